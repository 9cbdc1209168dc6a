"""Each value computed once (lowering/common_values.py).

References: SymPy's derivative of the same model written by hand, and mpmath
central differences at 50 digits (``support.mp_gradient``) where a branch or a
loop decides which statements run.
"""

from __future__ import annotations

import pytest
import sympy
from support import build, mp_function, mp_gradient, rel_err, run_source

import gradwright


def code(text: str, name: str) -> str:
    """The forward sweep of ``name``_grad without its comments (the source's
    own lines)."""
    forward = text.split(f"def {name}_grad")[1].split("# reverse sweep")[0]
    return "\n".join(
        line for line in forward.splitlines() if not line.strip().startswith("#")
    )


REPEATED = """
import math


def stiffness(k, a, b):
    soft = k * math.exp(-a * b) + math.sin(a * b)
    hard = math.exp(-a * b) / (1.0 + a * b)
    return soft * hard
"""


def test_an_expression_written_twice_is_one_value():
    text = gradwright.generate(REPEATED, ["stiffness"])
    body = code(text, "stiffness")
    # a * b and math.exp(-a * b) once each in the forward sweep
    assert body.count("a * b") == 1, body
    assert body.count("math.exp(") == 1, body
    module = build(REPEATED, "stiffness")
    k, a, b = sympy.symbols("k a b")
    model = (k * sympy.exp(-a * b) + sympy.sin(a * b)) * (
        sympy.exp(-a * b) / (1 + a * b)
    )
    point = {k: 1.3, a: 0.7, b: -0.4}
    value, grads = module["stiffness_grad"](1.3, 0.7, -0.4)
    assert value == run_source(REPEATED)["stiffness"](1.3, 0.7, -0.4)  # same bits
    for symbol, got in zip((k, a, b), grads, strict=True):
        # reference: SymPy's derivative of the model written by hand
        exact = sympy.diff(model, symbol).evalf(30, subs=point)
        assert rel_err(got, float(exact)) < 1e-14


NAMED = """
def f(x, y):
    t = x * y
    u = x * y
    return t * u + (x * y) ** 2
"""


def test_a_name_the_model_binds_keeps_its_statement():
    text = gradwright.generate(NAMED, ["f"])
    forward = code(text, "f")
    assert "t = x * y" in forward and "u = x * y" in forward
    # the anonymous (x * y) of the return is t's value, not a third product
    assert forward.count("x * y") == 2
    module = build(NAMED, "f")
    _, (x_bar, y_bar) = module["f_grad"](0.6, -1.7)
    # reference by hand: f = 2 x^2 y^2
    assert rel_err(x_bar, 4 * 0.6 * 1.7**2) < 1e-15
    assert rel_err(y_bar, 4 * 0.36 * -1.7) < 1e-15


SCOPED = """
import math


def f(x, y, n):
    s = 0.0
    if x > 0.5:
        s = math.sin(x * y)
    for i in range(n):
        s = s + math.cos(x * y) * 0.5
    return s + math.sin(x * y) * math.cos(x * y)
"""


@pytest.mark.parametrize("point", [(0.8, 1.1, 2), (0.3, 1.1, 2), (0.8, 1.1, 0)])
def test_a_value_made_in_a_branch_or_a_loop_is_not_read_after_it(point):
    # x * y of the then-side and of the loop body may not have run: the return
    # makes its own, and reads it twice
    text = gradwright.generate(SCOPED, ["f"], wrt=["x", "y"])
    forward = code(text, "f")
    assert forward.count("x * y") == 3, forward
    assert "value_2 = math.sin(value_1)\n    value_3 = math.cos(value_1)" in forward
    module = build(SCOPED, "f", ["x", "y"])
    value, grads = module["f_grad"](*point)
    assert value == run_source(SCOPED)["f"](*point)
    # reference: mpmath central differences at 50 digits
    exact = mp_gradient(mp_function(SCOPED, "f"), list(point), [0, 1])
    for got, want in zip(grads, exact, strict=True):
        assert rel_err(got, float(want)) < 1e-13
