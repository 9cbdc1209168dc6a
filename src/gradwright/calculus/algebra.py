"""Building and simplifying expression trees.

:class:`E` wraps an :data:`~gradwright.ir.Expr` so the rule table can be written as
ordinary arithmetic (``g * cos(x)``). :func:`simplify` folds the zeros, ones and
constant arithmetic the rules produce once the seed or a constant argument is known,
and keeps signs where a person would write them: a product or quotient carries at most
one minus, on its leftmost factor (``-(-a * b)`` is ``a * b``, ``-(a * b)`` is
``-a * b``), and ``a + -b`` is ``a - b``.

Every rewrite here is exact in IEEE arithmetic (round to nearest is symmetric in sign,
so moving a minus through ``*`` and ``/`` gives the same bits), except dropping
``0 * x`` (which would be NaN for infinite x), the usual convention for adjoint
contributions. Constant factors are merged only when one of them is a power of two,
where the merged product gives the same bits (outside overflow and underflow); other
constants stay where the rule put them, so no folding changes the rounding.
"""

from __future__ import annotations

import math
from collections.abc import Callable

from gradwright.calculus.primitives import OPS
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


def constant_call(op: str, args: tuple) -> bool:
    """Whether ``math.f(c, ...)`` of literal numbers gives a finite float: it
    cannot raise and gives the same bits wherever it is computed, so the reverse
    may compute it once instead of saving it each iteration (not folded: a libm
    need not round it as Python's float literal does)."""
    spec = OPS.get(op)
    values = [number(a) for a in args]
    if spec is None or not spec.symbol.startswith("math.") or None in values:
        return False
    try:
        result = getattr(math, spec.symbol.removeprefix("math."))(*values)
    except (ValueError, OverflowError, TypeError, AttributeError):
        return False
    return isinstance(result, float) and math.isfinite(result)


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


def literal_arithmetic(op: str, values: list[float | int]) -> float | int | None:
    """``op`` on literal numbers, as the model computes it (ints stay ints):
    + - * / and signs only, None for anything else or a result that is not
    finite."""
    if op in ("neg", "pos") and len(values) == 1:
        return -values[0] if op == "neg" else values[0]
    folded = _fold(op, *values) if len(values) == 2 else None
    return None if folded is None else number(folded)


def _split_sign(expr: Expr) -> tuple[bool, Expr]:
    """``(negative, m)`` with ``expr == -m if negative else m`` bit for bit and no
    minus left in m's chain of products and quotients."""
    n = number(expr)
    if n is not None and n < 0:
        return True, const(-n)
    if isinstance(expr, Apply):
        if expr.op == "neg":
            negative, magnitude = _split_sign(expr.args[0])
            return not negative, magnitude
        if expr.op in ("mul", "div"):
            left_negative, left = _split_sign(expr.args[0])
            right_negative, right = _split_sign(expr.args[1])
            if left_negative or right_negative:
                return left_negative != right_negative, Apply(expr.op, (left, right))
    return False, expr


def negated(expr: Expr) -> Expr | None:
    """m when ``expr == -m`` bit for bit (``-a * b``, ``-2.0``), else None: lets
    ``x += -m`` be written ``x -= m``."""
    negative, magnitude = _split_sign(expr)
    return magnitude if negative else None


def split_sign(expr: Expr) -> tuple[bool, Expr]:
    """``(negative, m)``: ``expr == -m if negative else m`` (``_split_sign``)."""
    return _split_sign(expr)


def _signed(negative: bool, magnitude: Expr) -> Expr:
    """``-magnitude`` written with the minus on the leftmost factor (``-a * b``)."""
    if not negative:
        return magnitude
    if isinstance(magnitude, Apply) and magnitude.op in ("mul", "div"):
        left, right = magnitude.args
        if _leftmost(left).op in _COMPARISONS:
            # NumPy refuses to negate a bool array (a max's one-hot mask):
            # -(mask * g), never -mask * g
            return Apply("neg", (magnitude,))
        return Apply(magnitude.op, (_signed(True, left), right))
    n = number(magnitude)
    if n is not None:
        return const(-n)
    return Apply("neg", (magnitude,))


def _leftmost(expr: Expr) -> Apply:
    """The leftmost factor of a chain of products and quotients (a name or a
    number: an empty Apply)."""
    while isinstance(expr, Apply) and expr.op in ("mul", "div"):
        expr = expr.args[0]
    return expr if isinstance(expr, Apply) else Apply("", ())


def _fold_constants(op: str, a: Expr, b: Expr) -> Expr | None:
    na, nb = number(a), number(b)
    if na is None or nb is None:
        return None
    return _fold(op, na, nb)


def _negate(expr: Expr) -> Expr:
    negative, magnitude = _split_sign(expr)
    return _signed(not negative, magnitude)


#: simplified trees by identity (the reverse sweep simplifies expressions that
#: share deep subtrees; without it a long sum was quadratic); the tree is kept so
#: its id is not reused while the entry lives
_SIMPLIFIED: dict[int, tuple[Expr, Expr]] = {}


def simplify(expr: Expr) -> Expr:
    if not isinstance(expr, Apply):
        return expr
    known = _SIMPLIFIED.get(id(expr))
    if known is not None and known[0] is expr:
        return known[1]
    if len(_SIMPLIFIED) > 200_000:
        _SIMPLIFIED.clear()
    result = _simplify(expr)
    _SIMPLIFIED[id(expr)] = (expr, result)
    # a simplified tree is simplified (merging adjoints re-simplifies the sum so
    # far with each new term)
    _SIMPLIFIED[id(result)] = (result, result)
    return result


def _simplify(expr: Apply) -> Expr:
    args = tuple(simplify(a) for a in expr.args)
    op = expr.op
    if op == "neg":
        return _negate(args[0])
    if op == "pos":
        return args[0]
    if len(args) == 2 and op in ("mul", "div"):
        a_negative, a = _split_sign(args[0])
        b_negative, b = _split_sign(args[1])
        return _signed(a_negative != b_negative, _product(op, a, b))
    if len(args) == 2 and op in ("add", "sub"):
        a, b = args
        folded = _fold_constants(op, a, b)
        if folded is not None:
            return folded
        if op == "add":
            if _is(a, 0):
                return b
            if _is(b, 0):
                return a
            if a == b:  # 2.0 * x * y, the factor on the leftmost (exact)
                return simplify(Apply("mul", (const(2.0), a)))
            # a + -m is a - m, and -m + b is b - m (IEEE + commutes)
            b_negative, b_magnitude = _split_sign(b)
            if b_negative:
                return Apply("sub", (a, b_magnitude))
            a_negative, a_magnitude = _split_sign(a)
            if a_negative:
                return Apply("sub", (b, a_magnitude))
        elif op == "sub":
            if _is(b, 0):
                return a
            if _is(a, 0):
                return _negate(b)
            b_negative, b_magnitude = _split_sign(b)
            if b_negative:
                return Apply("add", (a, b_magnitude))
            a_negative, a_magnitude = _split_sign(a)
            if a_negative and a_magnitude == b:  # -x - x is -(2.0 * x) (exact)
                return _negate(simplify(Apply("mul", (const(2.0), b))))
            if a_negative:  # -x - y is -(x + y): the sign once (exact)
                return _negate(Apply("add", (a_magnitude, b)))
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


def _product(op: str, a: Expr, b: Expr) -> Expr:
    """``a * b`` or ``a / b`` for operands without a sign of their own."""
    folded = _fold_constants(op, a, b)
    if folded is not None:
        return folded
    na, nb = number(a), number(b)
    if op == "div":
        if _is(b, 1) and not _boolean(a):
            return a
        if _is(a, 0):
            return const(0.0)
        return Apply("div", (a, b))
    if _is(a, 0) or _is(b, 0):
        return const(0.0)
    # (a comparison times 1.0 is a float, or an array of floats; alone, a bool)
    if _is(a, 1) and not _boolean(b):
        return b
    if _is(b, 1) and not _boolean(a):
        return a
    # 1.0 / x * y is y / x: one rounding instead of two, one operation fewer
    for recip, other in ((a, b), (b, a)):
        if (
            isinstance(recip, Apply)
            and recip.op == "div"
            and _is(recip.args[0], 1)
            and number(other) is None
        ):
            return Apply("div", (other, recip.args[1]))
    if na is None and nb is not None:
        if _is_chain(a) and _merge_constant(nb, a) is None and not _power_of_two(nb):
            return Apply("mul", (a, b))  # x * y * 0.9: first would need parentheses
        # the constant first, as written by hand (IEEE * commutes)
        a, b, na, nb = b, a, nb, na
    if na is None:
        inner = _leading_power_of_two(b)
        if inner is not None:  # x * (2.0 * y) is 2.0 * x * y, the same bits
            return _scale_leftmost(inner[0], _product("mul", a, inner[1]))
        return Apply("mul", (a, b))
    merged = _merge_constant(na, b)
    if merged is not None:
        return merged
    if _power_of_two(na) and _is_chain(b):
        return _scale_leftmost(a, b)
    return Apply("mul", (a, b))


def _boolean(expr: Expr) -> bool:
    return isinstance(expr, Apply) and (
        expr.op in _COMPARISONS or expr.op in ("and", "or", "not")
    )


def _leading_power_of_two(expr: Expr) -> tuple[Expr, Expr] | None:
    """``c * y`` with c a power of two: (c, y)."""
    if isinstance(expr, Apply) and expr.op == "mul":
        c = number(expr.args[0])
        if c is not None and _power_of_two(c) and number(expr.args[1]) is None:
            return expr.args[0], expr.args[1]
    return None


def _is_chain(expr: Expr) -> bool:
    return isinstance(expr, Apply) and expr.op in ("mul", "div")


def _scale_leftmost(c: Expr, chain: Expr) -> Expr:
    """``c * chain`` as ``c * x * y / z``: for a power of two c, scaling the leftmost
    factor instead of the product gives the same bits (outside overflow and
    underflow)."""
    if _is_chain(chain):
        left, right = chain.args
        return Apply(chain.op, (_scale_leftmost(c, left), right))
    return Apply("mul", (c, chain))


def _merge_constant(c: float | int, other: Expr) -> Expr | None:
    """``c * other`` with c merged into a constant factor of ``other``: c1 * (c2 * x),
    c1 * (x * c2) and c1 * (c2 / x) become (c1 * c2) * x or (c1 * c2) / x, the same
    bits when c1 or c2 is a power of two (outside overflow and underflow)."""
    if not isinstance(other, Apply) or other.op not in ("mul", "div"):
        return None
    places = (0, 1) if other.op == "mul" else (0,)
    for k in places:
        inner = number(other.args[k])
        if inner is None or not (_power_of_two(inner) or _power_of_two(c)):
            continue
        folded = _fold("mul", c, inner)
        if folded is not None:
            rest = other.args[1 - k]
            if other.op == "div":
                return _product("div", folded, rest)
            return _product("mul", folded, rest)
    return None


def _power_of_two(value: float | int) -> bool:
    mantissa, _ = math.frexp(value)
    return value != 0 and math.isfinite(value) and abs(mantissa) == 0.5


def power_of_two(value: float | int) -> bool:
    """Whether multiplying by ``value`` is exact (outside overflow and underflow)."""
    return _power_of_two(value)


def is_zero(expr: Expr) -> bool:
    return _is(expr, 0)
