"""The rule table: the only place that knows calculus.

Each entry maps a primitive to its adjoint rule ``rule(g, out, *args)``: given the
incoming adjoint ``g`` of the primitive's output ``out`` and its arguments, it returns
one contribution per argument (``None`` where the derivative is identically zero).
Rules reuse ``out`` wherever the derivative is a function of it (exp, sqrt, tan,
division, powers with a constant exponent below 1, NumPy's tanh), so the reverse
sweep does not recompute the primal; where the accurate form needs an argument twice
(``g / cosh(x)**2``) it is rewritten to need it once.

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

from collections.abc import Callable

from gradwright.calculus.algebra import E, call, number, where
from gradwright.ir import Apply, Const

Rule = Callable[..., tuple["E | None", ...]]

cos = call("cos")
sin = call("sin")
sqrt = call("sqrt")
exp = call("exp")
log = call("log")
hypot = call("hypot")
copysign = call("copysign")
# Constant factors as literals, the correctly rounded values (checked against mpmath
# in tests/test_rules.py): the reverse sweep does not recompute them per call, and
# the output does not depend on the generating machine's libm.
TWO_OVER_SQRT_PI = 1.1283791670955126
LN2 = 0.6931471805599453
LN10 = 2.302585092994046


def _power(g: E, out: E, x: E, y: E) -> tuple[E | None, E]:
    # d/dy = out*log(x) has the limit 0 at x == 0; a negative x has no real
    # derivative in y, and log(x) says so by raising.
    d_exponent = where(x.eq(0.0), 0.0, g * out * log(x))
    p = number(y.node)
    if p is None or isinstance(p, bool):
        # _constant_power's choice made at run time: out / x below 1 (no second
        # pow; at x == 0 it raises ZeroDivisionError as x**(y-1) did), x**(y-1)
        # from 1 on (finite at x == 0, accurate where out is subnormal)
        return g * y * where(y.lt(1.0), out / x, x ** (y - 1)), d_exponent
    return _constant_power(g, out, x, p), d_exponent


def _array_power(g: E, out: E, x: E, y: E) -> tuple[E | None, E]:
    # arrays: np.where evaluates both sides, so the exponent is chosen instead
    # (x**0 at y == 0, where x**(y-1) would divide by zero at x == 0)
    if number(y.node) is None:
        slope = g * y * x ** where(y.eq(0), 0, y - 1)
        # (log of 1.0 where x == 0: no log(0) evaluated, its side not taken)
        return slope, where(x.eq(0.0), 0.0, g * out * log(where(x.eq(0.0), 1.0, x)))
    return _power(g, out, x, y)


def _one_power(g: E, out: E, x: E, y: E) -> tuple[E | None, E]:
    # y * x**(y-1) as written, for an exponent with no adjoint (a count: u**j)
    # in a scalar model
    if number(y.node) is None:
        # x**0 is 1 for every x: at y == 0 the slope is 0, where x**(y-1) would
        # raise at x == 0 (a polynomial's first term at the origin)
        slope = where(y.eq(0), 0.0, g * y * x ** (y - 1))
        return slope, where(x.eq(0.0), 0.0, g * out * log(x))
    return _power(g, out, x, y)


def known_power(p: float | int) -> Rule:
    """The power rule for an exponent the model computes from literals
    (``x ** (2.0 / 3.0)``): its value ``p`` is known here, so the derivative is
    the constant exponent's (``p * out / x`` below 1: no second pow), with the
    exponent's own value as the coefficient (the same float the model computed)."""

    def rule(g: E, out: E, x: E, y: E) -> tuple[E | None, E | None]:
        return _constant_power(g, out, x, p, y), None

    return rule


def _constant_power(
    g: E, out: E, x: E, p: float | int, written: E | None = None
) -> E | None:
    """d(x**p)/dx for a constant p, from out where that is safe.

    p < 1: p * out / x, two roundings after pow's (within about 3 ulp of the
    derivative at x, where x**(p-1) is within about 2) and no second pow. Safe
    because x**p lies between x and 1 (0 < p < 1) or shrinks as |x| grows (p < 0):
    out neither overflows nor underflows where x**(p-1) does not. p == 0.5 is the
    sqrt rule, 0.5 / out. At x == 0 the derivative is infinite for p < 1; Python
    floats raise ZeroDivisionError there as before (the primal raises first for
    p < 0), NumPy arrays get inf for p == 0.5 and p < 0 and nan for other 0 < p < 1
    (x**(p-1) gave inf).
    p > 1: p * x**(p-1), which stays finite at x == 0 and accurate where out is
    subnormal (p * out / x would lose digits there, or overflow for large x); x**2 as
    x * x (correctly rounded, and no pow call).
    """
    if p == 0:
        return None
    if p == 0.5:
        return 0.5 * g / out
    # 2.0 * x, like every other factor, also for an integer exponent; an exponent
    # the model computes (``written``) is read, not printed as a long literal
    coefficient = float(p) if written is None else written
    if p < 1:
        return g * coefficient * out / x
    if p == 3:
        return g * coefficient * (x * x)
    return g * coefficient * x ** (p - 1)


def _divisor(g: E, out: E, x: E, y: E) -> E:
    # d(x/y)/dy = -out / y; for 1 / y that is -out * out, a multiply for a divide
    if number(x.node) == 1:
        return -g * out * out
    return -g * out / y


def _hypot(g: E, out: E, *xs: E) -> tuple[E, ...]:
    # at the origin the first argument takes the whole adjoint, as abs does at 0
    # (hypot(x, 0) is abs(x), whose derivative at 0 is +1 by the kink convention)
    first = where(out.eq(0.0), g, g * xs[0] / out)
    return (first,) + tuple(where(out.eq(0.0), 0.0, g * x / out) for x in xs[1:])


def _log(g: E, out: E, x: E, base: E | None = None) -> tuple[E | None, ...]:
    if base is None:
        return (g / x,)
    b = number(base.node)
    if b in (2.0, 10.0):
        # the correctly rounded ln 2 and ln 10, as the log2 and log10 rules read
        # them (a libm's log(10.0) may be the other neighbour of ln 10, 0.49 ulp
        # away: the literal is the better derivative, and none is computed per call)
        return g / (x * (LN2 if b == 2.0 else LN10)), None
    if b is not None:
        # a constant base: its log is left to the runtime libm, like the primal's
        return g / (x * log(base)), None
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
    "div": lambda g, out, x, y: (g / y, _divisor(g, out, x, y)),
    # x % y == x - y * (x // y), and x // y is piecewise constant
    "mod": lambda g, out, x, y: (g, -g * (x // y)),
    "pow": _power,
    "abs": lambda g, out, x: (where(x.ge(0.0), g, -g),),
    "fabs": lambda g, out, x: (where(x.ge(0.0), g, -g),),
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
    # sech(x)**2 = 1 / cosh(x)**2 = 1 / (0.5 + 0.5 * cosh(2x)): one cosh, within
    # about 2 ulp (all terms positive); 1 - out*out cancels for |x| > 1 (and is 0
    # past 19). cosh(2x) overflows past |x| = 355.2, where sech(x)**2 < 2e-308 is
    # below the smallest normal float: the rule returns 0 there
    "tanh": lambda g, out, x: (
        where(
            call("abs")(x).lt(355.0),
            g / (0.5 + 0.5 * call("cosh")(2.0 * x)),
            0.0,
        ),
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
        where(x.ge(0.0), g * copysign(1.0, y), -g * copysign(1.0, y)),
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


def _array_of(g: E, out: E, *parts: E) -> tuple[E, ...]:
    # np.array([a, b, ...]) stacks its parts along a new first axis: part k's
    # adjoint is g[k]
    return tuple(
        E(Apply("npindex", (g.node, Const("{}", None), Const(str(k), k))))
        for k in range(len(parts))
    )


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


def rule_for(op: str, array: bool, active: tuple[bool, ...]) -> Rule:
    """``RULES[op]``, or the one-pow power rule for arrays and for an exponent
    that has no adjoint (see ``_one_power``)."""
    if op in ("pow", "math_pow", "np.power") and (array or not active[1]):
        return _array_power if array else _one_power
    return RULES[op]


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
        "npindex": _index,
        "np.concatenate": _concatenate,
        "np.stack": _stack,
        "np.array": _array_of,
        "ndcopy": lambda g, out, x: (g,),
    }
)

# -- natural models' array functions ----------------------------------------------


def _stacked(kind: str) -> Rule:
    """np.vstack / np.hstack of a list of arrays: each part's adjoint is its
    block of ``g`` (``_gw_stacked`` finds the block from the parts' shapes)."""

    def rule(g: E, out: E, *parts: E) -> tuple[E | None, ...]:
        return tuple(
            _helper("_gw_stacked", g, Const(str(k), k), Const(f'"{kind}"'), *parts)
            for k in range(len(parts))
        )

    return rule


def _norm(g: E, out: E, x: E, *extra: E) -> tuple[E | None, ...]:
    # d|x|/dx = x / |x|, the reduced adjoint spread back along the axis. At the
    # origin (x all zeros) the subgradient 0, x / 1: so norm(x)**2 has its true
    # gradient 0 there, where x / |x| would give 0/0
    nonzero = where(out.eq(0.0), 1.0, out)
    if not extra:
        return (g * x / nonzero,)
    axis, keepdims = _keywords(extra)
    spread = _helper("_gw_unreduce", g / nonzero, x, axis, keepdims)
    return (spread * x,) + (None,) * len(extra)


RULES.update(
    {
        "np.cumsum": lambda g, out, x: (_helper("_gw_uncumsum", g, x),),
        "np.diff": lambda g, out, x: (_helper("_gw_undiff", g),),
        "np.vstack": _stacked("v"),
        "np.hstack": _stacked("h"),
        "np.linalg.norm": _norm,
        # the tables are constants (the lowering checks): the slope of the
        # segment x falls in, taken from the right at a knot; 0 outside the table
        "np.interp": lambda g, out, x, xp, fp: (
            g * _helper("_gw_interp_slope", x, xp, fp),
            None,
            None,
        ),
    }
)

# radians and degrees multiply by these (CPython: x * (pi / 180.0)); float(x) is
# the identity. int, round, floor, ceil and trunc have no rule: piecewise constant,
# their results are inactive
RULES["radians"] = lambda g, out, x: (g * 0.017453292519943295,)
RULES["degrees"] = lambda g, out, x: (g * 57.29577951308232,)
RULES["float"] = lambda g, out, x: (g,)

#: primitives that only array (NumPy) models have; the rest are the scalar rules
ARRAY_OPS: frozenset[str] = frozenset(
    {k for k in RULES if k.startswith("np.")}
    | {"matmul", "T", "reshape", "npindex", "ndcopy"}
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
