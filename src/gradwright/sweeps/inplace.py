"""Which array adjoints a NumPy model's reverse sweep may change in place.

``x_bar += g`` adds into the array ``x_bar`` holds; that is right only when no
other name holds the same array. An adjoint qualifies when its shape is known to be
its value's (so the sum does not grow it), every write to it is at the top of the
sweep (no branch or loop decides which array it holds), its first write makes a
new array (arithmetic, a NumPy function, a matrix product: not a copy of another
name, a view or a helper's result) and no statement copies it into another name or
takes a view of it. Such an adjoint of a ``wrt`` parameter is also returned as it
is, without ``_gw_shaped`` making it an array of its own again.
"""

from __future__ import annotations

from dataclasses import replace

from gradwright.calculus.rules import ELEMENTWISE_OPS
from gradwright.ir import (
    AdjointAssign,
    Apply,
    Bar,
    CallAdjoint,
    ElementAdjoint,
    Expr,
    ReverseBranch,
    ReverseLoop,
    ReverseStmt,
    ReverseSweep,
    SpreadAdjoint,
    Var,
    walk,
)
from gradwright.sweeps.broadcasting import Fitter

#: ops whose result is a new array (or a number), never one of their operands
_FRESH = ELEMENTWISE_OPS | {
    "ifexp",
    "matmul",
    "np.matmul",
    "np.dot",
    "np.outer",
    "np.sum",
    "np.einsum",
    "lt",
    "le",
    "gt",
    "ge",
    "eq",
    "ne",
}
#: ops whose result may be (a view of) an operand
_VIEWS = frozenset(
    {
        "T",
        "reshape",
        "np.reshape",
        "npindex",
        "copy",
        "np.broadcast_to",
        "np.expand_dims",
        "np.transpose",
        "_gw_unbroadcast",
        "_gw_unreduce",
        "_gw_unmean",
        "_gw_shaped",
    }
)


def _aliases(expr: Expr) -> set[Var]:
    """Adjoints whose array ``expr`` may be, or be a view of."""
    if isinstance(expr, Bar):
        return {expr.var}
    if isinstance(expr, Apply) and (expr.op in _VIEWS or expr.op not in _FRESH):
        return {v for a in expr.args for v in _aliases(a)}
    return set()


def _statements(stmt: ReverseStmt) -> list[ReverseStmt]:
    if isinstance(stmt, ReverseBranch):
        return [*stmt.then, *stmt.orelse]
    if isinstance(stmt, ReverseLoop):
        return list(stmt.body)
    return []


def plan_in_place(sweep: ReverseSweep, fitter: Fitter) -> ReverseSweep:
    top: dict[Var, list[AdjointAssign]] = {}
    unfit: set[Var] = set()  # written inside a branch or loop, or shared

    def visit(stmt: ReverseStmt, nested: bool) -> None:
        exprs: list[Expr] = []
        if isinstance(stmt, AdjointAssign):
            if nested:
                unfit.add(stmt.var)
            else:
                top.setdefault(stmt.var, []).append(stmt)
            exprs.append(stmt.expr)
        elif isinstance(stmt, (ElementAdjoint, SpreadAdjoint)):
            exprs.append(stmt.expr)
        elif isinstance(stmt, ReverseBranch):
            exprs.append(stmt.condition)
        elif isinstance(stmt, CallAdjoint):  # the helper may hand its seed back
            exprs += [stmt.seed, *stmt.args]
        for expr in exprs:
            unfit.update(_aliases(expr))
            # an adjoint read twice in one statement stays out of in-place work
        for inner in _statements(stmt):
            visit(inner, True)

    for stmt in sweep.statements:
        visit(stmt, False)
    carried = {carry for carry, _ in sweep.carries}
    fresh: set[Var] = set()
    for var, writes in top.items():
        first = writes[0]
        wanted = fitter.table.atom(var)
        if (
            var in unfit
            or var in carried
            or var.shape == "list"
            or first.accumulate
            or not isinstance(first.expr, Apply)
            or first.expr.op not in _FRESH
            or not isinstance(wanted, tuple)
            or fitter.adj.get(var) != wanted
            # the first array must have the full shape: += cannot grow it
            or fitter.shape(first.expr) != wanted
            or any(
                fitter.shape(w.expr) is None or any(n == Bar(var) for n in walk(w.expr))
                for w in writes
            )
        ):
            continue
        fresh.add(var)
    in_place = frozenset(v for v in fresh if len(top[v]) > 1)
    # a number's adjoint goes through _gw_shaped, which makes it a float (not an
    # int count, not a 0-d array)
    bare = frozenset(v for v in sweep.wrt if v in fresh and fitter.table.atom(v) != ())
    return replace(sweep, in_place=in_place, bare=bare)
