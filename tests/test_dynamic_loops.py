"""Loops whose trip count is known only when they end: ``while``, ``break``,
``continue`` and ``return`` inside ``for`` and ``while`` loops.

What is differentiated is the iterations as run (the stopping tests are piecewise
constant). For a converged solver that approximates the derivative of the
solution: each solver below is checked against the solution's own derivative (a
textbook closed form, or the implicit-function theorem), to a tolerance stated and
argued beside the check. Early exits are checked against mpmath central
differences of the model's own text at 50 digits (the exit taken does not change
within the step). Values are bit-identical to the primal's.
"""

from __future__ import annotations

import math
import re
from pathlib import Path

import pytest
from support import build, mp_function, mp_gradient, rel_err, run_source, same_bits

import gradwright

MODELS = Path(__file__).resolve().parent / "models"
SOLVERS = (MODELS / "dynamic_loops.py").read_text(encoding="utf-8")


def _solver(name: str) -> tuple:
    return build(SOLVERS, name)[f"{name}_grad"], run_source(SOLVERS)[name]


# -- solvers against the derivative of their solution ------------------------------
#
# Differentiating the iterations as run gives the derivative of the last iterate,
# which depends on the iterate before the last step; its distance from the solution
# (up to about sqrt(tol) for Newton, tol / (1 - contraction) for a fixed point)
# bounds the error. Measured over the grids below: Kepler 2e-11, square root 2e-11,
# fixed point 1.2e-13 relative; the checks hold 1e-10, 1e-10 and 1e-12.


def test_kepler_newton_against_closed_form():
    grad, primal = _solver("kepler")
    for k in range(1, 60):
        mean = 0.1 * k
        for ecc in (0.05, 0.3, 0.6, 0.9):
            E, (mean_bar, ecc_bar, tol_bar) = grad(mean, ecc, 1e-13)
            assert same_bits(E, primal(mean, ecc, 1e-13))
            assert abs(E - ecc * math.sin(E) - mean) < 1e-13
            # closed form (implicit differentiation of E - e sin E = M):
            # dE/dM = 1 / (1 - e cos E), dE/de = sin E / (1 - e cos E)
            slope = 1.0 - ecc * math.cos(E)
            assert rel_err(mean_bar, 1.0 / slope) < 1e-10
            assert abs(ecc_bar - math.sin(E) / slope) < 1e-10 * abs(1.0 / slope)
            assert tol_bar == 0.0  # the stopping test is piecewise constant


def test_newton_square_root_against_closed_form():
    grad, primal = _solver("newton_sqrt")
    for k in range(40):
        a = 0.01 * 1.3**k
        x, (a_bar, tol_bar) = grad(a, 1e-12 * a)
        assert same_bits(x, primal(a, 1e-12 * a))
        # d sqrt(a) / da = 1 / (2 sqrt(a)) (closed form)
        assert rel_err(a_bar, 1.0 / (2.0 * math.sqrt(a))) < 1e-10
        assert tol_bar == 0.0


def test_fixed_point_against_implicit_function_theorem():
    grad, primal = _solver("fixed_point")
    for k in range(60):
        p = -1.0 + 0.05 * k
        x, (p_bar, _) = grad(p, 1e-14)
        assert same_bits(x, primal(p, 1e-14))
        # implicit-function theorem for x = g(x, p), g = 0.5 cos x + p:
        # dx/dp = (dg/dp) / (1 - dg/dx) = 1 / (1 + 0.5 sin x)
        assert rel_err(p_bar, 1.0 / (1.0 + 0.5 * math.sin(x))) < 1e-12


BISECTION = """
def cube_root(p):
    lo = 0.0
    hi = 4.0
    while hi - lo > 1e-13:
        mid = 0.5 * (lo + hi)
        if mid * mid * mid > p:
            hi = mid
        else:
            lo = mid
    return 0.5 * (lo + hi)


def cube_root_polished(p):
    lo = 0.0
    hi = 4.0
    while hi - lo > 1e-13:
        mid = 0.5 * (lo + hi)
        if mid * mid * mid > p:
            hi = mid
        else:
            lo = mid
    x = 0.5 * (lo + hi)
    return x - (x * x * x - p) / (3.0 * x * x)
"""


def test_bisection_iterates_do_not_depend_on_the_parameter():
    # README: with a fixed bracket, bisection's iterates are built from constants
    # and comparisons only, so the derivative of the iterations as run is exactly
    # 0: the generator says so (an error, not a module returning zeros); one
    # Newton step at the end gives the root's derivative back
    with pytest.raises(gradwright.GradwrightError, match="does not depend"):
        gradwright.generate(BISECTION, ["cube_root"])
    polished = build(BISECTION, "cube_root_polished")["cube_root_polished_grad"]
    for p in (0.3, 1.0, 5.0):
        # d p^(1/3) / dp = 1 / (3 p^(2/3)) (closed form); the bracket is 1e-13
        # wide, the Newton step's derivative is off by about that much
        _, (p_bar,) = polished(p)
        assert rel_err(p_bar, 1.0 / (3.0 * p ** (2.0 / 3.0))) < 1e-11


# -- early exits against mpmath central differences --------------------------------


def _against_mpmath(source: str, func: str, args: tuple, active: list[int]) -> None:
    value, grads = build(source, func)[f"{func}_grad"](*args)
    assert same_bits(value, run_source(source)[func](*args))
    # reference: mpmath central differences of the model's own text, 50 digits
    exact = mp_gradient(mp_function(source, func), args, active)
    for k, reference in zip(active, exact, strict=True):
        if isinstance(reference, list):
            for got, ref in zip(grads[k], reference, strict=True):
                assert rel_err(got, ref) < 1e-13, (func, args, k)
        else:
            assert rel_err(grads[k], reference) < 1e-13, (func, args, k)


@pytest.mark.parametrize("usage", [5.0, 10.5, 37.5, 79.0, 95.0])
def test_tariff_break_at_matching_tier(usage):
    _against_mpmath(SOLVERS, "tariff", (usage, 0.2, 0.1), [0, 1, 2])


@pytest.mark.parametrize("a", [0.3, 0.7, 2.0])
def test_search_with_continue(a):
    _against_mpmath(SOLVERS, "search", (a, [0.1, 1.0, 2.0, 0.3, 1.5]), [0, 1])


@pytest.mark.parametrize("a", [0.1, 0.7])
def test_return_inside_for(a):
    _against_mpmath(SOLVERS, "first_over", (a, [0.1, 1.0, 4.0, 0.3]), [0, 1])


@pytest.mark.parametrize("a", [0.01, 0.1, 0.5])
def test_return_inside_while(a):
    _against_mpmath(SOLVERS, "grow_until", (a, 3.0), [0, 1])


NESTED = """
def nested_return(a, n):
    s = 0.0
    for i in range(n):
        j = 0
        while j < i:
            s = s + a * j
            if s > 5.0:
                return s * a
            j = j + 1
    return s


def inner_break(a, xs):
    total = 0.0
    for x in xs:
        y = x
        while True:
            y = y * a
            if y < 0.1:
                break
            total = total + y
    return total


def both_jumps(a, b):
    s = 0.0
    k = 0
    while k < 20:
        k = k + 1
        if k % 3 == 0:
            continue
        s = s + a * s + b
        if s > 40.0:
            break
        for m in range(3):
            if m == k % 2:
                continue
            s = s * (1.0 + 0.01 * a)
    return s


def tuple_result(a):
    x = a
    for k in range(10):
        x = x * 1.5
        if x > 4.0:
            return x, x * a
    return a, x
"""


@pytest.mark.parametrize(
    "func, args, active",
    [
        ("nested_return", (0.7, 6), [0]),
        ("nested_return", (0.1, 6), [0]),
        ("inner_break", (0.5, [1.0, 2.0, 0.05]), [0, 1]),
        ("both_jumps", (0.3, 1.2), [0, 1]),
        ("both_jumps", (0.05, 0.5), [0, 1]),
    ],
)
def test_nested_loops_with_jumps(func, args, active):
    _against_mpmath(NESTED, func, args, active)


def test_return_of_a_tuple_inside_a_loop():
    ns = build(NESTED, "tuple_result")
    f_mp = mp_function(NESTED, "tuple_result")
    for a in (0.5, 1.0):
        primal = ns["tuple_result"](a)
        jacobian = ns["tuple_result_jacobian"](a)
        for i in range(2):
            # reference: mpmath central differences of each output, 50 digits
            (exact,) = mp_gradient(lambda x, i=i, f=f_mp: f(x)[i], (a,), [0])
            assert rel_err(jacobian[1][i][0], exact) < 1e-13
        assert jacobian[0] == primal


def test_loops_stay_loops():
    text = gradwright.generate(SOLVERS, ["newton_sqrt", "tariff"])
    # the forward sweep runs the source's loop and counts its iterations; the
    # reverse sweep runs that many, as a loop
    assert "    while abs(x * x - a) > tol:\n" in text
    assert "        x_saved.append(x)\n" in text
    assert "for k in reversed(range(iterations)):" in text
    assert "for tier in reversed(range(iterations" in text


ARRAYS = """
import numpy as np


def np_newton(a, tol):
    x = a
    while np.max(np.abs(x * x - a)) > tol:
        x = 0.5 * (x + a / x)
    return np.sum(x)
"""


def test_numpy_newton_while_against_closed_form():
    np = pytest.importorskip("numpy")
    grad = build(ARRAYS, "np_newton")["np_newton_grad"]
    a = np.array([2.0, 3.0, 0.5, 40.0])
    value, (a_bar, tol_bar) = grad(a, 1e-12)
    assert same_bits(value, run_source(ARRAYS)["np_newton"](a, 1e-12))
    for got, ak in zip(a_bar, a, strict=True):
        # d sqrt(a) / da = 1 / (2 sqrt(a)) (closed form), as for the scalar case
        assert rel_err(got, 1.0 / (2.0 * math.sqrt(ak))) < 1e-10
    assert tol_bar == 0.0


HELPERS = """
import math


def g(u, c):
    return math.sin(u) * c + u


def helper_newton(m, c):
    x = m
    while abs(g(x, c) - m) > 1e-13:
        x = x - (g(x, c) - m) / (math.cos(x) * c + 1.0)
    return x


def helper_body(m, c):
    x = m
    k = 0
    while k < 5:
        y = g(x, c)
        if y > 3.0:
            break
        x = x + 0.1 * y
        k = k + 1
    return x
"""


def test_helper_called_in_a_while_test_and_body():
    grad = build(HELPERS, "helper_newton")["helper_newton_grad"]
    for m, c in ((0.7, 0.4), (2.0, 0.9)):
        x, (m_bar, c_bar) = grad(m, c)
        # implicit-function theorem on x + c sin x = m (closed form):
        # dx/dm = 1 / (1 + c cos x), dx/dc = -sin x / (1 + c cos x)
        slope = 1.0 + c * math.cos(x)
        assert rel_err(m_bar, 1.0 / slope) < 1e-10
        assert rel_err(c_bar, -math.sin(x) / slope) < 1e-10


@pytest.mark.parametrize("m, c", [(0.7, 0.4), (2.0, 1.0)])
def test_helper_called_before_a_break(m, c):
    _against_mpmath(HELPERS, "helper_body", (m, c), [0, 1])


EDGES = """
def list_carried_break(x, a):
    buf = [0.0] * 3
    k = 0
    while k < 3:
        buf[k] = buf[k] + x * a
        if buf[k] > 2.0:
            break
        k = k + 1
    return buf[0] + buf[1] * 2.0 + buf[2] * 3.0


def list_loop_break(a, xs):
    s = 0.0
    for v in xs:
        if v * a > 1.5:
            break
        s = s + v * a * a
    return s


def halving(x):
    while x > 1.0:
        x = x / 2.0
    return x * x


def inner_for_break(a, b):
    s = 0.0
    k = 0
    while k < 4:
        k = k + 1
        for j in range(5):
            if j * a > 1.0:
                break
            s = s + b * j
        if s > 6.0:
            break
    return s


def zero_trip_while(x, a):
    while x > 100.0:
        x = x * a
    return x * 2.0


def tuple_state_break(x, v, dt):
    state = (x, v)
    k = 0
    while k < 10:
        p, q = state
        state = (p + dt * q, q - dt * p)
        k = k + 1
        if state[0] < 0.0:
            break
    return state[0] * state[1]


def endless_while_returns(a, xs):
    k = 0
    while True:
        if k >= len(xs):
            return a
        if xs[k] * a > 1.0:
            return xs[k] * a * a
        k = k + 1


def elif_jumps(x, a):
    s = 0.0
    for i in range(6):
        if i == 1:
            continue
        elif x * i > 2.0:
            break
        elif x > a:
            s = s + x
        else:
            s = s + a * i
    return s


def while_in_if_returns(x, a):
    if a > 0.5:
        y = x
        while y < 5.0:
            y = y * (1.0 + a)
            if y > 4.0:
                return y * x
        x = y
    return x + a
"""


@pytest.mark.parametrize(
    "func, args, active",
    [
        ("list_carried_break", (0.7, 1.1), [0, 1]),
        ("list_carried_break", (0.4, 0.5), [0, 1]),
        ("list_loop_break", (0.7, [0.5, 1.0, 3.0, 0.2]), [0, 1]),
        ("list_loop_break", (0.1, [0.5, 1.0, 3.0, 0.2]), [0, 1]),
        ("halving", (7.3,), [0]),
        ("halving", (0.3,), [0]),
        ("inner_for_break", (0.3, 0.7), [0, 1]),
        ("inner_for_break", (0.15, 0.4), [0, 1]),
        ("zero_trip_while", (7.0, 1.2), [0, 1]),
        ("zero_trip_while", (300.0, 0.5), [0, 1]),
        ("tuple_state_break", (0.5, 1.0, 0.3), [0, 1, 2]),
        ("tuple_state_break", (0.5, -1.0, 0.3), [0, 1, 2]),
        ("endless_while_returns", (0.7, [0.5, 1.0, 3.0]), [0, 1]),
        ("endless_while_returns", (0.1, [0.5, 1.0, 3.0]), [0, 1]),
        ("elif_jumps", (0.7, 1.1), [0, 1]),
        ("elif_jumps", (0.3, 0.1), [0, 1]),
        ("while_in_if_returns", (0.7, 0.6), [0, 1]),
        ("while_in_if_returns", (0.7, 0.2), [0, 1]),
        ("while_in_if_returns", (4.5, 0.6), [0, 1]),
    ],
)
def test_edge_shapes(func, args, active):
    _against_mpmath(EDGES, func, args, active)


HELPER_SOLVER = """
import math


def solve(m, e):
    E = m
    while True:
        f = E - e * math.sin(E) - m
        if abs(f) < 1e-14:
            return E
        E = E - f / (1.0 - e * math.cos(E))


def orbit(e, ms):
    total = 0.0
    for m in ms:
        total = total + math.cos(solve(m, e))
    return total
"""


def test_solver_helper_returning_from_its_loop():
    grad = build(HELPER_SOLVER, "orbit")["orbit_grad"]
    solve = run_source(HELPER_SOLVER)["solve"]
    ms, e = [0.3, 1.2, 2.5], 0.4
    value, (e_bar, ms_bar) = grad(e, ms)
    assert same_bits(value, run_source(HELPER_SOLVER)["orbit"](e, ms))
    e_ref = 0.0
    for m, m_bar in zip(ms, ms_bar, strict=True):
        E = solve(m, e)
        slope = 1.0 - e * math.cos(E)
        # d cos(E)/dM = -sin E / (1 - e cos E), d cos(E)/de = -sin^2 E / (1 - e
        # cos E) (closed form, implicit differentiation of Kepler's equation)
        assert rel_err(m_bar, -math.sin(E) / slope) < 1e-10
        e_ref += -math.sin(E) ** 2 / slope
    assert rel_err(e_bar, e_ref) < 1e-10


WHILE_IN_FOR = """
def f(x):
    for i1 in range(2):
        x = x * 0.9
        k3 = 0
        while k3 < 1:
            k3 = k3 + 1
            x += x
    return x
"""


def test_while_updating_a_value_of_an_enclosing_for():
    # found by the dynamic_loops long run: the while loop was taken for a
    # statement reading no active value (the enclosing loop's x was not lowered
    # yet) and copied as written: a zero gradient. d(3.24 x)/dx = 3.24 (closed
    # form: two iterations of x -> 2 * 0.9 x)
    _, (x_bar,) = build(WHILE_IN_FOR, "f")["f_grad"](0.7)
    assert rel_err(x_bar, 3.24) < 1e-15
    _against_mpmath(WHILE_IN_FOR, "f", (0.7,), [0])


AUGMENTED_IN_WHILE = """
def f(x, y):
    y = y * x
    k = 0
    while k < 2:
        k = k + 1
        y **= 2
        y /= 2.0
        y += 1.0
    return y
"""


def test_augmented_assignment_with_a_constant_right_side_in_a_while():
    # found by the long random run: ``y **= 2`` reads y, but the scope analysis
    # records only its binding, so the loop was taken for one reading no active
    # value and copied (then rejected as constant in y). Closed form (chain rule
    # by hand): y0 = x y, then twice y -> y^2 / 2 + 1 (y1, y2); dy2/dy0 = y1 y0
    x, y = 0.8, 1.3
    _, (x_bar, y_bar) = build(AUGMENTED_IN_WHILE, "f")["f_grad"](x, y)
    y0 = x * y
    y1 = y0 * y0 / 2.0 + 1.0
    assert rel_err(y_bar, y1 * y0 * x) < 1e-15
    assert rel_err(x_bar, y1 * y0 * y) < 1e-15
    _against_mpmath(AUGMENTED_IN_WHILE, "f", (x, y), [0, 1])


ZERO_TRIP_WHILE = """
def f(x, n):
    k = 0
    while k < n:
        k = k + 1
        x = 0.25 * k
    return x
"""


def test_a_while_that_overwrites_an_active_value_and_may_not_run():
    # found by the long random run: the loop reads no active value, so it was
    # copied as written, and x after it taken for inactive ("does not depend
    # differentiably on x"); where it runs no trip x is returned unchanged.
    # Closed form: dx_out/dx = 1 for n = 0, 0 otherwise
    grad = build(ZERO_TRIP_WHILE, "f", ["x"])["f_grad"]
    for n, slope in ((0, 1.0), (1, 0.0), (3, 0.0)):
        value, (x_bar,) = grad(1.41, n)
        assert value == (1.41 if n == 0 else 0.25 * n)
        assert x_bar == slope


def test_code_after_continue_in_a_copyable_while_is_reported():
    source = """
def f(x, y):
    k = 0
    while k < 1:
        k = k + 1
        continue
        x = y
    return x
"""
    with pytest.raises(gradwright.GradwrightError) as error:
        gradwright.generate(source, ["f"], wrt=["x"])
    assert "code after the continue statement is never run" in str(error.value)


CUBIC_ROOT = """
def root(a, b):
    x = 1.0
    it = 0
    while True:
        step = (x * x * x + a * x - b) / (3.0 * x * x + a)
        x = x - step
        it += 1
        if abs(step) < 1e-15 * abs(x) or it > 60:
            break
    return x
"""


def test_a_closing_break_is_the_test_itself_against_implicit_derivative():
    text = gradwright.generate(CUBIC_ROOT, ["root"])
    forward = text.split("def root_grad")[1].split("# reverse sweep")[0]
    # no flag set on both sides and tested after: the test breaks, after the count
    assert "= True" not in forward and "= False" not in forward
    assert re.search(
        r"iterations \+= 1\n\s+# if .*\n\s+if abs\(step\) < .*:\n\s+break\n", forward
    )
    a, b = 2.0, 5.0
    x, (a_bar, b_bar) = build(CUBIC_ROOT, "root")["root_grad"](a, b)
    assert abs(x**3 + a * x - b) < 1e-14
    # implicit function theorem on x**3 + a x - b = 0 (textbook): dx/da =
    # -x / (3 x**2 + a), dx/db = 1 / (3 x**2 + a)
    assert rel_err(a_bar, -x / (3.0 * x * x + a)) < 1e-12
    assert rel_err(b_bar, 1.0 / (3.0 * x * x + a)) < 1e-12
