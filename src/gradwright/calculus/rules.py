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

from gradwright.calculus.algebra import E, call, where
from gradwright.ir import Apply, Const, const

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
    coefficient = y
    node = y.node
    if isinstance(node, Const) and isinstance(node.value, int):
        coefficient = E(const(float(node.value)))  # 2.0 * x, like every other factor
    return g * coefficient * x ** (y - 1), where(x.eq(0), 0.0, g * out * log(x))


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


# ---------------------------------------------------------------------------------
# NumPy. Elementwise functions share the scalar formulas above (the reverse sweep
# prints them with NumPy's functions); the array rules follow the standard collection
# of matrix derivative results for forward and reverse mode (Giles, 2008).


def _keywords(extra: tuple[E, ...]) -> tuple[Const, Const]:
    """axis and keepdims of a reduction, from its keyword constants."""
    found = {"axis": "None", "keepdims": "False"}
    for item in extra:
        node = item.node
        assert isinstance(node, Const)
        key, _, value = node.text.partition("=")
        found[key] = value
    return Const(found["axis"], None), Const(found["keepdims"], None)


def _helper(name: str, *args: E | Const) -> E:
    return E(Apply(name, tuple(a.node if isinstance(a, E) else a for a in args)))


def _reduction(helper: str, *tail: str) -> Rule:
    def rule(g: E, out: E, x: E, *extra: E) -> tuple[E | None, ...]:
        axis, keepdims = _keywords(extra)
        more = tuple(Const(t, None) for t in tail)
        return (_helper(helper, g, x, axis, keepdims, *more),) + (None,) * len(extra)

    return rule


def _prod(g: E, out: E, x: E, *extra: E) -> tuple[E | None, ...]:
    # every element's partial is the product of the others (exact at zeros too)
    axis, keepdims = _keywords(extra)
    return (_helper("_gw_unprod", g, x, axis, keepdims),) + (None,) * len(extra)


def _index(g: E, out: E, x: E, pattern: E, *values: E) -> tuple[E | None, ...]:
    scatter = E(
        Apply("npscatter", (g.node, x.node, pattern.node, *(v.node for v in values)))
    )
    return (scatter, None) + (None,) * len(values)


def _concatenate(g: E, out: E, *args: E) -> tuple[E | None, ...]:
    parts = [a for a in args if not _is_keyword_const(a)]
    axis = _keywords(tuple(a for a in args if _is_keyword_const(a)))[0]
    axis = axis if axis.text != "None" else Const("0", 0)
    pieces = tuple(
        _helper("_gw_part", g, Const(str(k), k), axis, *parts)
        for k in range(len(parts))
    )
    return pieces + (None,) * (len(args) - len(parts))


def _stack(g: E, out: E, *args: E) -> tuple[E | None, ...]:
    parts = [a for a in args if not _is_keyword_const(a)]
    axis = _keywords(tuple(a for a in args if _is_keyword_const(a)))[0]
    axis_text = "0" if axis.text == "None" else axis.text
    pieces = tuple(
        _helper("np.take", g, Const(str(k), k), Const(f"axis={axis_text}", None))
        for k in range(len(parts))
    )
    return pieces + (None,) * (len(args) - len(parts))


def _is_keyword_const(item: E) -> bool:
    node = item.node
    return isinstance(node, Const) and node.value is None and "=" in node.text


def _matmul(g: E, out: E, a: E, b: E) -> tuple[E, E]:
    return _helper("_gw_matmul_left", g, a, b), _helper("_gw_matmul_right", g, a, b)


def _clip(g: E, out: E, x: E, lo: E, hi: E) -> tuple[E, E, E]:
    inside = where(x.ge(lo), where(x.le(hi), g, 0.0), 0.0)
    return inside, where(x.lt(lo), g, 0.0), where(x.gt(hi), g, 0.0)


_SHARED = {
    "exp": "exp",
    "log": "log",
    "log1p": "log1p",
    "expm1": "expm1",
    "exp2": "exp2",
    "log2": "log2",
    "log10": "log10",
    "sqrt": "sqrt",
    "cbrt": "cbrt",
    "sin": "sin",
    "cos": "cos",
    "tan": "tan",
    "tanh": "tanh",
    "sinh": "sinh",
    "cosh": "cosh",
    "arcsin": "asin",
    "arccos": "acos",
    "arctan": "atan",
    "arcsinh": "asinh",
    "arccosh": "acosh",
    "arctanh": "atanh",
    "abs": "abs",
    "absolute": "abs",
    "fabs": "abs",
    "arctan2": "atan2",
    "hypot": "hypot",
    "maximum": "max",
    "minimum": "min",
    "power": "pow",
}
RULES.update({f"np.{name}": RULES[scalar] for name, scalar in _SHARED.items()})
RULES.update(
    {
        # For arrays, speed wins over the last digits in the tails: 1 - out**2 has
        # an absolute error of a few ulp (relative error grows where |x| > 1),
        # at a third of the cost of the cosh form the scalar rule uses.
        "np.tanh": lambda g, out, x: (g * (1.0 - out * out),),
        "np.square": lambda g, out, x: (g * 2.0 * x,),
        "np.where": lambda g, out, c, a, b: (None, where(c, g, 0.0), where(c, 0.0, g)),
        "np.clip": _clip,
        "np.sum": _reduction("_gw_unreduce"),
        "np.mean": _reduction("_gw_unmean"),
        "np.max": _reduction("_gw_unextreme", "np.argmax"),
        "np.amax": _reduction("_gw_unextreme", "np.argmax"),
        "np.min": _reduction("_gw_unextreme", "np.argmin"),
        "np.amin": _reduction("_gw_unextreme", "np.argmin"),
        "np.prod": _prod,
        "matmul": _matmul,
        "np.matmul": _matmul,
        "np.dot": _matmul,
        "np.outer": lambda g, out, a, b: (
            E(Apply("matmul", (g.node, b.node))),
            E(Apply("matmul", (a.node, g.node))),
        ),
        "T": lambda g, out, x: (E(Apply("T", (g.node,))),),
        "np.transpose": lambda g, out, x: (E(Apply("T", (g.node,))),),
        "reshape": lambda g, out, x, *shape: (
            _helper("np.reshape", g, _helper("np.shape", x)),
        )
        + (None,) * len(shape),
        "np.linalg.norm": lambda g, out, x: (g * x / out,),
        "npindex": _index,
        "np.concatenate": _concatenate,
        "np.stack": _stack,
    }
)

#: primitives that only array (NumPy) models have; the rest are the scalar rules
ARRAY_OPS: frozenset[str] = frozenset(
    {k for k in RULES if k.startswith("np.")} | {"matmul", "T", "reshape", "npindex"}
)
SCALAR_OPS: frozenset[str] = frozenset(set(RULES) - ARRAY_OPS)

#: primitives whose every output element depends only on the same element of each
#: operand (after broadcasting): a helper made only of these has elementwise
#: partials, so the caller's reverse sweep may multiply by them
ELEMENTWISE_OPS: frozenset[str] = (
    SCALAR_OPS
    | {f"np.{name}" for name in _SHARED}
    | {"np.tanh", "np.square", "np.where", "np.clip"}
)
