"""One run reports every error in the differentiated function, like a compiler:
each located, in source order, without errors that only follow from another."""

from __future__ import annotations

import pytest
from workflow_support import cli

import gradwright

MODEL = """import math


def model(a, b, xs):
    n = lambda t: t * a
    total = 0.0
    for x in xs:
        total += a * x
        math.sin(total)
    c = total @ b
    d = c + n(1.0)
    e = math.frexp(a)
    return total + d + e + b
"""


def test_every_error_in_one_run():
    with pytest.raises(gradwright.GradwrightError) as error:
        gradwright.generate(MODEL, ["model"], wrt=["a", "b"], path="model.py")
    text = str(error.value)
    heads = [line for line in text.splitlines() if ": error: " in line]
    assert [h.split(": error: ")[0] for h in heads] == [
        "model.py:5:9",  # lambda
        "model.py:9:9",  # math.sin(total): no effect
        "model.py:10:15",  # @
        "model.py:12:9",  # math.frexp
    ]
    # `d = c + n(1.0)` reads names of rejected statements: no error of its own
    assert "model.py:11:" not in text
    assert text.splitlines()[-1] == "4 errors"
    assert len(error.value.diagnostics) == 4


def test_at_most_twenty_are_shown():
    lines = [f"    v{k} = lambda t: t * x" for k in range(25)]
    source = "def f(x):\n" + "\n".join(lines) + "\n    return x\n"
    with pytest.raises(gradwright.GradwrightError) as error:
        gradwright.generate(source, ["f"], wrt=["x"])
    text = str(error.value)
    assert text.count(": error: ") == 20
    assert text.splitlines()[-1] == "25 errors (5 not shown)"


def test_command_line_prints_them_all_and_writes_nothing(tmp_path):
    (tmp_path / "model.py").write_text(MODEL)
    result = cli(
        "gen", "model.py", "model", "--wrt", "a,b", "-o", "out.py", cwd=tmp_path
    )
    assert result.code == 2
    assert result.out == ""
    assert result.err.count(": error: ") == 4 and "4 errors" in result.err
    assert not (tmp_path / "out.py").exists()


def test_no_cascade_through_loops_and_branches():
    source = """
def rod(alpha, u0, c):
    u = sorted(u0)
    for _ in range(3):
        new = u[:]
        for i in range(1, len(u) - 1):
            new[i] = u[i] + alpha * (u[i - 1] - 2.0 * u[i] + u[i + 1])
        if c > 0.0:
            new[0] = alpha
        u = new
    return u[0]
"""
    with pytest.raises(gradwright.GradwrightError) as error:
        gradwright.generate(source, ["rod"], wrt=["alpha", "u0"])
    text = str(error.value)
    assert text.count(": error: ") == 1  # only `sorted(u0)`; the rest reads u
    assert "<string>:3:9:" in text


# a state tuple handed to a step helper (not supported yet): the error is the
# helper's own, with the signature to write, not one that follows from it
STEPPED = """
def step(state, force, dt):
    x, v = state
    return x + dt * v, v + dt * force


def travel(force, steps):
    state = (0.0, 0.0)
    for n in range(steps):
        state = step(state, force, 0.1)
    return state[0]
"""


def test_a_tuple_parameter_is_reported_in_the_helper_with_the_signature_to_write():
    with pytest.raises(gradwright.GradwrightError) as error:
        gradwright.generate(STEPPED, ["travel"], wrt=["force"], path="model.py")
    text = str(error.value)
    assert text.startswith("model.py:3:12: error: 'state' is a parameter"), text
    assert "def step(x, v, force, dt)" in text
    # one error: not the loop's "tuple of another length", nor a second reason
    assert len(error.value.diagnostics) == 1
    assert "another length" not in text and "copied as written" not in text
