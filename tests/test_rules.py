"""Tests of ``gradwright.rules``: every adjoint rule against an outside reference.

Each primitive in ``rules.RULES`` is wrapped in a tiny model ``def f(x, y): ...``,
differentiated with gradwright with respect to ``(x, y)``, and compared with SymPy's
``diff`` of the same model text (run with ``math`` mapped to SymPy's own functions:
``sympy.erf``, ``sympy.asinh``, ``sympy.codegen.cfunctions.expm1``, ...) evaluated
at 30 digits at seeded random points of the primitive's domain.

Tolerance: 1e-12 relative (absolute where the exact derivative is 0). A rule is a
handful of IEEE operations and libm calls, each within about 1 ulp (libm accuracy
recalled from memory: glibc documents its errors in ulps), so on the well-conditioned
domains sampled here the computed adjoint is within a few tens of ulps, about 1e-14
relative, of the exact derivative at the float inputs. 1e-12 leaves a margin of about
100 for conditioning while a wrong rule (a wrong sign, factor or argument) is off by
O(1) and fails.

Further sections: the kink conventions documented in ``rules.py``; the accuracy claims
made in ``rules.py`` comments, and the edges of the domains where some rules lose
accuracy (checked against mpmath central differences at 50 digits); and a check that
every rule in the table has a case here.
"""

from __future__ import annotations

import math
import random
from collections.abc import Callable
from dataclasses import dataclass

import mpmath
import pytest
import sympy
from support import (
    build,
    mp_central_diff,
    mp_function,
    rel_err,
    run_source,
    same_bits,
    sympy_function,
    sympy_value,
)

import gradwright
from gradwright.calculus import rules
from gradwright.calculus.algebra import E, simplify
from gradwright.calculus.rules import RULES, SCALAR_OPS
from gradwright.emission.printer import Printer
from gradwright.ir import Apply, Const, Expr, Var
from gradwright.lowering.frontend import check_function, parse_module
from gradwright.lowering.ssa import lower

X, Y = sympy.symbols("x y", real=True)
N_POINTS = 6
TOLERANCE = 1e-12  # see the module docstring
REFERENCE = "SymPy diff"

Sampler = Callable[[random.Random], tuple[float, float]]


# ---------------------------------------------------------------------------------
# domains


def box(xlo: float, xhi: float, ylo: float = -3.0, yhi: float = 3.0) -> Sampler:
    return lambda rng: (rng.uniform(xlo, xhi), rng.uniform(ylo, yhi))


def signed(lo: float, hi: float, rng: random.Random) -> float:
    """A number with magnitude in [lo, hi] and a random sign."""
    return rng.choice((-1.0, 1.0)) * rng.uniform(lo, hi)


def both_signed(lo: float, hi: float) -> Sampler:
    return lambda rng: (signed(lo, hi, rng), signed(lo, hi, rng))


def apart(lo: float, hi: float, gap: float = 0.1) -> Sampler:
    """Pairs at least ``gap`` apart (away from the kinks of min and max)."""

    def sample(rng: random.Random) -> tuple[float, float]:
        while True:
            x, y = rng.uniform(lo, hi), rng.uniform(lo, hi)
            if abs(x - y) >= gap:
                return x, y

    return sample


def off_integer_ratio(sample: Sampler) -> Sampler:
    """Points where x / y is at least 0.05 from an integer (away from the jumps of
    ``%`` and ``//``)."""

    def inner(rng: random.Random) -> tuple[float, float]:
        while True:
            x, y = sample(rng)
            ratio = x / y
            if 0.05 < ratio - math.floor(ratio) < 0.95:
                return x, y

    return inner


def _piece(x: float, y: float) -> sympy.Integer:
    # floor(x / y) in exact arithmetic: which piece of % and // the point is on
    return sympy.floor(sympy.Rational(x) / sympy.Rational(y))


# ---------------------------------------------------------------------------------
# the cases


@dataclass(frozen=True)
class Case:
    id: str
    op: str  # the RULES key this case is about
    body: str  # the body of ``def f(x, y):``
    sample: Sampler
    prelude: str = ""
    # the SymPy form of the model on the piece containing the point, for % (SymPy
    # does not differentiate Mod); default: the model text run on SymPy symbols
    piece: Callable[[float, float], sympy.Expr] | None = None

    @property
    def source(self) -> str:
        lines = "\n".join(f"    {line}" for line in self.body.splitlines())
        return f"import math\n{self.prelude}\n\ndef f(x, y):\n{lines}\n"


def c(id: str, op: str, expr: str, sample: Sampler, **kw) -> Case:
    return Case(id, op, f"return {expr}", sample, **kw)


UNIT = box(-3.0, 3.0)
POSITIVE = box(0.1, 10.0)

CASES = [
    # operators
    Case("copy", "copy", "z = x\nreturn z * y", UNIT),
    c("pos", "pos", "+x * y", UNIT),
    c("neg", "neg", "-x * y", UNIT),
    c("neg-of-call", "neg", "-math.sin(x) + y", UNIT),
    c("add", "add", "x + y", UNIT),
    c("sub", "sub", "x - y", UNIT),
    c("mul", "mul", "x * y", UNIT),
    c("mul-same-argument", "mul", "x * x + y", UNIT),
    c("div", "div", "x / y", both_signed(0.2, 5.0)),
    c("div-constant-numerator", "div", "1.5 / x + y", both_signed(0.2, 5.0)),
    c("div-unit-numerator", "div", "1.0 / x * y", both_signed(0.2, 5.0)),
    c("div-unit-numerator-int", "div", "1 / (x * y)", both_signed(0.2, 5.0)),
    c(
        "mod",
        "mod",
        "x % y",
        off_integer_ratio(box(-10.0, 10.0, 0.5, 3.0)),
        piece=lambda x, y: X - Y * _piece(x, y),
    ),
    c(
        "mod-negative-divisor",
        "mod",
        "x % y",
        off_integer_ratio(box(-10.0, 10.0, -3.0, -0.5)),
        piece=lambda x, y: X - Y * _piece(x, y),
    ),
    # ** : constant exponents (int, negative int, float, named constant),
    # constant base, active base and exponent
    c("pow-int-exponent", "pow", "x**3 + y", UNIT),
    c("pow-negative-int-exponent", "pow", "x**-2 + y", both_signed(0.2, 3.0)),
    c("pow-float-exponent", "pow", "x**2.5 + y", POSITIVE),
    c("pow-half", "pow", "x**0.5 * y", POSITIVE),
    # the rule's branches for a constant exponent (rules._constant_power)
    c("pow-int-exponent-four", "pow", "x**4 * y", UNIT),
    c("pow-fraction-below-one", "pow", "x**0.3 * y", POSITIVE),
    c("pow-negative-float-exponent", "pow", "x**-1.5 + y", POSITIVE),
    c("pow-minus-one", "pow", "x**-1 * y", both_signed(0.2, 3.0)),
    c("pow-zero-exponent", "pow", "x**0 * y + x", UNIT),
    c("pow-named-exponent", "pow", "x**K * y", POSITIVE, prelude="K = 1.75"),
    c("pow-constant-base", "pow", "1.7**y * x", UNIT),
    c("pow-active-exponent", "pow", "x**y", box(0.2, 3.0, -2.0, 2.0)),
    c("math-pow-active", "math_pow", "math.pow(x, y)", box(0.2, 3.0, -2.0, 2.0)),
    c("math-pow-constant-exponent", "math_pow", "math.pow(x, 3.0) + y", UNIT),
    # kinks, away from the kinks
    c("abs", "abs", "abs(x) * y", both_signed(0.1, 5.0)),
    c("fabs", "fabs", "math.fabs(x) * y", both_signed(0.1, 5.0)),
    c("max", "max", "max(x, y)", apart(-3.0, 3.0)),
    c("max-three-args", "max", "max(x, y, 0.25) * (x + y)", apart(-3.0, 3.0)),
    c("min", "min", "min(x, y)", apart(-3.0, 3.0)),
    c("min-three-args", "min", "min(x, 0.25, y) * (x - y)", apart(-3.0, 3.0)),
    c("copysign", "copysign", "math.copysign(x, y)", both_signed(0.1, 5.0)),
    # one-argument math functions (y is a parameter the result does not use)
    c("sin", "sin", "math.sin(x)", UNIT),
    c("cos", "cos", "math.cos(x)", UNIT),
    c("tan", "tan", "math.tan(x)", box(-1.4, 1.4)),
    c("asin", "asin", "math.asin(x)", box(-0.9, 0.9)),
    c("acos", "acos", "math.acos(x)", box(-0.9, 0.9)),
    c("atan", "atan", "math.atan(x)", box(-10.0, 10.0)),
    c("sinh", "sinh", "math.sinh(x)", UNIT),
    c("cosh", "cosh", "math.cosh(x)", UNIT),
    c("tanh", "tanh", "math.tanh(x)", UNIT),
    c("asinh", "asinh", "math.asinh(x)", box(-10.0, 10.0)),
    c("acosh", "acosh", "math.acosh(x)", box(1.1, 10.0)),
    c("atanh", "atanh", "math.atanh(x)", box(-0.9, 0.9)),
    c("exp", "exp", "math.exp(x)", UNIT),
    c("expm1", "expm1", "math.expm1(x)", UNIT),
    c("exp2", "exp2", "math.exp2(x)", UNIT),
    c("log", "log", "math.log(x)", POSITIVE),
    c("log1p", "log1p", "math.log1p(x)", box(-0.9, 10.0)),
    c("log2", "log2", "math.log2(x)", POSITIVE),
    c("log10", "log10", "math.log10(x)", POSITIVE),
    c("sqrt", "sqrt", "math.sqrt(x)", POSITIVE),
    c("cbrt", "cbrt", "math.cbrt(x)", both_signed(0.1, 8.0)),
    c("erf", "erf", "math.erf(x)", UNIT),
    c("erfc", "erfc", "math.erfc(x)", UNIT),
    # several arguments
    c("log-active-base", "log", "math.log(x, y)", box(0.1, 10.0, 1.5, 10.0)),
    c("log-base-below-one", "log", "math.log(x, y)", box(0.1, 10.0, 0.1, 0.8)),
    c("log-constant-base", "log", "math.log(x, 10.0) * y", POSITIVE),
    c("log-base-two", "log", "math.log(x, 2.0) * y", POSITIVE),
    c("log-constant-base-below-one", "log", "math.log(x, 0.3) + y", POSITIVE),
    c("atan2", "atan2", "math.atan2(x, y)", both_signed(0.1, 5.0)),
    c("hypot-one-arg", "hypot", "math.hypot(x) * y", both_signed(0.1, 5.0)),
    c("hypot-two-args", "hypot", "math.hypot(x, y)", both_signed(0.1, 5.0)),
    c("hypot-three-args", "hypot", "math.hypot(x, y, x - 2.0 * y)", UNIT),
    c("hypot-constant-arg", "hypot", "math.hypot(x, 1.5, y)", UNIT),
    # unit conversions and float(x), the identity
    c("radians", "radians", "math.radians(x) * y", UNIT),
    c("degrees", "degrees", "math.degrees(x) + y * x", UNIT),
    c("float", "float", "float(x) * y", UNIT),
]


def _ssa_ops(source: str) -> set[str]:
    index = parse_module(source, "<test>")
    function = lower(index, check_function(index, "f", ("x", "y")))
    return {let.op for let in function.body}


def _sympy_model(case: Case, x: float, y: float) -> sympy.Expr:
    if case.piece is not None:
        return case.piece(x, y)
    return sympy.sympify(sympy_function(case.source, "f")(X, Y))


@pytest.mark.parametrize("case", CASES, ids=lambda case: case.id)
def test_rule_against_sympy(case: Case) -> None:
    ns = build(case.source, "f", ["x", "y"])
    rng = random.Random(f"test_rules:{case.id}")
    for _ in range(N_POINTS):
        x, y = case.sample(rng)
        value, grads = ns["f_grad"](x, y)
        assert same_bits(value, run_source(case.source)["f"](x, y))
        model = _sympy_model(case, x, y)
        for symbol, grad in zip((X, Y), grads, strict=True):
            # reference: SymPy's diff of the same model, at 30 digits
            exact = sympy_value(sympy.diff(model, symbol), {X: x, Y: y})
            assert rel_err(grad, exact) <= TOLERANCE, (
                f"{case.id}: d/d{symbol} at ({x!r}, {y!r}): gradwright {grad!r},"
                f" {REFERENCE} {exact}"
            )


@pytest.mark.parametrize("case", CASES, ids=lambda case: case.id)
def test_case_exercises_its_primitive(case: Case) -> None:
    # a case only covers a rule if the model really lowers to that primitive
    assert case.op in _ssa_ops(case.source)


def test_every_rule_has_a_case() -> None:
    # a new scalar rule without a test here fails; so does a case for a rule that is
    # gone (the array rules are covered in tests/test_numpy.py)
    assert {case.op for case in CASES} == set(SCALAR_OPS)


def test_floordiv_passes_no_adjoint() -> None:
    # rules.py: // is piecewise constant, so no adjoint flows through it.
    # Reference: SymPy diff of x*y + n, n = floor(x / y) fixed on the point's piece.
    source = "def f(x, y):\n    return x * y + x // y\n"
    assert "floordiv" in _ssa_ops(source) and "floordiv" not in RULES
    ns = build(source, "f", ["x", "y"])
    rng = random.Random("test_rules:floordiv")
    sample = off_integer_ratio(box(-10.0, 10.0, 0.5, 3.0))
    for _ in range(N_POINTS):
        x, y = sample(rng)
        _, grads = ns["f_grad"](x, y)
        model = X * Y + _piece(x, y)
        for symbol, grad in zip((X, Y), grads, strict=True):
            exact = sympy_value(sympy.diff(model, symbol), {X: x, Y: y})
            assert rel_err(grad, exact) <= TOLERANCE, REFERENCE


# ---------------------------------------------------------------------------------
# kinks: documented convention (rules.py) -- the argument the primal selects gets
# the whole adjoint


def _grad(source: str, *point: float, wrt: list[str] | None = None) -> tuple:
    ns = build(source, "f", wrt)
    return ns["f_grad"](*point)[1]


@pytest.mark.parametrize("zero", [0.0, -0.0], ids=["+0.0", "-0.0"])
@pytest.mark.parametrize("call", ["abs(x)", "math.fabs(x)"])
def test_abs_at_zero_is_plus_one(call: str, zero: float) -> None:
    # documented convention (rules.py): abs(x) is x for x >= 0, derivative +1 at 0
    # (-0.0 >= 0 is true, so -0.0 takes the same branch)
    source = f"import math\n\ndef f(x):\n    return {call}\n"
    assert _grad(source, zero) == (1.0,), "documented convention (rules.py)"


@pytest.mark.parametrize("builtin", ["max", "min"])
def test_two_argument_tie_goes_to_first(builtin: str) -> None:
    # documented convention (rules.py): max(a, b) returns a unless b > a, so at a
    # tie a gets the adjoint; min likewise
    source = f"def f(a, b):\n    return {builtin}(a, b)\n"
    assert _grad(source, 1.5, 1.5) == (1.0, 0.0), "documented convention (rules.py)"
    # off the tie the selected second argument gets it, so the tie check does not
    # pass merely because the first argument always wins
    second_selected = (1.0, 2.0) if builtin == "max" else (2.0, 1.0)
    convention = "documented convention (rules.py)"
    assert _grad(source, *second_selected) == (0.0, 1.0), convention


@pytest.mark.parametrize("builtin", ["max", "min"])
def test_three_argument_tie_goes_to_first(builtin: str) -> None:
    # documented convention (rules.py / primitives.py): f(a, b, c) is lowered to
    # f(f(a, b), c), which selects the same element as the builtin: the first
    source = f"def f(a, b, c):\n    return {builtin}(a, b, c)\n"
    convention = "documented convention (rules.py)"
    assert _grad(source, 2.0, 2.0, 2.0) == (1.0, 0.0, 0.0), convention
    # ``loser`` is never selected, ``winner`` always is
    loser, winner = (1.0, 3.0) if builtin == "max" else (3.0, 1.0)
    # first and last tie, the middle one is not selected
    assert _grad(source, 2.0, loser, 2.0) == (1.0, 0.0, 0.0), convention
    # and the last one does get the adjoint when it alone is selected
    assert _grad(source, 2.0, 2.0, winner) == (0.0, 0.0, 1.0), convention


def test_tie_adjoint_follows_primal_selection() -> None:
    # documented convention (rules.py): "the argument that the primal's own
    # selection picks receives the whole adjoint" -- so for max(x, -x) at x = 0
    # the first argument (d/dx = +1) is the one differentiated
    source = "def f(x):\n    return max(x, -x)\n"
    assert _grad(source, 0.0) == (1.0,), "documented convention (rules.py)"
    source = "def f(x):\n    return max(-x, x)\n"
    assert _grad(source, 0.0) == (-1.0,), "documented convention (rules.py)"


# ---------------------------------------------------------------------------------
# accuracy at the edges of the domains, against mpmath central differences
# (50 digits, support.mp_central_diff); same 1e-12 relative tolerance as above


def _edge_error(expr: str, x: float) -> float:
    source = f"import math\n\ndef f(x):\n    return {expr}\n"
    (grad,) = _grad(source, x)
    # reference: mpmath central difference of the same model at 50 digits
    exact = mp_central_diff(mp_function(source, "f"), (x,), 0)
    return rel_err(grad, exact)


@pytest.mark.parametrize(
    ("expr", "x"),
    [
        # rules.py: "hypot(x, 1) avoids the overflow of x*x + 1 for |x| > 1e154"
        ("math.asinh(x)", 1e200),
        ("math.asinh(x)", -1e300),
        ("math.asinh(x)", 1e-200),
        # rules.py: "the factored forms keep accuracy near |x| == 1"
        ("math.acosh(x)", 1.0 + 2.0**-40),
        ("math.atanh(x)", 1.0 - 2.0**-40),
        ("math.atanh(x)", -1.0 + 2.0**-40),
        # rules.py reuses out for tan: 1 + tan**2 stays accurate near pi/2
        ("math.tan(x)", 1.5707963),
        # common practice: log1p is used for arguments near -1 and near 0
        ("math.log1p(x)", -1.0 + 2.0**-40),
        ("math.log1p(x)", 1e-300),
        # far tails: exp(-x*x) underflows gracefully
        ("math.erfc(x)", 26.0),
        ("math.erf(x)", -6.0),
        ("math.exp(x)", -700.0),
        ("math.sqrt(x)", 1e-300),
        ("math.cbrt(x)", -1e-300),
        # rules._constant_power: p * out / x for p < 1 neither overflows nor loses
        # digits to underflow; x**(p-1) is kept for p > 1 where out is subnormal
        ("x**0.5", 1e-300),
        ("x**0.5", 1e300),
        ("x**0.3", 1e-320),
        ("x**-2", 1e-100),
        ("x**-2", -1e100),
        ("x**-1.5", 1e-100),
        ("x**-1.5", 1e100),
        ("x**2.5", 1e-125),
        ("x**3", 1e-100),
        ("x**3", -1e100),
    ],
)
def test_rule_accurate_at_domain_edge(expr: str, x: float) -> None:
    assert _edge_error(expr, x) <= TOLERANCE, "mpmath central difference, 50 digits"


@pytest.mark.parametrize("x", [10.0, -25.0, 1e-8, 0.5, -3.0, 300.0, -354.0])
def test_tanh_rule_accurate_in_the_tails(x: float) -> None:
    assert _edge_error("math.tanh(x)", x) <= TOLERANCE, "mpmath central difference"


@pytest.mark.parametrize("x", [355.0, -400.0, 709.0, 1e300])
def test_tanh_rule_is_zero_below_the_normal_range(x: float) -> None:
    # documented convention (rules.py): past |x| = 355 sech(x)**2 < 2e-308, below
    # the smallest normal float, and the rule returns 0 (cosh(2x) would overflow)
    source = "import math\n\ndef f(x):\n    return math.tanh(x)\n"
    assert _grad(source, x) == (0.0,), "documented convention (rules.py)"
    # reference: mpmath central difference at 50 digits: the exact value is tiny
    exact = mp_central_diff(mp_function(source, "f"), (x,), 0)
    assert abs(exact) < 2e-308


@pytest.mark.parametrize("x", [-20.0, -40.0])
def test_expm1_rule_accurate_for_negative_x(x: float) -> None:
    assert _edge_error("math.expm1(x)", x) <= TOLERANCE, "mpmath central difference"


@pytest.mark.parametrize("expr", ["math.asin(x)", "math.acos(x)"])
def test_asin_acos_rules_accurate_near_one(expr: str) -> None:
    assert _edge_error(expr, 1.0 - 1e-10) <= TOLERANCE, "mpmath central difference"


def _atan2_grads(y: float, x: float) -> tuple:
    return _grad("import math\n\ndef f(y, x):\n    return math.atan2(y, x)\n", y, x)


def test_atan2_rule_tiny_arguments() -> None:
    grads = _atan2_grads(1e-200, 1e-200)
    # closed form (by hand): d atan2(y, x) = (x dy - y dx) / (x^2 + y^2)
    exact = (5e199, -5e199)
    assert all(rel_err(g, e) <= TOLERANCE for g, e in zip(grads, exact, strict=True))


def test_atan2_rule_huge_arguments() -> None:
    grads = _atan2_grads(1e200, 1e200)
    # closed form (by hand): d atan2(y, x) = (x dy - y dx) / (x^2 + y^2)
    exact = (5e-201, -5e-201)
    assert all(rel_err(g, e) <= TOLERANCE for g, e in zip(grads, exact, strict=True))


@pytest.mark.parametrize("y", [2, 1, sympy.Rational(3, 2)])
@pytest.mark.parametrize("expr", ["x**y", "math.pow(x, y)"])
def test_pow_active_exponent_at_zero_base(expr: str, y: sympy.Rational) -> None:
    # rules._power reads out / x only for y < 1: from 1 on x == 0 stays finite
    source = f"import math\n\ndef f(x, y):\n    return {expr}\n"
    # SymPy diff of x**y, (y * x**(y - 1), x**y * log(x)), at x -> 0+
    # (SymPy's limit: log(0) alone is undefined, x**y * log(x) tends to 0)
    exact = tuple(
        float(sympy.limit(sympy.diff(X**Y, s).subs(Y, y), X, 0, "+")) for s in (X, Y)
    )
    assert _grad(source, 0.0, float(y)) == exact, REFERENCE


@pytest.mark.parametrize("y", [0.5, 0.0])
@pytest.mark.parametrize("expr", ["x**y", "math.pow(x, y)"])
def test_pow_active_exponent_below_one_at_zero_base_raises(expr: str, y: float) -> None:
    """The derivative y * x**(y - 1) is infinite at x == 0 for y < 1 (y == 0 gives
    0 * inf): Python raised ZeroDivisionError there for x**(y-1) and does for
    out / x (0.0 ** -0.5 and 0.0 / 0.0 both raise; SymPy: x**(y-1) -> oo)."""
    source = f"import math\n\ndef f(x, y):\n    return {expr}\n"
    with pytest.raises(ZeroDivisionError):
        _grad(source, 0.0, y)


@pytest.mark.parametrize(
    ("x", "y"), [(3.7, 0.3), (0.2, -1.5), (1e-300, 0.5), (1e-200, 2.0), (1e-160, 2.5)]
)
def test_pow_active_exponent_accurate(x: float, y: float) -> None:
    # out / x for y < 1 (no second pow); x**(y-1) from 1 on, where x**y underflows
    # (1e-200**2.0 is 0.0: out / x would give 0 for d/dx = 2e-200)
    source = "def f(x, y):\n    return x**y\n"
    grads = _grad(source, x, y)
    # reference: mpmath at 50 digits, the closed forms y*x**(y-1) and x**y*log(x)
    with mpmath.workdps(50):
        mx, my = mpmath.mpf(x), mpmath.mpf(y)
        exact = (my * mx ** (my - 1), mx**my * mpmath.log(mx))
    for grad, ref in zip(grads, exact, strict=True):
        if abs(ref) < 2.2250738585072014e-308:  # below the normal range: absolute
            assert abs(grad - float(ref)) <= 1e-323, "mpmath closed form"
        else:
            assert rel_err(grad, ref) <= TOLERANCE, "mpmath closed form"


def test_pow_active_exponent_reads_out() -> None:
    # rules._power: x**y with both active divides out by x below 1 (issue 12);
    # an exponent without an adjoint (a count) keeps the one pow
    code = _reverse_code("def f(x, y):\n    return x**y\n")
    assert any("/ x if y < 1.0 else x ** (y - 1)" in line for line in code), code
    code = _reverse_code("def f(x, n):\n    return x**n\n", ["x"])
    assert any(line.endswith("n * x ** (n - 1)") for line in code), code


@pytest.mark.parametrize("expr", ["x**y", "math.pow(x, y)"])
def test_pow_active_exponent_at_negative_base_raises(expr: str) -> None:
    """x**y for x < 0 has no real derivative in y (it needs log(x)): an error.

    With only x active the same point is fine: d(x**3)/dx = 3 x**2 = 12 at x = -2
    (power rule).
    """
    source = f"import math\n\ndef f(x, y):\n    return {expr}\n"
    assert run_source(source)["f"](-2.0, 3.0) == -8.0  # the primal is real here
    with pytest.raises(ValueError, match="math domain error"):
        _grad(source, -2.0, 3.0)
    assert _grad(source, -2.0, 3.0, wrt=["x"]) == (12.0,), "power rule"


# ---------------------------------------------------------------------------------
# the math.* calls the rules print must reach the math module


@pytest.mark.parametrize(
    "source",
    [
        "from math import sin\n\n"
        "def f(x, y):\n    math = x * y\n    return sin(math)\n",
        "import math as m\n\ndef f(math, y):\n    return m.sin(math) * y\n",
    ],
    ids=["local-named-math", "parameter-named-math"],
)
def test_rules_math_calls_survive_a_local_named_math(source: str) -> None:
    ns = build(source, "f")
    value, grads = ns["f_grad"](0.5, 1.5)
    assert same_bits(value, run_source(source)["f"](0.5, 1.5))
    # reference: mpmath central differences of the model at 50 digits
    f_mp = mp_function(source, "f")
    for i, grad in enumerate(grads):
        exact = mp_central_diff(f_mp, (0.5, 1.5), i)
        assert rel_err(grad, exact) <= TOLERANCE, "mpmath central difference"


def test_power_rule_reads_out_instead_of_recomputing() -> None:
    # rules._constant_power: no second pow for x**-2 and x**0.5 (issue 12)
    source = "def f(x, y):\n    return x**-2 + y**0.5\n"
    code = _reverse_code(source)
    assert not any("**" in line for line in code), code


def _reverse_code(source: str, wrt: list[str] | None = None) -> list[str]:
    text = gradwright.generate(source, ["f"], wrt=wrt)
    lines = text.split("# reverse sweep")[1].splitlines()
    return [line for line in lines if not line.lstrip().startswith("#")]


def test_log_base_two_reads_the_constant() -> None:
    # rules._log: log(x, 2.0) uses LN2, as log2 does, not math.log(2.0) per call
    code = _reverse_code("import math\n\ndef f(x):\n    return math.log(x, 2.0)\n")
    assert not any("log" in line for line in code), code
    assert any(repr(rules.LN2) in line for line in code), code


def test_log_base_ten_reads_the_constant() -> None:
    # rules._log: log(x, 10.0) uses LN10, as log10 does (checked against mpmath in
    # test_rule_constants_are_correctly_rounded)
    code = _reverse_code("import math\n\ndef f(x):\n    return math.log(x, 10.0)\n")
    assert not any("log" in line for line in code), code
    assert any(repr(rules.LN10) in line for line in code), code


def test_tanh_rule_calls_cosh_once() -> None:
    # rules.py: sech(x)**2 from one cosh (issue 12: no recomputation in rules)
    code = _reverse_code("import math\n\ndef f(x):\n    return math.tanh(x)\n")
    assert sum(line.count("cosh(") for line in code) == 1, code


@pytest.mark.parametrize(
    ("name", "exact"),
    [
        ("LN2", mpmath.log(2)),
        ("LN10", mpmath.log(10)),
        ("TWO_OVER_SQRT_PI", 2 / mpmath.sqrt(mpmath.pi)),
    ],
)
def test_rule_constants_are_correctly_rounded(name: str, exact: mpmath.mpf) -> None:
    # rules.py writes these as literals; reference: mpmath at 50 digits
    with mpmath.workdps(50):
        value = getattr(rules, name)
        assert abs(mpmath.mpf(value) - exact) <= math.ulp(value) / 2


# ---------------------------------------------------------------------------------
# algebra.simplify: the sign and constant rewrites give the same bits


def _evaluate(expr: Expr, values: dict[str, float]) -> float:
    if isinstance(expr, Const):
        return float(expr.value)
    if isinstance(expr, Var):
        return values[expr.base]
    assert isinstance(expr, Apply)
    args = [_evaluate(a, values) for a in expr.args]
    return {
        "neg": lambda a: -a,
        "add": lambda a, b: a + b,
        "sub": lambda a, b: a - b,
        "mul": lambda a, b: a * b,
        "div": lambda a, b: a / b,
    }[expr.op](*args)


_A, _B, _C = (E(Var(k, name, "local")) for k, name in enumerate("abc"))
SIMPLIFY_CASES = [
    # (built expression, printed simplified form)
    (-(-_A * _B), "a * b"),
    (-(_A * _B), "-a * b"),
    (-(_A.__neg__() * _B / _C * _A).__neg__(), "-a * b / c * a"),
    (-(-_A * _B / _C * _A), "a * b / c * a"),
    (_A - (-_B * _C), "a + b * c"),
    (_A + (-_B * _C), "a - b * c"),
    (_A * -_B, "-a * b"),
    (2.0 * (3.0 * _A), "6.0 * a"),
    (2.0 * (_A * 3.0), "6.0 * a"),
    ((_A * 3.0) * 0.5, "1.5 * a"),
    (0.25 * (4.0 / _A), "1.0 / a"),
    # neither constant a power of two: merging would change the rounding
    (3.0 * (5.0 * _A), "3.0 * (5.0 * a)"),
    (_A * 1.0, "a"),
    (0.0 + _A, "a"),
    (-1.0 * _A, "-a"),
    (_A * -1.0, "-a"),
    (-(_A * _A), "-a * a"),
    (_A - -2.0, "a + 2.0"),
    # a power-of-two factor scales the leftmost factor of a chain; others stay put
    (2.0 * (_A * _B), "2.0 * a * b"),
    ((_A * _B) * 2.0, "2.0 * a * b"),
    (-2.0 * (_A * _B / _C * _A), "-2.0 * a * b / c * a"),
    (0.5 * (-_A / _B), "-0.5 * a / b"),
    (3.0 * (_A * _B), "3.0 * (a * b)"),
    ((_A * _B) * 3.0, "a * b * 3.0"),
    (_A * 0.25, "0.25 * a"),
    (_A * 0.9, "0.9 * a"),
]


@pytest.mark.parametrize(("built", "printed"), SIMPLIFY_CASES, ids=lambda v: str(v))
def test_simplify_keeps_the_bits(built: E, printed: str) -> None:
    simplified = simplify(built.node)
    text = Printer(lambda v: v.base, lambda v: f"{v.base}_bar")(simplified)
    assert text == printed
    rng = random.Random(f"test_rules:simplify:{printed}")
    for _ in range(200):
        values = {n: signed(1e-3, 1e3, rng) for n in "abc"}
        assert same_bits(_evaluate(simplified, values), _evaluate(built.node, values))
