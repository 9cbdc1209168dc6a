"""A constant factor every reader of an adjoint applies, applied once where it is made.

``value_bar_1 = 1.0 / scale`` read only as ``2.0 * value_bar_1 * e1``,
``2.0 * value_bar_1 * e2``, ... (the adjoints of squares) becomes
``value_bar_1 = 2.0 / scale`` read as ``value_bar_1 * e1``: one multiply instead of
one per reader. Only a power of two moves, whose products are exact (outside
overflow and underflow), so the gradient keeps its bits; and only into an adjoint
made by one statement.
"""

from __future__ import annotations

from collections import Counter
from dataclasses import replace

from gradwright.calculus.algebra import number, power_of_two, simplify
from gradwright.ir import (
    AdjointAssign,
    Apply,
    Bar,
    Expr,
    ReverseStmt,
    ReverseSweep,
    Var,
    const,
    walk,
)
from gradwright.sweeps.optimize import (
    all_statements,
    map_statements,
    map_sweep,
    statement_exprs,
    written_bars,
)


def fold_scales(sweep: ReverseSweep) -> ReverseSweep:
    flat = list(all_statements(sweep.statements))
    writes: Counter[Var] = Counter(v for s in flat for v in written_bars(s))
    reads: Counter[Var] = Counter(
        node.var
        for s in flat
        for e in statement_exprs(s)
        for node in walk(e)
        if isinstance(node, Bar)
    )
    scaled: dict[Var, list[float]] = {}
    map_sweep(sweep, lambda e: _scan(e, scaled))  # what map_sweep rewrites
    keep = set(sweep.wrt) | set(sweep.seeds)
    factors: dict[Var, float] = {}
    for stmt in flat:
        if not isinstance(stmt, AdjointAssign) or stmt.accumulate:
            continue
        var = stmt.var
        found = scaled.get(var, [])
        if (
            var.kind == "temp"
            and var.shape == "scalar"
            and var not in keep
            and writes[var] == 1
            and found
            and len(found) == reads[var]
            and len(set(found)) == 1
        ):
            factors[var] = found[0]
    if not factors:
        return sweep
    sweep = map_sweep(sweep, lambda e: _unscale(e, factors))
    statements = map_statements(
        sweep.statements, lambda stmt: _scale_definition(stmt, factors)
    )
    return replace(sweep, statements=statements)


def _scaled_read(node: Expr) -> tuple[float, Var] | None:
    """``c * v_bar`` with c a power of two other than 1: (c, v)."""
    if isinstance(node, Apply) and node.op == "mul":
        c, bar = node.args
        n = number(c)
        if n is not None and n != 1 and power_of_two(n) and isinstance(bar, Bar):
            return float(n), bar.var
    return None


def _scan(expr: Expr, scaled: dict[Var, list[float]]) -> Expr:
    for node in walk(expr):
        read = _scaled_read(node)
        if read is not None:
            scaled.setdefault(read[1], []).append(read[0])
    return expr


def _unscale(expr: Expr, factors: dict[Var, float]) -> Expr:
    if not isinstance(expr, Apply):
        return expr
    read = _scaled_read(expr)
    if read is not None and read[1] in factors:
        return Bar(read[1])
    return Apply(expr.op, tuple(_unscale(a, factors) for a in expr.args))


def _scale_definition(stmt: ReverseStmt, factors: dict[Var, float]) -> ReverseStmt:
    if isinstance(stmt, AdjointAssign) and stmt.var in factors:
        c = Apply("mul", (const(factors[stmt.var]), stmt.expr))
        return replace(stmt, expr=simplify(c))
    return stmt
