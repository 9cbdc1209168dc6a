"""Adjoints known to be zero, read as the zero they are.

A value a loop overwrites before the next iteration reads it (a Newton step's
residual, read again only by the loop's test) has an adjoint that every iteration
sets back to 0.0 and that the next iteration starts from: ``err_bar_1 = err_bar``,
``err_bar_1 += shift_bar_1``, ..., ``err_bar = 0.0``. Where every write of an
adjoint is ``= 0.0``, each read of it is 0.0 and the writes go; then
``x_bar = 0.0`` followed in its block by ``x_bar += e``, with nothing reading
``x_bar`` between, is ``x_bar = e``. Scalar adjoints of scalar models only (an
array adjoint set from another would share its array). Exact: only additions of
zero are left out.
"""

from __future__ import annotations

from collections import Counter
from dataclasses import replace

from gradwright.calculus.algebra import is_zero, simplify
from gradwright.ir import (
    AdjointAssign,
    Bar,
    Const,
    ReverseBranch,
    ReverseLoop,
    ReverseStmt,
    ReverseSweep,
    Var,
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
    flat = list(all_statements(sweep.statements))
    writes: Counter[Var] = Counter(v for s in flat for v in written_bars(s))
    zero_writes: Counter[Var] = Counter(
        s.var
        for s in flat
        if isinstance(s, AdjointAssign) and not s.accumulate and is_zero(s.expr)
    )
    keep = set(sweep.wrt) | set(sweep.seeds)
    zero = {
        v
        for v, n in zero_writes.items()
        if n == writes[v] and v.shape == "scalar" and v not in keep
    }
    if zero:
        zeros = {v: Const("0.0", 0.0) for v in zero}
        sweep = map_sweep(sweep, lambda e: simplify(substitute(e, zeros)))
        statements = map_statements(
            sweep.statements,
            lambda s: None if isinstance(s, AdjointAssign) and s.var in zero else s,
        )
        sweep = replace(sweep, statements=statements)
    return merge_zero_starts(sweep)


def merge_zero_starts(sweep: ReverseSweep) -> ReverseSweep:
    """``x_bar = 0.0`` then ``x_bar += e`` (nothing reading it between) is
    ``x_bar = e``."""
    return replace(sweep, statements=_merge_zero_starts(sweep.statements))


def _merge_zero_starts(statements: tuple[ReverseStmt, ...]) -> tuple[ReverseStmt, ...]:
    """``x_bar = 0.0`` then, in the same block with no read of ``x_bar`` between,
    ``x_bar += e``: one ``x_bar = e`` where the ``+=`` was."""
    out: list[ReverseStmt | None] = []
    pending: dict[Var, int] = {}  # scalar adjoint set to 0.0 -> its place in out
    for stmt in statements:
        if isinstance(stmt, ReverseBranch):
            stmt = replace(
                stmt,
                then=_merge_zero_starts(stmt.then),
                orelse=_merge_zero_starts(stmt.orelse),
            )
        elif isinstance(stmt, ReverseLoop):
            stmt = replace(stmt, body=_merge_zero_starts(stmt.body))
        reads = {
            n.var
            for inner in all_statements([stmt])
            for e in statement_exprs(inner)
            for n in walk(e)
            if isinstance(n, Bar)
        }
        simple_add = (
            isinstance(stmt, AdjointAssign)
            and stmt.accumulate
            and stmt.var in pending
            and stmt.var not in reads
        )
        if simple_add:
            assert isinstance(stmt, AdjointAssign)
            out[pending.pop(stmt.var)] = None
            out.append(replace(stmt, accumulate=False))
            continue
        nested = isinstance(stmt, (ReverseBranch, ReverseLoop))
        written = {w for inner in all_statements([stmt]) for w in written_bars(inner)}
        for var in list(pending):
            if var in reads or var in written:
                del pending[var]  # read or changed (inside a branch or loop too)
        if (
            isinstance(stmt, AdjointAssign)
            and not stmt.accumulate
            and stmt.var.shape == "scalar"
            and is_zero(stmt.expr)
            and not nested
        ):
            pending[stmt.var] = len(out)
        out.append(stmt)
    return tuple(s for s in out if s is not None)
