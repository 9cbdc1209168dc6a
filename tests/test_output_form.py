"""The generated code reads as a careful engineer would write it: trip counts and
saved-list slots as plain integer expressions, no loop index `_` read, no value the
reverse sweep reads computed twice. Each model's gradient is also checked against
mpmath high-precision central differences (named beside the check), and its value
against the primal, bit for bit."""

from __future__ import annotations

import pytest
from support import build, mp_function, mp_gradient, rel_err, run_source

import gradwright
from gradwright.emission import indexing
from gradwright.emission.printer import Printer
from gradwright.ir import Apply, Var, const


def _print(expr) -> str:
    return Printer(lambda v: v.base, lambda v: v.base + "_bar")(expr)


@pytest.mark.parametrize("step", [1, -1, 2, -2, 3, -3, 5])
def test_count_and_slot_against_python_range(step):
    """indexing.count is len(range(...)) (negative meaning empty) and
    indexing.slot the position of each index: checked against Python's range."""
    start_var, stop_var, index = (
        Var(1, "a", "param"),
        Var(2, "b", "param"),
        Var(3, "i", "index"),
    )
    count = _print(indexing.count(start_var, stop_var, const(step)))
    slot = _print(indexing.slot(index, start_var, const(step)))
    for a in range(-7, 8):
        for b in range(-7, 8):
            expected = range(a, b, step)
            n = eval(count, {"a": a, "b": b})
            assert len([0.0] * n) == len(expected), (count, a, b)
            for position, i in enumerate(expected):
                assert eval(slot, {"a": a, "i": i}) == position, (slot, a, i)


def test_affine_folds_integer_constants():
    n = Var(1, "steps", "param")
    i = Var(2, "i", "index")
    # range(steps - 1, -1, -1) has steps - 1 - -1 iterations
    length = indexing.affine(Apply("sub", (Apply("sub", (n, const(1))), const(-1))))
    assert _print(length) == "steps"
    assert _print(indexing.affine(Apply("sub", (Apply("add", (i, n)), n)))) == "i"
    assert _print(indexing.slot(i, n, const(-1))) == "steps - i"


BACKWARD = """
def discounted(rate, cash, steps):
    total = 0.0
    for i in range(steps - 1, -1, -1):
        total = total * (1.0 + rate) + cash * (i + 1) * total * 0.01 + cash
    return total
"""


def test_backward_range_trip_count_and_slot():
    text = gradwright.generate(BACKWARD, ["discounted"], wrt=["rate", "cash"])
    assert "len(range(" not in text and "// -1" not in text
    assert "total_saved = [0.0] * steps" in text
    assert "total_saved[steps - i - 1] = total" in text
    module = build(BACKWARD, "discounted", ["rate", "cash"])
    args = (0.03, 1.5, 9)
    value, grads = module["discounted_grad"](*args)
    assert value == run_source(BACKWARD)["discounted"](*args)
    # outside reference: mpmath central differences
    reference = mp_gradient(mp_function(BACKWARD, "discounted"), args, [0, 1])
    for got, want in zip(grads, reference, strict=True):
        assert rel_err(got, want) < 1e-12


UNDERSCORE = """
def relax(k, x0, steps, dt):
    x = x0
    for _ in range(steps):
        x = x - dt * k * x * x
    return x
"""


def test_underscore_loop_index_gets_a_name_when_read():
    text = gradwright.generate(UNDERSCORE, ["relax"], wrt=["k", "x0"])
    assert "[_]" not in text
    assert "x_saved[step] = x" in text
    assert "for step in reversed(range(steps)):" in text
    module = build(UNDERSCORE, "relax", ["k", "x0"])
    args = (0.7, 1.2, 12, 0.05)
    value, grads = module["relax_grad"](*args)
    assert value == run_source(UNDERSCORE)["relax"](*args)
    # outside reference: mpmath central differences
    reference = mp_gradient(mp_function(UNDERSCORE, "relax"), args, [0, 1])
    for got, want in zip(grads, reference, strict=True):
        assert rel_err(got, want) < 1e-12


def test_underscore_loop_index_never_clashes():
    source = UNDERSCORE.replace("steps", "step")
    text = gradwright.generate(source, ["relax"], wrt=["k", "x0"])
    assert "x_saved[step_1] = x" in text  # step and k are the model's names


def test_underscore_loop_index_kept_when_nothing_reads_it():
    source = """
def scale(a, n):
    s = a
    for _ in range(n):
        s = s * 1.5
    return s
"""
    text = gradwright.generate(source, ["scale"], wrt=["a"])
    assert "for _ in range(n):" in text.split("def scale_grad")[1]
