"""The rule table: the only place that knows calculus.

Each entry maps a primitive to its adjoint rule ``rule(g, out, *args)``: given the
incoming adjoint ``g`` of the primitive's output ``out`` and its arguments, it returns
one contribution per argument (``None`` where the derivative is identically zero).
Rules reuse ``out`` wherever the derivative is a function of it (exp, sqrt, tanh,
tan, division), so the reverse sweep does not recompute the primal.

Kinks follow one convention: the argument (or piece) that the primal's own selection
picks receives the whole adjoint. ``abs(x)`` is ``x`` for ``x >= 0`` so its derivative
at 0 is +1; ``max(a, b)`` returns ``a`` unless ``b > a``, so at a tie ``a`` gets the
adjoint; ``min`` likewise.

Primitives without an entry (``//``, comparisons) are piecewise constant: their
derivative is zero wherever it exists, and no adjoint flows through them.

Adding a primitive: add its spelling to ``primitives.py``, its rule here, and a test
in ``tests/test_rules.py`` against an outside reference.
"""

from __future__ import annotations

import math
from collections.abc import Callable

from .algebra import E, call, where

Rule = Callable[..., tuple["E | None", ...]]

cos = call("cos")
sin = call("sin")
sqrt = call("sqrt")
exp = call("exp")
log = call("log")
hypot = call("hypot")
copysign = call("copysign")
# Constant factors as literals: the reverse sweep should not recompute them per call.
TWO_OVER_SQRT_PI = 2.0 / math.sqrt(math.pi)
LN2 = math.log(2.0)
LN10 = math.log(10.0)


def _power(g: E, out: E, x: E, y: E) -> tuple[E, E]:
    # d(x**y)/dx = y*x**(y-1) stays finite at x == 0 for y >= 1, unlike y*out/x.
    # d/dy = out*log(x) has the limit 0 at x == 0; a negative x has no real
    # derivative in y, and log(x) says so by raising.
    return g * y * x ** (y - 1), where(x.eq(0), 0.0, g * out * log(x))


def _hypot(g: E, out: E, *xs: E) -> tuple[E, ...]:
    return tuple(g * x / out for x in xs)


def _log(g: E, out: E, x: E, base: E | None = None) -> tuple[E, ...]:
    if base is None:
        return (g / x,)
    return g / (x * log(base)), -g * out / (base * log(base))


def _erf(g: E, x: E) -> E:
    return g * TWO_OVER_SQRT_PI * exp(-(x * x))


RULES: dict[str, Rule] = {
    "copy": lambda g, out, x: (g,),
    "pos": lambda g, out, x: (g,),
    "neg": lambda g, out, x: (-g,),
    "add": lambda g, out, x, y: (g, g),
    "sub": lambda g, out, x, y: (g, -g),
    "mul": lambda g, out, x, y: (g * y, g * x),
    "div": lambda g, out, x, y: (g / y, -g * out / y),
    # x % y == x - y * (x // y), and x // y is piecewise constant
    "mod": lambda g, out, x, y: (g, -g * (x // y)),
    "pow": _power,
    "abs": lambda g, out, x: (where(x.ge(0), g, -g),),
    "fabs": lambda g, out, x: (where(x.ge(0), g, -g),),
    "max": lambda g, out, a, b: (where(a.ge(b), g, 0.0), where(b.gt(a), g, 0.0)),
    "min": lambda g, out, a, b: (where(a.le(b), g, 0.0), where(b.lt(a), g, 0.0)),
    "sin": lambda g, out, x: (g * cos(x),),
    "cos": lambda g, out, x: (-g * sin(x),),
    "tan": lambda g, out, x: (g * (1.0 + out * out),),
    # (1 - x)(1 + x) keeps accuracy near |x| == 1, where 1 - x*x cancels
    "asin": lambda g, out, x: (g / sqrt((1.0 - x) * (1.0 + x)),),
    "acos": lambda g, out, x: (-g / sqrt((1.0 - x) * (1.0 + x)),),
    "atan": lambda g, out, x: (g / (1.0 + x * x),),
    # dividing by hypot twice neither overflows nor underflows, unlike x*x + y*y
    "atan2": lambda g, out, y, x: (
        g * x / hypot(x, y) / hypot(x, y),
        -g * y / hypot(x, y) / hypot(x, y),
    ),
    "sinh": lambda g, out, x: (g * call("cosh")(x),),
    "cosh": lambda g, out, x: (g * call("sinh")(x),),
    # sech(x)**2 from cosh: 1 - out*out cancels for |x| > 1 (and is 0 past 19);
    # cosh overflows past 710, where the derivative is below the smallest float
    "tanh": lambda g, out, x: (
        where(call("abs")(x).lt(710.0), g / call("cosh")(x) / call("cosh")(x), 0.0),
    ),
    # hypot(x, 1) avoids the overflow of x*x + 1 for |x| > 1e154
    "asinh": lambda g, out, x: (g / hypot(x, 1.0),),
    # the factored forms keep accuracy near |x| == 1
    "acosh": lambda g, out, x: (g / (sqrt(x - 1.0) * sqrt(x + 1.0)),),
    "atanh": lambda g, out, x: (g / ((1.0 - x) * (1.0 + x)),),
    "exp": lambda g, out, x: (g * out,),
    # out + 1 would lose the digits of exp(x) for x < -20
    "expm1": lambda g, out, x: (g * exp(x),),
    "exp2": lambda g, out, x: (g * out * LN2,),
    "log": _log,
    "log1p": lambda g, out, x: (g / (1.0 + x),),
    "log2": lambda g, out, x: (g / (x * LN2),),
    "log10": lambda g, out, x: (g / (x * LN10),),
    "sqrt": lambda g, out, x: (0.5 * g / out,),
    "cbrt": lambda g, out, x: (g / (3.0 * out * out),),
    "hypot": _hypot,
    "erf": lambda g, out, x: (_erf(g, x),),
    "erfc": lambda g, out, x: (-_erf(g, x),),
    # copysign(x, y) == |x| * sign(y): no derivative in y away from y == 0
    "copysign": lambda g, out, x, y: (
        where(x.ge(0), g * copysign(1.0, y), -g * copysign(1.0, y)),
        None,
    ),
}
RULES["math_pow"] = _power
