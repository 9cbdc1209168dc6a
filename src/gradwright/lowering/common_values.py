"""Each value computed once: an expression the model writes again with the same
operands (``span / (2.0 * a)`` in three statements of one Newton step) is one SSA
value, so the forward sweep computes it once under a name, and the reverse sweep
reads it once and gathers its adjoint in one place.

Only pure arithmetic and elementwise functions are shared (never a call, a list or
element read, a copied statement, nor arithmetic on counts), and only where the
first computation is sure to have run (earlier in the same block or an enclosing
one; not in a branch side or loop body that has ended). The same operation on
the same operands gives the same bits, so the values and gradients are unchanged.
A name the model binds keeps its own statement; only the anonymous parts of
expressions are shared.
"""

from __future__ import annotations

from dataclasses import replace

from gradwright.calculus.primitives import COMPARISONS
from gradwright.calculus.rules import ELEMENTWISE_OPS, SCALAR_OPS
from gradwright.ir import Atom, Branch, Let, Loop, Phi, Return, SSAFunction, Stmt, Var

#: operations whose value depends on their operands alone
_PURE = (SCALAR_OPS | ELEMENTWISE_OPS | COMPARISONS) - {"copy"} | {"ifexp"}

_Key = tuple[str, tuple[Atom, ...]]


def share_common_values(function: SSAFunction) -> SSAFunction:
    sharing = _Sharing()
    body = sharing.block(function.body, {})
    if not sharing.same:
        return function
    result = function.result
    return replace(
        function,
        body=body,
        result=Return(
            tuple(sharing.atom(a) for a in result.values),
            result.origin,
            result.is_tuple,
        ),
    )


def _counting(atom: Atom) -> bool:
    """A list, a loop index or an int literal: counts and sizes (``steps + 1``
    in a range and a list's length) stay as written, they cost nothing."""
    if isinstance(atom, Var):
        return atom.shape == "list" or atom.kind == "index"
    return isinstance(atom.value, int) and not isinstance(atom.value, bool)


class _Sharing:
    def __init__(self) -> None:
        #: a dropped value -> the earlier equal one
        self.same: dict[Var, Var] = {}

    def atom(self, atom: Atom) -> Atom:
        return self.same.get(atom, atom) if isinstance(atom, Var) else atom

    def block(
        self, statements: tuple[Stmt, ...], seen: dict[_Key, Var]
    ) -> tuple[Stmt, ...]:
        out: list[Stmt] = []
        for stmt in statements:
            kept = self.statement(stmt, seen)
            if kept is not None:
                out.append(kept)
        return tuple(out)

    def statement(self, stmt: Stmt, seen: dict[_Key, Var]) -> Stmt | None:
        if isinstance(stmt, Let):
            args = tuple(self.atom(a) for a in stmt.args)
            if stmt.op in _PURE and not any(map(_counting, args)):
                key = (stmt.op, args)
                first = seen.get(key)
                if first is not None and stmt.target.kind == "temp":
                    self.same[stmt.target] = first
                    return None
                seen.setdefault(key, stmt.target)
            return replace(stmt, args=args) if args != stmt.args else stmt
        if isinstance(stmt, Branch):
            return replace(
                stmt,
                condition=self.atom(stmt.condition),
                then=self.block(stmt.then, dict(seen)),
                orelse=self.block(stmt.orelse, dict(seen)),
                merges=tuple(self.phi(p) for p in stmt.merges),
            )
        return self.loop(stmt, seen)

    def loop(self, loop: Loop, seen: dict[_Key, Var]) -> Loop:
        inner = dict(seen)
        test = loop.body[: loop.test_size]
        kept_test = self.block(test, inner)
        rest = self.block(loop.body[loop.test_size :], inner)
        return replace(
            loop,
            start=self.atom(loop.start),
            stop=self.atom(loop.stop),
            step=self.atom(loop.step),
            carried=tuple(self.phi(p) for p in loop.carried),
            body=kept_test + rest,
            test=self.atom(loop.test) if loop.test is not None else None,
            test_size=len(kept_test),
            exit_flag=(
                self.atom(loop.exit_flag) if loop.exit_flag is not None else None
            ),
        )

    def phi(self, phi: Phi) -> Phi:
        return replace(phi, first=self.atom(phi.first), second=self.atom(phi.second))
