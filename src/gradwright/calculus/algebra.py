"""Building and simplifying expression trees.

:class:`E` wraps an :data:`~gradwright.ir.Expr` so the rule table can be written as
ordinary arithmetic (``g * cos(x)``). :func:`simplify` folds the zeros, ones and
constant arithmetic the rules produce once the seed or a constant argument is known.
Every rewrite here is exact in IEEE arithmetic except dropping ``0 * x`` (which would
be NaN for infinite x), the usual convention for adjoint contributions.
"""

from __future__ import annotations

import math
from collections.abc import Callable

from gradwright.ir import Apply, Const, Expr, const

Operand = "E | float | int"


def lift(value: E | Expr | float | int) -> Expr:
    if isinstance(value, E):
        return value.node
    if isinstance(value, (int, float)):
        return const(value)
    return value


class E:
    """Operator-overloading view of an expression tree, for writing rules."""

    __slots__ = ("node",)

    def __init__(self, node: Expr) -> None:
        self.node = node

    def _binary(self, op: str, other: E | float | int, reverse: bool = False) -> E:
        left, right = (lift(other), self.node) if reverse else (self.node, lift(other))
        return E(Apply(op, (left, right)))

    def __add__(self, other: E | float | int) -> E:
        return self._binary("add", other)

    def __radd__(self, other: E | float | int) -> E:
        return self._binary("add", other, reverse=True)

    def __sub__(self, other: E | float | int) -> E:
        return self._binary("sub", other)

    def __rsub__(self, other: E | float | int) -> E:
        return self._binary("sub", other, reverse=True)

    def __mul__(self, other: E | float | int) -> E:
        return self._binary("mul", other)

    def __rmul__(self, other: E | float | int) -> E:
        return self._binary("mul", other, reverse=True)

    def __truediv__(self, other: E | float | int) -> E:
        return self._binary("div", other)

    def __rtruediv__(self, other: E | float | int) -> E:
        return self._binary("div", other, reverse=True)

    def __floordiv__(self, other: E | float | int) -> E:
        return self._binary("floordiv", other)

    def __pow__(self, other: E | float | int) -> E:
        return self._binary("pow", other)

    def __neg__(self) -> E:
        return E(Apply("neg", (self.node,)))

    def eq(self, other: E | float | int) -> E:
        return self._binary("eq", other)

    def ge(self, other: E | float | int) -> E:
        return self._binary("ge", other)

    def gt(self, other: E | float | int) -> E:
        return self._binary("gt", other)

    def le(self, other: E | float | int) -> E:
        return self._binary("le", other)

    def lt(self, other: E | float | int) -> E:
        return self._binary("lt", other)


def call(op: str) -> Callable[..., E]:
    """A builder for the primitive ``op`` applied to its arguments."""

    def build(*args: E | float | int) -> E:
        return E(Apply(op, tuple(lift(a) for a in args)))

    build.__name__ = op
    return build


def where(condition: E, if_true: E | float, if_false: E | float) -> E:
    """``if_true if condition else if_false``."""
    return E(Apply("ifexp", (lift(if_true), condition.node, lift(if_false))))


# ---------------------------------------------------------------------------------
# simplification


def number(expr: Expr) -> float | int | None:
    """The value of a literal constant, or None."""
    if isinstance(expr, Const) and expr.value is not None:
        return expr.value
    return None


def _is(expr: Expr, value: float) -> bool:
    n = number(expr)
    return n is not None and n == value


def _fold(op: str, a: float | int, b: float | int) -> Expr | None:
    """Constant arithmetic done now gives the bits the same operation gives later."""
    try:
        if op == "add":
            result = a + b
        elif op == "sub":
            result = a - b
        elif op == "mul":
            result = a * b
        elif op == "div":
            result = a / b
        else:
            return None
    except ZeroDivisionError:
        return None
    if isinstance(result, float) and not math.isfinite(result):
        return None
    return const(result)


def _negate(expr: Expr) -> Expr:
    n = number(expr)
    if n is not None:
        return const(-n)
    if isinstance(expr, Apply) and expr.op == "neg":
        return expr.args[0]
    return Apply("neg", (expr,))


def simplify(expr: Expr) -> Expr:
    if not isinstance(expr, Apply):
        return expr
    args = tuple(simplify(a) for a in expr.args)
    op = expr.op
    if op == "neg":
        return _negate(args[0])
    if op == "pos":
        return args[0]
    if len(args) == 2 and op in ("add", "sub", "mul", "div"):
        a, b = args
        na, nb = number(a), number(b)
        if na is not None and nb is not None:
            folded = _fold(op, na, nb)
            if folded is not None:
                return folded
        if op == "mul":
            # (x * c1) * c2 -> x * (c1 * c2), exact when c1 or c2 is a power of two
            if nb is not None and isinstance(a, Apply) and a.op == "mul":
                inner = number(a.args[1])
                if inner is not None and (_power_of_two(inner) or _power_of_two(nb)):
                    return simplify(Apply("mul", (a.args[0], const(inner * nb))))
            if _is(a, 0) or _is(b, 0):
                return const(0.0)
            if _is(a, 1):
                return b
            if _is(b, 1):
                return a
            if _is(a, -1):
                return _negate(b)
            if _is(b, -1):
                return _negate(a)
        elif op == "div":
            if _is(b, 1):
                return a
            if _is(b, -1):
                return _negate(a)
            if _is(a, 0):
                return const(0.0)
        elif op == "add":
            if _is(a, 0):
                return b
            if _is(b, 0):
                return a
            if a == b:
                return Apply("mul", (const(2.0), a))
            if isinstance(b, Apply) and b.op == "neg":
                return Apply("sub", (a, b.args[0]))
            if isinstance(a, Apply) and a.op == "neg":
                return Apply("sub", (b, a.args[0]))
        elif op == "sub":
            if _is(b, 0):
                return a
            if _is(a, 0):
                return _negate(b)
            if isinstance(b, Apply) and b.op == "neg":
                return Apply("add", (a, b.args[0]))
    if op == "_gw_unbroadcast" and isinstance(args[0], Const):
        # a constant adjoint belongs to a scalar result: nothing was broadcast
        return args[0]
    if op == "pow":
        if _is(args[1], 1):
            return args[0]
        if _is(args[1], 0):
            return const(1.0)
    if op in _COMPARISONS and len(args) == 2:
        na, nb = number(args[0]), number(args[1])
        if na is not None and nb is not None:
            return _TRUE if _COMPARISONS[op](na, nb) else _FALSE
    if op == "ifexp":
        if args[0] == args[2]:
            return args[0]
        if args[1] in (_TRUE, _FALSE):
            return args[0] if args[1] == _TRUE else args[2]
    return Apply(op, args)


_TRUE = Const("True", None)
_FALSE = Const("False", None)
_COMPARISONS: dict[str, Callable[[float, float], bool]] = {
    "lt": lambda a, b: a < b,
    "le": lambda a, b: a <= b,
    "gt": lambda a, b: a > b,
    "ge": lambda a, b: a >= b,
    "eq": lambda a, b: a == b,
    "ne": lambda a, b: a != b,
}


def _power_of_two(value: float | int) -> bool:
    mantissa, _ = math.frexp(value)
    return value != 0 and math.isfinite(value) and abs(mantissa) == 0.5


def is_zero(expr: Expr) -> bool:
    return _is(expr, 0)
