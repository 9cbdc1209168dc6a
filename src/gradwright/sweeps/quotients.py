"""One division where several contributions divide the same adjoint by one value.

The rules for ``hypot``, ``atan2`` and a quotient's divisor each divide an adjoint
by a forward value, once per argument: ``ex_bar = span_bar * ex / span`` and
``ey_bar = span_bar * ey / span``. A person divides once and multiplies twice:
``span_bar_1 = span_bar / span``, then ``span_bar_1 * ex`` and ``span_bar_1 * ey``.
Where a statement ``v_bar = B / D`` already exists (a quotient's numerator
adjoint), the later ``-B * out / D`` reads it instead: ``-v_bar * out``.

A group is the quotients ``(±B * X) / D`` with one scalar adjoint ``B`` and one
forward value ``D`` inside a run of simple statements, up to a statement that
writes ``B`` again. The shared quotient is computed right before the group's
first statement. ``(B / D) * X`` rounds twice, as ``(B * X) / D`` did: the
result may differ from the unshared form in the last bit.
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace

from gradwright.calculus.algebra import simplify, split_sign
from gradwright.ir import (
    AdjointAssign,
    Apply,
    Bar,
    ElementAdjoint,
    Expr,
    ReverseBranch,
    ReverseLoop,
    ReverseStmt,
    ReverseSweep,
    Var,
)
from gradwright.sweeps.optimize import product_factors, written_bars

Key = tuple[Var, Var]  # (the adjoint divided, the divisor)


def share_quotients(sweep: ReverseSweep, next_uid: int) -> ReverseSweep:
    """The sweep with each group of two or more quotients sharing one division;
    ``next_uid`` is a uid no value of the function or sweep has yet."""
    sharing = _Sharing(next_uid)
    return replace(sweep, statements=sharing.block(sweep.statements))


def _split(node: Expr) -> tuple[bool, Key, list[Expr]] | None:
    """``node`` as ``±B * rest / D``: (negative, (B, D), rest's factors)."""
    if not (isinstance(node, Apply) and node.op == "div"):
        return None
    num, divisor = node.args
    if not isinstance(divisor, Var):
        return None
    negative, magnitude = split_sign(num)
    factors = product_factors(magnitude)
    for k, factor in enumerate(factors):
        if isinstance(factor, Bar) and factor.var.shape == "scalar":
            return negative, (factor.var, divisor), factors[:k] + factors[k + 1 :]
    return None


def _keys(expr: Expr) -> list[Key]:
    """The keys of the quotients in ``expr``, one per occurrence."""
    if not isinstance(expr, Apply):
        return []
    found = [key for arg in expr.args for key in _keys(arg)]
    split = _split(expr)
    if split is not None:
        found.append(split[1])
    return found


def _rewrite(expr: Expr, shared: dict[Key, Var]) -> Expr:
    if not isinstance(expr, Apply):
        return expr
    expr = Apply(expr.op, tuple(_rewrite(a, shared) for a in expr.args))
    split = _split(expr)
    if split is None or split[1] not in shared:
        return expr
    negative, key, rest = split
    out: Expr = Bar(shared[key])
    for factor in rest:
        out = Apply("mul", (out, factor))
    return simplify(Apply("neg", (out,)) if negative else out)


def _own_quotient(stmt: ReverseStmt) -> Key | None:
    """The key of ``v_bar = B / D`` written as a statement of its own."""
    if not (isinstance(stmt, AdjointAssign) and not stmt.accumulate):
        return None
    split = _split(stmt.expr)
    if split is None or split[0] or split[2]:
        return None
    return split[1]


@dataclass
class _Group:
    first: int  # index in the run of the first statement that reads it
    count: int = 0
    named: Var | None = None  # an existing ``v_bar = B / D`` before the others


@dataclass
class _Sharing:
    next_uid: int
    counted: dict[int, int] = field(default_factory=dict)

    def block(self, statements: tuple[ReverseStmt, ...]) -> tuple[ReverseStmt, ...]:
        out: list[ReverseStmt] = []
        run: list[ReverseStmt] = []
        for stmt in statements:
            if isinstance(stmt, (AdjointAssign, ElementAdjoint)):
                run.append(stmt)
                continue
            out.extend(self.run(run))
            run = []
            if isinstance(stmt, ReverseBranch):
                stmt = replace(
                    stmt, then=self.block(stmt.then), orelse=self.block(stmt.orelse)
                )
            elif isinstance(stmt, ReverseLoop):
                stmt = replace(stmt, body=self.block(stmt.body))
            out.append(stmt)
        out.extend(self.run(run))
        return tuple(out)

    def run(self, run: list[ReverseStmt]) -> list[ReverseStmt]:
        """The run with each closed group of two or more sharing a division."""
        groups: list[tuple[Key, _Group, int]] = []  # (key, group, last index)
        open_: dict[Key, _Group] = {}
        for k, stmt in enumerate(run):
            own = _own_quotient(stmt)
            for key in _keys(_expr(stmt)):
                group = open_.setdefault(key, _Group(k))
                group.count += 1
                if own == key and group.count == 1:
                    group.named = stmt.var  # type: ignore[union-attr]
            for var in written_bars(stmt):
                # B changes, or the name holding B / D does (not where it is made)
                for key in [
                    key
                    for key, group in open_.items()
                    if key[0] == var or (group.named == var and group.first != k)
                ]:
                    groups.append((key, open_.pop(key), k))
        groups += [(key, group, len(run)) for key, group in open_.items()]
        inserts: dict[int, list[ReverseStmt]] = {}
        # per statement index: the keys its quotients read from a shared name
        reads: dict[int, dict[Key, Var]] = {}
        for key, group, last in groups:
            if group.count < 2:
                continue
            start = group.first
            name = group.named
            if name is None:
                name = Var(self.next_uid, key[0].base, "temp")
                self.next_uid += 1
                first = run[start]
                inserts.setdefault(start, []).append(
                    AdjointAssign(
                        name, Apply("div", (Bar(key[0]), key[1])), False, first.origin
                    )
                )
            else:
                start += 1  # the named quotient itself stays as it is
            for k in range(start, min(last + 1, len(run))):
                reads.setdefault(k, {})[key] = name
        out: list[ReverseStmt] = []
        for k, stmt in enumerate(run):
            out.extend(inserts.get(k, []))
            out.append(_map(stmt, reads.get(k, {})))
        return out


def _expr(stmt: ReverseStmt) -> Expr:
    assert isinstance(stmt, (AdjointAssign, ElementAdjoint))
    return stmt.expr


def _map(stmt: ReverseStmt, shared: dict[Key, Var]) -> ReverseStmt:
    if not shared:
        return stmt
    assert isinstance(stmt, (AdjointAssign, ElementAdjoint))
    return replace(stmt, expr=_rewrite(stmt.expr, shared))
