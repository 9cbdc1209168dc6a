"""The reverse sweep: adjoint statements from the rule table, in reverse order.

Activity analysis runs here too: a value is active when it depends on a ``wrt``
parameter through a differentiable primitive, and only active values receive
adjoint contributions. A contribution to a value that already has an adjoint
accumulates (``+=``); the first one assigns.
"""

from __future__ import annotations

from .algebra import E, is_zero, simplify
from .ir import AdjointAssign, Apply, Bar, Expr, ReverseSweep, SSAFunction, Var
from .rules import RULES


def active_values(function: SSAFunction, wrt: tuple[str, ...]) -> set[Var]:
    """Values that depend on a wrt parameter through differentiable primitives."""
    active = {p for p in function.params if p.base in wrt}
    for let in function.body:
        if let.op in RULES and any(a in active for a in let.args):
            active.add(let.target)
    return active


def reverse_sweep(
    function: SSAFunction,
    wrt: tuple[str, ...],
    seeds: tuple[Expr, ...],
) -> ReverseSweep:
    """Adjoint statements for ``sum(seed_i * d result_i)``, reverse order."""
    active = active_values(function, wrt)
    statements: list[AdjointAssign] = []
    has_adjoint: set[Var] = set()

    def contribute(var: Var, expr: Expr, origin) -> None:  # noqa: ANN001
        expr = simplify(expr)
        if is_zero(expr):
            return
        statements.append(AdjointAssign(var, expr, var in has_adjoint, origin))
        has_adjoint.add(var)

    result = function.result
    for atom, seed in zip(result.values, seeds, strict=True):
        if isinstance(atom, Var) and atom in active:
            contribute(atom, seed, result.origin)

    for let in reversed(function.body):
        if let.target not in has_adjoint:
            continue
        rule = RULES[let.op]
        g = E(Bar(let.target))
        parts = rule(g, E(let.target), *(E(a) for a in let.args))
        grouped: dict[Var, list[Expr]] = {}
        for arg, part in zip(let.args, parts, strict=False):
            if part is not None and isinstance(arg, Var) and arg in active:
                grouped.setdefault(arg, []).append(part.node)
        for var, pieces in grouped.items():
            total = pieces[0]
            for piece in pieces[1:]:
                total = Apply("add", (total, piece))
            contribute(var, total, let.origin)

    wrt_vars = tuple(p for name in wrt for p in function.params if p.base == name)
    unused = tuple(v for v in wrt_vars if v not in has_adjoint)
    return ReverseSweep(tuple(statements), wrt_vars, unused)
