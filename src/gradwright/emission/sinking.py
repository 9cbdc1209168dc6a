"""Restores and recomputations a reverse loop needs on one side of a branch only.

The reverse of a loop iteration begins by restoring the values it saved and
recomputing the cheap ones. Where a value is read on one side of one of the
body's branches and nowhere else (an exercise node's powers in a binomial tree,
read only where exercising wins), it is restored or recomputed at the top of
that side instead: no load on the iterations that take the other side, and the
line sits beside the lines that read it. The layout check sees these lines where
they are printed, as it sees every other.
"""

from __future__ import annotations

from collections.abc import Iterable, Iterator

from gradwright.emission.layout import Layout
from gradwright.emission.layout_tapes import reverse_bounds
from gradwright.ir import (
    AdjointAssign,
    Apply,
    CallAdjoint,
    ElementAdjoint,
    Expr,
    Let,
    ReverseBranch,
    ReverseLoop,
    ReverseStmt,
    SpreadAdjoint,
    Var,
    walk,
)
from gradwright.sweeps.optimize import all_statements

#: (id of a ReverseBranch, 0 for its then side or 1 for its else side)
Side = tuple[int, int]


def sunk_values(
    layout: Layout, stmt: ReverseLoop
) -> dict[Side, tuple[list[Var], list[Let]]]:
    """Per branch side of ``stmt``'s body: the saved values to restore and the
    values to recompute there rather than at the top of each iteration."""
    loop = stmt.loop
    if any(isinstance(s, ReverseLoop) for s in all_statements(stmt.body)):
        return {}  # an inner loop's own recomputations read them too: left alone
    places: dict[Var, set[Side | None]] = {}

    def note(exprs: Iterable[tuple[Expr, bool]], place: Side | None) -> None:
        for expr, everywhere in exprs:
            # as the printer expands it: values printed inline read their operands
            for node in walk(layout.cheap(expr, everywhere)):
                if isinstance(node, Var):
                    places.setdefault(node, set()).add(place)
                elif isinstance(node, Apply) and node.op == "partial":
                    partials = layout.partials_of(node.args[0])  # type: ignore[arg-type]
                    places.setdefault(partials, set()).add(place)

    for top in stmt.body:
        if isinstance(top, ReverseBranch):
            note([(top.condition, top.branch is not None)], None)
            note(_exprs(top.then), (id(top), 0))
            note(_exprs(top.orelse), (id(top), 1))
        else:
            note(_exprs([top]), None)
    lets = list(layout.recompute.get(loop, []))
    changed = True
    while changed:  # a recomputed value's operands are read where it is computed
        changed = False
        for let in lets:
            where = _one_side(places.get(let.target, set()))
            for arg in let.args:
                if isinstance(arg, Var):
                    seen = places.setdefault(arg, set())
                    if where not in seen:
                        seen.add(where)
                        changed = True
    out: dict[Side, tuple[list[Var], list[Let]]] = {}
    for var in layout.tapes.get(loop, []):
        side = _one_side(places.get(var, set()))
        if side is not None and var.shape == "scalar":
            # a record's values are unpacked together at the top
            if var not in layout.partials_call and var not in layout.records.get(
                loop, ()
            ):
                out.setdefault(side, ([], []))[0].append(var)
    for let in lets:
        side = _one_side(places.get(let.target, set()))
        if side is not None and let.target.shape == "scalar":
            out.setdefault(side, ([], []))[1].append(let)
    return out


def _one_side(places: set[Side | None]) -> Side | None:
    if len(places) == 1:
        return next(iter(places))
    return None


def _exprs(statements: Iterable[ReverseStmt]) -> Iterator[tuple[Expr, bool]]:
    """Every expression the statements' lines read, and whether the printer
    expands it as an index or a branch's test (``Layout.cheap``'s everywhere)."""
    for stmt in all_statements(statements):
        if isinstance(stmt, (AdjointAssign, SpreadAdjoint)):
            yield stmt.expr, False
        elif isinstance(stmt, ElementAdjoint):
            yield stmt.index, True
            yield stmt.expr, False
        elif isinstance(stmt, CallAdjoint):
            for arg in stmt.args:
                yield arg, False
            yield stmt.seed, False
        elif isinstance(stmt, ReverseBranch):
            yield stmt.condition, stmt.branch is not None
        elif isinstance(stmt, ReverseLoop):
            for bound in reverse_bounds(stmt.loop):
                yield bound, True
