"""Clean-up of the reverse sweep before it is laid out.

Adjoints that are a single atom, and adjoints of compiler temporaries read once, are
substituted into their use instead of being stored; a carried adjoint assigned to
itself disappears. Reading forward values instead of recomputing them is
``common.py``'s; the forward sweep's folding is decided in ``layout.py``.
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Callable, Iterable, Iterator
from dataclasses import replace

from gradwright.calculus.algebra import number, simplify, split_sign
from gradwright.ir import (
    AdjointAssign,
    Apply,
    Bar,
    CallAdjoint,
    Const,
    ElementAdjoint,
    Expr,
    Let,
    PopAdjoint,
    ReverseBranch,
    ReverseLoop,
    ReverseStmt,
    ReverseSweep,
    SpreadAdjoint,
    Stmt,
    Var,
    const,
    walk,
)


def substitute(expr: Expr, bars: dict[Var, Expr]) -> Expr:
    if isinstance(expr, Bar):
        return bars.get(expr.var, expr)
    if isinstance(expr, Apply):
        return Apply(expr.op, tuple(substitute(a, bars) for a in expr.args))
    return expr


def _flatten(statements: Iterable[ReverseStmt]) -> Iterator[ReverseStmt]:
    for stmt in statements:
        yield stmt
        if isinstance(stmt, ReverseBranch):
            yield from _flatten(stmt.then)
            yield from _flatten(stmt.orelse)
        elif isinstance(stmt, ReverseLoop):
            yield from _flatten(stmt.body)


def _exprs(stmt: ReverseStmt) -> tuple[Expr, ...]:
    if isinstance(stmt, AdjointAssign):
        return (stmt.expr,)
    if isinstance(stmt, ElementAdjoint):
        return (stmt.index, stmt.expr)
    if isinstance(stmt, SpreadAdjoint):
        return (stmt.expr,)
    if isinstance(stmt, CallAdjoint):
        return (*stmt.args, stmt.seed)
    if isinstance(stmt, ReverseBranch):
        return (stmt.condition,)
    return ()


#: the expressions one statement evaluates (not those of nested blocks)
statement_exprs = _exprs


def _reads_list_adjoint(expr: Expr) -> bool:
    # a list adjoint changes in place: reading it must stay where it is
    return any(isinstance(n, Bar) and n.var.shape == "list" for n in walk(expr))


def _written_bars(stmt: ReverseStmt) -> set[Var]:
    """The scalar adjoints a statement writes."""
    if isinstance(stmt, AdjointAssign):
        return {stmt.var}
    if isinstance(stmt, CallAdjoint):
        return set(stmt.parts)
    if isinstance(stmt, PopAdjoint) and stmt.var is not None:
        return {stmt.var}
    return set()


#: the scalar adjoints one statement writes
written_bars = _written_bars


def _bars_read(stmt: ReverseStmt) -> set[Var]:
    return {n.var for e in _exprs(stmt) for n in walk(e) if isinstance(n, Bar)}


def _can_pass(moved: ReverseStmt, between: list[ReverseStmt]) -> bool:
    """Whether ``moved`` (an ``+=`` or ``=``, into a number's adjoint or a list
    adjoint's element) can move past ``between``, statements of its own source
    statement: none reads or sets what it writes, none changes what it reads; an
    ``+=`` into any list element commutes with it."""
    if not between:
        return True  # (a long sum's adjoint grows by one term per statement)
    reads = _bars_read(moved)
    for stmt in between:
        if stmt.origin != moved.origin or not isinstance(
            stmt, (AdjointAssign, ElementAdjoint)
        ):
            return False
        if _written_bars(stmt) & reads:
            return False
        if isinstance(moved, AdjointAssign):
            if moved.var in _written_bars(stmt) | _bars_read(stmt):
                return False
        elif _reads_list_adjoint_stmt(stmt) or (
            isinstance(stmt, ElementAdjoint) and not stmt.accumulate
        ):
            return False
    return True


def _reads_list_adjoint_stmt(stmt: ReverseStmt) -> bool:
    return any(_reads_list_adjoint(e) for e in _exprs(stmt))


def _same_target(first: ReverseStmt, stmt: ReverseStmt) -> bool:
    if isinstance(stmt, AdjointAssign):
        return (
            isinstance(first, AdjointAssign)
            and first.var == stmt.var
            and stmt.var.shape == "scalar"
            and not any(n == Bar(stmt.var) for n in walk(stmt.expr))
        )
    return (
        isinstance(stmt, ElementAdjoint)
        and isinstance(first, ElementAdjoint)
        and (first.root, first.index) == (stmt.root, stmt.index)
        and not _reads_list_adjoint(stmt.expr)
    )


def _factors(expr: Expr) -> list[Expr]:
    """The factors of a product chain ``a * b * c`` (a quotient is one factor)."""
    if isinstance(expr, Apply) and expr.op == "mul":
        return _factors(expr.args[0]) + _factors(expr.args[1])
    return [expr]


#: the factors of a product chain
product_factors = _factors


def _product_of(factors: list[Expr]) -> Expr:
    out = factors[0] if factors else const(1.0)
    for factor in factors[1:]:
        out = Apply("mul", (out, factor))
    return out


def _with_sign(negative: bool, expr: Expr) -> Expr:
    return Apply("neg", (expr,)) if negative else expr


def _sum_factored(a: Expr, b: Expr) -> Expr:
    """``a + b`` with a factor common to both terms taken out once, as a person
    writes it: ``g * x - g * y`` is ``g * (x - y)`` (reassociated: may differ in
    the last bit from the term-by-term sum)."""
    a, b = simplify(a), simplify(b)
    if a == b:  # 2.0 * x, from simplify
        return simplify(Apply("add", (a, b)))
    a_negative, a_magnitude = split_sign(a)
    b_negative, b_magnitude = split_sign(b)
    left, right = _factors(a_magnitude), _factors(b_magnitude)
    for k, factor in enumerate(left):
        if number(factor) is None and factor in right:
            rest_a = _product_of(left[:k] + left[k + 1 :])
            others = list(right)
            others.remove(factor)
            rest_b = _product_of(others)
            inner = Apply(
                "add", (_with_sign(a_negative, rest_a), _with_sign(b_negative, rest_b))
            )
            return simplify(Apply("mul", (factor, inner)))
    return simplify(Apply("add", (a, b)))


def _merge_adjacent(statements: tuple[ReverseStmt, ...]) -> tuple[ReverseStmt, ...]:
    """``x_bar = a`` (or ``+= a``), ``x_bar += b`` from one source statement:
    ``x_bar = a + b`` where the second is, when the first can move there;
    likewise for one element of a list adjoint (``u_bar[i] += a - 2.0 * b``), so
    each adjoint gets one ``+=`` per source statement."""
    out: list[ReverseStmt] = []
    for stmt in statements:
        if isinstance(stmt, ReverseBranch):
            stmt = replace(
                stmt,
                then=_merge_adjacent(stmt.then),
                orelse=_merge_adjacent(stmt.orelse),
            )
        elif isinstance(stmt, ReverseLoop):
            stmt = replace(stmt, body=_merge_adjacent(stmt.body))
        if (
            isinstance(stmt, (AdjointAssign, ElementAdjoint))
            and stmt.accumulate
            and not _reads_list_adjoint(stmt.expr)
        ):
            for at in range(len(out) - 1, -1, -1):
                first = out[at]
                if first.origin != stmt.origin:
                    break
                if not _same_target(first, stmt):
                    continue
                if _can_pass(first, out[at + 1 :]):
                    merged = _sum_factored(first.expr, stmt.expr)  # type: ignore[union-attr]
                    del out[at]
                    stmt = replace(first, expr=merged)
                break
        out.append(stmt)
    return tuple(out)


def inline_adjoints(sweep: ReverseSweep) -> ReverseSweep:
    """Single-use temporaries and copies (or negations) of one adjoint written
    into their readers."""
    flat = list(_flatten(sweep.statements))
    writes = Counter(s.var for s in flat if isinstance(s, AdjointAssign))
    reads = Counter(
        node.var
        for s in flat
        for e in _exprs(s)
        for node in walk(e)
        if isinstance(node, Bar)
    )
    keep = set(sweep.wrt)
    # an adjoint a pop writes is a statement of its own, never substituted
    keep |= {s.var for s in flat if isinstance(s, PopAdjoint) and s.var is not None}
    carries = dict(sweep.carries)
    # a loop value's start-of-iteration adjoint copied from a carried adjoint stays a
    # statement: the carried adjoints are all updated at the end of the body, and one
    # read there after another was updated would be wrong (`s, w = w, s`)
    headers = set(carries.values())
    # a loop's reverse restores its carried values into the names they share with
    # the value after the loop, so an adjoint reading that value stays a statement
    # where it is made: substituted into a use past the reverse loop, it would read
    # whatever the last restore left in the name
    restored = {
        phi.exit
        for s in flat
        if isinstance(s, ReverseLoop)
        for phi in s.loop.carried
        if phi.exit is not None
    }
    inlined: dict[Var, Expr] = {}

    def block(statements: tuple[ReverseStmt, ...]) -> tuple[ReverseStmt, ...]:
        out: list[ReverseStmt] = []
        for stmt in statements:
            if isinstance(stmt, AdjointAssign):
                expr = simplify(substitute(stmt.expr, inlined))
                var = stmt.var
                if expr == Bar(var) and not stmt.accumulate:
                    continue  # a carried adjoint that stayed as it was
                # a negated atom too: ``-(-a) * b`` then simplifies to ``a * b``
                atom = isinstance(expr, (Var, Const, Bar)) or (
                    isinstance(expr, Apply)
                    and expr.op == "neg"
                    and isinstance(expr.args[0], (Var, Const, Bar))
                )
                # the negated atom's too: -z_bar read after z_bar's update was wrong
                bare = expr.args[0] if isinstance(expr, Apply) and atom else expr
                carried = isinstance(bare, Bar) and bare.var in carries
                if (
                    var not in keep
                    and not (var in headers and carried)
                    and writes[var] == 1
                    and not _reads_list_adjoint(expr)
                    and (atom or (var.kind == "temp" and reads[var] == 1))
                    and not any(node in restored for node in walk(expr))
                ):
                    inlined[var] = expr
                    continue
                out.append(AdjointAssign(var, expr, stmt.accumulate, stmt.origin))
            elif isinstance(stmt, ElementAdjoint):
                out.append(
                    ElementAdjoint(
                        stmt.root,
                        substitute(stmt.index, inlined),
                        simplify(substitute(stmt.expr, inlined)),
                        stmt.accumulate,
                        stmt.origin,
                    )
                )
            elif isinstance(stmt, SpreadAdjoint):
                out.append(replace(stmt, expr=simplify(substitute(stmt.expr, inlined))))
            elif isinstance(stmt, CallAdjoint):
                out.append(
                    replace(
                        stmt,
                        args=tuple(substitute(a, inlined) for a in stmt.args),
                        seed=simplify(substitute(stmt.seed, inlined)),
                    )
                )
            elif isinstance(stmt, PopAdjoint):
                out.append(stmt)
            elif isinstance(stmt, ReverseBranch):
                then, orelse = block(stmt.then), block(stmt.orelse)
                if then or orelse:
                    out.append(replace(stmt, then=then, orelse=orelse))
            else:
                body = block(stmt.body)
                if body:
                    out.append(ReverseLoop(stmt.loop, body, stmt.origin))
        return tuple(out)

    statements = _merge_adjacent(block(sweep.statements))
    return replace(sweep, statements=_into_arguments(statements, keep))


def _into_arguments(
    statements: tuple[ReverseStmt, ...], keep: set[Var]
) -> tuple[ReverseStmt, ...]:
    """``x_1_bar, ... = h_adjoint(...)`` then ``x_bar = x_1_bar``: the call
    writes ``x_bar`` itself (the part was read only by that copy, and no
    statement between them reads or writes ``x_bar`` or the part: a loop's carried state
    handed on after a list element's ``+=``; the layout's carried-adjoint naming
    sees a call's writes, see ``layout_names._writes``)."""
    flat = list(_flatten(statements))
    reads = Counter(
        node.var
        for s in flat
        for e in _exprs(s)
        for node in walk(e)
        if isinstance(node, Bar)
    )
    out: list[ReverseStmt] = []
    call: int | None = None  # where in ``out`` the last call adjoint is
    between: list[ReverseStmt] = []  # what follows it, of its statement
    for stmt in statements:
        if isinstance(stmt, ReverseBranch):
            stmt = replace(
                stmt,
                then=_into_arguments(stmt.then, keep),
                orelse=_into_arguments(stmt.orelse, keep),
            )
        elif isinstance(stmt, ReverseLoop):
            stmt = replace(stmt, body=_into_arguments(stmt.body, keep))
        if isinstance(stmt, CallAdjoint):
            call = len(out)
            between = []
            out.append(stmt)
            continue
        if (
            call is not None
            and isinstance(stmt, AdjointAssign)
            and not stmt.accumulate
            and isinstance(stmt.expr, Bar)
        ):
            found: CallAdjoint = out[call]  # type: ignore[assignment]
            part = stmt.expr.var
            if (
                part in found.parts
                and reads[part] == 1
                and stmt.var not in found.parts
                and stmt.var.shape == part.shape
                # (a list element's += in between may not read or write either:
                # x_1_bar += y_bar would go to a name nobody reads)
                and not any(mentions(s, stmt.var) or mentions(s, part) for s in between)
            ):
                parts = tuple(stmt.var if p == part else p for p in found.parts)
                out[call] = replace(found, parts=parts)
                continue
        if not isinstance(stmt, (AdjointAssign, ElementAdjoint, SpreadAdjoint)):
            call = None  # (a block: what runs in it is not known here)
        between.append(stmt)
        out.append(stmt)
    return tuple(out)


def mentions(stmt: ReverseStmt, var: Var) -> bool:
    """Whether ``stmt`` (or a statement inside it) reads or writes ``var``'s
    adjoint (a list adjoint through an element or spread write too)."""
    return any(
        var == getattr(s, "root", None) or var in _written_bars(s) | _bars_read(s)
        for s in _flatten([stmt])
    )


def map_statements(
    statements: tuple[ReverseStmt, ...],
    change: Callable[[ReverseStmt], ReverseStmt | None],
) -> tuple[ReverseStmt, ...]:
    """``change`` applied to every statement that is not a block (None drops
    it); branches and loops are rebuilt around their changed bodies, and go
    when nothing is left in them; a branch whose sides are the same statements
    is those statements (the test decides nothing)."""
    out: list[ReverseStmt] = []
    for stmt in statements:
        changed: ReverseStmt | None
        if isinstance(stmt, ReverseBranch):
            then = map_statements(stmt.then, change)
            orelse = map_statements(stmt.orelse, change)
            if then == orelse:
                out.extend(then)
                continue
            changed = replace(stmt, then=then, orelse=orelse)
        elif isinstance(stmt, ReverseLoop):
            body = map_statements(stmt.body, change)
            changed = replace(stmt, body=body) if body else None
        else:
            changed = change(stmt)
        if changed is not None:
            out.append(changed)
    return tuple(out)


def change_expr(stmt: ReverseStmt, change: Callable[[Expr], Expr]) -> ReverseStmt:
    """``stmt`` with ``change`` applied to the contribution it makes."""
    if isinstance(stmt, (AdjointAssign, ElementAdjoint, SpreadAdjoint)):
        return replace(stmt, expr=change(stmt.expr))
    if isinstance(stmt, CallAdjoint):
        return replace(stmt, seed=change(stmt.seed))
    return stmt


def map_sweep(sweep: ReverseSweep, change: Callable[[Expr], Expr]) -> ReverseSweep:
    """The sweep with ``change`` applied to each adjoint contribution."""
    return replace(
        sweep,
        statements=map_statements(
            sweep.statements, lambda stmt: change_expr(stmt, change)
        ),
    )


def all_statements(statements: Iterable[ReverseStmt]) -> Iterator[ReverseStmt]:
    """Every statement of a reverse sweep, nested blocks included."""
    return _flatten(statements)


def sweep_exprs(statements: Iterable[ReverseStmt]) -> Iterator[Expr]:
    """Every expression of a reverse sweep, nested blocks included."""
    for stmt in _flatten(statements):
        yield from _exprs(stmt)


def drop_dead_zeroing(sweep: ReverseSweep) -> ReverseSweep:
    """``v_bar[k] = 0.0`` with nothing reading ``v_bar`` after it: the reverse of
    the first element writes of a list made in the function (``v[0] = left``),
    whose adjoint is not returned. Inside loops the zero is read by the next
    iteration; only the function's own top-level statements are looked at."""
    roots = dict(sweep.roots)
    live = {roots.get(v, v) for v in sweep.wrt if v.shape == "list"}
    out: list[ReverseStmt] = []
    for stmt in reversed(sweep.statements):
        if (
            isinstance(stmt, ElementAdjoint)
            and not stmt.accumulate
            and number(stmt.expr) == 0
            and roots.get(stmt.root, stmt.root) not in live
        ):
            continue
        for inner in _flatten([stmt]):
            for expr in _exprs(inner):
                live |= {
                    roots.get(n.var, n.var)
                    for n in walk(expr)
                    if isinstance(n, Bar) and n.var.shape == "list"
                }
            if isinstance(inner, (SpreadAdjoint, PopAdjoint)) or (
                isinstance(inner, ElementAdjoint)
                and (inner.accumulate or inner is not stmt)
            ):
                live.add(roots.get(inner.root, inner.root))
        out.append(stmt)
    return replace(sweep, statements=tuple(reversed(out)))


def _writes(stmt: ReverseStmt) -> set[Var]:
    """The adjoints a statement of a block writes, nested blocks included (a list
    adjoint by its root)."""
    written: set[Var] = set()
    for inner in _flatten([stmt]):
        if isinstance(inner, AdjointAssign):
            written.add(inner.var)
        elif isinstance(inner, (ElementAdjoint, SpreadAdjoint)):
            written.add(inner.root)
        elif isinstance(inner, PopAdjoint):
            written |= {inner.root} | ({inner.var} if inner.var else set())
        elif isinstance(inner, CallAdjoint):
            written |= set(inner.parts)
    return written


def _bars(expr: Expr) -> set[Var]:
    return {n.var for n in walk(expr) if isinstance(n, Bar)}


def tuple_seeds(sweep: ReverseSweep, sizes: dict[Var, int]) -> ReverseSweep:
    """``p_bar = [0.0] * 2``, ``p_bar[1] += y_bar``, ``p_bar[0] += x_bar``, then
    ``h_adjoint(..., seed=p_bar)``: the seed is ``(x_bar, y_bar)``, no list made.

    For a helper's tuple result whose adjoint list nothing else touches: each
    element's contributions (constant indices, summed in their order) move to the
    call, which they reach in the same block past statements that write none of
    the adjoints they read (no loop or branch between: a loop's reverse restores
    forward values into shared names)."""
    flat = list(_flatten(sweep.statements))
    touching: Counter[Var] = Counter()
    for stmt in flat:
        found: set[Var] = set()
        if isinstance(stmt, (ElementAdjoint, SpreadAdjoint, PopAdjoint)):
            found.add(stmt.root)
        for expr in _exprs(stmt):
            found |= {v for v in _bars(expr) if v in sizes}
        touching.update(found)
    moved = set(sweep.moved)
    made: set[Var] = set()

    def block(statements: tuple[ReverseStmt, ...]) -> tuple[ReverseStmt, ...]:
        out = list(statements)
        for at, stmt in enumerate(statements):
            if isinstance(stmt, ReverseBranch):
                out[at] = replace(
                    stmt, then=block(stmt.then), orelse=block(stmt.orelse)
                )
            elif isinstance(stmt, ReverseLoop):
                out[at] = replace(stmt, body=block(stmt.body))
        for at, stmt in enumerate(statements):
            if not isinstance(stmt, CallAdjoint) or not isinstance(stmt.seed, Bar):
                continue
            root = stmt.seed.var
            if root not in sizes or root in moved or root not in sweep.list_roots:
                continue
            parts = _seed_parts(statements[:at], root, sizes[root])
            if parts is None or touching[root] != len(parts[1]) + 1:
                continue
            elements, used = parts
            for k in used:
                out[k] = None  # type: ignore[call-overload]
            out[at] = replace(stmt, seed=Apply("seed_tuple", elements))
            made.add(root)
        return tuple(s for s in out if s is not None)

    statements = block(sweep.statements)
    if not made:
        return sweep
    roots = tuple(r for r in sweep.list_roots if r not in made)
    return replace(sweep, statements=statements, list_roots=roots)


def _seed_parts(
    before: tuple[ReverseStmt, ...], root: Var, size: int
) -> tuple[tuple[Expr, ...], list[int]] | None:
    """The elements of ``root``'s adjoint at the end of ``before`` (a block's
    statements up to a call that reads it), and the positions of the statements
    that make them; None unless they can move to the call."""
    contributions: list[tuple[int, int, Expr]] = []
    written: set[Var] = set()  # written after the contributions met so far
    for at in range(len(before) - 1, -1, -1):
        stmt = before[at]
        if isinstance(stmt, ElementAdjoint) and stmt.root == root:
            k = number(stmt.index)
            if (
                not stmt.accumulate
                or not isinstance(k, int)
                or isinstance(k, bool)
                or not 0 <= k < size
                or _reads_list_adjoint(stmt.expr)
                or _bars(stmt.expr) & written
            ):
                return None
            contributions.append((at, k, stmt.expr))
            continue
        if not isinstance(stmt, (AdjointAssign, ElementAdjoint)):
            break  # a loop, branch, call, pop or spread: the elements stop here
        written |= _writes(stmt)
    elements: list[Expr] = [const(0.0)] * size
    filled: list[Expr | None] = [None] * size
    for _, k, expr in reversed(contributions):  # in the sweep's order
        previous = filled[k]
        filled[k] = expr if previous is None else Apply("add", (previous, expr))
    for k, expr in enumerate(filled):
        if expr is not None:
            elements[k] = simplify(expr)
    return tuple(elements), [at for at, _, _ in contributions]


def spread_reads(sweep: ReverseSweep, body: tuple[Stmt, ...]) -> ReverseSweep:
    """``s = sum(ts)``'s reverse adds ``s_bar`` to every element of ``ts_bar``,
    then the reverse of each append pops its element: when nothing else touches
    ``ts_bar``, each pop reads ``s_bar`` itself and no adjoint list is made.

    The spreads (``each=False``, unconditional) are in the reverse of the block
    that makes the list (``body``, the function's), so one list's adjoint lives
    there (a list made before a loop and summed in it gathers every iteration's
    sums), and come before every statement holding a pop, in the sweep's order;
    ``s_bar`` is the adjoint of the sum's own value, final where its spread is
    (run before inlining). Scalar models only: an array adjoint read twice
    would be shared."""
    roots = dict(sweep.roots)
    kept = {roots.get(v, v) for v in sweep.wrt} | set(sweep.moved)
    touching: Counter[Var] = Counter()
    for stmt in _flatten(sweep.statements):
        found: set[Var] = set()
        if isinstance(stmt, (ElementAdjoint, SpreadAdjoint, PopAdjoint)):
            found.add(roots.get(stmt.root, stmt.root))
        for expr in _exprs(stmt):
            found |= {roots.get(v, v) for v in _bars(expr) if v.shape == "list"}
        touching.update(found)
    pops: Counter[Var] = Counter(
        roots.get(s.root, s.root)
        for s in _flatten(sweep.statements)
        if isinstance(s, PopAdjoint)
    )
    done: set[Var] = set()

    def block(
        statements: tuple[ReverseStmt, ...], forward: tuple[Stmt, ...]
    ) -> tuple[ReverseStmt, ...]:
        out = list(statements)
        for at, stmt in enumerate(statements):
            if isinstance(stmt, ReverseBranch):
                sides = (
                    (stmt.branch.then, stmt.branch.orelse) if stmt.branch else ((), ())
                )
                then, orelse = block(stmt.then, sides[0]), block(stmt.orelse, sides[1])
                out[at] = replace(stmt, then=then, orelse=orelse)
            elif isinstance(stmt, ReverseLoop):
                out[at] = replace(stmt, body=block(stmt.body, stmt.loop.body))
        made = {s.target for s in forward if isinstance(s, Let)}
        spreads: dict[Var, list[int]] = {}
        for at, stmt in enumerate(statements):
            if isinstance(stmt, SpreadAdjoint) and not stmt.each:
                spreads.setdefault(roots.get(stmt.root, stmt.root), []).append(at)
        for root, places in spreads.items():
            if root in kept or root not in sweep.list_roots or root not in made:
                continue
            last = places[-1]
            later = [
                s
                for s in statements[last + 1 :]
                for s in _flatten([s])
                if isinstance(s, PopAdjoint) and roots.get(s.root, s.root) == root
            ]
            if len(places) + pops[root] != touching[root] or len(later) != pops[root]:
                continue
            value: Expr | None = None
            for at in places:
                expr = statements[at].expr  # type: ignore[union-attr]
                value = expr if value is None else Apply("add", (value, expr))
                out[at] = None  # type: ignore[call-overload]
            for at in range(last + 1, len(out)):
                out[at] = _read_spread(out[at], root, value, roots)  # type: ignore[arg-type]
            done.add(root)
        return tuple(s for s in out if s is not None)

    statements = block(sweep.statements, body)
    if not done:
        return sweep
    list_roots = tuple(r for r in sweep.list_roots if r not in done)
    return replace(sweep, statements=statements, list_roots=list_roots)


def _read_spread(
    stmt: ReverseStmt, root: Var, value: Expr, roots: dict[Var, Var]
) -> ReverseStmt | None:
    """``stmt`` with each pop of ``root``'s adjoint reading ``value`` instead."""
    if isinstance(stmt, PopAdjoint) and roots.get(stmt.root, stmt.root) == root:
        if stmt.var is None:
            return None
        return AdjointAssign(stmt.var, value, stmt.accumulate, stmt.origin)
    if isinstance(stmt, ReverseBranch):
        then = _read_spreads(stmt.then, root, value, roots)
        orelse = _read_spreads(stmt.orelse, root, value, roots)
        return replace(stmt, then=then, orelse=orelse)
    if isinstance(stmt, ReverseLoop):
        return replace(stmt, body=_read_spreads(stmt.body, root, value, roots))
    return stmt


def _read_spreads(
    statements: tuple[ReverseStmt, ...], root: Var, value: Expr, roots: dict[Var, Var]
) -> tuple[ReverseStmt, ...]:
    changed = (_read_spread(s, root, value, roots) for s in statements)
    return tuple(s for s in changed if s is not None)
