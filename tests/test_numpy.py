"""NumPy models ("array mode") differentiated by gradwright, against outside references.

- Closed forms: the logistic-regression log-likelihood gradient X^T (sigma(Xw) - y)
  (Bishop, "Pattern Recognition and Machine Learning", section 4.3.2; recalled from
  memory), with sigma from scipy.special.expit; the least-squares gradient
  2 A^T (Ax - b) and the quadratic-form gradient (A + A^T) x (Petersen & Pedersen,
  "The Matrix Cookbook", section 2.4; recalled from memory); the softmax
  cross-entropy gradient softmax(z) - y (common practice), with scipy.special.softmax.
- SymPy: matrix products, transposes, outer products, quadratic forms and the 2-norm
  written with sympy.Matrix, differentiated by sympy.diff.
- Everything else: Richardson-extrapolated central differences in double precision
  (:func:`richardson_gradient`, error analysis there): broadcasting patterns,
  spellings, shapes and reads. Each array rule on its own is checked against SymPy
  at 1e-12 in tests/test_array_rules.py, which also fails when a rule has no case.
- The value ``f_grad`` returns is the copied primal's result, bit for bit.

Data are invented for these tests, drawn from seeded generators.
"""

from __future__ import annotations

import ast
import subprocess
import sys
import textwrap

import mpmath
import numpy as np
import pytest
import scipy.special
import sympy
from support import build, run_source, same_bits

import gradwright
from gradwright.workflow.cli import main

# ---------------------------------------------------------------------------------
# helpers


def numpy_model(params: str, body: str, name: str = "f") -> str:
    """A model module that imports numpy, with one function ``name(params)``."""
    body = textwrap.indent(textwrap.dedent(body), "    ")
    return f"import numpy as np\n\n\ndef {name}({params}):\n{body}"


def richardson_gradient(fn, args: tuple, k: int, step: float = 1e-3):
    """d fn(*args) / d args[k], element by element, by Richardson extrapolation.

    The central difference D(h) = (f(x + h) - f(x - h)) / 2h has the error series
    c2 h**2 + c4 h**4 + ...; (4 D(h/2) - D(h)) / 3 cancels the h**2 term, so the
    estimate is of order 4: its truncation error is about h**4 |f'''''| / 480.
    With h = 1e-3 * max(1, |x|) that is ~1e-13 for the smooth, O(1)-scaled data
    used here; the rounding error is about 3 * eps * |f| / h ~ 7e-13 * |f|. Checks
    against it therefore use rtol 1e-7 and an absolute floor of 1e-8 * (|f| + the
    largest partial): the errors seen are ~1e-11 relative, four orders below, while
    a wrong rule (a missing factor, a dropped broadcast sum, a misplaced adjoint) is
    off by O(1) relative, and a gradient scaled by 1 + 1e-5 already fails. The
    steps are exact: the denominator is the difference of the two perturbed
    coordinates as floats, not 2h.
    """
    base = args[k]
    python_float = isinstance(base, float) and not isinstance(base, np.generic)
    x = np.array(base, dtype=float)
    grad = np.zeros(x.shape)

    def value_at(point: np.ndarray) -> float:
        moved = list(args)
        moved[k] = float(point) if python_float else point
        return float(np.sum(fn(*moved)))

    for idx in np.ndindex(x.shape):
        h = step * max(1.0, abs(float(x[idx])))

        def central(width: float, idx=idx) -> float:
            up, down = x.copy(), x.copy()
            up[idx] += width
            down[idx] -= width
            return (value_at(up) - value_at(down)) / (up[idx] - down[idx])

        grad[idx] = (4.0 * central(h / 2.0) - central(h)) / 3.0
    return float(grad) if python_float else grad


def assert_close_to_differences(fn, args, k, got, value, rtol=1e-7):
    """``got`` against :func:`richardson_gradient` (tolerance argued there)."""
    reference = richardson_gradient(fn, args, k)
    floor = 1e-8 * (abs(float(np.sum(value))) + float(np.max(np.abs(reference))))
    np.testing.assert_allclose(got, reference, rtol=rtol, atol=floor)


def assert_same_value(value, primal) -> None:
    """The gradient function's value is the primal's result, bit for bit."""
    assert type(value) is type(primal)
    if isinstance(primal, np.ndarray):
        assert value.dtype == primal.dtype and np.array_equal(value, primal)
    else:
        assert same_bits(float(value), float(primal))


def assert_shaped_like(grad, param) -> None:
    """A gradient entry has its parameter's shape; a Python float gets a float."""
    if isinstance(param, float):
        assert isinstance(grad, float), type(grad)
    else:
        assert np.shape(grad) == np.shape(param)


def check_against_differences(source, args, wrt, rtol=1e-7):
    """Generate, then compare every wrt entry with Richardson differences of the
    model's own function (the source executed as written, not the generated copy);
    also the value and the entries' shapes."""
    ns = build(source, "f", wrt)
    model = run_source(source)["f"]
    value, grads = ns["f_grad"](*args)
    assert_same_value(value, ns["f"](*args))
    assert_same_value(value, model(*args))
    names = [p.strip() for p in source.split("def f(")[1].split(")")[0].split(",")]
    assert len(grads) == len(wrt)
    for name, grad in zip(wrt, grads, strict=True):
        k = names.index(name)
        assert_shaped_like(grad, args[k])
        assert_close_to_differences(model, args, k, grad, value, rtol)
    return value, grads


def rng(seed: int) -> np.random.Generator:
    return np.random.default_rng(seed)


# ---------------------------------------------------------------------------------
# closed forms

LOGISTIC_MEAN = numpy_model(
    "w, X, y",
    """\
    z = X @ w
    p = 1.0 / (1.0 + np.exp(-z))
    return -np.mean(y * np.log(p) + (1.0 - y) * np.log(1.0 - p))
    """,
)

LOGISTIC_SUM = numpy_model(
    "w, X, y",
    """\
    z = X.dot(w)
    return np.sum(np.log1p(np.exp(z)) - y * z)
    """,
)


def _logistic_data(n=40, d=5):
    g = rng(11)
    X = g.normal(size=(n, d))
    w = 0.4 * g.normal(size=d)
    y = (g.uniform(size=n) < 0.5).astype(float)
    return w, X, y


def test_logistic_mean_nll_against_closed_form():
    w, X, y = _logistic_data()
    ns = build(LOGISTIC_MEAN, "f", ["w"])
    value, (w_bar,) = ns["f_grad"](w, X, y)
    assert_same_value(value, ns["f"](w, X, y))
    # Bishop, PRML section 4.3.2 (recalled from memory): grad of the summed
    # negative log-likelihood is X^T (sigma(Xw) - y); the mean divides by n.
    # sigma from scipy.special.expit. |Xw| < 4 here, so 1 - p loses at most ~2
    # digits; both sides are O(n d) rounded operations: rtol 1e-11.
    reference = X.T @ (scipy.special.expit(X @ w) - y) / len(y)
    assert np.max(np.abs(X @ w)) < 4.0
    assert w_bar.shape == w.shape
    np.testing.assert_allclose(w_bar, reference, rtol=1e-11, atol=1e-14)


def test_logistic_sum_nll_against_closed_form():
    w, X, y = _logistic_data()
    ns = build(LOGISTIC_SUM, "f", ["w"])
    value, (w_bar,) = ns["f_grad"](w, X, y)
    assert_same_value(value, ns["f"](w, X, y))
    # log(1 + e^z) - y z is the same negative log-likelihood (Bishop, recalled
    # from memory); d/dz = sigma(z) - y, so the gradient is X^T (sigma(Xw) - y).
    reference = X.T @ (scipy.special.expit(X @ w) - y)
    np.testing.assert_allclose(w_bar, reference, rtol=1e-12, atol=1e-13)


LEAST_SQUARES = numpy_model(
    "x, A, b",
    """\
    r = A @ x - b
    return r @ r
    """,
)


def test_least_squares_against_closed_form():
    g = rng(12)
    A, b, x = g.normal(size=(7, 4)), g.normal(size=7), g.normal(size=4)
    ns = build(LEAST_SQUARES, "f", ["x", "A", "b"])
    value, (x_bar, A_bar, b_bar) = ns["f_grad"](x, A, b)
    assert_same_value(value, ns["f"](x, A, b))
    r = A @ x - b
    # The Matrix Cookbook, section 2.4 (recalled from memory):
    # d ||Ax - b||^2 / dx = 2 A^T (Ax - b); by the same rule d/dA = 2 (Ax - b) x^T
    # and d/db = -2 (Ax - b). A few tens of rounded operations: rtol 1e-13.
    np.testing.assert_allclose(x_bar, 2.0 * A.T @ r, rtol=1e-13, atol=1e-14)
    np.testing.assert_allclose(A_bar, 2.0 * np.outer(r, x), rtol=1e-13, atol=1e-14)
    np.testing.assert_allclose(b_bar, -2.0 * r, rtol=1e-13, atol=1e-14)


@pytest.mark.parametrize(
    "expression", ["x @ A @ x", "x.dot(A.dot(x))", "np.dot(x, np.matmul(A, x))"]
)
def test_quadratic_form_against_closed_form(expression):
    g = rng(13)
    A, x = g.normal(size=(5, 5)), g.normal(size=5)
    assert not np.allclose(A, A.T)  # the closed form tells A from A^T only then
    ns = build(numpy_model("x, A", f"return {expression}\n"), "f")
    value, (x_bar, A_bar) = ns["f_grad"](x, A)
    assert_same_value(value, ns["f"](x, A))
    # The Matrix Cookbook, section 2.4 (recalled from memory): d x^T A x / dx =
    # (A + A^T) x, and d/dA = x x^T.
    np.testing.assert_allclose(x_bar, (A + A.T) @ x, rtol=1e-13, atol=1e-14)
    np.testing.assert_allclose(A_bar, np.outer(x, x), rtol=1e-13, atol=1e-14)


def test_quadratic_form_against_sympy_matrix():
    # SymPy: x^T A x built from sympy.Matrix symbols and differentiated exactly
    g = rng(14)
    A, x = g.normal(size=(3, 3)), g.normal(size=3)
    xs = sympy.Matrix(sympy.symbols("x0:3"))
    As = sympy.Matrix(3, 3, sympy.symbols("a0:9"))
    form = (xs.T * As * xs)[0]
    point = dict(zip(list(xs) + list(As), list(x) + list(A.ravel()), strict=True))
    x_ref = [float(sympy.diff(form, s).subs(point)) for s in xs]
    A_ref = [float(sympy.diff(form, s).subs(point)) for s in As]
    ns = build(numpy_model("x, A", "return x @ A @ x\n"), "f")
    _, (x_bar, A_bar) = ns["f_grad"](x, A)
    np.testing.assert_allclose(x_bar, x_ref, rtol=1e-13, atol=1e-14)
    np.testing.assert_allclose(A_bar.ravel(), A_ref, rtol=1e-13, atol=1e-14)


# ---------------------------------------------------------------------------------
# small networks, against Richardson differences

TWO_LAYER = numpy_model(
    "W1, b1, W2, b2, X, Y",
    """\
    H = np.tanh(X @ W1 + b1)
    out = H @ W2 + b2
    r = out - Y
    return np.mean(r * r)
    """,
)


def test_two_layer_tanh_network():
    g = rng(21)
    X, Y = g.normal(size=(6, 3)), g.normal(size=(6, 2))
    W1, W2 = 0.7 * g.normal(size=(3, 4)), 0.7 * g.normal(size=(4, 2))
    b1, b2 = 0.3 * g.normal(size=4), 0.3 * g.normal(size=(1, 2))
    args = (W1, b1, W2, b2, X, Y)
    # b1 (4,) broadcasts as a 1-D row, b2 (1, 2) as a 2-D row, over 6 samples
    check_against_differences(TWO_LAYER, args, ["W1", "b1", "W2", "b2"])


SOFTMAX_CE = numpy_model(
    "W, b, X, Y",
    """\
    Z = X @ W + b
    m = np.max(Z, axis=1, keepdims=True)
    s = Z - m
    lse = np.log(np.sum(np.exp(s), axis=1, keepdims=True))
    return -np.sum(Y * (s - lse)) / X.shape[0]
    """,
)


def _softmax_data():
    g = rng(22)
    X = g.normal(size=(5, 3))
    W, b = g.normal(size=(3, 4)), g.normal(size=4)
    Y = np.eye(4)[g.integers(0, 4, size=5)]
    return W, b, X, Y


def test_softmax_cross_entropy_against_differences():
    W, b, X, Y = _softmax_data()
    check_against_differences(SOFTMAX_CE, (W, b, X, Y), ["W", "b"])


def test_softmax_cross_entropy_against_closed_form():
    W, b, X, Y = _softmax_data()
    ns = build(SOFTMAX_CE, "f", ["W", "b"])
    _, (W_bar, b_bar) = ns["f_grad"](W, b, X, Y)
    # d CE / d Z = (softmax(Z) - Y) / n (common practice); scipy.special.softmax.
    # The max subtraction contributes nothing in exact arithmetic (each row's
    # adjoints of m sum to zero): its rounding residue is ~1e-16, inside rtol.
    dZ = (scipy.special.softmax(X @ W + b, axis=1) - Y) / X.shape[0]
    np.testing.assert_allclose(W_bar, X.T @ dZ, rtol=1e-12, atol=1e-15)
    np.testing.assert_allclose(b_bar, dZ.sum(axis=0), rtol=1e-12, atol=1e-15)


# ---------------------------------------------------------------------------------
# elementwise functions, each against Richardson differences

#: name -> the interval its arguments are drawn from (inside the domain, away from
#: kinks and poles by much more than the difference step)
UNARY = {
    "exp": (-2.0, 2.0),
    "log": (0.5, 3.0),
    "log1p": (-0.5, 2.0),
    "expm1": (-2.0, 2.0),
    "exp2": (-2.0, 2.0),
    "log2": (0.5, 3.0),
    "log10": (0.5, 3.0),
    "sqrt": (0.5, 3.0),
    "cbrt": (0.5, 3.0),
    "sin": (-3.0, 3.0),
    "cos": (-3.0, 3.0),
    "tan": (-1.2, 1.2),
    "tanh": (-2.0, 2.0),
    "sinh": (-2.0, 2.0),
    "cosh": (-2.0, 2.0),
    "arcsin": (-0.8, 0.8),
    "arccos": (-0.8, 0.8),
    "arctan": (-3.0, 3.0),
    "arcsinh": (-3.0, 3.0),
    "arccosh": (1.5, 3.0),
    "arctanh": (-0.8, 0.8),
    "square": (-2.0, 2.0),
}
#: kinked at 0: drawn from +-[0.2, 2]
ABSOLUTE = ("abs", "absolute", "fabs")


@pytest.mark.parametrize("name", sorted(UNARY) + list(ABSOLUTE))
def test_elementwise_function(name):
    g = rng(31)
    if name in ABSOLUTE:
        x = g.uniform(0.2, 2.0, size=(3, 4)) * g.choice([-1.0, 1.0], size=(3, 4))
    else:
        x = g.uniform(*UNARY[name], size=(3, 4))
    w = g.normal(size=(3, 4))  # uneven weights, so each element's adjoint differs
    source = numpy_model("x, w", f"return np.sum(w * np.{name}(x))\n")
    check_against_differences(source, (x, w), ["x"])


def test_abs_slope_keeps_every_bit_at_zeros_and_non_finite_values():
    # |x|'s slope is +1 where x >= 0 (so at -0.0 too) and -1 elsewhere, NaN
    # included; the module multiplies by 2.0 * (x >= 0.0) - 1.0 instead of calling
    # np.where. Reference: NumPy's own np.where(x >= 0.0, w, -w) on the same
    # arrays, compared value by value and sign bit by sign bit (zeros' signs too)
    source = numpy_model("x, w", "return np.sum(w * np.abs(x))\n")
    assert "np.where" not in gradwright.generate(source, ["f"], wrt=["x"])
    ns = build(source, "f", ["x"])
    special = [0.0, -0.0, np.nan, np.inf, -np.inf, 1.5, -2.5]
    x = np.array([v for v in special for _ in special])
    w = np.array(special * len(special))
    with np.errstate(all="ignore"):
        _, (x_bar,) = ns["f_grad"](x, w)
    reference = np.where(x >= 0.0, w, -w)
    np.testing.assert_array_equal(x_bar, reference)
    numbers = ~np.isnan(reference)  # a NaN's sign bit carries no value (IEEE 754)
    assert np.array_equal(np.signbit(x_bar)[numbers], np.signbit(reference)[numbers])


def test_tanh_far_in_the_tail():
    # the array rule is 1 - tanh(x)**2 (rules.py; not the scalar rule's 1/cosh**2,
    # which needs a guard against cosh overflowing): far out tanh rounds to +-1 and
    # the entry is exactly 0, the correctly rounded sech(800)**2 ~ 4e-695 (mpmath),
    # with no floating-point warning on the way
    with mpmath.workdps(30):
        assert mpmath.sech(800) ** 2 < mpmath.mpf(2) ** -1075
    ns = build(numpy_model("x", "return np.sum(np.tanh(x))\n"), "f")
    with np.errstate(all="raise"):
        _, (x_bar,) = ns["f_grad"](np.array([800.0, -800.0, 0.0]))
    assert np.array_equal(x_bar, [0.0, 0.0, 1.0])


# ---------------------------------------------------------------------------------
# binary operations under every broadcasting pattern

#: the shape of the parameter `a` that meets the (3, 4) matrix X
PATTERNS = {
    "python-float": None,
    "0-d": (),
    "row-(1,n)": (1, 4),
    "column-(m,1)": (3, 1),
    "1-d-(n,)": (4,),
    "same-(m,n)": (3, 4),
}
BINARY = {
    "add": "{0} + {1}",
    "sub": "{0} - {1}",
    "mul": "{0} * {1}",
    "div": "{0} / {1}",
    "pow": "{0} ** {1}",
    "np.power": "np.power({0}, {1})",
    "np.maximum": "np.maximum({0}, {1})",
    "np.minimum": "np.minimum({0}, {1})",
    "np.arctan2": "np.arctan2({0}, {1})",
    "np.hypot": "np.hypot({0}, {1})",
}


def _pattern_data(pattern: str):
    """X (3, 4) and a of the pattern's shape, positive (for ** and /), with every
    a element at least 0.06 from every X element (no ties for maximum/minimum
    within the difference step)."""
    g = rng(41)
    X = np.linspace(0.6, 2.0, 12).reshape(3, 4)[:, g.permutation(4)]
    shape = PATTERNS[pattern]
    count = 1 if shape is None else int(np.prod(shape))
    # midway between X's grid points (spacing 1.4 / 11), shuffled
    a = (np.linspace(0.6, 2.0, 12) + 0.7 / 11)[g.permutation(12)][:count]
    a = float(a[0]) if shape is None else a.reshape(shape)
    assert np.min(np.abs(np.subtract.outer(np.ravel(a), X.ravel()))) > 0.06
    return a, X, g.normal(size=(3, 4))


@pytest.mark.parametrize("order", ["a-first", "X-first"])
@pytest.mark.parametrize("pattern", list(PATTERNS))
@pytest.mark.parametrize("op", list(BINARY))
def test_broadcasting_binary(op, pattern, order):
    a, X, w = _pattern_data(pattern)
    operands = ("a", "X") if order == "a-first" else ("X", "a")
    source = numpy_model(
        "a, X, w", f"return np.sum(w * {BINARY[op]})\n".format(*operands)
    )
    _, (a_bar, X_bar) = check_against_differences(source, (a, X, w), ["a", "X"])
    if pattern == "python-float":
        assert isinstance(a_bar, float)
    assert X_bar.shape == (3, 4)


@pytest.mark.parametrize("pattern", list(PATTERNS))
def test_broadcasting_where(pattern):
    a, X, w = _pattern_data(pattern)
    source = numpy_model(
        "a, X, w", "return np.sum(w * np.where(X > 1.3, a * X, X - a))\n"
    )
    check_against_differences(source, (a, X, w), ["a", "X"])


@pytest.mark.parametrize("pattern", list(PATTERNS))
def test_broadcasting_where_picks_a_parameter(pattern):
    a, X, w = _pattern_data(pattern)
    source = numpy_model("a, X, w", "return np.sum(w * np.where(X < 1.3, a, X))\n")
    check_against_differences(source, (a, X, w), ["a", "X"])


def test_clip_with_float_bounds():
    g = rng(42)
    # elements well inside and well outside [lo, hi] = [0.7, 1.6]
    X = np.array([[0.1, 0.5, 0.9, 1.2], [1.4, 1.9, 2.4, 0.3], [1.0, 0.8, 3.0, 1.5]])
    source = numpy_model("X, lo, hi, w", "return np.sum(w * np.clip(X, lo, hi))\n")
    args = (X, 0.7, 1.6, g.normal(size=(3, 4)))
    _, (X_bar, lo_bar, hi_bar) = check_against_differences(
        source, args, ["X", "lo", "hi"]
    )
    assert isinstance(lo_bar, float) and isinstance(hi_bar, float)


def test_unary_minus_and_scalar_literals_broadcast():
    g = rng(43)
    x, w = g.normal(size=(2, 3)), g.normal(size=(2, 3))
    source = numpy_model("x, c, w", "return np.sum(w * (-x * c + 2.0 - x / 3.0))\n")
    check_against_differences(source, (x, 0.8, w), ["x", "c"])


# ---------------------------------------------------------------------------------
# reductions

AXES = {"None": None, "0": 0, "1": 1, "-1": -1, "(0, 1)": (0, 1)}


REDUCTION_CASES = [
    (name, axis, keepdims)
    for name in ("sum", "mean", "prod", "max", "min")
    for axis in AXES
    for keepdims in (False, True)
]


@pytest.mark.parametrize("name, axis, keepdims", REDUCTION_CASES)
def test_reduction(name, axis, keepdims):
    g = rng(51)
    # distinct values (no ties for max/min), away from 0 (prod's rule divides)
    x = np.linspace(0.55, 1.65, 12)[g.permutation(12)].reshape(3, 4)
    call = f"np.{name}(x, axis={axis}, keepdims={keepdims})"
    # the sin makes each reduced element's adjoint different
    source = numpy_model("x", f"return np.sum(np.sin(3.0 * {call}))\n")
    check_against_differences(source, (x,), ["x"])


@pytest.mark.parametrize(
    "call",
    [
        "x.sum()",
        "x.sum(axis=0)",
        "x.mean(axis=1)",
        "x.mean(axis=1, keepdims=True)",
        "x.max(axis=0)",
        "x.min(axis=1)",
        "x.max()",
        "x.min()",
        "x.prod(axis=0)",
        "np.sum(x, 1)",
        "np.mean(x, 0)",
        "np.amax(x, axis=1)",
        "np.amin(x, axis=0)",
    ],
)
def test_reduction_spellings(call):
    g = rng(52)
    x = np.linspace(0.55, 1.65, 12)[g.permutation(12)].reshape(3, 4)
    source = numpy_model("x", f"return np.sum(np.sin(3.0 * {call}))\n")
    check_against_differences(source, (x,), ["x"])


@pytest.mark.parametrize("name", ["sum", "mean"])
@pytest.mark.parametrize("keepdims", [False, True])
@pytest.mark.parametrize("axis", ["(0, 2)", "(-1, 0)", "1"])
def test_reduction_of_three_dimensions(name, axis, keepdims):
    g = rng(53)
    x = g.normal(size=(2, 3, 4))
    call = f"np.{name}(x, axis={axis}, keepdims={keepdims})"
    source = numpy_model("x", f"return np.sum(np.sin(3.0 * {call}))\n")
    check_against_differences(source, (x,), ["x"])


def test_extreme_ties_follow_the_documented_convention():
    # Convention (numpy_support._gw_unextreme's docstring, matching np.argmax and
    # np.argmin's "first occurrence" rule): at a tie the first extreme element, in
    # C order along the reduced axis, gets the whole adjoint. Not a derivative but a
    # choice among the subgradients, so checked exactly.
    x = np.array([[1.0, 3.0, 3.0], [2.0, 2.0, 0.0], [0.0, 3.0, 0.0]])
    w = np.array([1.0, 2.0, 3.0])
    cases = {
        # 3.0 at flat indices 1, 2, 7: index 1 gets it
        "np.max(x)": np.eye(9)[1].reshape(3, 3),
        # 0.0 at flat indices 5, 6, 8: index 5 gets it
        "np.min(x)": np.eye(9)[5].reshape(3, 3),
        # over a tuple of axes: the same first element in C order
        "np.max(x, axis=(0, 1))": np.eye(9)[1].reshape(3, 3),
        "np.sum(np.min(x, axis=(0, 1), keepdims=True))": np.eye(9)[5].reshape(3, 3),
        "np.sum(np.max(x, keepdims=True))": np.eye(9)[1].reshape(3, 3),
        "np.sum(np.max(x, axis=1) * w)": np.array(
            [[0.0, 1.0, 0.0], [2.0, 0.0, 0.0], [0.0, 3.0, 0.0]]
        ),
        "np.sum(np.min(x, axis=0, keepdims=True) * w)": np.array(
            [[0.0, 0.0, 0.0], [0.0, 2.0, 3.0], [1.0, 0.0, 0.0]]
        ),
        # np.maximum / np.minimum: the first argument wins a tie (rules.py)
        "np.sum(np.maximum(x, 2.0))": np.array(
            [[0.0, 1.0, 1.0], [1.0, 1.0, 0.0], [0.0, 1.0, 0.0]]
        ),
        "np.sum(np.minimum(x, 2.0))": np.array(
            [[1.0, 0.0, 0.0], [1.0, 1.0, 1.0], [1.0, 0.0, 1.0]]
        ),
    }
    for expression, expected in cases.items():
        ns = build(numpy_model("x, w", f"return {expression}\n"), "f", ["x"])
        value, (x_bar,) = ns["f_grad"](x, w)
        assert_same_value(value, ns["f"](x, w))
        assert np.array_equal(x_bar, expected), expression


def test_tie_between_a_parameter_and_an_array_goes_to_the_first_argument():
    # np.maximum(a, X), a == X[0, 0]: a is the first argument, so the tie is a's;
    # a also wins at (0, 1) and (1, 1), X at (1, 0)
    X = np.array([[2.0, 1.0], [3.0, 0.5]])
    ns = build(numpy_model("a, X", "return np.sum(np.maximum(a, X))\n"), "f")
    _, (a_bar, X_bar) = ns["f_grad"](2.0, X)
    assert a_bar == 3.0 and isinstance(a_bar, float)
    assert np.array_equal(X_bar, [[0.0, 0.0], [1.0, 0.0]])


@pytest.mark.parametrize("name", ["max", "min"])
def test_extreme_over_a_tuple_of_axes(name):
    # regression: at commit 2db1350 the reverse sweep passed the tuple to np.argmax
    # (TypeError); the working tree's _gw_unextreme flattens the reduced axes
    source = numpy_model("x", f"return np.{name}(x, axis=(0, 1))\n")
    x = np.array([[1.0, 5.0, 2.0], [0.5, 3.0, 4.0]])
    ns = build(source, "f")
    _, (x_bar,) = ns["f_grad"](x)
    # max over all axes: d max / d x is the indicator of the (unique) extreme
    flat = np.argmax(x) if name == "max" else np.argmin(x)
    assert np.array_equal(x_bar, np.eye(6)[flat].reshape(2, 3))


@pytest.mark.parametrize("name", ["max", "min"])
def test_extreme_keepdims_without_axis(name):
    # regression: at commit 2db1350 a (1, 1) adjoint went into one .flat element
    # (ValueError)
    x = np.array([[1.0, 5.0, 2.0], [0.5, 3.0, 4.0]])
    source = numpy_model("x", f"return np.sum(np.{name}(x, keepdims=True))\n")
    ns = build(source, "f")
    _, (x_bar,) = ns["f_grad"](x)
    flat = np.argmax(x) if name == "max" else np.argmin(x)
    assert np.array_equal(x_bar, np.eye(6)[flat].reshape(2, 3))


# ---------------------------------------------------------------------------------
# matrix rules, against SymPy matrix calculus


def _symbols(name: str, shape: tuple[int, ...]):
    """A sympy.Matrix of symbols (a vector as a column) and its flat list."""
    count = int(np.prod(shape))
    flat = list(sympy.symbols(f"{name}0:{count}"))
    rows, cols = (shape[0], shape[1]) if len(shape) == 2 else (count, 1)
    return sympy.Matrix(rows, cols, flat), flat


def _weighted(result, weights) -> sympy.Expr:
    """sum(w * result) over the elements, in C order (as NumPy lays them out)."""
    if not isinstance(result, sympy.MatrixBase):
        return result * float(weights)
    return sum(
        (float(w) * r for w, r in zip(np.ravel(weights), result, strict=True)),
        sympy.Integer(0),
    )


#: (expression, shape of a, shape of b, the same product in SymPy over column
#: vectors and matrices)
MATRIX_CASES = {
    "a @ b (matrix, matrix)": ("a @ b", (2, 3), (3, 2), lambda a, b: a * b),
    "a @ b (matrix, vector)": ("a @ b", (2, 3), (3,), lambda a, b: a * b),
    "a @ b (vector, matrix)": ("a @ b", (3,), (3, 2), lambda a, b: b.T * a),
    "a @ b (vector, vector)": ("a @ b", (3,), (3,), lambda a, b: (a.T * b)[0]),
    "np.matmul (matrix, matrix)": (
        "np.matmul(a, b)",
        (3, 2),
        (2, 3),
        lambda a, b: a * b,
    ),
    "np.dot (matrix, vector)": ("np.dot(a, b)", (2, 3), (3,), lambda a, b: a * b),
    "np.dot (vector, vector)": (
        "np.dot(a, b)",
        (3,),
        (3,),
        lambda a, b: (a.T * b)[0],
    ),
    ".dot (matrix, matrix)": ("a.dot(b)", (2, 3), (3, 2), lambda a, b: a * b),
    ".dot (vector, matrix)": ("a.dot(b)", (3,), (3, 2), lambda a, b: b.T * a),
    "a.T @ b": ("a.T @ b", (3, 2), (3, 2), lambda a, b: a.T * b),
    "np.transpose(a) * b": (
        "np.transpose(a) * b",
        (3, 2),
        (2, 3),
        lambda a, b: a.T.multiply_elementwise(b),
    ),
    "np.outer": ("np.outer(a, b)", (3,), (2,), lambda a, b: a * b.T),
    "a @ b @ a (quadratic form)": (
        "a @ b @ a",
        (3,),
        (3, 3),
        lambda a, b: (a.T * b * a)[0],
    ),
}


def _result_shape(expression, a_shape, b_shape):
    env = {"np": np, "a": np.ones(a_shape), "b": np.ones(b_shape)}
    return np.shape(eval(expression, env))  # evaluates the test's own table


@pytest.mark.parametrize("case", list(MATRIX_CASES))
def test_matrix_rule_against_sympy(case):
    expression, a_shape, b_shape, symbolic = MATRIX_CASES[case]
    g = rng(61)
    a, b = g.normal(size=a_shape), g.normal(size=b_shape)
    w = g.normal(size=_result_shape(expression, a_shape, b_shape))
    a_sym, a_flat = _symbols("a", a_shape)
    b_sym, b_flat = _symbols("b", b_shape)
    target = _weighted(symbolic(a_sym, b_sym), w)
    point = dict(zip(a_flat + b_flat, [*a.ravel(), *b.ravel()], strict=True))
    # SymPy: exact partial derivatives of the weighted sum, evaluated at the point
    a_ref = np.array([float(sympy.diff(target, s).subs(point)) for s in a_flat])
    b_ref = np.array([float(sympy.diff(target, s).subs(point)) for s in b_flat])
    ns = build(numpy_model("a, b, w", f"return np.sum(w * ({expression}))\n"), "f")
    value, (a_bar, b_bar, _) = ns["f_grad"](a, b, w)
    assert_same_value(value, ns["f"](a, b, w))
    assert a_bar.shape == a_shape and b_bar.shape == b_shape
    # a handful of products and sums each side: rtol 1e-13
    np.testing.assert_allclose(a_bar.ravel(), a_ref, rtol=1e-13, atol=1e-14)
    np.testing.assert_allclose(b_bar.ravel(), b_ref, rtol=1e-13, atol=1e-14)


@pytest.mark.parametrize("shape", [(4,), (2, 3)])
def test_norm_against_sympy(shape):
    g = rng(62)
    x = g.normal(size=shape)
    x_sym, x_flat = _symbols("x", shape)
    norm = sympy.sqrt(sum(s**2 for s in x_flat))  # the 2-norm (Frobenius for 2-d)
    point = dict(zip(x_flat, x.ravel(), strict=True))
    reference = [float(sympy.diff(norm, s).subs(point)) for s in x_flat]
    ns = build(numpy_model("x", "return np.linalg.norm(x)\n"), "f")
    value, (x_bar,) = ns["f_grad"](x)
    assert_same_value(value, ns["f"](x))
    np.testing.assert_allclose(x_bar.ravel(), reference, rtol=1e-14, atol=1e-15)


# ---------------------------------------------------------------------------------
# shape operations and joins, against Richardson differences

SHAPE_CASES = {
    "transpose": ("x, w", "return np.sum(w.T * np.sin(x.T))\n"),
    "reshape-ints": ("x, w", "return np.sum(w.reshape(4, 3) * x.reshape(4, 3) ** 3)\n"),
    "reshape-tuple": (
        "x, w",
        "return np.sum(np.sin(x.reshape((2, 6))) * w.reshape(2, 6))\n",
    ),
    "reshape-minus-one": (
        "x, w",
        "return np.sum(x.reshape(-1) ** 2 * w.reshape(-1))\n",
    ),
    "reshape-then-matmul": ("x, w", "return np.sum(x.reshape(4, 3) @ x)\n"),
    "concatenate-axis0": (
        "x, w",
        "return np.sum(np.concatenate([x, x * x, np.sin(x)], axis=0) ** 2)\n",
    ),
    "concatenate-axis1": (
        "x, w",
        "return np.sum(np.sin(np.concatenate([x, w * x], axis=1)))\n",
    ),
    "concatenate-default-axis": (
        "x, w",
        "return np.sum(np.exp(np.concatenate([x[0], x[:, 1]])))\n",
    ),
    "stack-axis0": ("x, w", "return np.sum(np.stack([x, w * x * x]) ** 2)\n"),
    "stack-axis1": ("x, w", "return np.sum(np.sin(np.stack([x, x * w], axis=1)))\n"),
    "stack-axis-minus-one": (
        "x, w",
        "return np.sum(np.stack([x, np.exp(x)], axis=-1) ** 2)\n",
    ),
}


@pytest.mark.parametrize("case", list(SHAPE_CASES))
def test_shape_operations(case):
    params, body = SHAPE_CASES[case]
    g = rng(71)
    x, w = g.normal(size=(3, 4)), g.normal(size=(3, 4))
    check_against_differences(numpy_model(params, body), (x, w), ["x"])


# ---------------------------------------------------------------------------------
# indexing and slicing reads; shapes as constants

READS = [
    "x[0]",
    "x[-1]",
    "x[:, 1]",
    "x[1:-1]",
    "x[::2]",
    "x[::-1, 1:]",
    "x[1, 2]",
    "x[1:, :2]",
    "x[0] * x[:, 0]",  # x[0, 0] read twice, through two different reads
    "x[2] * x[2] + x[1:]",
]


@pytest.mark.parametrize("read", READS)
def test_index_and_slice_reads(read):
    g = rng(81)
    x = g.normal(size=(3, 3))
    source = numpy_model("x", f"return np.sum(np.sin(2.0 * ({read})))\n")
    _, (x_bar,) = check_against_differences(source, (x,), ["x"])
    assert x_bar.shape == (3, 3)


SHAPE_CONSTANTS = {
    "x.shape[0]": "return np.sum(x * x) / x.shape[0]\n",
    "x.shape[1]": "return np.sum(x) * x.shape[1] + np.sum(x * x)\n",
    "len(x)": "return np.sum(np.exp(x)) / len(x)\n",
    "loop over x.shape[0]": (
        "s = 0.0\nfor i in range(x.shape[0]):\n    s = s + np.sum(x[i] ** 2) * i\n"
        "return s\n"
    ),
}


@pytest.mark.parametrize("case", list(SHAPE_CONSTANTS))
def test_shape_as_a_constant(case):
    g = rng(82)
    x = g.normal(size=(4, 3))
    check_against_differences(numpy_model("x", SHAPE_CONSTANTS[case]), (x,), ["x"])


def test_shape_read_is_not_differentiated():
    # x.shape[0] is an integer of the array's layout: d/dx of sum(x) * x.shape[0]
    # is x.shape[0] everywhere (common practice), nothing flows through the shape
    ns = build(numpy_model("x", "return np.sum(x) * x.shape[0]\n"), "f")
    _, (x_bar,) = ns["f_grad"](np.ones((5, 2)))
    assert np.array_equal(x_bar, np.full((5, 2), 5.0))


# ---------------------------------------------------------------------------------
# values: bit-identical to the copied primal

VALUE_MODELS = {
    "logistic": (LOGISTIC_MEAN, lambda g: _logistic_data()),
    "least-squares": (
        LEAST_SQUARES,
        lambda g: (g.normal(size=4), g.normal(size=(7, 4)), g.normal(size=7)),
    ),
    "two-layer": (
        TWO_LAYER,
        lambda g: (
            g.normal(size=(3, 4)),
            g.normal(size=4),
            g.normal(size=(4, 2)),
            g.normal(size=2),
            g.normal(size=(6, 3)),
            g.normal(size=(6, 2)),
        ),
    ),
    "softmax": (SOFTMAX_CE, lambda g: _softmax_data()),
    # an array-valued result: f_grad returns the array (and the gradient of its sum)
    "array-result": (
        numpy_model("x, y", "return np.exp(x) * y - x / 3.0\n"),
        lambda g: (g.normal(size=(50, 3)), g.normal(size=3)),
    ),
}


@pytest.mark.parametrize("case", list(VALUE_MODELS))
@pytest.mark.parametrize("seed", [1, 2, 3])
def test_value_bit_identical_to_primal(case, seed):
    source, data = VALUE_MODELS[case]
    args = data(rng(1000 + seed))
    ns = build(source, "f")
    value, _ = ns["f_grad"](*args)
    primal = ns["f"](*args)
    assert_same_value(value, primal)
    # and the copied primal is the model's own function, result for result
    assert_same_value(primal, run_source(source)["f"](*args))


def test_array_result_returns_the_gradient_of_its_sum():
    # what f_grad does with an array-valued model: the seed 1.0 broadcasts, so the
    # entries are the gradient of sum(result) (checked by differences of the sum)
    g = rng(91)
    x, y = g.normal(size=(4, 3)), g.normal(size=3)
    source = numpy_model("x, y", "return np.exp(x) * y - x / 3.0\n")
    check_against_differences(source, (x, y), ["x", "y"])


def test_local_augmented_assignment_on_a_fresh_array():
    # y is a new array (x * x), so `y += 1.0` changing it in place and the
    # generator's rebinding y_1 = y + 1.0 agree
    g = rng(92)
    x = g.normal(size=(3, 2))
    source = numpy_model("x", "y = x * x\ny += 1.0\ny *= x\nreturn np.sum(y)\n")
    check_against_differences(source, (x,), ["x"])


# ---------------------------------------------------------------------------------
# a product with a zero element (the rule must not divide by it)


def test_prod_with_a_zero_element():
    x = np.array([2.0, 0.0, 3.0, 5.0])
    # SymPy: d(x0 x1 x2 x3)/dx_i, the product of the other three
    xs = sympy.symbols("x0:4")
    product = xs[0] * xs[1] * xs[2] * xs[3]
    point = dict(zip(xs, x, strict=True))
    reference = [float(sympy.diff(product, s).subs(point)) for s in xs]
    ns = build(numpy_model("x", "return np.prod(x)\n"), "f")
    # running products on both sides, no division: no floating-point warning at all
    with np.errstate(all="raise"):
        _, (x_bar,) = ns["f_grad"](x)
    assert np.array_equal(x_bar, reference)  # [0, 30, 0, 0]


# ---------------------------------------------------------------------------------
# gradient entries belong to the caller


def test_gradient_entry_is_a_writable_array():
    ns = build(numpy_model("x", "return np.sum(x)\n"), "f")
    _, (x_bar,) = ns["f_grad"](np.ones((2, 3)))
    x_bar *= 0.5  # an optimizer's in-place step
    assert np.array_equal(x_bar, np.full((2, 3), 0.5))


# ---------------------------------------------------------------------------------
# rejections, located


def _gen_cli(tmp_path, monkeypatch, capsys, source: str) -> tuple[int, str, str]:
    (tmp_path / "model.py").write_text(source)
    monkeypatch.chdir(tmp_path)
    status = main(["gen", "model.py", "f", "-o", "out.py"])
    captured = capsys.readouterr()
    return status, captured.out, captured.err


REJECTIONS = {
    # (body, line of the error, the exact text the caret underlines, message part)
    "item-assignment-on-parameter": (
        "x[0] = 1.0\nreturn np.sum(x)\n",
        5,
        "x[0]",
        "changing an array in place is not supported",
    ),
    "augmented-assignment-on-parameter": (
        "x += 1.0\nreturn np.sum(x)\n",
        5,
        "x += 1.0",
        "would change that array in place",
    ),
    # README: `x += ...` on a name that may share its array (`y = x`) is a located
    # error, as on the parameter itself
    "augmented-assignment-on-an-alias-of-a-parameter": (
        "y = x\ny += 1.0\nreturn np.sum(y * x)\n",
        6,
        "y += 1.0",
        "'y' may share its array with another name",
    ),
    "item-assignment-on-local-array": (
        "y = x * 2.0\ny[0] = 1.0\nreturn np.sum(y)\n",
        6,
        "y[0]",
        "changing an array in place is not supported",
    ),
    "unsupported-function": (
        "return np.sum(np.sort(x))\n",
        5,
        "np.sort",
        "np.sort is not supported",
    ),
    "unsupported-keyword": (
        "return np.sum(x, dtype=float)\n",
        5,
        "dtype=float",
        "the keyword dtype= is not supported",
    ),
}


@pytest.mark.parametrize("case", list(REJECTIONS))
def test_rejection_is_located(case, tmp_path, monkeypatch, capsys):
    body, line, span, message = REJECTIONS[case]
    source = numpy_model("x", body)
    status, out, err = _gen_cli(tmp_path, monkeypatch, capsys, source)
    assert status == 2 and out == ""
    assert not (tmp_path / "out.py").exists()  # nothing written
    text = source.splitlines()[line - 1]
    column = text.index(span) + 1
    lines = err.splitlines()
    assert lines[0].startswith(f"model.py:{line}:{column}: error: ")
    assert message in lines[0]
    assert lines[1] == "    " + text.strip()
    indent = len(text) - len(text.lstrip())
    assert lines[2] == "    " + " " * (column - 1 - indent) + "^" * len(span)
    assert "Traceback" not in err
    # the API raises the same diagnostic
    with pytest.raises(gradwright.GradwrightError) as raised:
        gradwright.generate(source, ["f"], path="model.py")
    assert raised.value.diagnostic.render() == err.rstrip("\n")


# ---------------------------------------------------------------------------------
# the generated module stands alone

STANDALONE = numpy_model(
    "W, b, X, Y",
    """\
    Z = np.tanh(X @ W + b)
    m = np.max(Z, axis=1, keepdims=True)
    lse = np.log(np.sum(np.exp(Z - m), axis=1, keepdims=True)) + m
    picked = np.concatenate([Z[:, :1], Z[:, 1:]], axis=1) * Y
    return np.mean(lse) - np.sum(picked) / len(X) + np.linalg.norm(W[0]) * 0.1
    """,
)


def _standalone_args():
    g = rng(101)
    return (
        g.normal(size=(3, 4)),
        g.normal(size=4),
        g.normal(size=(5, 3)),
        np.eye(4)[g.integers(0, 4, size=5)],
    )


def test_generated_module_imports_only_numpy_and_math():
    text = gradwright.generate(STANDALONE, ["f"])
    imported = set()
    for node in ast.walk(ast.parse(text)):
        if isinstance(node, ast.Import):
            imported |= {alias.name for alias in node.names}
        elif isinstance(node, ast.ImportFrom):
            imported.add(node.module or "")
        elif isinstance(node, ast.Call) and isinstance(node.func, ast.Name):
            assert node.func.id not in ("eval", "exec", "__import__", "compile")
    assert imported and imported <= {"numpy", "math"}, imported


#: run in a child interpreter: ``-I`` keeps the working directory and the user site
#: off sys.path, but not site-packages, whose editable-install .pth still puts
#: gradwright's source on the path (and whose gradwright/templates directory would
#: even import as a namespace package under ``-S``). So the child blocks the name
#: itself: a finder ahead of all others refuses any gradwright import, and the
#: child then asserts no gradwright module was loaded. A generated module that
#: imported gradwright anywhere (at the top or inside a function) fails here; see
#: test_the_standalone_check_can_fail.
CHILD = """\
import json, sys

class Refuse:
    def find_spec(self, name, path=None, target=None):
        if name == "gradwright" or name.startswith("gradwright."):
            raise ImportError("gradwright is not available here: " + name)
        return None

sys.meta_path.insert(0, Refuse())
sys.path.insert(0, sys.argv[1])
import numpy as np
import mod

data = np.load(sys.argv[2])
args = [data[k] for k in sorted(data.files)]
value, grads = mod.f_grad(*args)
assert not [m for m in sys.modules if m.split(".")[0] == "gradwright"]
print(json.dumps([float(value).hex()] + [np.asarray(g).tolist() for g in grads]))
"""


def _run_child(tmp_path, text: str):
    (tmp_path / "mod.py").write_text(text)
    args = _standalone_args()
    np.savez(tmp_path / "args.npz", **{f"a{k}": a for k, a in enumerate(args)})
    return subprocess.run(
        [sys.executable, "-I", "-c", CHILD, str(tmp_path), str(tmp_path / "args.npz")],
        capture_output=True,
        text=True,
        cwd=tmp_path,
        timeout=60,
    )


def test_generated_module_runs_without_gradwright(tmp_path):
    import json

    text = gradwright.generate(STANDALONE, ["f"])
    done = _run_child(tmp_path, text)
    assert done.returncode == 0, done.stderr
    ns: dict = {}
    exec(compile(text, "<generated>", "exec"), ns)
    value, grads = ns["f_grad"](*_standalone_args())
    child = json.loads(done.stdout)
    assert child[0] == float(value).hex()
    for got, expected in zip(child[1:], grads, strict=True):
        assert np.array_equal(np.array(got), expected)


def test_the_standalone_check_can_fail(tmp_path):
    # the same harness refuses a module that needs gradwright at call time
    text = gradwright.generate(STANDALONE, ["f"]).replace(
        '    """f and its gradient',
        '    import gradwright  # noqa\n    """f and its',
        1,
    )
    assert "import gradwright" in text
    done = _run_child(tmp_path, text)
    assert done.returncode != 0 and "gradwright is not available here" in done.stderr


def test_new_axis_indexes_without_shapes():
    # b[:, None] and np.newaxis add an axis of size 1; without declared shapes the
    # adjoint goes back through the generic scatter. Reference: Richardson
    # differences of the model itself
    source = (
        "import numpy as np\n\n\ndef f(b, x):\n"
        "    return np.sum(np.sin(b[:, None] * x[np.newaxis, :]))\n"
    )
    namespace: dict = {}
    exec(gradwright.generate(source, ["f"]), namespace)
    model: dict = {}
    exec(source, model)
    args = (np.array([0.3, -1.2, 0.8]), np.array([1.1, 0.4]))
    value, grads = namespace["f_grad"](*args)
    for k in range(2):
        assert_close_to_differences(model["f"], args, k, grads[k], value)


def test_a_norm_at_the_origin_takes_the_subgradient_zero():
    # |x|^2 = sum(x^2) has the gradient 2x everywhere, the origin included (a
    # closed form); the norm's own slope x / |x| is 0/0 there, so the norm takes
    # the subgradient 0 at the origin, whole-array and per row
    source = (
        "import numpy as np\n\n\ndef f(w, x):\n"
        "    return np.linalg.norm(w) ** 2 + np.sum(w * x)\n\n\n"
        "def g(w):\n    return np.sum(np.linalg.norm(w, axis=1) ** 2)\n"
    )
    namespace: dict = {}
    exec(gradwright.generate(source, ["f", "g"]), namespace)
    x = np.array([1.0, -2.0, 0.5])
    _, (w_bar, x_bar) = namespace["f_grad"](np.zeros(3), x)
    assert np.array_equal(w_bar, x) and np.array_equal(x_bar, np.zeros(3))
    w = np.array([[0.0, 0.0, 0.0], [1.0, -2.0, 3.0]])
    _, (w_bar,) = namespace["g_grad"](w)
    np.testing.assert_allclose(w_bar, 2.0 * w, rtol=1e-15, atol=0.0)


def test_an_ellipsis_index_is_a_located_error():
    # review finding: x[..., None] said "... is not a number"
    source = "import numpy as np\n\n\ndef f(x):\n    return np.sum(x[..., None] * x)\n"
    with pytest.raises(gradwright.GradwrightError) as caught:
        gradwright.generate(source, ["f"], path="model.py")
    text = caught.value.diagnostic.render()
    assert text.startswith("model.py:5:21: error: indexing with ... (Ellipsis)")
    assert "hint: write one `:` per axis" in text


def test_an_array_a_copied_statement_made_takes_slices_and_new_axes():
    # found by the npshapes family of the long random run: c0[:, None] on an
    # array a copied statement made was read as a dict lookup and refused
    source = (
        "import numpy as np\n\n\ndef f(x):\n    c0 = np.full(x.shape, 0.5)\n"
        "    u2 = x * np.sum(c0[:, None] * np.tanh(c0)[None, :], axis=0)\n"
        "    return np.sum(u2 * x) + np.sum(c0[1:] * x[1:])\n"
    )
    model: dict = {}
    exec(source, model)
    args = (np.array([0.96, 0.57, -1.2]),)
    for shapes in (None, {"x": (3,)}):
        namespace: dict = {}
        exec(gradwright.generate(source, ["f"], shapes=shapes), namespace)
        value, (x_bar,) = namespace["f_grad"](*args)
        # reference: Richardson differences of the model itself
        assert_close_to_differences(model["f"], args, 0, x_bar, value)
