"""Adjoints known to be zero, read as the zero they are.

A value a loop overwrites before the next iteration reads it (a Newton step's
residual, read again only by the loop's test) has an adjoint that every iteration
sets back to 0.0 and that the next iteration starts from: ``err_bar_1 = err_bar``,
``err_bar_1 += shift_bar_1``, ..., ``err_bar = 0.0``. Where every write of an
adjoint is ``= 0.0`` or adds or copies only such adjoints (a carried adjoint that
nothing else ever adds to), each read of it is 0.0 and the writes go; then
``x_bar = 0.0`` followed in its block by ``x_bar += e``, with nothing reading
``x_bar`` between, is ``x_bar = e``. Scalar adjoints of scalar models only (an
array adjoint set from another would share its array). Exact: only additions of
zero are left out.
"""

from __future__ import annotations

from collections import defaultdict
from dataclasses import replace

from gradwright.calculus.algebra import is_zero, simplify
from gradwright.ir import (
    AdjointAssign,
    Apply,
    Bar,
    ElementAdjoint,
    ReverseBranch,
    ReverseLoop,
    ReverseStmt,
    ReverseSweep,
    SpreadAdjoint,
    Var,
    const,
    walk,
)
from gradwright.sweeps.optimize import (
    all_statements,
    map_statements,
    map_sweep,
    statement_exprs,
    substitute,
    written_bars,
)


def settle_zeros(sweep: ReverseSweep) -> ReverseSweep:
    """Adjoints only ever set to 0.0 read as 0.0; ``x_bar = 0.0; x_bar += e``
    is ``x_bar = e``."""
    keep = set(sweep.wrt) | set(sweep.seeds)
    # reading one zero adjoint as 0.0 can leave another set only to 0.0
    while zero := _only_zero(sweep, keep):
        sweep = _read_as_zero(sweep, zero)
    return replace(sweep, statements=_merge_zero_starts(sweep.statements, False))


def sink_copies(sweep: ReverseSweep) -> ReverseSweep:
    """``t_bar = e`` then, right after it, ``v_bar = t_bar`` (a carried
    adjoint's hand-over at the end of an iteration) is ``v_bar = e`` when every
    read of ``t_bar`` is such a copy; ``v_bar = v_bar`` goes, and so do the
    writes of ``t_bar`` nothing reads.
    A max fold's sides were ``largest_bar_1 = 0.0; ...; largest_bar =
    largest_bar_1`` and ``largest_bar_1 = largest_bar; largest_bar =
    largest_bar_1``."""
    keep = set(sweep.wrt) | set(sweep.seeds) | {carry for carry, _ in sweep.carries}
    reads: defaultdict[Var, int] = defaultdict(int)
    writes: defaultdict[Var, int] = defaultdict(int)
    for stmt in all_statements(sweep.statements):
        for e in statement_exprs(stmt):
            for n in walk(e):
                if isinstance(n, Bar):
                    reads[n.var] += 1
        for var in written_bars(stmt):
            writes[var] += 1
    movable = {v for v in writes if v not in keep and v.shape == "scalar"}
    # every read of the adjoint must be one such copy (the sides of a branch
    # each have theirs); its other writes are then read by nothing and go
    pairs: defaultdict[Var, int] = defaultdict(int)
    _sink_block(sweep.statements, movable, pairs)
    movable = {v for v in movable if pairs[v] == reads[v]}
    if not movable:
        return sweep
    statements = _sink_block(sweep.statements, movable, pairs)
    return replace(sweep, statements=map_statements(statements, _unread(movable)))


def _unread(movable: set[Var]):  # noqa: ANN202
    def keep(stmt: ReverseStmt) -> ReverseStmt | None:
        if isinstance(stmt, AdjointAssign) and stmt.var in movable:
            return None  # a write whose every read was a copy now sunk
        return stmt

    return keep


def _sink_block(
    statements: tuple[ReverseStmt, ...],
    movable: set[Var],
    pairs: defaultdict[Var, int],
    side: bool = False,
) -> tuple[ReverseStmt, ...]:
    """``side``: a branch's side, where the pairs are looked for (a copy at a
    loop's start or end names the adjoint the loop carries: the namer keeps it)."""
    out: list[ReverseStmt | None] = []
    # the place of the statement before, when it is a movable adjoint's plain
    # write: the copy must follow right after it (a carried adjoint and the value
    # it carries print under one name, so moving a write past others may change
    # what a reader sees, and the line would leave its statement's comment)
    made: int | None = None
    for stmt in statements:
        if isinstance(stmt, ReverseBranch):
            stmt = replace(
                stmt,
                then=_sink_block(stmt.then, movable, pairs, True),
                orelse=_sink_block(stmt.orelse, movable, pairs, True),
            )
        elif isinstance(stmt, ReverseLoop):
            stmt = replace(stmt, body=_sink_block(stmt.body, movable, pairs))
        first = out[made] if made is not None else None
        if (
            side
            and isinstance(first, AdjointAssign)
            and isinstance(stmt, AdjointAssign)
            and not stmt.accumulate
            and stmt.expr == Bar(first.var)
        ):
            pairs[first.var] += 1
            out[made] = None  # type: ignore[index]
            if first.expr != Bar(stmt.var):  # v_bar = v_bar changes nothing
                out.append(replace(first, var=stmt.var))
            made = None
            continue
        movable_write = (
            isinstance(stmt, AdjointAssign)
            and not stmt.accumulate
            and stmt.var in movable
        )
        made = len(out) if movable_write else None
        out.append(stmt)
    return tuple(s for s in out if s is not None)


def _read_as_zero(sweep: ReverseSweep, zero: set[Var]) -> ReverseSweep:
    zeros = {v: const(0.0) for v in zero}
    sweep = map_sweep(sweep, lambda e: simplify(substitute(e, zeros)))
    return replace(
        sweep, statements=map_statements(sweep.statements, lambda s: _kept(s, zero))
    )


def _kept(stmt: ReverseStmt, zero: set[Var]) -> ReverseStmt | None:
    """None for a write of a zero adjoint, and for adding 0.0 to any."""
    if isinstance(stmt, AdjointAssign) and (
        stmt.var in zero or (stmt.accumulate and is_zero(stmt.expr))
    ):
        return None
    added = isinstance(stmt, SpreadAdjoint) or (
        isinstance(stmt, ElementAdjoint) and stmt.accumulate
    )
    if added and is_zero(stmt.expr):
        return None
    return stmt


def _only_zero(sweep: ReverseSweep, keep: set[Var]) -> set[Var]:
    """The scalar adjoints that stay 0.0: each of their writes is zero when they
    all are (``= 0.0``, or a copy or multiple of another such adjoint, as a
    loop-carried adjoint that nothing but its own copies ever adds to).

    The largest such set: an adjoint is taken out when one of its writes may be
    nonzero, and the writes reading it are looked at again.
    """
    writes = [(v, s) for s in all_statements(sweep.statements) for v in written_bars(s)]
    candidates = {v for v, _ in writes if v.shape == "scalar" and v not in keep}
    reads = [_bars(stmt) for _, stmt in writes]
    readers: dict[Var, list[int]] = defaultdict(list)
    for k, bars in enumerate(reads):
        for bar in bars:
            readers[bar].append(k)
    nonzero: set[Var] = set()
    pending = list(range(len(writes)))
    while pending:
        k = pending.pop()
        var, stmt = writes[k]
        if var not in candidates or var in nonzero:
            continue
        zeros = {
            b: const(0.0) for b in reads[k] if b in candidates and b not in nonzero
        }
        if (
            not isinstance(stmt, AdjointAssign)
            or (reads[k] and not zeros)  # reads only adjoints that may be nonzero
            or not is_zero(simplify(substitute(stmt.expr, zeros)))
        ):
            nonzero.add(var)
            pending.extend(readers[var])
    return candidates - nonzero


def merge_zero_starts(sweep: ReverseSweep) -> ReverseSweep:
    """``x_bar = 0.0`` or ``x_bar = y_bar`` then ``x_bar += e`` in one block,
    nothing reading ``x_bar`` or changing ``y_bar`` between, is ``x_bar = e`` or
    ``x_bar = y_bar + e`` where the ``+=`` was."""
    return replace(sweep, statements=_merge_zero_starts(sweep.statements, True))


def _bars(stmt: ReverseStmt) -> set[Var]:
    return {
        n.var
        for inner in all_statements([stmt])
        for e in statement_exprs(inner)
        for n in walk(e)
        if isinstance(n, Bar)
    }


def _merge_zero_starts(
    statements: tuple[ReverseStmt, ...], copies: bool
) -> tuple[ReverseStmt, ...]:
    # copies: not before the kinks branch (a copy merged with a select's
    # contribution would keep that select out of the branch)
    out: list[ReverseStmt | None] = []
    # scalar adjoint set by a plain assignment -> its place in out
    pending: dict[Var, int] = {}
    # an adjoint a pending start reads (``x_bar = y_bar``) -> those starts' adjoints:
    # a write ends only them (looking at every pending start at each statement
    # made a long sweep quadratic)
    watchers: defaultdict[Var, set[Var]] = defaultdict(set)

    def drop(var: Var) -> int:
        place = pending.pop(var)
        for bar in _bars(out[place]):  # type: ignore[arg-type]
            watchers[bar].discard(var)
        return place

    for stmt in statements:
        if isinstance(stmt, ReverseBranch):
            stmt = replace(
                stmt,
                then=_merge_zero_starts(stmt.then, copies),
                orelse=_merge_zero_starts(stmt.orelse, copies),
            )
        elif isinstance(stmt, ReverseLoop):
            stmt = replace(stmt, body=_merge_zero_starts(stmt.body, copies))
        reads = _bars(stmt)
        if (
            isinstance(stmt, AdjointAssign)
            and stmt.accumulate
            and stmt.var in pending
            and stmt.var not in reads
        ):
            place = drop(stmt.var)
            first = out[place]
            assert isinstance(first, AdjointAssign)
            expr = stmt.expr
            if not is_zero(first.expr):
                expr = simplify(Apply("add", (first.expr, expr)))
            out[place] = None
            out.append(replace(stmt, expr=expr, accumulate=False))
            continue
        written = {w for inner in all_statements([stmt]) for w in written_bars(inner)}
        # read or changed (inside a branch or loop too), or reading what changes
        ended = (reads | written) & pending.keys()
        ended.update(v for w in written for v in watchers.get(w, ()))
        for var in ended:
            drop(var)
        if (
            isinstance(stmt, AdjointAssign)
            and not stmt.accumulate
            and stmt.var.shape == "scalar"
            # a zero or a carried adjoint's copy: merged, the line still reads
            # as the contribution of the statement it is under
            and (is_zero(stmt.expr) or (copies and isinstance(stmt.expr, Bar)))
        ):
            if stmt.var in pending:
                drop(stmt.var)
            pending[stmt.var] = len(out)
            for bar in _bars(stmt):
                watchers[bar].add(stmt.var)
        out.append(stmt)
    return tuple(s for s in out if s is not None)
