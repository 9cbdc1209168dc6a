"""The reverse sweep branches on a kink's condition (sweeps/selects.py): each side
is checked against outside references, on both sides of every kink."""

from __future__ import annotations

import math

import pytest
import sympy
from support import build, mp_function, mp_gradient, rel_err, sympy_function

import gradwright

# a clipped payoff and a capped cost: max and min whose losing side has work
CLIPPED = """
import math


def clipped(a, b, c):
    gain = max(a * math.exp(b), c * c - a)
    cost = min(gain * b, 4.0 + c)
    return gain + cost * cost
"""


@pytest.mark.parametrize(
    "point",
    [
        (1.0, 0.5, 0.3),  # max takes a * exp(b); min takes gain * b
        (0.2, 0.1, 2.0),  # max takes c * c - a
        (3.0, 1.5, 0.1),  # min takes 4.0 + c
        (0.5, -0.4, 1.7),  # max takes c * c - a, min gain * b
    ],
)
def test_max_and_min_on_either_side_against_sympy(point):
    module = build(CLIPPED, "clipped")
    value, grads = module["clipped_grad"](*point)
    # outside reference: SymPy's derivative of the same source (Max, Min), away
    # from the kinks
    symbols = sympy.symbols("a b c")
    expr = sympy_function(CLIPPED, "clipped")(*symbols)
    at = dict(zip(symbols, point, strict=True))
    for symbol, got in zip(symbols, grads, strict=True):
        want = float(sympy.diff(expr, symbol).subs(at).evalf(30))
        assert rel_err(got, want) < 1e-13, (symbol, got, want)
    text = gradwright.generate(CLIPPED, ["clipped"])
    reverse = text.split("# reverse sweep")[1]
    assert "if " in reverse and "else 0.0" not in reverse


def test_a_tie_gives_the_first_argument_the_adjoint():
    # max(a, b) returns a unless b > a; at a tie a gets the whole adjoint (the
    # kink convention of calculus/rules.py); closed form by hand: 3 a**2 and 0
    source = "def f(a, b):\n    return max(a * a * a, b) * 1.0\n"
    module = build(source, "f")
    _, (a_bar, b_bar) = module["f_grad"](2.0, 8.0)
    assert (a_bar, b_bar) == (12.0, 0.0)
    _, (a_bar, b_bar) = module["f_grad"](2.0, 8.5)
    assert (a_bar, b_bar) == (0.0, 1.0)


@pytest.mark.parametrize(
    "a, b",
    [
        (math.nan, 0.0),
        (0.0, math.nan),
        (-0.0, 0.0),
        (0.0, -0.0),
        (2, 2.0),
        (2.0, 2),
        (-1.5, 3),
        (math.inf, -math.inf),
    ],
)
def test_max_and_min_print_as_tests_with_the_builtins_values(a, b):
    # the forward sweep writes max(a, b) as a conditional expression; the
    # reference is Python's own max and min, compared by repr so that a NaN and
    # the sign of a zero count (max(-0.0, 0.0) is -0.0: the first of equals)
    cases = {
        "max(a, b)": lambda: max(a, b),
        "min(a, b)": lambda: min(a, b),
        "max(a, 1.0)": lambda: max(a, 1.0),
        "min(b, 0.0)": lambda: min(b, 0.0),
    }
    for written, builtin in cases.items():
        source = f"def f(x, a, b):\n    m = {written}\n    return x * m\n"
        text = gradwright.generate(source, ["f"], ["x"])
        forward = text.split("def f_grad")[1].split("# reverse sweep")[0]
        code = [line for line in forward.splitlines() if "#" not in line]
        assert not [line for line in code if "max(" in line or "min(" in line]
        module = build(source, "f", ["x"])
        value, (x_bar,) = module["f_grad"](1.0, a, b)
        want = repr(float(builtin()))
        assert repr(float(x_bar)) == want, (written, a, b, x_bar)
        assert repr(value) == repr(1.0 * builtin()), (written, a, b, value)


def test_the_losing_side_is_not_evaluated():
    # 1e200 * x * x overflows to inf at x = 1e160, and min(y, 1.0) is 1.0 there:
    # constant near that point, so the derivative is 0 (closed form). Evaluating
    # the losing side would multiply the zero adjoint by 2e200 * x = inf (nan).
    source = "def capped(x):\n    y = 1e200 * x * x\n    return min(y, 1.0)\n"
    module = build(source, "capped")
    value, (x_bar,) = module["capped_grad"](1e160)
    assert value == 1.0 and x_bar == 0.0


HYPOT_CHAIN = """
import math


def reach(x, y, w):
    r = math.hypot(x * w, y)
    s = math.hypot(r - 1.0, x)
    return r * s + w * r
"""


@pytest.mark.parametrize("point", [(0.3, -0.8, 1.7), (1.2, 0.4, -0.6)])
def test_hypot_shares_its_zero_test_against_mpmath(point):
    module = build(HYPOT_CHAIN, "reach")
    _, grads = module["reach_grad"](*point)
    # outside reference: mpmath central differences at 50 digits
    reference = mp_gradient(mp_function(HYPOT_CHAIN, "reach"), point, range(3))
    for got, want in zip(grads, reference, strict=True):
        assert rel_err(got, want) < 1e-12, (got, want)
    text = gradwright.generate(HYPOT_CHAIN, ["reach"])
    reverse = text.split("# reverse sweep")[1]
    # one test per hypot, not one per argument
    assert reverse.count("== 0.0") == 2


def test_hypot_at_the_origin_follows_the_kink_convention():
    # hypot(x, 0) is abs(x): at the origin the first argument takes the whole
    # adjoint (+1, as abs's derivative at 0), the second none (rules.py)
    source = "import math\n\n\ndef f(x, y):\n    return 2.0 * math.hypot(x, y)\n"
    module = build(source, "f")
    assert module["f_grad"](0.0, 0.0)[1] == (2.0, 0.0)
    # closed form away from it: 2 x / r, 2 y / r
    _, (x_bar, y_bar) = module["f_grad"](3.0, 4.0)
    assert math.isclose(x_bar, 1.2, rel_tol=1e-15)
    assert math.isclose(y_bar, 1.6, rel_tol=1e-15)
