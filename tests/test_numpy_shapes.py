"""NumPy gradients written for shapes known at generation time (``gen --shape``).

References: every gradient is checked against Richardson-extrapolated central
differences of the model's own text (``test_numpy.richardson_gradient``, error
analysis there) at several concrete shapes, broadcasting cases included, and one
model against mpmath central differences at 30 digits (``support.mp_gradient``
style, element by element). The text checks assert that the run-time helpers
(``_gw_unbroadcast``, ``_gw_unmean``, ``_gw_matmul_*``) are absent where the shapes
are known, so they fail if a helper comes back.
"""

from __future__ import annotations

import subprocess
import sys
import textwrap
from pathlib import Path

import mpmath
import numpy as np
import pytest
from test_numpy import assert_close_to_differences, numpy_model

import gradwright
from gradwright.diagnostics import GradwrightError
from gradwright.workflow.cli import main

ROOT = Path(__file__).resolve().parents[1]


def generate(source: str, shapes: dict | None, wrt=None) -> tuple[str, dict]:
    text = gradwright.generate(source, ["f"], wrt, shapes=shapes)
    namespace: dict = {}
    exec(compile(text, "<f_grad>", "exec"), namespace)
    return text, namespace


def draw(shape: tuple, g: np.random.Generator):
    """An argument of ``shape``: a Python float for ``()``."""
    return float(g.uniform(0.5, 1.5)) if shape == () else g.uniform(0.5, 1.5, shape)


# (model, declared shapes, concrete shapes of the arguments to test with)
CASES = [
    (  # a row, a matrix and a number broadcast together
        numpy_model("a, b, c", "return np.sum(a * b + c)"),
        {"a": ("n", 4), "b": (4,), "c": ()},
        [[(3, 4), (4,), ()], [(1, 4), (4,), ()]],
    ),
    (  # a column and a row against a matrix
        numpy_model("a, b, c", "return np.sum(np.sin(a) * b / c)"),
        {"a": ("n", 4), "b": ("n", 1), "c": (1, 4)},
        [[(3, 4), (3, 1), (1, 4)], [(1, 4), (1, 1), (1, 4)]],
    ),
    (  # a mean's seed is a number; a number added everywhere gets n * d of it
        numpy_model("a, b", "return np.mean(a + b)"),
        {"a": ("n", "d"), "b": ()},
        [[(3, 5), ()], [(1, 1), ()]],
    ),
    (  # a sum over an inner axis, then a product with a vector
        numpy_model("a, b", "s = np.sum(a, axis=1)\nreturn np.sum(s * b)"),
        {"a": ("n", "d"), "b": ("n",)},
        [[(3, 5), (3,)], [(2, 1), (2,)]],
    ),
    (  # centring with keepdims, weights along the last axis
        numpy_model(
            "a, b",
            "s = np.mean(a, axis=0, keepdims=True)\nreturn np.sum((a - s) ** 2 * b)",
        ),
        {"a": ("n", "d"), "b": ("d",)},
        [[(3, 5), (5,)], [(4, 1), (1,)]],
    ),
    (  # three axes, a middle one summed
        numpy_model(
            "a, b", "s = np.sum(a, axis=1)\nreturn np.sum(np.exp(s)) + np.sum(b * 0.5)"
        ),
        {"a": (2, 3, 4), "b": (4,)},
        [[(2, 3, 4), (4,)]],
    ),
    (  # a tanh layer: matrix, bias row, mean
        numpy_model("a, b, W", "h = np.tanh(a @ W + b)\nreturn np.mean(h * h)"),
        {"a": ("n", 3), "b": (4,), "W": (3, 4)},
        [[(6, 3), (4,), (3, 4)], [(1, 3), (4,), (3, 4)]],
    ),
    (  # matrix-vector, vector-vector, a transpose of a matrix
        numpy_model("a, W", "h = W @ a\nreturn h @ h + np.sum(W.T)"),
        {"a": (3,), "W": (4, 3)},
        [[(3,), (4, 3)]],
    ),
    (  # an outer sum: both operands broadcast
        numpy_model("a, b", "return np.sum(a + b)"),
        {"a": ("n", 1), "b": ("m",)},
        [[(3, 1), (4,)], [(1, 1), (1,)]],
    ),
    (  # a one-element vector against n elements
        numpy_model("a, b", "return np.sum(a) * np.mean(b + a)"),
        {"a": (1,), "b": ("n",)},
        [[(1,), (5,)], [(1,), (1,)]],
    ),
    (  # an in-place update of a local array
        numpy_model("a, b", "c = a * 2.0\nc += b\nreturn np.sum(c * c)"),
        {"a": ("n",), "b": ("n",)},
        [[(4,), (4,)]],
    ),
    (  # a branch on a number
        numpy_model(
            "a, b",
            "if b > 1.0:\n    c = a * b\nelse:\n    c = a + 1.0\nreturn np.sum(c)",
        ),
        {"a": ("n",), "b": ()},
        [[(4,), ()]],
    ),
    (  # elements of a short vector against a long one (a two-part mixture)
        numpy_model(
            "m, s, x",
            "z = (x - m[0]) / s[1]\nq = np.exp(-z * z) / s[0] + m[1]\n"
            "return np.mean(np.log(q))",
        ),
        {"m": (2,), "s": (2,), "x": ("n",)},
        [[(2,), (2,), (5,)], [(2,), (2,), (1,)]],
    ),
    (  # a column, a row and a constant slice of a matrix
        numpy_model(
            "a, b",
            "c = a[:, 1] * b[0, 1:4]\nd = a[1] + b[1, :]\n"
            "return np.sum(c) + np.sum(d * d) + np.sum(a[0:2, 0])",
        ),
        {"a": (3, 4), "b": (2, 4)},
        [[(3, 4), (2, 4)]],
    ),
    (  # np.array of numbers that depend on the parameters, nested lists too
        numpy_model(
            "a, b",
            "tip = np.array([np.sum(a * np.cos(b)), np.sum(a * np.sin(b))])\n"
            "m = np.array([[a[0], 2.0 * b[1]], [b[0] * b[1], 1.0]])\n"
            "return np.sum((tip - np.array([1.2, 0.7])) ** 2) + np.sum(m @ tip)",
        ),
        {"a": (3,), "b": (3,)},
        [[(3,), (3,)]],
    ),
    (  # np.array of arrays: stacked rows; a module-level table of literal shape
        "import numpy as np\n\nW = np.array([[0.5, -1.0], [2.0, 0.25], [1.0, 1.0]])"
        "\n\n\ndef f(a, b):\n    rows = np.array([a * b, np.exp(a) - b])\n"
        "    return np.mean(rows @ W.T)\n",
        {"a": (2,), "b": (2,)},
        [[(2,), (2,)]],
    ),
    (  # a row's max kept for broadcasting (a stable log-sum-exp); a column's min
        numpy_model(
            "a, b",
            "m = np.max(a, axis=1, keepdims=True)\ns = a - m\n"
            "lse = np.log(np.sum(np.exp(s), axis=1, keepdims=True))\n"
            "return np.sum(b * (s - lse)) + np.sum(np.sin(np.min(a, axis=0)))",
        ),
        {"a": ("n", 4), "b": ("n", 4)},
        [[(5, 4), (5, 4)], [(1, 4), (1, 4)]],
    ),
    (  # new axes for an outer difference, and a kept axis dropped again
        numpy_model(
            "a, b, c",
            "z = (a[:, None] - b[None, :]) / c[np.newaxis, :]\n"
            "p = np.max(z, axis=1, keepdims=True)\n"
            "return np.sum(np.tanh(z)) + np.sum(p[:, 0] * a)",
        ),
        {"a": ("n",), "b": ("k",), "c": ("k",)},
        [[(5,), (3,), (3,)], [(1,), (1,), (1,)]],
    ),
    (  # the max over the middle axis of three, and a whole vector's max
        numpy_model(
            "a, b",
            "return np.sum(np.cos(np.max(a, axis=1)) * b) + np.amax(b) * np.sum(a)",
        ),
        {"a": (2, 3, "d"), "b": (2, "d")},
        [[(2, 3, 4), (2, 4)], [(2, 3, 1), (2, 1)]],
    ),
    (  # a loop carrying an array
        numpy_model(
            "a, b", "for k in range(3):\n    a = a * b + 1.0\nreturn np.sum(a)"
        ),
        {"a": ("n", 2), "b": (2,)},
        [[(4, 2), (2,)], [(1, 2), (2,)]],
    ),
]


@pytest.mark.parametrize("case", range(len(CASES)))
def test_shaped_gradients_match_differences(case: int) -> None:
    source, declared, concretes = CASES[case]
    _, shaped = generate(source, declared)
    _, generic = generate(source, None)
    model = {}
    exec(compile(source, "<model>", "exec"), model)
    names = list(declared)
    for k, shapes in enumerate(concretes):
        args = [draw(s, np.random.default_rng(100 * case + k)) for s in shapes]
        value, grads = shaped["f_grad"](*args)
        _, generic_grads = generic["f_grad"](*args)
        for j, name in enumerate(names):
            assert np.shape(grads[j]) == np.shape(args[j]), name
            # reference: Richardson-extrapolated central differences of the model
            assert_close_to_differences(model["f"], args, j, grads[j], value)
            # and the generic module (run-time helpers) agrees to rounding
            np.testing.assert_allclose(grads[j], generic_grads[j], rtol=1e-12)


LOGISTIC = numpy_model(
    "w, X, y",
    """\
    z = X @ w
    p = 1.0 / (1.0 + np.exp(-z))
    nll = -np.mean(y * np.log(p + 1e-12) + (1.0 - y) * np.log(1.0 - p + 1e-12))
    return nll + 0.01 * (w @ w)
    """,
)
LOGISTIC_SHAPES = {"w": (5,), "X": ("n", 5), "y": ("n",)}


def test_a_max_along_an_axis_gives_each_line_first_extreme_its_adjoint() -> None:
    # ties: the first maximal element of each row gets the row's adjoint, which is
    # NumPy's documented np.argmax ("the indices of the first occurrence"); the
    # closed form is w at that index and 0 elsewhere
    source = numpy_model("x, w", "return np.sum(w * np.max(x, axis=1))")
    text, shaped = generate(source, {"x": ("n", 4), "w": ("n",)}, ["x"])
    assert "_gw_unextreme" not in text
    assert "np.argmax(x, axis=1, keepdims=True) == np.arange(4)" in text
    x = np.array([[1.0, 3.0, 3.0, 0.0], [2.0, 2.0, 2.0, 2.0], [0.0, -1.0, 5.0, 5.0]])
    w = np.array([0.5, -2.0, 3.0])
    _, (x_bar,) = shaped["f_grad"](x, w)
    exact = np.zeros((3, 4))
    exact[0, 1], exact[1, 0], exact[2, 2] = 0.5, -2.0, 3.0
    assert np.array_equal(x_bar, exact)
    # the same along the first axis, minimum, no keepdims
    source = numpy_model("x, w", "return np.sum(w * np.min(x, axis=0))")
    text, shaped = generate(source, {"x": (3, "d"), "w": ("d",)}, ["x"])
    assert "np.arange(3).reshape(-1, 1)" in text
    y = np.array([[1.0, 0.0, 2.0, 7.0], [1.0, 0.0, 3.0, 7.0], [0.0, 4.0, 2.0, 7.0]])
    _, (x_bar,) = shaped["f_grad"](y, np.array([1.0, 2.0, 3.0, 4.0]))
    exact = np.zeros((3, 4))
    exact[2, 0], exact[0, 1], exact[0, 2], exact[0, 3] = 1.0, 2.0, 3.0, 4.0
    assert np.array_equal(x_bar, exact)


def test_logistic_regression_reads_like_hand_written_code() -> None:
    text, _ = generate(LOGISTIC, LOGISTIC_SHAPES, ["w"])
    reverse = text.split("# reverse sweep")[1]
    for helper in ("_gw_unbroadcast", "_gw_unmean", "_gw_matmul", "_gw_shaped"):
        assert helper not in text, helper
    # the mean's seed is the number -1.0 / n, taken out of the sum once
    assert "p_bar = (nll_2 / nll_3 - y / nll_1) / n\n" in reverse
    assert "w_bar = 0.02 * w" in reverse  # 0.01 * (w @ w): factors folded
    # the logistic's rule updates p's adjoint in place: p_bar is read no more,
    # and no other name has its array (p * p * p_1 is the lighter operand)
    assert "p_bar *= p * p * p_1\n" in reverse
    assert "z_bar" not in reverse  # the old form: a second array of n floats
    assert "w_bar += X.T @ p_bar" in reverse  # in place: no other name has it
    assert "n = X.shape[0]" in text


def test_logistic_regression_against_mpmath_differences() -> None:
    g = np.random.default_rng(7)
    w, X = 0.3 * g.normal(size=5), g.normal(size=(6, 5))
    y = (g.uniform(size=6) < 0.5).astype(float)
    _, ns = generate(LOGISTIC, LOGISTIC_SHAPES, ["w"])
    _, (w_bar,) = ns["f_grad"](w, X, y)
    # reference: mpmath central differences at 30 digits (step 1e-12) of the
    # model written out over mpf numbers
    with mpmath.workdps(30):
        Xm = [[mpmath.mpf(v) for v in row] for row in X]
        ym = [mpmath.mpf(v) for v in y]

        def loss(wm):
            total = mpmath.mpf(0)
            for row, t in zip(Xm, ym, strict=True):
                p = 1 / (
                    1
                    + mpmath.exp(
                        -mpmath.fsum(a * b for a, b in zip(row, wm, strict=True))
                    )
                )
                total += t * mpmath.log(p + 1e-12) + (1 - t) * mpmath.log(1 - p + 1e-12)
            return -total / len(ym) + mpmath.mpf("0.01") * mpmath.fsum(
                v * v for v in wm
            )

        for k in range(5):
            up = [mpmath.mpf(v) for v in w]
            down = list(up)
            up[k] += mpmath.mpf("1e-12")
            down[k] -= mpmath.mpf("1e-12")
            exact = (loss(up) - loss(down)) / mpmath.mpf("2e-12")
            assert abs(w_bar[k] - float(exact)) <= 1e-12 * (1 + abs(float(exact))), k


def test_a_violated_declared_shape_is_a_clear_error() -> None:
    _, ns = generate(LOGISTIC, LOGISTIC_SHAPES, ["w"])
    g = np.random.default_rng(3)
    w, X, y = g.normal(size=5), g.normal(size=(6, 5)), g.normal(size=6)
    ns["f_grad"](w, X, y)
    with pytest.raises(ValueError, match=r"y has shape \(7,\).*\(6,\)"):
        ns["f_grad"](w, X, g.normal(size=7))  # n disagrees between X and y
    with pytest.raises(ValueError, match=r"w has shape \(4,\)"):
        ns["f_grad"](g.normal(size=4), g.normal(size=(6, 4)), y)
    with pytest.raises(ValueError, match=r"y has shape \(6, 1\)"):
        ns["f_grad"](w, X, y.reshape(6, 1))  # the broadcast a wrong gradient needs
    assert ns["f"](w, X, y.reshape(6, 1)) is not None  # the primal stays as written


TWO_LAYER = numpy_model(
    "W1, b1, W2, b2, X, Y",
    """\
    H = np.tanh(X @ W1 + b1)
    r = H @ W2 + b2 - Y
    return np.mean(r * r)
    """,
)
TWO_LAYER_SHAPES = {
    "W1": (3, 4),
    "b1": (4,),
    "W2": (4, 1),
    "b2": (1,),
    "X": ("n", 3),
    "Y": ("n", 1),
}


DEEP_NET = numpy_model(
    "W1, W2, W3, X, Y",
    """\
    H1 = np.tanh(X @ W1)
    H2 = np.tanh(H1 @ W2)
    r = H2 @ W3 - Y
    return np.sum(r * r)
    """,
)
DEEP_NET_SHAPES = {
    "W1": (3, 4),
    "W2": (4, 4),
    "W3": (4, 1),
    "X": ("n", 3),
    "Y": ("n", 1),
}
# (model, declared shapes, the update in place, what the old forms printed)
LENDING = [
    (
        TWO_LAYER,
        TWO_LAYER_SHAPES,
        "H_bar_1 = 1.0 - H * H\n    H_bar_1 *= r_bar * W2.T\n",
        ("H_bar = ", "* (1.0 - H * H)"),
    ),
    (
        DEEP_NET,
        DEEP_NET_SHAPES,
        "H2_bar_1 = 1.0 - H2 * H2\n    H2_bar_1 *= r_bar * W3.T\n",
        ("H2_bar = ", "* (1.0 - H2 * H2)"),
    ),
]


@pytest.mark.parametrize("case", range(len(LENDING)))
def test_an_adjoint_read_no_more_lends_its_array(case: int) -> None:
    source, shapes, update, old = LENDING[case]
    wrt = [p for p in shapes if p not in ("X", "Y")]
    text, ns = generate(source, shapes, wrt)
    reverse = text.split("# reverse sweep")[1]
    # tanh's rule reads H's adjoint, r_bar * W2.T, once, and nothing reads it
    # after: 1.0 - H * H (two array operations) makes the array first, then the
    # lighter factor goes into it in place; two full-size arrays at once, where
    # H_bar = r_bar * W2.T; H_bar_1 = H_bar * (1.0 - H * H) held three
    assert update in reverse
    assert not any(form in reverse for form in old)
    g = np.random.default_rng(12 + case)
    args = [
        g.normal(size=tuple(6 if d == "n" else d for d in s)) for s in shapes.values()
    ]
    before = [a.copy() for a in args]
    value, grads = ns["f_grad"](*args)
    model: dict = {}
    exec(compile(source, "<model>", "exec"), model)
    for j in range(len(wrt)):
        # reference: Richardson-extrapolated central differences of the model
        assert_close_to_differences(model["f"], args, j, grads[j], value)
    # no argument was written into, and no two arrays returned share memory
    for arg, copy in zip(args, before, strict=True):
        np.testing.assert_array_equal(arg, copy)
    arrays = [*grads, *args]
    for i, a in enumerate(arrays):
        assert not any(np.shares_memory(a, b) for b in arrays[i + 1 :])


def test_int_data_adjoints_are_not_updated_in_place() -> None:
    # w_bar's first array is Y * X: int for int data, and += of floats into it
    # would raise; it is summed into a new array instead
    source = numpy_model(
        "w, X, Y", "b = np.sum(w * w)\na = np.sum(w * X * Y)\nreturn a + b"
    )
    text, ns = generate(source, {"w": ("n",), "X": ("n",), "Y": ("n",)}, ["w"])
    assert "w_bar = w_bar + 2.0 * w" in text
    w, X, Y = np.array([0.5, 1.5]), np.array([1, 2]), np.array([3, 4])
    _, (w_bar,) = ns["f_grad"](w, X, Y)
    # reference by hand: d/dw (sum(w * X * Y) + sum(w * w)) = X * Y + 2 w
    np.testing.assert_array_equal(w_bar, X * Y + 2.0 * w)


def test_known_broadcasts_are_written_as_sums() -> None:
    text, _ = generate(*CASES[1][:2])
    assert "_gw_unbroadcast" not in text
    # the minus of d(b / c)/dc outside the sum
    assert "c_bar = -np.sum(value_2 / c, axis=0, keepdims=True)" in text
    assert "b_bar = np.sum(" in text and "axis=1, keepdims=True)" in text
    text, _ = generate(*CASES[0][:2])
    assert "_gw_unbroadcast" not in text
    # a 2-D array's column sums: einsum, not np.sum(g, axis=0)'s slow inner loop
    assert 'b_bar = np.einsum("ij->j", a)' in text
    assert "axis=0)" not in text


def test_indexed_elements_and_slices_have_known_shapes() -> None:
    for case in CASES[12:16]:
        text, _ = generate(*case[:2])
        assert "_gw_unbroadcast" not in text and "_gw_unmean" not in text, text


def test_an_array_of_active_numbers_reads_like_hand_written_code() -> None:
    text, _ = generate(*CASES[14][:2])
    # the parts' adjoints are the elements of the array's adjoint
    assert "tip_bar = 2.0 * " in text and "= tip_bar[0]" in text
    # the constructor copied out of the return statement sits under its comment
    forward = text.split("def f_grad")[1].split("# reverse sweep")[0]
    assert "# return np.sum((tip - np.array([1.2, 0.7])) ** 2)" in forward


def test_an_array_of_active_numbers_without_declared_shapes() -> None:
    source = CASES[14][0]
    _, generic = generate(source, None)
    model: dict = {}
    exec(compile(source, "<model>", "exec"), model)
    args = (np.array([0.3, 1.1, 0.7]), np.array([0.2, -0.4, 0.9]))
    value, grads = generic["f_grad"](*args)
    for k in range(2):
        # reference: Richardson-extrapolated central differences
        assert_close_to_differences(model["f"], args, k, grads[k], value)


def test_same_shapes_need_no_helper_even_undeclared() -> None:
    # x and every value made from it elementwise share x's shape, whatever it is
    source = numpy_model(
        "x", "u = np.exp(-x) * x + np.sin(x) / x\nreturn np.sum(u * u)"
    )
    text, ns = generate(source, None)
    assert "_gw_unbroadcast" not in text
    x = np.linspace(0.5, 1.5, 6).reshape(2, 3)
    value, (x_bar,) = ns["f_grad"](x)
    model: dict = {}
    exec(compile(source, "<model>", "exec"), model)
    # reference: Richardson-extrapolated central differences
    assert_close_to_differences(model["f"], (x,), 0, x_bar, value)


def test_unknown_shapes_keep_the_generic_helper() -> None:
    text, _ = generate(CASES[0][0], None)
    assert "_gw_unbroadcast" in text


def test_returned_gradients_share_no_array() -> None:
    source = numpy_model("a, b", "return np.sum(a * 1.0 + b)")
    _, ns = generate(source, {"a": ("n",), "b": ("n",)})
    a, b = np.ones(3), np.ones(3)
    _, (a_bar, b_bar) = ns["f_grad"](a, b)
    a_bar[0] = 5.0
    assert b_bar[0] == 1.0 and not np.shares_memory(a_bar, b_bar)


def test_declared_shape_errors() -> None:
    with pytest.raises(GradwrightError, match="no parameter"):
        gradwright.generate(LOGISTIC, ["f"], shapes={"Q": (2,)})
    with pytest.raises(GradwrightError, match="neither a size nor a name"):
        gradwright.generate(LOGISTIC, ["f"], shapes={"X": ("n", "5x")})


def test_gen_records_shapes_in_the_header(tmp_path: Path, monkeypatch) -> None:
    monkeypatch.chdir(tmp_path)
    Path("model.py").write_text(LOGISTIC)
    words = ["gen", "model.py", "f", "--wrt", "w", "-o", "out.py"]
    shapes = ["--shape", "y=n", "--shape", "X=n,5", "--shape", "w=5"]
    assert main([*words, *shapes]) == 0
    header = Path("out.py").read_text().splitlines()[3]
    assert "--shape X=n,5 --shape w=5 --shape y=n" in header
    assert main([*words, *shapes, "--check"]) == 0
    assert main([*words, "--check"]) == 1  # without the shapes it is another module
    assert main([*words, "--shape", "X=n;5"]) == 2
    assert main([*words, "--shape", "X=4x5", "--shape", "b=()"]) == 2  # b: no param


def test_build_target_shapes(tmp_path: Path, monkeypatch) -> None:
    monkeypatch.chdir(tmp_path)
    Path("model.py").write_text(LOGISTIC)
    Path("pyproject.toml").write_text(textwrap.dedent("""\
            [[tool.gradwright.targets]]
            source = "model.py"
            functions = ["f"]
            wrt = ["w"]
            output = "out.py"
            shapes = { X = "n,5", y = ["n"], w = [5] }
            """))
    assert main(["build"]) == 0
    text = Path("out.py").read_text()
    assert "--shape X=n,5 --shape w=5 --shape y=n" in text
    assert "_gw_unbroadcast" not in text
    assert main(["build", "--check"]) == 0
    Path("pyproject.toml").write_text(
        Path("pyproject.toml").read_text().replace('y = ["n"]', "y = 3.5")
    )
    assert main(["build"]) == 2


def test_shaped_module_runs_in_a_fresh_interpreter(tmp_path: Path) -> None:
    text, _ = generate(LOGISTIC, LOGISTIC_SHAPES, ["w"])
    (tmp_path / "m.py").write_text(text)
    script = (
        "import numpy as np, m\n"
        "v, (g,) = m.f_grad(np.ones(5) * 0.1, np.ones((3, 5)), np.zeros(3))\n"
        "print(g.shape)\n"
    )
    out = subprocess.run(
        [sys.executable, "-c", script], cwd=tmp_path, capture_output=True, text=True
    )
    assert out.stdout.strip() == "(5,)", out.stderr


# found by the npshapes random family (long run)
REGRESSIONS = [
    (  # a number's adjoint from np.where was returned as a 0-d array
        numpy_model("w, s", "u0 = np.where(s > 0.5, s, 0.5 * 0.5)\nreturn np.sum(u0)"),
        {"w": (2,), "s": ()},
        [(2,), ()],
    ),
    (  # the first write of an adjoint was smaller than its value, then added into
        numpy_model(
            "A",
            "u1 = np.maximum(np.sum(A, axis=1, keepdims=True), np.sum(np.dot(A.T, A)))"
            "\nreturn np.mean(u1)",
        ),
        {"A": ("n2", "n3")},
        [(2, 3)],
    ),
    (  # a norm along an axis is an array (it was taken for a number)
        numpy_model("A, b", "r = np.linalg.norm(A, axis=1) + b\nreturn np.sum(r * r)"),
        {"A": ("n", 3), "b": ("n",)},
        [(2, 3), (2,)],
    ),
    (  # and a number added to it gets the sum of its adjoint
        numpy_model("A, b", "r = np.linalg.norm(A, axis=1) + b\nreturn np.sum(r * r)"),
        {"A": ("n", 3), "b": ()},
        [(2, 3), ()],
    ),
    (  # a number broadcast over a matrix: its adjoint 6.0, not the int 6
        numpy_model("A, s", "return np.sum(s - A)"),
        {"A": ("n2", "n3"), "s": ()},
        [(2, 3), ()],
    ),
    (  # a number's adjoint added into from another adjoint as it is (a crash)
        numpy_model("s", "u1 = s\nu2 = np.arctan2(u1, 1.5 + s * s)\ns = u2\nreturn s"),
        {"s": ()},
        [()],
    ),
]


@pytest.mark.parametrize("case", range(len(REGRESSIONS)))
def test_regressions_found_by_random_programs(case: int) -> None:
    source, declared, shapes = REGRESSIONS[case]
    _, ns = generate(source, declared)
    model: dict = {}
    exec(compile(source, "<model>", "exec"), model)
    args = [draw(s, np.random.default_rng(case)) for s in shapes]
    value, grads = ns["f_grad"](*args)
    for j, arg in enumerate(args):
        if isinstance(arg, float):
            assert isinstance(grads[j], float)  # a number, not a 0-d array
        # reference: Richardson-extrapolated central differences of the model
        assert_close_to_differences(model["f"], args, j, grads[j], value)


def test_a_number_factor_moves_to_the_smaller_side_of_a_matrix_product() -> None:
    source = numpy_model("x, A, b", "r = A @ x - b\nreturn r @ r")
    text, ns = generate(source, {"x": (3,), "A": ("m", 3), "b": ("m",)}, ["x"])
    assert "x_bar = 2.0 * (A.T @ r)\n" in text  # not 2.0 * r over all m rows
    g = np.random.default_rng(11)
    x, A, b = g.normal(size=3), g.normal(size=(7, 3)), g.normal(size=7)
    _, (x_bar,) = ns["f_grad"](x, A, b)
    # reference: the closed form 2 A^T (Ax - b) (The Matrix Cookbook, section 2.4;
    # recalled from memory)
    np.testing.assert_allclose(x_bar, 2.0 * A.T @ (A @ x - b), rtol=1e-13)


def test_a_constructor_assigned_to_a_name_is_copied_once() -> None:
    source = numpy_model(
        "x", "z = np.zeros(3)\nw = np.linspace(0.0, 1.0, 3)\nreturn np.sum((x - z) * w)"
    )
    text, ns = generate(source, {"x": (3,)})
    forward = text.split("def f_grad")[1].split("# reverse sweep")[0]
    # as written, under the statement's own line: no `zeros = ...; z = zeros`
    assert "    z = np.zeros(3)\n    w = np.linspace(0.0, 1.0, 3)\n" in forward
    assert "_gw_unbroadcast" not in text  # literal sizes: known shapes
    x = np.array([0.3, -1.2, 2.0])
    value, (x_bar,) = ns["f_grad"](x)
    # reference: d/dx sum((x - z) * w) = w, by hand
    np.testing.assert_array_equal(x_bar, np.linspace(0.0, 1.0, 3))


def test_np_where_is_printed_as_a_call_without_extra_parentheses() -> None:
    source = numpy_model(
        "x, lo",
        "y = np.clip(x * 2.0, -1.0, 1.0)\nz = np.clip(x, lo, 3.0)\n"
        "return np.sum(y * y) + np.sum(z)",
    )
    text, ns = generate(source, {"x": ("n",), "lo": ()}, wrt=["x"])
    assert "x_bar += 2.0 * np.where(" in text and "* (np.where(" not in text
    x = np.array([-0.7, 0.1, 0.3, 2.0, 3.5])
    value, (x_bar,) = ns["f_grad"](x, 0.2)
    model: dict = {}
    exec(compile(source, "<model>", "exec"), model)
    # reference: Richardson-extrapolated central differences (no point on a kink)
    assert_close_to_differences(model["f"], (x, 0.2), 0, x_bar, value)


def test_a_number_parameter_rebound_gets_a_float_back() -> None:
    # s = np.where(...) re-binds s to a 0-d array; _gw_shaped(s_bar, s) read that
    # array instead of the parameter and gave a 0-d array back
    source = numpy_model("x, s", "s = np.where(s > 0.0, s, -s)\nreturn np.sum(x * s)")
    for shapes in (None, {"x": ("n",), "s": ()}):
        _, ns = generate(source, shapes)
        x = np.array([1.0, 2.0, -0.5])
        for s in (0.5, -0.5):
            _, (x_bar, s_bar) = ns["f_grad"](x, s)
            assert type(s_bar) is float, type(s_bar)
            # reference by hand: d/ds sum(x * |s|) = sign(s) * sum(x), d/dx = |s|
            assert s_bar == np.sign(s) * 2.5
            np.testing.assert_array_equal(x_bar, np.full(3, abs(s)))


def test_a_declared_number_comes_back_through_float() -> None:
    # b=() is checked at the call, so its adjoint is a number: float(b_bar), with
    # no generic helper in the module
    source = numpy_model("x, b", "return np.sum(np.tanh(x + b))")
    text, ns = generate(source, {"x": ("n",), "b": ()})
    assert "float(b_bar)" in text and "_gw_shaped" not in text
    x = np.array([0.3, -1.1, 2.0])
    for b in (0.25, np.float64(0.25), np.array(0.25)):
        _, (x_bar, b_bar) = ns["f_grad"](x, b)
        assert type(b_bar) is float, type(b_bar)
        # reference by hand: d/db sum(tanh(x + b)) = sum(1 - tanh(x + b)**2)
        exact = 1.0 - np.tanh(x + 0.25) ** 2
        assert abs(b_bar - float(np.sum(exact))) <= 1e-15
        np.testing.assert_allclose(x_bar, exact, rtol=1e-15)
    # x_bar = value_bar_1 is that new array's one copy: returned as it is; two
    # parameters with the one adjoint each get an array of their own
    source = numpy_model("x, y", "return np.sum(np.tanh(x + y))")
    text, ns = generate(source, {"x": ("n",), "y": ("n",)})
    assert "(_gw_shaped(x_bar, x), _gw_shaped(y_bar, y))" in text
    _, (x_bar, y_bar) = ns["f_grad"](x, x[::-1].copy())
    assert x_bar is not y_bar
    x_bar[0] = 7.0
    assert y_bar[0] == 1.0 - np.tanh(x[0] + x[-1]) ** 2  # reference by hand


def test_the_declared_shapes_are_read_once() -> None:
    # the check runs at every call; reading its declaration cost more than the
    # check itself (least squares, 10^4 rows: 4.5 us of a 30 us primal, CPU time)
    text, ns = generate(LOGISTIC, LOGISTIC_SHAPES, ["w"])
    assert "_GW_DECLARED.get(declared)" in text
    g = np.random.default_rng(4)
    w, X, y = g.normal(size=5), g.normal(size=(6, 5)), g.normal(size=6)
    ns["f_grad"](w, X, y)
    ns["f_grad"](w, X, y)
    assert list(ns["_GW_DECLARED"].values()) == [
        [("w", [5]), ("X", ["n", 5]), ("y", ["n"])]
    ]
    # read from the cache, a violation is still refused
    with pytest.raises(ValueError, match=r"y has shape \(7,\).*\(6,\)"):
        ns["f_grad"](w, X, g.normal(size=7))


# a copied statement's text, the shapes of the names it reads (n and d stand for
# sizes), and the shape the text gives its target: None where it is not read
TEXT_SHAPES = [
    ("s = X.std(axis=0) + 1e-12", {"X": ("n", "d")}, ("d",)),
    ("s = np.std(X, 0, ddof=1)", {"X": ("n", "d")}, ("d",)),
    ("m = X.mean(axis=1, keepdims=True)", {"X": ("n", "d")}, ("n", 1)),
    ("m = np.max(X, axis=(0, 1))", {"X": (2, "n", 3)}, (3,)),
    ("t = np.median(X)", {"X": ("n", "d")}, ()),
    ("z = np.zeros(len(x))", {"x": ("n",)}, ("n",)),
    ("z = np.ones((X.shape[1], 3))", {"X": ("n", "d")}, ("d", 3)),
    ("z = np.full(X.shape, 2.0)", {"X": ("n", "d")}, ("n", "d")),
    ("z = np.zeros_like(X)", {"X": ("n", "d")}, ("n", "d")),
    ("z = np.sqrt(np.maximum(X, 0.0)) * w", {"X": ("n", "d"), "w": ("d",)}, ("n", "d")),
    ("z = (X - mu) / s", {"X": ("n", 3), "mu": (3,), "s": ()}, ("n", 3)),
    ("z = X.T @ X", {"X": ("n", "d")}, ("d", "d")),
    ("a, b = X.sum(axis=0), 2.0", {"X": ("n", "d")}, ("d",)),
    ("z = np.linspace(0.0, 1.0, 7)", {}, (7,)),
    # not read: a shape NumPy decides from values, or forms outside the list
    ("z = np.zeros(k)", {"k": ()}, None),
    ("z = X[mask]", {"X": ("n",), "mask": ("n",)}, None),
    ("z = X.reshape(-1)", {"X": ("n", "d")}, None),
    ("z = np.mean(X, axis=k)", {"X": ("n", "d"), "k": ()}, None),
    ("z = np.concatenate([X, X])", {"X": ("n",)}, None),
]


@pytest.mark.parametrize("case", range(len(TEXT_SHAPES)))
def test_shapes_read_from_copied_text_are_numpys(case: int) -> None:
    from gradwright.sweeps.text_shapes import copied_shape

    text, names, expected = TEXT_SHAPES[case]
    target = text.split("=")[0].split(",")[0].strip()
    got = copied_shape(text, target, names, ["np"])
    assert got == expected
    if expected is None:
        return
    # reference: NumPy itself, run on arrays of those shapes (n = 5, d = 4)
    sizes = {"n": 5, "d": 4}
    g = np.random.default_rng(case)
    env = {
        name: g.uniform(0.5, 1.5, tuple(sizes.get(k, k) for k in shape))
        for name, shape in names.items()
    }
    env["np"] = np
    exec(text, env)
    assert np.shape(env[target]) == tuple(sizes.get(k, k) for k in expected)


def test_a_copied_standardisation_keeps_the_shapes_known() -> None:
    # sigma comes out of a copied statement (it reads no --wrt parameter)
    source = numpy_model(
        "w, X, y, lam",
        """\
        mu = X.mean(axis=0)
        sigma = X.std(axis=0) + 1e-12
        Xn = (X - mu) / sigma
        r = Xn @ w - y
        return np.mean(r * r) + lam * np.sum(w * w)
        """,
    )
    declared = {"w": ("d",), "X": ("n", "d"), "y": ("n",), "lam": ()}
    text, shaped = generate(source, declared, ["w"])
    assert "_gw_" not in text.split("# reverse sweep")[1], text
    assert "w_bar += 2.0 / n * (Xn.T @ r)" in text
    g = np.random.default_rng(7)
    X, y, w = g.normal(size=(6, 3)), g.normal(size=6), g.normal(size=3)
    value, (w_bar,) = shaped["f_grad"](w, X, y, 0.1)
    # reference: the closed form of ridge least squares' gradient (common practice),
    # 2/n Xn^T (Xn w - y) + 2 lam w
    Xn = (X - X.mean(axis=0)) / (X.std(axis=0) + 1e-12)
    exact = 2.0 / 6 * Xn.T @ (Xn @ w - y) + 0.2 * w
    np.testing.assert_allclose(w_bar, exact, rtol=1e-13)


def test_new_axes_read_like_hand_written_code() -> None:
    # x[:, None] and x[None, :] are the same elements: their adjoints are sums
    # over the broadcast axis, not scatters into zeros
    source = numpy_model(
        "a, b", "return np.sum(np.tanh(a[:, None] - b[None, :]) * b[None, :])"
    )
    text, _ = generate(source, {"a": ("n",), "b": ("k",)})
    reverse = text.split("# reverse sweep")[1]
    assert "_gw_" not in reverse and "broadcast_to" not in reverse, reverse
    assert 'np.einsum("ij->j"' in reverse


def test_a_loop_carried_adjoint_keeps_its_known_shape() -> None:
    # pred's adjoint enters the loop with pred's shape and no trip changes it, so
    # the loop needs no np.broadcast_to; np.zeros(len(x)) is copied as written
    source = numpy_model(
        "c, x, y",
        """\
        pred = np.zeros(len(x))
        for k in range(4):
            pred = pred + c[k] * x**k
        return np.mean((pred - y) ** 2)
        """,
    )
    text, shaped = generate(source, {"c": (4,), "x": ("n",), "y": ("n",)}, ["c"])
    reverse = text.split("# reverse sweep")[1]
    assert "broadcast_to" not in reverse and "_gw_unbroadcast" not in reverse
    g = np.random.default_rng(3)
    c, x, y = g.normal(size=4), g.normal(size=9), g.normal(size=9)
    _, (c_bar,) = shaped["f_grad"](c, x, y)
    # reference: the normal equations' gradient of a polynomial least-squares fit
    # (common practice): 2/n V^T (V c - y), V the Vandermonde matrix of x
    V = np.vander(x, 4, increasing=True)
    np.testing.assert_allclose(c_bar, 2.0 / 9 * V.T @ (V @ c - y), rtol=1e-12)


def test_arrays_shaped_like_an_active_array_are_copied() -> None:
    # np.ones_like(x) reads x only for its shape and type: no derivative flows
    # through it, so it is copied as written (and refused with an active fill)
    source = numpy_model(
        "a, x",
        "z = np.ones_like(x) * 1.5\nreturn np.sum(np.full_like(x, 2.0) * z * x * a)",
    )
    text, shaped = generate(source, {"a": (), "x": ("n",)})
    assert "z = ones_like * 1.5" in text or "np.ones_like(x)" in text
    x = np.array([0.5, -1.0, 2.0])
    _, (a_bar, x_bar) = shaped["f_grad"](0.7, x)
    # reference: d/da sum(3 x a) = 3 sum(x), d/dx = 3 a (closed form)
    assert a_bar == pytest.approx(3.0 * np.sum(x), rel=1e-15)
    np.testing.assert_allclose(x_bar, 3.0 * 0.7 * np.ones(3), rtol=1e-15)
    with pytest.raises(GradwrightError, match="has no derivative here"):
        generate(numpy_model("a, x", "return np.sum(np.full_like(x, a) * x)"), None)


def test_a_leaky_relu_layer_reads_like_hand_written_code() -> None:
    # np.where(h > 0, h, 0.01 * h)'s slope is one select, and X @ W.T's adjoint
    # in W is h_bar.T @ X, not (X.T @ h_bar).T
    source = numpy_model(
        "W, b, X",
        "h = X @ W.T + b\nh = np.where(h > 0, h, 0.01 * h)\nreturn np.sum(h * h)",
    )
    declared = {"W": ("k", "d"), "b": ("k",), "X": ("n", "d")}
    text, shaped = generate(source, declared, ["W", "b"])
    reverse = text.split("# reverse sweep")[1]
    assert "np.where(h_1, h_bar, 0.01 * h_bar)" in reverse, reverse
    assert "W_bar = h_bar_1.T @ X" in reverse, reverse
    model: dict = {}
    exec(compile(source, "<model>", "exec"), model)
    g = np.random.default_rng(11)
    args = [g.normal(size=(3, 2)), g.normal(size=3), g.normal(size=(5, 2))]
    value, grads = shaped["f_grad"](*args)
    for k in range(2):
        # reference: Richardson-extrapolated central differences of the model
        assert_close_to_differences(model["f"], args, k, grads[k], value)


SPRING = numpy_model(
    "k, c, gain, target, limit",
    """\
    x = np.zeros(2)
    cost = 0.0
    for step in range(len(target)):
        force = np.clip(gain * (target[step] - x[0]), -limit, limit)
        acc = force - k * x[0] - c * x[1]
        x = x + 0.05 * np.array([x[1], acc])
        cost += (x[0] - target[step]) ** 2
    return cost
    """,
)


def test_a_state_vector_simulation_reads_like_hand_written_code() -> None:
    # a two-element state: its adjoint starts as np.zeros((2,)) (so every trip
    # keeps its shape), the element reads' adjoints are one np.array([...]) each,
    # and a choice between numbers is Python's conditional, not np.where
    declared = {"k": (), "c": (), "gain": (), "target": ("n",), "limit": ()}
    text, shaped = generate(SPRING, declared, ["k", "c", "gain"])
    reverse = text.split("# reverse sweep")[1]
    assert "x_bar = np.zeros((2,))" in reverse
    for noise in ("_gw_scatter", "_gw_unbroadcast", "broadcast_to", "np.where"):
        assert noise not in reverse, (noise, reverse)
    assert "np.array([-acc_bar * k, -acc_bar * c], dtype=float)" in reverse, reverse
    model: dict = {}
    exec(compile(SPRING, "<model>", "exec"), model)
    target = np.sin(np.linspace(0.0, 3.0, 12))
    # the limit cuts in on some steps, not others (no step at the limit exactly)
    args = [2.0, 0.4, 5.0, target, 0.9]
    value, grads = shaped["f_grad"](*args)
    for j in range(3):
        # reference: Richardson-extrapolated central differences of the model
        assert_close_to_differences(model["f"], args, j, grads[j], value)


def test_review_findings_on_shapes_aliases_and_int_arrays() -> None:
    # np.vecdot is a ufunc with a core signature: its result is not a broadcast
    # of its operands' shapes (NumPy's own ufunc.signature says so)
    from gradwright.sweeps.text_shapes import copied_shape

    assert (
        copied_shape("y = np.vecdot(X, u)", "y", {"X": (3, 3), "u": (3,)}, ["np"])
        is None
    )
    # `alias = cost` then `cost += ...` changes alias too: refused, not lowered as
    # if cost held an array of its own
    aliased = numpy_model(
        "x",
        "cost = 0.0\ncost += x\nalias = cost\ncost += x * x\n"
        "return np.sum(alias * cost)",
    )
    with pytest.raises(GradwrightError, match="may share its array"):
        generate(aliased, None)
    # element adjoints gathered into an array are floats even when every one is
    # an int-valued expression (x_bar = [k, k] with k = 3)
    source = numpy_model("x, k", "return x[0] * k + x[1] * k")
    _, shaped = generate(source, {"x": (2,), "k": ()}, ["x"])
    _, (x_bar,) = shaped["f_grad"](np.array([1.0, 2.0]), 3)
    assert x_bar.dtype == np.float64 and list(x_bar) == [3.0, 3.0]  # closed form


def test_an_array_power_with_an_exponent_array_raises_no_floating_point_error() -> None:
    # at x == 0 with exponent 0 the slope is 0 (x**0 == 1 everywhere); the
    # exponent's slope at x == 0 is 0 too. Reference: the closed forms
    # d/dx x^k = k x^(k-1), d/dk x^k = x^k log x, evaluated by hand
    source = numpy_model("x, k", "return np.sum(np.power(x, k))")
    _, namespace = generate(source, None)
    x, k = np.array([0.0, 2.0, 0.5]), np.array([0.0, 3.0, 2.0])
    with np.errstate(all="raise"):
        _, (x_bar, k_bar) = namespace["f_grad"](x, k)
    np.testing.assert_allclose(x_bar, [0.0, 12.0, 1.0], rtol=1e-15)
    np.testing.assert_allclose(
        k_bar, [0.0, 8.0 * np.log(2.0), 0.25 * np.log(0.5)], rtol=1e-15
    )


def test_a_division_by_a_sum_stays_outside_the_sum() -> None:
    source = numpy_model(
        "logits, cov, expected, risk_aversion",
        "w = np.exp(logits - np.max(logits))\nw = w / np.sum(w)\n"
        "return risk_aversion * (w @ cov @ w) - expected @ w",
    )
    shapes = {"logits": ("n",), "cov": ("n", "n"), "expected": ("n",)}
    text, ns = generate(source, {**shapes, "risk_aversion": ()}, wrt=["logits"])
    # d(w / s): (g - sum(g * w / s)) / s, the division once per element
    assert "(w_2_bar - np.sum(w_2_bar * w_2)) / w_1" in text
    g = np.random.default_rng(21)
    logits, cov, expected = g.normal(size=4), g.normal(size=(4, 4)), g.normal(size=4)
    _, (logits_bar,) = ns["f_grad"](logits, cov, expected, 0.7)
    # reference: the softmax Jacobian diag(w) - w w^T (textbook) applied to the
    # gradient in w, 0.7 (C + C^T) w - e
    w = np.exp(logits - logits.max())
    w /= w.sum()
    grad_w = 0.7 * (cov + cov.T) @ w - expected
    np.testing.assert_allclose(logits_bar, w * (grad_w - w @ grad_w), atol=1e-15)
