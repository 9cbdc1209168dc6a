"""Statements that read no active value are copied as written (lowering/inactive.py):
guards, string formatting, local constant dicts, while loops computing constants.

Gradients are checked against SymPy's ``diff`` of the closed form the model
computes (the copied statements fix its constants); tests/models/programs_inactive.py
holds more, run on MicroPython and checked against mpmath central differences.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import sympy
from support import build, rel_err, run_source, same_bits

import gradwright

MODEL = (Path(__file__).parent / "models" / "programs_inactive.py").read_text()


def _closed_guarded():
    """guarded() written out: the while loop leaves k = 5; p = 1.5, q = -0.25."""
    x, y = sympy.symbols("x y", positive=True)
    z = x * y * 5 * sympy.Rational(3, 2) + 2 * sympy.log(x)
    q = sympy.Rational(-1, 4)
    for i in range(3):
        z = z * q + sympy.sin(y * i)
    return (x, y), z


@pytest.mark.parametrize("point", [(0.7, 1.3), (2.5, -0.4)])
def test_guarded_matches_sympy(point):
    ns = build(MODEL, "guarded")
    value, grad = ns["guarded_grad"](*point)
    assert same_bits(value, run_source(MODEL)["guarded"](*point))
    symbols, z = _closed_guarded()
    subs = dict(zip(symbols, point, strict=True))
    for got, symbol in zip(grad, symbols, strict=True):
        exact = sympy.diff(z, symbol).subs(subs)  # reference: SymPy diff
        assert rel_err(got, float(exact)) < 1e-14


def test_guards_raise_as_the_source_does():
    ns = build(MODEL, "guarded")
    plain = run_source(MODEL)["guarded"]
    for point, error in [((-1.0, 1.0), AssertionError), ((1.0, -20.0), ValueError)]:
        with pytest.raises(error) as primal:
            plain(*point)
        with pytest.raises(error) as generated:
            ns["guarded_grad"](*point)
        assert str(generated.value) == str(primal.value)


def test_copied_statements_are_the_source_text():
    text = gradwright.generate(MODEL, ["guarded"])
    body = text.split("def guarded_grad")[1].split("# reverse sweep")[0]
    for line in [
        '    assert x > 0.0, f"x must be positive, got {x}"',
        "    if y < -10.0:",
        '        raise ValueError(f"y={y} is out of range")',
        "    while k * k < 20:",
        "        k += 1",
        '    label = "k=" + str(k)',
        '        note = label + ", step " + str(i)',
    ]:
        assert line + "\n" in body
    assert "    # while" not in body  # a copied statement quotes itself


def test_renamed_by_the_syntax_tree_not_the_text():
    # c is read by the reverse sweep (y = c * x) and rebound by the while loop:
    # the loop works on a copy named c_1; a string holding "c" is left alone
    source = (
        "def f(x):\n"
        "    c = 3.0\n"
        "    y = c * x\n"
        "    while c < 10.0:\n"
        "        c += 4.0\n"
        '    label = f"c={c}" + "c"\n'
        "    return y * c\n"
    )
    text = gradwright.generate(source, ["f"])
    assert "    c_1 = c\n    while c_1 < 10.0:\n        c_1 += 4.0\n" in text
    assert '    label = f"c={c_1}" + "c"\n' in text
    ns = build(source, "f")
    _, (x_bar,) = ns["f_grad"](1.7)
    x = sympy.Symbol("x")
    assert x_bar == float(sympy.diff(3 * x * 11, x))  # reference: SymPy diff (33)


def test_names_a_guard_binds_are_its_own():
    source = (
        "def f(x):\n"
        "    msg = 2.0 * x\n"
        "    if x < 0.0:\n"
        '        note = "negative: " + str(x)\n'
        "        raise ValueError(note)\n"
        "    return msg * x\n"
    )
    ns = build(source, "f")
    _, (x_bar,) = ns["f_grad"](1.5)
    assert x_bar == 6.0  # d(2 x^2)/dx = 4 x, a textbook closed form
    with pytest.raises(ValueError, match="negative: -1.0"):
        ns["f_grad"](-1.0)


def test_local_dict_lookup_with_a_key_from_a_copied_statement():
    source = (
        "def f(x, n):\n"
        '    weights = {"a": 2.0, "b": 5.0}\n'
        "    total = 0.0\n"
        "    for i in range(n):\n"
        '        key = "a" if i % 2 == 0 else "b"\n'
        "        total = total + weights[key] * x * x\n"
        "    return total\n"
    )
    ns = build(source, "f")
    _, (x_bar, n_bar) = ns["f_grad"](0.5, 3)
    # weights a, b, a: total = 9 x^2, derivative 18 x (SymPy diff)
    x = sympy.Symbol("x")
    assert x_bar == float(sympy.diff(9 * x**2, x).subs(x, 0.5))
    assert n_bar == 0.0


def _error(source: str, wrt: list[str] | None = None) -> str:
    with pytest.raises(gradwright.GradwrightError) as error:
        gradwright.generate(source, ["f"], wrt=wrt)
    return str(error.value)


def test_a_statement_reading_an_active_value_is_not_copied():
    text = _error('def f(x):\n    label = f"{x:.3f}"\n    return x\n')
    assert "<string>:2:13: error: f-strings are not supported" in text
    assert "this one reads 'x'" in text
    # the same statement copies when x is left out of --wrt
    source = 'def f(x, y):\n    label = f"{x:.3f}"\n    return x * y\n'
    assert 'label = f"{x:.3f}"' in gradwright.generate(source, ["f"], wrt=["y"])


def test_a_copied_statement_must_not_change_a_value_in_place():
    source = (
        "def f(x):\n"
        "    n = 2\n"
        '    table = {"a": n}\n'
        '    table["a"] = 3\n'
        '    return x * table["a"]\n'
    )
    text = _error(source)
    assert "<string>:4:5: error: a statement copied as written must not change" in (
        text
    )
    assert "build a new value" in text


STANDARDISED = """
import numpy as np


def ridge_loss(w, X, y, lam):
    sigma = X.std(axis=0) + 1e-12
    Xn = (X - X.mean(axis=0)) / sigma
    resid = Xn @ w - y
    return np.mean(resid**2) + lam * np.dot(w, w)
"""


def test_an_array_method_that_only_reads_is_copied_against_closed_form():
    # X.std(axis=0) is no primitive of ours, and reads no active value: copied
    text = gradwright.generate(STANDARDISED, ["ridge_loss"], wrt=["w"])
    assert "    sigma = X.std(axis=0) + 1e-12\n" in text
    rng = np.random.default_rng(5)
    X, y, w = rng.normal(size=(12, 3)), rng.normal(size=12), rng.normal(size=3)
    _, (w_bar,) = build(STANDARDISED, "ridge_loss", ["w"])["ridge_loss_grad"](
        w, X, y, 0.3
    )
    # closed form by hand: d/dw [mean((Xn w - y)^2) + lam w.w] = 2 Xn^T r / n + 2 lam w
    Xn = (X - X.mean(axis=0)) / (X.std(axis=0) + 1e-12)
    exact = 2.0 * Xn.T @ (Xn @ w - y) / len(y) + 2.0 * 0.3 * w
    assert np.max(np.abs(w_bar - exact)) < 1e-13 * np.max(np.abs(exact))
    # a method's out= writes into its argument: that is a change in place
    writing = STANDARDISED.replace("X.std(axis=0)", "X.std(axis=0, out=y)")
    text = _error(writing.replace("ridge_loss", "f"), ["w"])
    assert "error: a statement copied as written must not change a value" in text
    # so does a ufunc's positional output, np.multiply(X, 2.0, X)
    positional = STANDARDISED.replace("X.std(axis=0)", "np.multiply(X, 2.0, X)")
    text = _error(positional.replace("ridge_loss", "f"), ["w"])
    assert "error: a statement copied as written must not change a value" in text
    # out=None writes nothing: copied
    unwritten = STANDARDISED.replace("X.std(axis=0)", "X.std(axis=0, out=None)")
    assert "out=None" in gradwright.generate(unwritten, ["ridge_loss"], wrt=["w"])
    # a view (ravel, reshape, ...) would let a later copied `flat *= 2.0` change X
    viewed = STANDARDISED.replace("X.std(axis=0)", "X.ravel()[:3]")
    text = _error(viewed.replace("ridge_loss", "f"), ["w"])
    assert "error: a statement copied as written must not change a value" in text


ACCUMULATED = """
import numpy as np


def f(w, X):
    r = X @ w
    acc = np.zeros(X.shape[1])
    for row in X:
        acc += row
    scale = acc * 2.0
    scale += 1.0
    return np.sum(r**2) * np.sum(scale)
"""


def test_copied_op_assign_only_on_an_array_of_its_own_against_closed_form():
    rng = np.random.default_rng(8)
    X, w = rng.normal(size=(6, 3)), rng.normal(size=3)
    _, (w_bar,) = build(ACCUMULATED, "f", ["w"])["f_grad"](w, X)
    # closed form by hand: f = |Xw|^2 S, S = sum(2 colsum(X) + 1), constant in w
    exact = 2.0 * X.T @ (X @ w) * np.sum(2.0 * X.sum(axis=0) + 1.0)
    assert np.max(np.abs(w_bar - exact)) < 1e-13 * np.max(np.abs(exact))
    # a view or an alias of X, changed by a copied `op=`, would change the X the
    # reverse sweep reads: refused
    for binding in ("np.ravel(X)", "X", "X[0]", "X.T"):
        changed = ACCUMULATED.replace("np.zeros(X.shape[1])", binding)
        with pytest.raises(gradwright.GradwrightError, match="in place"):
            gradwright.generate(changed, ["f"], wrt=["w"])


def test_a_copied_statement_reading_a_dict_of_numbers_is_a_located_error():
    # the dict of numbers is a list (and a table of positions) in the output: a
    # statement copied as written would index it with a key; before, the
    # rejected copy also left its table of positions behind (an internal error)
    source = (
        'NAMES = ["a", "b"]\n'
        "def f(x, y):\n"
        '    d = {"a": 1.5, "b": 2.5}\n'
        "    s = 0.0\n"
        "    for name in NAMES:\n"
        "        w = d[name] + len(name.upper())\n"
        "        s += w * x + d[name] * y\n"
        "    return s\n"
    )
    text = _error(source)
    assert "<string>:6:" in text and "internal error" not in text


def test_a_guard_reading_an_active_value_inside_a_loop():
    source = (
        "import math\n\n\n"
        "def f(x):\n"
        "    s = 0.0\n"
        "    for i in range(4):\n"
        "        s = s + math.sin(x * i)\n"
        '        assert s < 100.0, f"diverged at {i}: {s}"\n'
        "    return s\n"
    )
    ns = build(source, "f")
    _, (x_bar,) = ns["f_grad"](0.3)
    x = sympy.Symbol("x")
    exact = sympy.diff(sum(sympy.sin(x * i) for i in range(4)), x).subs(x, 0.3)
    assert rel_err(x_bar, float(exact)) < 1e-15  # reference: SymPy diff


NUMPY_MODEL = """import numpy as np

XP = [0.0, 1.0, 2.0, 4.0]
FP = [1.0, 3.0, 2.0, 5.0]


def f(x):
    grid = np.linspace(0.0, 1.0, len(x))
    y = np.interp(x, XP, FP) * (grid + np.ones(len(x)))
    return np.sum(y)
"""


def test_interp_slope_at_knots_and_outside_the_table():
    ns = build(NUMPY_MODEL, "f")
    import numpy as np

    x = np.array([-1.0, 0.0, 0.5, 1.0, 2.0, 3.0, 4.0, 5.0])
    _, (x_bar,) = ns["f_grad"](x)
    # the slope rule (closed form): segment slopes 2, -1, 1.5; at a knot the
    # segment to its right; 0 before the table and from the last knot on
    slope = np.array([0.0, 2.0, 2.0, -1.0, 1.5, 1.5, 0.0, 0.0])
    weight = np.linspace(0.0, 1.0, len(x)) + 1.0
    assert np.array_equal(x_bar, slope * weight)


def test_array_constructors_are_copied_where_they_appear():
    text = gradwright.generate(NUMPY_MODEL, ["f"])
    assert "    grid = np.linspace(0.0, 1.0, len(x))\n" in text
    assert "    ones = np.ones(len(x))\n" in text
    text = _error(
        "import numpy as np\n\n\ndef f(x):\n    return np.sum(np.full(3, x[0]))\n"
    )
    assert "this expression reads 'x'" in text
    assert "np.zeros(n)" in text


def test_two_copied_loops_from_equal_values_bind_values_of_their_own():
    # found by the guards_dicts random family: m1 and m2 both start at 1, and value
    # numbering took the second loop's result for the first's (y_bar read m1)
    source = (
        "def f(y):\n"
        "    m1 = 1\n"
        "    while m1 < 2:\n"
        "        m1 = m1 * 2\n"
        "    m2 = 1\n"
        "    while m2 < 8:\n"
        "        m2 = m2 * 2\n"
        "    return y * m2 / 8.0\n"
    )
    ns = build(source, "f")
    _, (y_bar,) = ns["f_grad"](-0.5)
    assert y_bar == 1.0  # d(y * 8 / 8)/dy, a closed form


REPORTING = """
def spring(k, c):
    e = 0.5 * k * c * c
    print("energy", e)
    for i in range(2):
        if i == 1:
            print(f"{i}: {e * k:.3f}")
    return e * k
"""


def test_print_lines_are_copied_as_written_against_closed_form(capsys):
    # a print reads active values but binds nothing: it is copied, not refused
    text = gradwright.generate(REPORTING, ["spring"])
    forward = text.split("def spring_grad")[1].split("# reverse sweep")[0]
    assert '    print("energy", e)\n' in forward
    assert 'print(f"{i}: {e * k:.3f}")' in forward
    ns = build(REPORTING, "spring")
    ns["spring"](2.0, 3.0)
    primal_output = capsys.readouterr().out
    value, (k_bar, c_bar) = ns["spring_grad"](2.0, 3.0)
    assert capsys.readouterr().out == primal_output == "energy 9.0\n1: 18.000\n"
    # closed form: f = 0.5 k**2 c**2, df/dk = k c**2, df/dc = k**2 c
    assert (value, k_bar, c_bar) == (18.0, 18.0, 12.0)
