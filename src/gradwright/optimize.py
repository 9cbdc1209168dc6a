"""Clean-up of the two sweeps before printing.

- Adjoints that are a single atom, and adjoints of compiler temporaries used once,
  are substituted into their use instead of being stored.
- The forward sweep keeps (names) only the values the reverse sweep reads, the
  user's own variables and values used more than once; every other temporary folds
  back into the expression that uses it, so the forward sweep reads like the source
  and evaluates the same operations in the same order.
- Forward values that feed neither the result nor the reverse sweep are dropped.
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Iterator
from dataclasses import dataclass

from .algebra import simplify
from .ir import (
    AdjointAssign,
    Apply,
    Atom,
    Bar,
    Const,
    Expr,
    Let,
    ReverseSweep,
    SSAFunction,
    Var,
)


def walk(expr: Expr) -> Iterator[Expr]:
    yield expr
    if isinstance(expr, Apply):
        for arg in expr.args:
            yield from walk(arg)


def substitute(expr: Expr, bars: dict[Var, Expr], values: dict[Var, Expr]) -> Expr:
    if isinstance(expr, Bar):
        return bars.get(expr.var, expr)
    if isinstance(expr, Var):
        return values.get(expr, expr)
    if isinstance(expr, Apply):
        return Apply(expr.op, tuple(substitute(a, bars, values) for a in expr.args))
    return expr


def inline_adjoints(sweep: ReverseSweep) -> ReverseSweep:
    writes = Counter(s.var for s in sweep.statements)
    reads = Counter(
        node.var
        for s in sweep.statements
        for node in walk(s.expr)
        if isinstance(node, Bar)
    )
    keep = set(sweep.wrt)
    inlined: dict[Var, Expr] = {}
    out: list[AdjointAssign] = []
    for stmt in sweep.statements:
        expr = simplify(substitute(stmt.expr, inlined, {}))
        var = stmt.var
        atom = isinstance(expr, (Var, Const, Bar))
        if (
            var not in keep
            and writes[var] == 1
            and (atom or (var.kind == "temp" and reads[var] == 1))
        ):
            inlined[var] = expr
            continue
        out.append(AdjointAssign(var, expr, stmt.accumulate, stmt.origin))
    return ReverseSweep(tuple(out), sweep.wrt, sweep.unused_wrt)


@dataclass(frozen=True)
class ForwardPlan:
    """Which forward values are stored, and the folded expression of each."""

    statements: tuple[tuple[Let, Expr], ...]
    result: tuple[Expr, ...]


def plan_forward(function: SSAFunction, sweep: ReverseSweep) -> ForwardPlan:
    reverse_reads = {
        node for s in sweep.statements for node in walk(s.expr) if isinstance(node, Var)
    }
    # liveness, backwards: what the result or the reverse sweep needs
    live: set[Var] = {a for a in function.result.values if isinstance(a, Var)}
    live |= reverse_reads
    uses: Counter[Var] = Counter()
    for let in reversed(function.body):
        if let.target not in live:
            continue
        for arg in let.args:
            if isinstance(arg, Var):
                live.add(arg)
                uses[arg] += 1
    for atom in function.result.values:
        if isinstance(atom, Var):
            uses[atom] += 1

    folded: dict[Var, Expr] = {}
    stored: list[tuple[Let, Expr]] = []
    for let in function.body:
        if let.target not in live:
            continue
        expr: Expr = Apply(let.op, tuple(_fold_arg(a, folded) for a in let.args))
        target = let.target
        if target.kind == "temp" and target not in reverse_reads and uses[target] == 1:
            folded[target] = expr
        else:
            stored.append((let, expr))
    result = tuple(_fold_arg(a, folded) for a in function.result.values)
    return ForwardPlan(tuple(stored), result)


def _fold_arg(atom: Atom, folded: dict[Var, Expr]) -> Expr:
    if isinstance(atom, Var):
        return folded.get(atom, atom)
    return atom
