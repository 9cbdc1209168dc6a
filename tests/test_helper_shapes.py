"""Helpers of any shape: numbers, tuples, lists and NumPy arrays in and out.

A helper that takes numbers and returns one number keeps the partials form
(``NAME_grad``); any other is reversed by ``NAME_adjoint`` (vjp form, joint
reversal: DEVELOPERS.md). Each check names its outside reference beside it.
"""

from __future__ import annotations

import math
import re
import sys
from pathlib import Path

import mpmath
import numpy as np
import pytest
import sympy
from support import mp_function, mp_gradient, rel_err, run_source

import gradwright

sys.path.insert(0, str(Path(__file__).resolve().parent / "micropython"))

from harness import require_micropython, run_micropython  # noqa: E402


def generate(source: str, functions: list[str], wrt=None, target="cpython") -> dict:
    text = gradwright.generate(source, functions, wrt, target=target)
    namespace: dict = {}
    exec(compile(text, "<gradwright>", "exec"), namespace)
    namespace["__text__"] = text
    return namespace


ARM = """
import math
import re

L1 = 1.0
L2 = 0.6


def forward_kinematics(q1, q2):
    x = L1 * math.cos(q1) + L2 * math.cos(q1 + q2)
    y = L1 * math.sin(q1) + L2 * math.sin(q1 + q2)
    return x, y


def tip(q1, q2):
    x, y = forward_kinematics(q1, q2)
    return x, y


def reach(q1, q2, tx, ty):
    p = forward_kinematics(q1, q2)
    return (p[0] - tx) ** 2 + (p[1] - ty) ** 2
"""


def _arm_jacobian(q1: float, q2: float) -> list[list[float]]:
    # textbook closed form of the planar 2-link arm's tip Jacobian
    s1, c1 = math.sin(q1), math.cos(q1)
    s12, c12 = math.sin(q1 + q2), math.cos(q1 + q2)
    return [
        [-1.0 * s1 - 0.6 * s12, -0.6 * s12],
        [1.0 * c1 + 0.6 * c12, 0.6 * c12],
    ]


@pytest.mark.parametrize(("q1", "q2"), [(0.3, 0.9), (-1.2, 2.5), (2.0, -0.4)])
def test_arm_tuple_helper_against_the_closed_form_jacobian(q1, q2):
    module = generate(ARM, ["tip", "reach"])
    assert "def forward_kinematics_adjoint(q1, q2, seed):" in module["__text__"]
    value, jac = module["tip_jacobian"](q1, q2)
    assert value == run_source(ARM)["tip"](q1, q2)
    exact = _arm_jacobian(q1, q2)  # closed form
    for i in range(2):
        for j in range(2):
            assert abs(jac[i][j] - exact[i][j]) < 1e-15
    tx, ty = 0.4, 1.1
    _, grad = module["reach_grad"](q1, q2, tx, ty)
    x, y = run_source(ARM)["forward_kinematics"](q1, q2)
    # closed form: d/dq |p - t|^2 = 2 (p - t)^T J
    for j in range(2):
        expected = 2 * (x - tx) * exact[0][j] + 2 * (y - ty) * exact[1][j]
        assert rel_err(grad[j], expected) < 1e-14
    assert rel_err(grad[2], -2 * (x - tx)) < 1e-15
    assert rel_err(grad[3], -2 * (y - ty)) < 1e-15


HORNER = """
def horner(coeffs, x):
    acc = 0.0
    for c in reversed(coeffs):
        acc = acc * x + c
    return acc


def poly(coeffs, x):
    return horner(coeffs, x)


def fit(coeffs, xs, ys):
    return sum((horner(coeffs, x) - y) ** 2 for x, y in zip(xs, ys))
"""


def test_horner_over_a_coefficient_list_against_sympy():
    module = generate(HORNER, ["poly", "fit"], None)
    coeffs, x0 = [0.5, -1.25, 2.0, 0.75], 1.3
    value, (c_bar, x_bar) = module["poly_grad"](coeffs, x0)
    x = sympy.Symbol("x")
    cs = sympy.symbols("c0:4")
    p = sum(c * x**k for k, c in enumerate(cs))
    subs = {
        x: sympy.Rational(13, 10),
        **{c: sympy.nsimplify(v) for c, v in zip(cs, coeffs, strict=True)},
    }
    assert rel_err(value, float(p.subs(subs))) < 1e-15
    # SymPy: dp/dx and dp/dc_k
    assert rel_err(x_bar, float(sympy.diff(p, x).subs(subs))) < 1e-14
    for k in range(4):
        assert rel_err(c_bar[k], float(sympy.diff(p, cs[k]).subs(subs))) < 1e-14
    xs, ys = [0.0, 0.5, 1.5], [1.0, 0.2, -0.7]
    _, (fc_bar, xs_bar, ys_bar) = module["fit_grad"](coeffs, xs, ys)
    loss = sum(
        (p.subs(x, sympy.nsimplify(xi)) - sympy.nsimplify(yi)) ** 2
        for xi, yi in zip(xs, ys, strict=True)
    )
    coefficient_subs = {c: sympy.nsimplify(v) for c, v in zip(cs, coeffs, strict=True)}
    for k in range(4):
        exact = float(sympy.diff(loss, cs[k]).subs(coefficient_subs))  # SymPy
        assert rel_err(fc_bar[k], exact) < 1e-13
    # the data points' entries: mpmath central differences of the model's text
    exact = mp_gradient(mp_function(HORNER, "fit"), [coeffs, xs, ys], [1, 2])
    for got, ref in zip(xs_bar + ys_bar, exact[0] + exact[1], strict=True):
        assert rel_err(got, ref) < 1e-12


ARRAYS = """
import numpy as np


def normalize(z):
    return z / np.sum(z)


def dense(x, W, b):
    return np.tanh(x @ W + b)


def f(z, c):
    return np.sum(normalize(z) * c)


def net(x, W, b, V):
    h = dense(x, W, b)
    return np.sum(dense(h, V, 0.1) ** 2)
"""


def test_normalize_helper_against_mpmath_differences():
    module = generate(ARRAYS, ["f"], ["z"])
    z, c = np.array([1.0, 2.0, 3.0]), np.array([0.5, -1.0, 2.0])
    _, (z_bar,) = module["f_grad"](z, c)

    def f_mp(*zs):  # the model in mpmath
        total = mpmath.fsum(zs)
        return mpmath.fsum(
            zk / total * ck for zk, ck in zip(zs, [0.5, -1, 2], strict=True)
        )

    exact = mp_gradient(f_mp, [1.0, 2.0, 3.0], [0, 1, 2])  # mpmath differences
    for got, ref in zip(z_bar, exact, strict=True):
        assert rel_err(got, ref) < 1e-14
    # issue 10 §1: central differences give about [-0.042, -0.292, 0.208]
    assert np.allclose(z_bar, [-0.042, -0.292, 0.208], atol=1e-3)


def test_dense_layer_helper_against_numpy_differences():
    module = generate(ARRAYS, ["net"])
    rng = np.random.default_rng(7)
    args = [
        rng.normal(size=3),
        rng.normal(size=(3, 4)),
        rng.normal(size=4),
        rng.normal(size=(4, 2)),
    ]
    value, grads = module["net_grad"](*args)
    net = run_source(ARRAYS)["net"]
    assert value == net(*args)
    for k, grad in enumerate(grads):
        assert grad.shape == args[k].shape
        # NumPy central differences, step 1e-6 (truncation ~1e-12)
        expected = np.zeros_like(args[k])
        for i in np.ndindex(args[k].shape):
            up = [a.copy() for a in args]
            down = [a.copy() for a in args]
            up[k][i] += 1e-6
            down[k][i] -= 1e-6
            expected[i] = (net(*up) - net(*down)) / 2e-6
        np.testing.assert_allclose(grad, expected, rtol=1e-7, atol=1e-9)


CHAINED = """
import math
import re


def polar(r, t):
    return r * math.cos(t), r * math.sin(t)


def rotate(x, y, a):
    c = math.cos(a)
    s = math.sin(a)
    return c * x - s * y, s * x + c * y


def gap(r, t, a, tx):
    x, y = polar(r, t)
    u, v = rotate(x, y, a)
    return math.hypot(u - tx, v)


def spin(r, t, a, tx, n):
    x, y = polar(r, t)
    total = 0.0
    for i in range(n):
        x, y = rotate(x, y, a * (i + 1))
        if x > 0.0:
            total += gap(x, y, a, tx)
        else:
            total += x * y
    return total + y
"""


@pytest.mark.parametrize(
    "point",
    [(1.3, 0.4, 0.7, 0.2, 5), (0.8, -1.1, 0.3, -0.5, 4), (1.0, 2.0, 1.9, 0.1, 3)],
)
def test_helpers_calling_helpers_in_a_loop_against_mpmath(point):
    """A tuple helper called in a loop (its arguments saved per iteration) and in a
    branch; a helper of numbers (partials form) calling two tuple helpers."""
    module = generate(CHAINED, ["spin"])
    text = module["__text__"]
    assert "def gap_grad(" in text and "def rotate_adjoint(" in text
    value, grads = module["spin_grad"](*point)
    assert value == run_source(CHAINED)["spin"](*point)
    # mpmath central differences of the model's own text, 50 digits
    exact = mp_gradient(mp_function(CHAINED, "spin"), list(point), [0, 1, 2, 3])
    for got, ref in zip(grads[:4], exact, strict=True):
        assert rel_err(got, ref) < 1e-12
    assert grads[4] == 0.0


LISTS = """
def smooth(xs, w):
    ys = [0.0] * len(xs)
    for i in range(len(xs)):
        left = xs[i - 1] if i > 0 else xs[i]
        ys[i] = (1.0 - w) * xs[i] + w * left
    return ys


def energy(xs, w):
    ys = smooth(xs, w)
    total = 0.0
    for k in range(2):
        zs = smooth(ys, w * (k + 1))
        for i in range(len(zs)):
            total += zs[i] ** 2
    return total + ys[0]
"""


def test_list_in_list_out_helper_against_mpmath():
    module = generate(LISTS, ["energy"])
    xs, w = [1.0, -0.5, 2.0, 0.25], 0.3
    value, (xs_bar, w_bar) = module["energy_grad"](xs, w)
    assert value == run_source(LISTS)["energy"](xs, w)
    # mpmath central differences of the model's own text, 50 digits
    exact = mp_gradient(mp_function(LISTS, "energy"), [xs, w], [0, 1])
    for got, ref in zip(xs_bar, exact[0], strict=True):
        assert rel_err(got, ref) < 1e-12
    assert rel_err(w_bar, exact[1]) < 1e-12


def test_one_adjoint_function_per_helper():
    """Every call site shares the helper's one adjoint function (no inlining)."""
    text = generate(LISTS, ["energy"])["__text__"]
    assert text.count("def smooth_adjoint(") == 1
    assert text.count("smooth_adjoint(") == 3


BOARD = [
    (
        ARM,
        ["tip", "reach"],
        [("tip_jacobian", (0.3, 0.9)), ("reach_grad", (0.3, 0.9, 0.4, 1.1))],
    ),
    (
        HORNER,
        ["poly", "fit"],
        [("fit_grad", ([0.5, -1.25, 2.0], [0.0, 0.5, 1.5], [1.0, 0.2, -0.7]))],
    ),
    (CHAINED, ["spin"], [("spin_grad", (1.3, 0.4, 0.7, 0.2, 5))]),
    (LISTS, ["energy"], [("energy_grad", ([1.0, -0.5, 2.0, 0.25], 0.3))]),
]


def _flatten(value: object) -> list[float]:
    if isinstance(value, (list, tuple)):
        return [x for item in value for x in _flatten(item)]
    return [float(value)]  # type: ignore[arg-type]


@pytest.mark.micropython
@pytest.mark.parametrize("case", range(len(BOARD)))
def test_helper_shapes_on_micropython(case):
    """The same module on the board: within 1e-12 relative of CPython's run (the
    same double arithmetic; CPython's run is checked against references above)."""
    require_micropython()
    source, functions, calls = BOARD[case]
    text = gradwright.generate(source, functions, target="micropython")
    driver = (
        text
        + "\n"
        + "\n".join(
            f"print(repr({name}({', '.join(repr(a) for a in args)})))"
            for name, args in calls
        )
        + "\n"
    )
    board = run_micropython(driver).strip().splitlines()
    namespace: dict = {}
    exec(compile(text, "<board>", "exec"), namespace)
    assert len(board) == len(calls)
    import ast

    for line, (name, args) in zip(board, calls, strict=True):
        got = _flatten(ast.literal_eval(line))
        expected = _flatten(namespace[name](*args))
        assert len(got) == len(expected)
        for a, b in zip(got, expected, strict=True):
            assert abs(a - b) <= 1e-12 * max(1.0, abs(b)), (name, a, b)


DEFAULTS = """
def scaled(a, b=0.5):
    return a * b, a + b


def f(x, y):
    u, v = scaled(x, b=y)
    p, q = scaled(x)
    return u * v + p * q
"""


def test_tuple_helper_with_a_default_parameter():
    """The seed goes by keyword: after a default it is keyword-only (a module that
    raised TypeError before)."""
    module = generate(DEFAULTS, ["f"])
    x, y = 0.3, 0.7
    _, (x_bar, y_bar) = module["f_grad"](x, y)
    # closed form: f = x y (x + y) + 0.5 x (x + 0.5)
    assert rel_err(x_bar, 2 * x * y + y * y + x + 0.25) < 1e-15
    assert rel_err(y_bar, x * x + 2 * x * y) < 1e-15


ARRAY_CORNERS = """
import numpy as np


def first(a, b):
    return a


def total(a):
    t = a
    return np.sum(t)


def f(w, A):
    u = first(w, A)
    return np.sum(A + total(A)) + np.sum(u * u)
"""


def test_array_helpers_with_an_unused_operand_and_a_reduced_result():
    """Found by the numpy_helpers random family: partials of an unused matrix
    operand raised a broadcasting error, and a helper's scalar result added to a
    matrix lost its adjoint's sum (2 instead of 7)."""
    module = generate(ARRAY_CORNERS, ["f"])
    w = np.array([0.5, -1.5])
    A = np.arange(6.0).reshape(2, 3) / 7.0
    _, (w_bar, A_bar) = module["f_grad"](w, A)
    # closed form: f = sum(A) + 6 sum(A) + |w|^2
    np.testing.assert_array_equal(w_bar, 2 * w)
    np.testing.assert_allclose(A_bar, np.full((2, 3), 7.0), rtol=1e-15)


BRANCHED = """
import math
import re


def polar(r, t):
    return r * math.cos(t), r * math.sin(t)


def pick(r, t):
    if r > 1.0:
        p = polar(r, t)
    else:
        p = polar(t, r)
    return polar(r, t)[0] * p[1]
"""


@pytest.mark.parametrize("point", [(1.2, 0.4), (0.7, 0.4)])
def test_tuple_result_bound_to_a_name_in_each_branch(point):
    """``p = polar(...)`` on both sides of an if binds p's elements like
    ``p = (a, b)`` (it was refused as a different list on each path)."""
    module = generate(BRANCHED, ["pick"])
    value, grads = module["pick_grad"](*point)
    assert value == run_source(BRANCHED)["pick"](*point)
    # mpmath central differences of the model's own text, 50 digits
    exact = mp_gradient(mp_function(BRANCHED, "pick"), list(point), [0, 1])
    for got, ref in zip(grads, exact, strict=True):
        assert rel_err(got, ref) < 1e-13


def test_a_listed_function_also_called_as_a_helper():
    """Its Jacobian and its adjoint are both generated, once each (a rebase once
    left two adjoints and no Jacobian)."""
    module = generate(ARM, ["tip", "forward_kinematics"])
    names = re.findall(r"^def (\w+)", module["__text__"], re.M)
    assert len(names) == len(set(names))
    exact = _arm_jacobian(0.3, 0.9)  # closed form
    for name in ("tip_jacobian", "forward_kinematics_jacobian"):
        _, jac = module[name](0.3, 0.9)
        for i in range(2):
            for j in range(2):
                assert abs(jac[i][j] - exact[i][j]) < 1e-15


ARRAY_TUPLES = """
import numpy as np


def moments(z):
    m = np.mean(z)
    return m, np.mean((z - m) ** 2)


def scale(z, s):
    return [s * z, z / s]


def f(z, w):
    m, v = moments(z * w)
    p = moments(w)
    parts = scale(z, v)
    return m * v + p[1] + np.sum(parts[0] * parts[1])
"""


def test_array_helpers_returning_a_tuple_and_a_list_literal():
    module = generate(ARRAY_TUPLES, ["f"])
    z, w = np.array([0.5, 1.5, -0.2]), np.array([1.1, 0.3, 0.7])
    value, grads = module["f_grad"](z, w)
    f = run_source(ARRAY_TUPLES)["f"]
    assert value == f(z, w)
    for k, grad in enumerate(grads):
        # NumPy central differences, step 1e-6 (truncation ~1e-12)
        expected = np.zeros(3)
        for i in range(3):
            up, down = [z.copy(), w.copy()], [z.copy(), w.copy()]
            up[k][i] += 1e-6
            down[k][i] -= 1e-6
            expected[i] = (f(*up) - f(*down)) / 2e-6
        np.testing.assert_allclose(grad, expected, rtol=1e-7, atol=1e-9)


NAMED_ELEMENTS = """
def g1(a, b=0.5):
    t3 = b
    return t3, a


def f(x, y):
    p4 = g1(x, b=(x * x))
    t5 = (p4[0] * y + p4[1])
    t6 = (t5 if y < t5 < y else t5)
    t6 = t6
    return (t6 + 0.5)
"""


def test_tuple_elements_take_names_that_clash_with_nothing():
    """Found by the helper_shapes long run: an element named p4_1 met the
    temporary p4_1 of the same statement, a refused layout ("internal error")."""
    module = generate(NAMED_ELEMENTS, ["f"])
    _, (x_bar, y_bar) = module["f_grad"](1.0, -0.45)
    # closed form: f = x^2 y + x + 0.5
    assert rel_err(x_bar, 2 * 1.0 * -0.45 + 1.0) < 1e-15
    assert rel_err(y_bar, 1.0) < 1e-15


LOOP_RESULT = """
def g0(xs, a):
    acc = a
    for c in xs:
        acc = (a * c)
    return acc


def f(x, xs):
    return g0(xs, xs[0]) * x
"""


def test_adjoint_of_a_helper_whose_loop_only_makes_its_result():
    """Found by the helper_shapes long run: the adjoint function left out the
    loop that makes the result, whose reverse reads its trip count (refused)."""
    module = generate(LOOP_RESULT, ["f"])
    x, xs = 1.5, [-0.25, 0.6]
    _, (x_bar, xs_bar) = module["f_grad"](x, xs)
    # closed form: f = x * xs[0] * xs[-1]
    assert rel_err(x_bar, xs[0] * xs[1]) < 1e-15
    assert rel_err(xs_bar[0], x * xs[1]) < 1e-15
    assert rel_err(xs_bar[1], x * xs[0]) < 1e-15
