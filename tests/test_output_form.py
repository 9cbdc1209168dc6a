"""The generated code reads as a careful engineer would write it: trip counts and
saved-list slots as plain integer expressions, no loop index `_` read, no value the
reverse sweep reads computed twice. Each model's gradient is also checked against
mpmath high-precision central differences (named beside the check), and its value
against the primal, bit for bit."""

from __future__ import annotations

import math
import re
import sys
from pathlib import Path

import pytest
import sympy
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


# ---------------------------------------------------------------------------------
# each value the reverse sweep reads computed once

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "tests" / "benchmarks"))
import scalar_models  # noqa: E402


def _sweeps(text: str, func: str) -> tuple[str, str]:
    """The forward and the reverse sweep of ``func``'s gradient, comments dropped."""
    body = text.split(f"def {func}_grad(")[1].split("\ndef ")[0]
    forward, reverse = body.split("# reverse sweep")
    strip = lambda part: "\n".join(  # noqa: E731
        line for line in part.splitlines() if not line.lstrip().startswith("#")
    )
    return strip(forward), strip(reverse)


def _check_against_mpmath(source, func, args, active, tolerance=1e-11):
    names = [p for p in _params(source, func)]
    module = build(source, func, [names[k] for k in active])
    value, grads = module[f"{func}_grad"](*args)
    assert value == run_source(source)[func](*args)  # bit-identical to the primal
    # outside reference: mpmath high-precision central differences
    reference = mp_gradient(mp_function(source, func), args, active)
    for got, want in zip(grads, reference, strict=True):
        assert rel_err(got, want) < tolerance, (got, want)


def _params(source: str, func: str) -> list[str]:
    header = source.split(f"def {func}(")[1].split(")")[0]
    return [p.strip() for p in header.split(",")]


def test_atan2_shares_one_hypot_and_trig_values_are_read_not_recomputed():
    text = gradwright.generate(scalar_models.ARM_REACH, ["reach_cost"])
    forward, reverse = _sweeps(text, "reach_cost")
    # atan2(ty, tx)'s rule divides by hypot(tx, ty) twice in each contribution
    assert (forward + reverse).count("math.hypot(tx, ty)") == 1
    # sin(q1 + q2) and cos(q1 + q2) are forward values: the rules read them
    assert "math.sin" not in reverse and "math.cos" not in reverse
    args = (1.0, 0.7, 0.4, 0.9, 0.8, 1.1)
    _check_against_mpmath(scalar_models.ARM_REACH, "reach_cost", args, range(6))


def test_arm_divides_each_adjoint_by_a_hypot_once():
    text = gradwright.generate(scalar_models.ARM_REACH, ["reach_cost"])
    _, reverse = _sweeps(text, "reach_cost")
    # hypot's rule divides its adjoint by the result once per argument, atan2's
    # once per argument too: one shared quotient each (sweeps/quotients.py)
    # (unshared: 2 and 4 + 2 divisions by span, 2 by dist, 4 by hypot(tx, ty))
    assert reverse.count("span_bar / span") == 1
    assert reverse.count("dist_bar / dist") == 1
    assert reverse.count("/ dist") == 1 and reverse.count("/ span") == 4
    assert reverse.count("/ target_bearing_1") == 3
    for args in [(1.0, 0.7, 0.4, 0.9, 0.8, 1.1), (0.3, 1.9, -2.0, 2.5, -0.4, 0.2)]:
        _check_against_mpmath(scalar_models.ARM_REACH, "reach_cost", args, range(6))


QUOTIENT_CHAIN = """
def chain(a, b, c):
    q = a / (b * c)
    g = q * q - a
    r = g / c
    return r + q * b
"""


@pytest.mark.parametrize("point", [(1.3, 0.4, 2.1), (-0.7, 3.0, -0.25)])
def test_a_quotients_numerator_adjoint_is_reused_by_its_divisor(point):
    # q = a / (b * c): the divisor's adjoint -q_bar * q / (b * c) reads the
    # numerator's a_bar = q_bar / (b * c) instead of dividing again, also where
    # a_bar is added to later (the read must come first)
    text = gradwright.generate(QUOTIENT_CHAIN, ["chain"])
    _, reverse = _sweeps(text, "chain")
    assert reverse.count("/ q_1") == 1, reverse
    _check_against_mpmath(QUOTIENT_CHAIN, "chain", point, range(3))


def test_binomial_tree_powers_are_saved_not_recomputed():
    text = gradwright.generate(scalar_models.BINOMIAL_TREE, ["tree_price"])
    _, reverse = _sweeps(text, "tree_price")
    assert "u**j" not in reverse and "d ** (i - j)" not in reverse
    assert "d ** (steps - j)" not in reverse
    args = (100.0, 95.0, 0.25, 0.03, 1.0, 6)
    _check_against_mpmath(
        scalar_models.BINOMIAL_TREE, "tree_price", args, range(5), 1e-9
    )


def test_binomial_tree_branches_on_the_exercise_condition():
    # max(hold, exercise)'s adjoint goes to one side: the exercise side's powers
    # are evaluated only at nodes where exercising wins
    text = gradwright.generate(scalar_models.BINOMIAL_TREE, ["tree_price"])
    _, reverse = _sweeps(text, "tree_price")
    lines = reverse.splitlines()
    test = next(
        k for k, line in enumerate(lines) if line.strip() == "if values_6 > hold:"
    )
    power = next(k for k, line in enumerate(lines) if "u ** (j - 1)" in line)
    indent = len(lines[test]) - len(lines[test].lstrip())
    assert test < power and lines[power].startswith(" " * (indent + 4))
    otherwise = lines.index(" " * indent + "else:")
    # what an iteration saved comes back in one unpacking, before the test
    unpack = next(
        k for k, line in enumerate(lines) if re.fullmatch(r" *[\w, ]+ = \w+\[j\]", line)
    )
    assert unpack < test < power < otherwise
    assert lines[unpack].strip().startswith("hold_1, hold_2, hold_3, values_4,")
    assert "else 0.0" not in reverse
    # the payoff's max(..., 0.0): nothing at all where the option is out of money
    assert "if values_3 >= 0.0:" in reverse
    for steps in (5, 8):  # nodes on both sides of the exercise boundary
        args = (100.0, 95.0, 0.25, 0.03, 1.0, steps)
        _check_against_mpmath(
            scalar_models.BINOMIAL_TREE, "tree_price", args, range(5), 1e-9
        )


def test_an_iterations_many_saves_are_one_tuple_except_on_a_board():
    """Six values an iteration of the tree saves go in one tuple (CPython: one
    store and one list per node); three (the payoff loop) keep a list each, and
    --target micropython always does (a tuple per iteration is heap a board
    lacks). Both modules compute the same numbers."""
    wrt = ["spot", "strike", "vol", "rate", "years"]
    tree = scalar_models.BINOMIAL_TREE
    texts = {
        target: gradwright.generate(tree, ["tree_price"], wrt, target=target)
        for target in ("cpython", "micropython")
    }
    forward, reverse = _sweeps(texts["cpython"], "tree_price")
    assert forward.count("_saved[j] = (") == 1
    assert "j_saved[j] = (hold_1, hold_2, hold_3, values_4, values_5, values_6)" in (
        forward
    )
    assert "values_1_saved[j] = values_1" in forward  # three: a list each
    assert "hold_1, hold_2, hold_3, values_4, values_5, values_6 = j_saved[j]" in (
        reverse
    )
    board, _ = _sweeps(texts["micropython"], "tree_price")
    assert "_saved[j] = (" not in board and "hold_1_saved[j] = hold_1" in board
    args = (100.0, 95.0, 0.25, 0.03, 1.0, 7)
    results = []
    for text in texts.values():
        namespace: dict = {}
        exec(compile(text, "tree", "exec"), namespace)
        results.append(namespace["tree_price_grad"](*args))
    assert results[0] == results[1]
    # outside reference: mpmath high-precision central differences
    reference = mp_gradient(mp_function(tree, "tree_price"), args, range(5))
    for got, want in zip(results[1][1], reference, strict=True):
        assert rel_err(got, want) < 1e-9, (got, want)


def test_heat_scheme_reads_each_cell_once():
    text = gradwright.generate(
        scalar_models.HEAT_SCHEME, ["heat_loss"], wrt=["conductivity", "left"]
    )
    forward, reverse = _sweeps(text, "heat_loss")
    # v[0] = left: its adjoint is read and then nothing reads v_bar[0]: no zeroing
    assert "v_bar[0] = 0.0" not in reverse and "u_bar[0] = 0.0" not in reverse
    # total += u[i] * u[i]: u comes out of a loop but is one list object all
    # along (never rebound) and nothing writes it after: read again, not saved
    assert "total_1_saved" not in forward
    assert "total_1 = u[i]" in reverse
    # v[i] = u[i] + r * (u[i - 1] - 2.0 * u[i] + u[i + 1]):
    # the reverse reads only the stencil: saved once, not the three cells it is
    # made of
    assert forward.count("_saved[i - 1] =") == 1
    assert "v_1 = u[i - 1] - 2.0 * u[i] + u[i + 1]" in forward
    args = (0.8, 0.5, 1.0, 0.0, 6, 5, 0.01)
    _check_against_mpmath(scalar_models.HEAT_SCHEME, "heat_loss", args, [0, 1, 2, 3])


def test_power_law_fit():
    text = gradwright.generate(scalar_models.POWER_LAW, ["power_fit"])
    _, reverse = _sweeps(text, "power_fit")
    # the three squares' 2.0 is taken once, into their shared seed (scales.py);
    # 1.0 / (ln 2 * a * a) * a is a / (ln 2 * a * a)
    assert "value_bar_1 = 2.0 / scale" in reverse
    assert "e1_bar = value_bar_1 * e1" in reverse
    assert "1.0 /" not in reverse
    args = (2.0, 0.7, 0.3, 1.5, 2.9, 2.5, 4.1, 4.0, 5.3)
    _check_against_mpmath(scalar_models.POWER_LAW, "power_fit", args, range(9))


# ---------------------------------------------------------------------------------
# noise

CLIP = """
def clip(v, lo, hi):
    return min(max(v, lo), hi)


def damped(x, rate, tol, count):
    y = x
    for _ in range(count):
        y = y - rate * (y - tol * x)
    return y


def model(a, b):
    return clip(a * b, 0.0, 1.0) + clip(a - b, -0.5, 0.5) ** 2 + damped(b, 0.3, 1e-3, 4)
"""


def test_helpers_return_only_the_partials_a_call_site_reads():
    text = gradwright.generate(CLIP, ["model"])
    assert "Returns (value, (v_bar,))." in text.split("def clip_grad")[1]
    assert "Returns (value, (x_bar,))." in text.split("def damped_grad")[1]
    assert "lo_bar" not in text and "hi_bar" not in text and "tol_bar" not in text
    _check_against_mpmath(CLIP, "model", (0.8, 0.6), [0, 1])


def test_helper_partials_follow_a_narrowed_caller():
    source = """
def inner(p, q, k):
    return p * q * k


def middle(s, t, k):
    return inner(s, 2.0, k) + inner(t, s, 3.0)


def model(a, b):
    return middle(a * b, b, 5.0)
"""
    text = gradwright.generate(source, ["model"])
    assert "Returns (value, (s_bar, t_bar))." in text
    assert "Returns (value, (p_bar, q_bar))." in text
    _check_against_mpmath(source, "model", (0.8, 0.6), [0, 1])


STEPPER = """
import math


def advance(x, v, push, dt, drag):
    accel = push - drag * v * abs(v)
    return x + dt * v, v + dt * accel


def coast(y, v, dt):
    return advance(y, v, 0.0, dt, 0.3)


def glide(push, drag, steps):
    x, v = 0.0, 1.0
    for n in range(steps):
        x, v = advance(x, v, push * math.cos(0.1 * n), 0.05, drag)
    x, v = coast(x, v, 0.05)
    return x * x + v
"""


def test_adjoint_helpers_return_only_the_adjoints_a_call_site_reads():
    # a tuple result: advance is reversed by advance_adjoint; no call differentiates
    # dt (a constant at both calls), and coast's call passes constant push and drag
    # but glide's differentiates them, so advance keeps them
    text = gradwright.generate(STEPPER, ["glide"])
    advance = text.split("def advance_adjoint")[1].split("\ndef ")[0]
    assert "(x_bar, v_bar, push_bar, drag_bar), the adjoints" in advance
    assert "dt_bar" not in advance
    coast = text.split("def coast_adjoint")[1].split("\ndef ")[0]
    assert "(y_bar, v_bar), the adjoints" in coast and "dt_bar" not in coast
    # coast's call of advance still unpacks all four parts advance returns
    assert "= advance_adjoint(" in coast
    _check_against_mpmath(STEPPER, "glide", (0.7, 0.4, 6), [0, 1])


def _folded_temporaries_with_a_bar(text: str) -> list[str]:
    assigned = set(re.findall(r"^\s*(\w+)(?:, \w+)? =", text, re.MULTILINE))
    assigned |= set(re.findall(r"^\s*for (\w+) in", text, re.MULTILINE))
    bars = set(re.findall(r"\b(\w+_\d+)_bar\b", text))
    return sorted(b for b in bars if b not in assigned)


@pytest.mark.parametrize(
    ("source", "func"),
    [
        (scalar_models.BINOMIAL_TREE, "tree_price"),
        (scalar_models.HEAT_SCHEME, "heat_loss"),
        (scalar_models.ARM_REACH, "reach_cost"),
        (scalar_models.POWER_LAW, "power_fit"),
        ((ROOT / "samples" / "fuel_hedge.py").read_text(), "call_value"),
        ((ROOT / "samples" / "kiln_cooling.py").read_text(), "kiln_loss"),
    ],
)
def test_no_adjoint_named_after_a_value_the_forward_sweep_never_names(source, func):
    text = gradwright.generate(source, [func])
    assert _folded_temporaries_with_a_bar(text) == []


def test_empty_sum_gives_a_float_gradient_entry():
    source = "def f(x, y):\n    zs = []\n    x *= sum(zs)\n    return x + y * y\n"
    module = build(source, "f")
    value, (x_bar, y_bar) = module["f_grad"](1.5, 2.0)
    # closed form: d/dx (x * 0 + y * y) = 0, d/dy = 2 y
    assert x_bar == 0.0 and type(x_bar) is float
    assert y_bar == 4.0


EMPTY_SUMS = """
def squared(x, xs):
    return x * sum(xs) ** 2


def same(a):
    return a


def through_helper(x, xs):
    x *= same(sum(xs))
    return x


def one_side(x, xs):
    return x * (x if x > 0.0 else sum(xs))
"""


@pytest.mark.parametrize("func", ["squared", "through_helper", "one_side"])
def test_an_int_power_or_helper_result_of_an_empty_sum_gives_a_float(func):
    # found by the long random run: sum([]) is the int 0, and so are its
    # square and a helper handing it back. Closed form: d/dx (x * 0) = 0;
    # d/dx (x * 3^2) = 9 and d/dx (x * 3) = 3 for xs summing to 3
    # one_side at x < 0 is x * sum(xs): d/dx = sum(xs), 0 for an empty list
    grad = build(EMPTY_SUMS, func, ["x"])[f"{func}_grad"]
    _, (x_bar,) = grad(-1.5 if func == "one_side" else 1.5, [])
    assert x_bar == 0.0 and type(x_bar) is float
    _, (x_bar,) = grad(-1.5 if func == "one_side" else 1.5, [1.0, 2.0])
    assert x_bar == (9.0 if func == "squared" else 3.0)


def test_a_trip_count_times_a_parameter_gives_a_float_gradient_entry():
    source = (
        "def f(y, n):\n    for k in range(n):\n        y = y + 0.5\n    return y * n\n"
    )
    module = build(source, "f", ["y"])
    value, (y_bar,) = module["f_grad"](1.0, 3)
    # closed form: d/dy ((y + 0.5 n) n) = n, a float as any gradient entry
    assert y_bar == 3.0 and type(y_bar) is float


LOOP_ATAN2 = """
import math


def f(x, y, n):
    for i in range(n):
        x = math.atan2(x, y) + x * 0.5
    return x * y
"""


def test_shared_call_in_a_loop_is_saved_once_per_iteration():
    text = gradwright.generate(LOOP_ATAN2, ["f"], wrt=["x", "y"])
    forward, reverse = _sweeps(text, "f")
    assert forward.count("math.hypot(y, x)") == 1 and "hypot" not in reverse
    # made before the statement re-binds x: x keeps its one name
    assert "x = math.atan2(x, y) + x * 0.5" in forward
    _check_against_mpmath(LOOP_ATAN2, "f", (0.3, 1.2, 5), [0, 1])


KEPLER = """
import math


def kepler(mean_anomaly, ecc):
    E = mean_anomaly
    for _ in range(12):
        f = E - ecc * math.sin(E) - mean_anomaly
        fp = 1.0 - ecc * math.cos(E)
        E = E - f / fp
    return math.atan2(math.sqrt(1.0 - ecc * ecc) * math.sin(E), math.cos(E) - ecc)
"""


def test_newton_iteration_reads_its_saved_sin_and_cos():
    text = gradwright.generate(KEPLER, ["kepler"])
    forward, reverse = _sweeps(text, "kepler")
    assert "math.sin" not in reverse and "math.cos" not in reverse
    assert "hypot" not in reverse and forward.count("math.hypot(") == 1
    _check_against_mpmath(KEPLER, "kepler", (1.1, 0.3), [0, 1])


FIXED_POINT = (Path(__file__).parent / "models" / "dynamic_loops.py").read_text(
    encoding="utf-8"
)


def test_an_adjoint_that_is_only_ever_zero_leaves_no_trace():
    # change is read only by the loop's test: its adjoint is 0.0 in every
    # iteration, so neither it nor the abs kink's side appears in the reverse
    text = gradwright.generate(FIXED_POINT, ["fixed_point"], wrt=["p"])
    _, reverse = _sweeps(text, "fixed_point")
    assert "change" not in reverse.replace("# while change > tol:", "")
    assert "x_bar = -0.5 * new_bar * math.sin(x)" in reverse
    assert "x_bar = 0.0" not in reverse
    settle = build(FIXED_POINT, "fixed_point")["fixed_point_grad"]
    for p in (-0.8, 0.1, 0.9):
        x, (p_bar, _) = settle(p, 1e-15)
        # implicit-function theorem for x = 0.5 cos x + p (closed form):
        # dx/dp = 1 / (1 + 0.5 sin x); iterations as run converge to it
        assert rel_err(p_bar, 1.0 / (1.0 + 0.5 * math.sin(x))) < 1e-12


DECIBELS = """
import math


def decibels(x, n):
    total = 0.0
    for i in range(n):
        total += 10.0 * math.log(x * (i + 1)) / math.log(10.0)
    return total
"""


def test_a_math_call_of_literals_is_computed_once_not_saved_per_iteration():
    text = gradwright.generate(DECIBELS, ["decibels"], wrt=["x"])
    forward, reverse = _sweeps(text, "decibels")
    assert "_saved" not in forward
    # once, before the reverse loop (it cannot raise, so a loop of no trips
    # may compute it too)
    assert reverse.count("math.log(10.0)") == 1
    assert re.search(r"\n    \w+ = math\.log\(10\.0\)\n    for i in reversed", reverse)
    grad = build(DECIBELS, "decibels")["decibels_grad"]
    for x, n in ((0.7, 5), (2.5, 1), (1.3, 0)):
        _, (x_bar, _) = grad(x, n)
        # closed form: d/dx of sum 10 log10(x (i + 1)) = 10 n / (x ln 10)
        assert rel_err(x_bar, 10.0 * n / (x * math.log(10.0))) < 1e-14 or n == 0
        assert n or x_bar == 0.0


TRACKING = """
def track(r, decay, n):
    v = 0.0
    total = 0.0
    for i in range(n):
        v = v * decay + r
        err = v - 0.1 * i
        total += err * err
    return total
"""


def test_a_carried_adjoints_copy_and_first_contribution_are_one_line():
    text = gradwright.generate(TRACKING, ["track"], wrt=["r", "decay"])
    _, reverse = _sweeps(text, "track")
    assert "v_bar_1 = v_bar + err_bar\n" in reverse
    assert "v_bar_1 = v_bar\n" not in reverse and "v_bar_1 +=" not in reverse
    _check_against_mpmath(TRACKING, "track", (0.3, 0.8, 4), [0, 1])


# ---------------------------------------------------------------------------------
# signs a person would write

SIGNS = """
import math


def orbit_radius(a, ecc, anomaly):
    return a * (1.0 - ecc * math.cos(anomaly)) - 0.5 * ecc * a


def bend(a, b):
    c = a * b
    return math.sin(a) - c
"""


def test_negative_contributions_subtract_and_double_negations_cancel():
    text = gradwright.generate(SIGNS, ["orbit_radius", "bend"])
    assert "+= -" not in text and "- -" not in text and "-(-" not in text
    _, reverse = _sweeps(text, "orbit_radius")
    # d/d(anomaly) of -a*ecc*cos(anomaly) is +a*ecc*sin(anomaly): no minus left
    assert "anomaly_bar = a * ecc * math.sin(anomaly)" in reverse
    _, reverse = _sweeps(text, "bend")
    assert "a_bar -= b" in reverse
    # outside reference: mpmath central differences
    _check_against_mpmath(SIGNS, "orbit_radius", (1.3, 0.4, 0.7), [0, 1, 2])
    _check_against_mpmath(SIGNS, "bend", (0.3, 2.0), [0, 1])


def _check_flat(source, func, args, active, tolerance=1e-11):
    """As _check_against_mpmath, for models with list parameters too."""
    module = build(source, func, [_params(source, func)[k] for k in active])
    value, grads = module[f"{func}_grad"](*args)
    assert value == run_source(source)[func](*args)  # bit-identical to the primal

    def flat(values):
        return [
            v
            for value in values
            for v in (value if isinstance(value, list) else [value])
        ]

    # outside reference: mpmath high-precision central differences
    reference = flat(mp_gradient(mp_function(source, func), args, active))
    grads = flat(grads)
    assert len(grads) == len(reference)
    for got, want in zip(grads, reference, strict=True):
        assert rel_err(got, want) < tolerance, (got, want)


# ---------------------------------------------------------------------------------
# helpers, sums and folds as a person writes them

FOLDS = """
def spread(a, xs):
    errs = [(x - a) ** 2 for x in xs]
    return a * max(errs)


def floor(a, xs):
    return min(x * a for x in xs) + min(xs) * a


def worst(a, xs):
    errs = [(x - a) ** 2 for x in xs]
    worst = max(errs)
    return worst * a
"""


def test_fold_without_a_name_is_named_for_what_it_holds():
    # comprehensions.accumulator: not `value`, the return's own name
    text = gradwright.generate(FOLDS, ["spread", "floor", "worst"])
    forward, _ = _sweeps(text, "spread")
    assert "largest = errs[0]" in forward and "value = a * largest" in forward
    forward, _ = _sweeps(text, "floor")
    # the second fold's number depends on how many names the layout keeps
    second = re.search(r"(smallest_\d+) = xs\[0\]", forward)
    assert "smallest = terms[0]" in forward and second is not None
    assert f"value = smallest + {second.group(1)} * a" in forward
    forward, _ = _sweeps(text, "worst")
    assert "worst = errs[0]" in forward  # bound to a name: that name
    for func in ("spread", "floor", "worst"):
        forward, reverse = _sweeps(text, func)
        assert "value_" not in forward + reverse
        _check_flat(FOLDS, func, (0.4, [0.3, 0.9, -0.6, 0.1]), [0, 1])


POLAR = """
import math


def polar(r, t):
    return r * math.cos(t), r * math.sin(t)


def spiral(r, t, n):
    x, y = polar(r, t)
    s = x * y
    for i in range(n):
        a, b = polar(r + i, t * s)
        s = s + a * b
    return s


def parts(r, t):
    p = polar(r, t)
    u = p[0] * 2.0
    x, _ = polar(u, t)
    return p[1] + u * x
"""


def test_tuple_helper_seed_is_the_tuple_of_its_adjoints():
    # optimize.tuple_seeds: no adjoint list made and filled element by element
    text = gradwright.generate(POLAR, ["spiral", "parts"])
    _, spiral = _sweeps(text, "spiral")
    assert "seed=(a_bar, b_bar)" in spiral and "seed=(x_bar, y_bar)" in spiral
    _, parts = _sweeps(text, "parts")
    assert ", 0.0)" in parts  # the unused element of x, _ = polar(u, t)
    assert "[0.0] * 2" not in text and "] += " not in spiral + parts
    # arguments the reverse needs again are named for the parameter they are
    assert "values" not in text and "polar_t_1 = t * s" in spiral
    _check_against_mpmath(POLAR, "spiral", (0.7, 0.4, 3), [0, 1])
    _check_against_mpmath(POLAR, "parts", (0.7, 0.4), [0, 1])


PRICES = """
import math


def present_value(rate, cash):
    price_terms = [c * math.exp(-rate * k) for k, c in enumerate(cash)]
    price = sum(price_terms)
    return price * price


def nested(a, xs):
    total = 1.0
    for k in range(3):
        terms = []
        for x in xs:
            if x > 0.5:
                terms.append(x * total)
            else:
                terms.append(a)
        total = total * a - (sum(terms) + math.fsum(terms)) * 0.1
    return total


def running(a, xs):
    terms = []
    s = 0.0
    for x in xs:
        terms.append(a * x)
        s = s + sum(terms) * a
    return s
"""


def test_summed_list_adjoint_is_read_directly():
    # optimize.spread_reads: each term's adjoint is the sum's, no list spread
    # and popped
    text = gradwright.generate(PRICES, ["present_value", "nested"])
    _, reverse = _sweeps(text, "present_value")
    assert "price_terms_bar" not in reverse and "pop()" not in reverse
    assert "rate_bar -= price_bar * c * price_terms_1 * k" in reverse
    _, reverse = _sweeps(text, "nested")
    assert "terms_bar =" not in reverse and "terms_bar[" not in reverse
    assert "pop()" not in reverse and "terms_bar_1 = total_bar_2" in reverse
    # sum + fsum reads each term twice: the 2.0 goes into the one seed (scales.py)
    assert "total_bar_2 = -0.2 * total_bar" in reverse
    # made before the loop that sums it: each element gathers every later
    # iteration's sum, so the list stays (each pop reading one sum was wrong)
    text = gradwright.generate(PRICES, ["running"])
    assert "terms_bar.pop()" in _sweeps(text, "running")[1]
    args = (0.05, [1.0, 2.0, 3.5, 4.0])
    _check_flat(PRICES, "present_value", args, [0, 1])
    _check_flat(PRICES, "running", (0.7, [0.3, 0.9, 0.6, 0.1]), [0, 1])
    _check_flat(PRICES, "nested", (0.8, [0.3, 0.9, 0.6, 0.1]), [0, 1])


MEAN_CENTRED = """
def spread_fit(gain, drift, readings):
    est = readings[0]
    resid = []
    for z in readings:
        pred = est + drift * 0.5
        est = pred + gain * (z - pred)
        resid.append(z - pred)
    mean = sum(resid) / len(resid)
    return sum((r - mean) ** 2 for r in resid) + 0.1 * gain * gain
"""


def test_a_mean_spread_over_a_list_is_computed_once():
    text = gradwright.generate(MEAN_CENTRED, ["spread_fit"], wrt=["gain", "drift"])
    _, reverse = _sweeps(text, "spread_fit")
    # the same number goes to every element: one division, then the loop
    assert "resid_bar_each = mean_bar / mean_1" in reverse
    assert "resid_bar[resid_bar_index] += resid_bar_each" in reverse
    args = (0.4, 0.3, [0.9, 1.3, 1.1, 1.8, 2.2])
    # outside reference: mpmath central differences
    _check_against_mpmath(MEAN_CENTRED, "spread_fit", args, [0, 1])


STENCIL = """
def smoothed(k, p, xs):
    ys = [0.0] * len(xs)
    for i in range(1, len(xs) - 1):
        ys[i] = xs[i] + k * (xs[i - 1] - 2.0 * xs[i] + xs[i + 1])
    total = 0.0
    for i in range(1, len(xs) - 1):
        total += p * ys[i] + (1.0 - p) * ys[i - 1]
    return total * total
"""


def _repeated_accumulations(reverse: str) -> list[str]:
    """Targets given two ``+=`` in the reverse lines of one source statement."""
    repeated: list[str] = []
    seen: set[str] = set()
    for line in reverse.splitlines():
        stripped = line.strip()
        if stripped.startswith(("#", "for ", "if ", "else", "while ")):
            seen = set()  # another statement's (or block's) lines
            continue
        for operator in (" += ", " -= "):
            if operator not in stripped:
                continue
            target = stripped.split(operator)[0]
            if target in seen:
                repeated.append(target)
            seen.add(target)
    return repeated


@pytest.mark.parametrize(
    "source, func, wrt",
    [
        (STENCIL, "smoothed", None),
        (scalar_models.BINOMIAL_TREE, "tree_price", None),
        (scalar_models.HEAT_SCHEME, "heat_loss", None),
    ],
)
def test_one_accumulation_per_adjoint_and_statement(source, func, wrt):
    """``u_bar[i] += a`` then ``u_bar[i] += b`` from one statement is one
    ``u_bar[i] += a + b`` (one load and store of the element), and a factor common
    to both terms is taken out (``p_bar += g * (a - b)``)."""
    text = gradwright.generate(source, [func], wrt=wrt)
    reverse = text.split(f"def {func}_grad(")[1].split("# reverse sweep")[1]
    assert _repeated_accumulations(reverse) == []
    if func == "smoothed":
        # total += p * ys[i] + (1.0 - p) * ys[i - 1]
        assert "p_bar += total_bar * (total_1 - total_2)" in reverse
        assert "xs_bar[i] += ys_bar_1 - 2.0 * ys_1_bar" in reverse
    if func == "tree_price":
        assert "p_bar += hold_3_bar * (hold_1 - hold_2)" in reverse


def test_stencil_gradient_against_mpmath():
    args = (0.3, 0.6, [0.5, 1.5, -0.25, 2.0, 0.75, 1.25])
    module = build(STENCIL, "smoothed")
    value, (k_bar, p_bar, xs_bar) = module["smoothed_grad"](*args)
    assert value == run_source(STENCIL)["smoothed"](*args)
    # outside reference: mpmath high-precision central differences
    k_ref, p_ref, xs_ref = mp_gradient(
        mp_function(STENCIL, "smoothed"), args, [0, 1, 2]
    )
    for got, want in zip([k_bar, p_bar, *xs_bar], [k_ref, p_ref, *xs_ref], strict=True):
        assert rel_err(got, want) < 1e-11, (got, want)


def test_loop_invariant_recomputation_is_done_once_before_the_reverse_loops():
    text = gradwright.generate(scalar_models.BINOMIAL_TREE, ["tree_price"])
    _, reverse = _sweeps(text, "tree_price")
    # hold = disc * (p * values[j + 1] + (1.0 - p) * values[j]): 1.0 - p once,
    # before both reverse loops, not at every node
    assert reverse.count("= 1.0 - p") == 1
    assert "\n    hold_4 = 1.0 - p\n    for i in range(steps):" in reverse


NO_TRIPS = """
def scaled(x, c, n):
    total = 0.0
    for i in range(n):
        total += x * (1.0 / c) * (x - c * i)
    return total + x
"""


def test_an_invariant_division_stays_in_a_loop_that_may_run_no_trip():
    """The forward sweep never divides by c when n is 0: neither may the reverse
    (a division recomputed before the loop would raise ZeroDivisionError)."""
    module = build(NO_TRIPS, "scaled", ["x"])
    value, (x_bar,) = module["scaled_grad"](1.5, 0.0, 0)
    assert (value, x_bar) == (1.5, 1.0)  # by hand: the loop adds nothing
    args = (1.5, 0.7, 4)
    value, (x_bar,) = module["scaled_grad"](*args)
    assert value == run_source(NO_TRIPS)["scaled"](*args)
    # outside reference: mpmath high-precision central differences
    (want,) = mp_gradient(mp_function(NO_TRIPS, "scaled"), args, [0])
    assert rel_err(x_bar, want) < 1e-12


def test_a_value_rebuilt_through_a_chain_is_saved_instead():
    """The reverse recomputes a value only when that takes one operation on values
    it reads anyway; one rebuilt through several temporaries is saved."""
    text = gradwright.generate(scalar_models.BINOMIAL_TREE, ["tree_price"])
    forward, reverse = _sweeps(text, "tree_price")
    # hold = disc * (p * values[j + 1] + (1.0 - p) * values[j]): the bracket is
    # saved, hold is one multiplication from it
    record = forward.split("j_saved[j] = (")[1].split(")")[0]
    assert "hold_3" in record and not re.search(r"\bhold\b", record)
    assert "hold = disc * hold_3" in reverse
    recomputed = [
        line.strip()
        for line in reverse.splitlines()
        if re.match(r"\s+\w+ = [\w.]+ [-+*/] [\w.]+$", line)
    ]
    # each recomputed line is one operation on restored or invariant values
    assert all(line.count(" = ") == 1 for line in recomputed)
    assert "hold_5" not in reverse and "hold_6" not in reverse
    tide = (ROOT / "samples" / "tide_gauge.py").read_text()
    _, reverse = _sweeps(gradwright.generate(tide, ["tide_misfit"]), "tide_misfit")
    # miss = HARBOUR.datum + m2 + s2 - height is not rebuilt: its adjoint reads
    # the saved weight * miss
    assert "miss_1" not in reverse and "miss =" not in reverse
    # the table row is module data: read again, as cheap as a save
    assert "_saved" not in reverse.split("hour = READINGS[hour_index][0]")[1]
    assert "miss_bar = 2.0 * total_bar * total_1" in reverse


REREAD = """
def f(x, c, n):
    u = [x] * n
    s = 0.0
    for t in range(3):
        for i in range(n):
            u[i] = u[i] * c + x
        for i in range(n):
            s += u[i] * u[i] * c
    w = [x * c] * n
    for i in range(n):
        w[i] = w[i] * x
    for i in range(n):
        s += w[i] * w[i]
    return s
"""


def test_a_list_no_later_write_changes_is_read_again_not_saved():
    """u is written again by the next iteration of t: its elements are saved.
    w comes out of the loop that writes it but is one list all along (every
    merge of it joins that list, none a swapped buffer): read again."""
    text = gradwright.generate(REREAD, ["f"], wrt=["x", "c"])
    forward, reverse = _sweeps(text, "f")
    assert "= u[i]" not in reverse
    assert "s_1 = s_1_saved[i]" in reverse  # u[i], as s's update read it
    assert re.search(r"\n +s_\d = w\[i\]\n", reverse)  # s += w[i] * w[i]
    assert forward.count("_saved[i] = ") == 4  # u's, s's two, w's rewritten cells
    args = (0.7, 0.9, 4)
    _check_against_mpmath(REREAD, "f", args, [0, 1])


NESTED_STEPS = """
def settle(x, k, n, m):
    loss = 0.0
    for i in range(n):
        for j in range(m):
            x = x - 0.1 * k * x * x
        loss += (x - 0.5 * i) ** 2
    return loss
"""


def test_adjoint_carried_through_nested_loops_keeps_one_name():
    """x_bar flows through both loops: updated in place, not copied into
    another name at the start of each outer iteration and back at its end."""
    text = gradwright.generate(NESTED_STEPS, ["settle"], wrt=["x", "k"])
    _, reverse = _sweeps(text, "settle")
    # one copy into the parameter's adjoint after the loops, none in them
    assert "x_bar_1 = x_bar\n" not in reverse
    assert reverse.count("x_bar = x_bar_1") == 1
    assert reverse.rstrip().endswith("x_bar = x_bar_1\n    return loss, (x_bar, k_bar)")
    kiln = (ROOT / "samples" / "kiln_cooling.py").read_text()
    wrt = ["k_conv", "k_rad", "start_temp"]
    _, reverse = _sweeps(gradwright.generate(kiln, ["kiln_loss"], wrt=wrt), "kiln_loss")
    assert "temp_bar_1" not in reverse
    args = (0.8, 0.3, 3, 4)
    _check_against_mpmath(NESTED_STEPS, "settle", args, [0, 1])


EARLY_EXIT = """\
def settle(x, y, z):
    if z > 1.0:
        for i in range(2):
            return y * x
    if y < 2.0:
        if y < 3.0:
            x = y * y
    return x
"""


def test_a_loop_that_always_returns_breaks_plainly():
    text = gradwright.generate(EARLY_EXIT, ["settle"])
    forward, reverse = _sweeps(text, "settle")
    # the return ends every iteration: a plain break, no `if True:`
    assert "if True:" not in forward and "            break" in forward
    # a side with nothing to do is not printed as `pass` + `else:`
    assert "if not returned:" in forward and "pass" not in text
    for args in ((0.7, 1.5, 2.0), (0.7, 1.5, 0.5), (0.7, 2.5, 0.5)):
        _check_against_mpmath(EARLY_EXIT, "settle", args, [0, 1, 2])


CHANNEL = """\
import math


def channel_flow(depth, width, slope, rough):
    area = width * depth
    rh = area / (width + 2.0 * depth)
    return area * rh ** (2.0 / 3.0) * math.sqrt(slope) / rough + rh ** (5.0 / 2.0)
"""


def test_an_exponent_computed_from_literals_is_a_constant_power():
    """``rh ** (2.0 / 3.0)``: the exponent is known at generation time, so its
    derivative reads the power the forward sweep computed (no second pow, no
    ``2.0 / 3.0 - 1``); above 1 the exponent less one is one literal."""
    text = gradwright.generate(CHANNEL, ["channel_flow"])
    _, reverse = _sweeps(text, "channel_flow")
    assert "- 1" not in reverse and re.search(r" \* value_\d+ / rh\b", reverse)
    assert reverse.count("**") == 1 and "rh**1.5" in reverse
    args = (0.8, 2.5, 0.001, 0.03)
    _check_against_mpmath(CHANNEL, "channel_flow", args, range(4))


def test_an_exponent_of_literal_ints_is_the_int_the_model_gets():
    """(10**17 + 2) - (10**17 + 1) is 1 in Python's ints; in floats it would be
    0.0, and the derivative of x ** 0 would drop the whole term. Reference: the
    power rule, d/dx (x + x**3.5) = 1 + 3.5 x**2.5 (textbook closed form)."""
    source = (
        "def f(x):\n"
        "    return x ** ((100000000000000001 + 1) - 100000000000000001)"
        " + x ** (7 / 2)\n"
    )
    module = build(source, "f", ["x"])
    for x in (0.4, 1.3, 2.9):
        _, (x_bar,) = module["f_grad"](x)
        assert rel_err(x_bar, 1.0 + 3.5 * x**2.5) < 1e-14


BANDS = """
import math


def band_cost(x, k):
    if x < 0.0:
        y = -x * k
    elif x < 1.0:
        y = x * x * k
    elif x < 2.0:
        y = math.sin(x) * k
    else:
        y = 2.0 * x
    return y * x
"""


@pytest.mark.parametrize("x", [-0.7, 0.4, 1.3, 2.6])
def test_an_elif_chain_prints_as_one_with_one_name_against_closed_form(x):
    text = gradwright.generate(BANDS, ["band_cost"])
    body = text.split("def band_cost_grad")[1]
    # both sweeps keep the chain's shape: no `else:` holding a lone `if`
    assert body.count("elif x < 1.0:") == 2 and body.count("elif x < 2.0:") == 2
    assert not re.search(r"else:\n\s+(# .*\n\s+)?if ", body)
    # every side binds y itself: no copies merging y_1, y_2, ... after the chain
    forward = body.split("# reverse sweep")[0]
    assert forward.count("        y = ") == 4
    assert not re.search(r"^\s+y(_\d+)? = y(_\d+)?$", forward, re.M)
    k = 1.7
    value, (x_bar, k_bar) = build(BANDS, "band_cost")["band_cost_grad"](x, k)
    # closed forms of y * x on each band, by hand
    if x < 0.0:
        want = (-2.0 * x * k, -x * x)
    elif x < 1.0:
        want = (3.0 * x * x * k, x**3)
    elif x < 2.0:
        want = (k * (math.sin(x) + x * math.cos(x)), x * math.sin(x))
    else:
        want = (4.0 * x, 0.0)
    assert rel_err(x_bar, want[0]) < 1e-15 and rel_err(k_bar, want[1]) < 1e-15


ROWS = """
LOG = [(0.0, 1.2, 4.11), (10.0, 1.2, 4.05), (20.0, 2.5, 3.92)]


def fit(r0, v0):
    loss = 0.0
    for t, amps, volts in LOG:
        loss += (v0 - r0 * amps - volts - 0.001 * t) ** 2
    return loss
"""


def test_a_table_row_unpacks_as_written_against_closed_form():
    text = gradwright.generate(ROWS, ["fit"])
    forward = text.split("def fit_grad")[1].split("# reverse sweep")[0]
    assert "        t, amps, volts = LOG[t_index]\n" in forward
    assert "row" not in forward
    value, (r0_bar, v0_bar) = build(ROWS, "fit")["fit_grad"](0.3, 4.4)
    # closed form: d/dv0 = 2 sum(e), d/dr0 = -2 sum(e * amps), e the residual
    log = [(0.0, 1.2, 4.11), (10.0, 1.2, 4.05), (20.0, 2.5, 3.92)]
    e = [4.4 - 0.3 * a - v - 0.001 * t for t, a, v in log]
    assert rel_err(v0_bar, 2.0 * sum(e)) < 1e-14
    assert (
        rel_err(r0_bar, -2.0 * sum(x * a for x, (_, a, _) in zip(e, log, strict=True)))
        < 1e-14
    )


UNREAD = """
import math

LOG = [(0.0, 1.2, 4.11), (10.0, 1.2, 4.05), (20.0, 2.5, 3.92)]


def settle(v, amps, r):
    decay = math.exp(-1.0 / r)
    return v * decay + amps * (1.0 - decay), decay


def fit(r, v0):
    v = v0
    loss = 0.0
    for t, _, volts in LOG:
        v, _ = settle(v, t, r)
        loss += (v - volts) ** 2
    return loss


def named(r, v0):
    v, decay = settle(v0, 1.0, r)
    return v * v
"""


def test_an_unread_element_unpacks_as_written_against_sympy():
    text = gradwright.generate(UNREAD, ["fit", "named"])
    forward = text.split("def fit_grad")[1].split("# reverse sweep")[0]
    assert "        t, _, volts = LOG[t_index]\n" in forward
    assert "        v, _ = settle(v, t, r)\n" in forward
    assert "row" not in forward and "settle_1" not in forward
    # the reverse recomputes the one element it reads, straight from the table
    reverse = text.split("def fit_grad")[1].split("# reverse sweep")[1]
    assert "        t = LOG[t_index][0]\n" in reverse and "row" not in reverse
    named = text.split("def named_grad")[1].split("# reverse sweep")[0]
    assert "    v, decay = settle(v0, 1.0, r)\n" in named
    # reference: SymPy differentiates the loop unrolled over the three rows
    r, v0 = sympy.symbols("r v0")
    v, loss, decay = v0, 0, sympy.exp(-1 / r)
    for t, _, volts in [(0.0, 1.2, 4.11), (10.0, 1.2, 4.05), (20.0, 2.5, 3.92)]:
        v = v * decay + sympy.Float(t) * (1 - decay)
        loss += (v - sympy.Float(volts)) ** 2
    point = {r: 2.5, v0: 3.9}
    _, grads = build(UNREAD, "fit")["fit_grad"](2.5, 3.9)
    _, named_grads = build(UNREAD, "named")["named_grad"](2.5, 3.9)
    settled = (v0 * decay + 1 - decay) ** 2
    for got, symbol in zip(grads, (r, v0), strict=True):
        assert rel_err(got, float(sympy.diff(loss, symbol).subs(point))) < 1e-13
    for got, symbol in zip(named_grads, (r, v0), strict=True):
        assert rel_err(got, float(sympy.diff(settled, symbol).subs(point))) < 1e-13


AUGMENTED = """
def drag(c, v0, dt):
    v = v0
    dist = 0.0
    for _ in range(4):
        v -= c * v * v * dt
        dist += v * dt
        v *= 0.99
    spread = dist
    spread = spread + 1.0
    return dist + spread
"""


def test_augmented_assignments_print_as_written_against_sympy():
    text = gradwright.generate(AUGMENTED, ["drag"])
    forward = text.split("def drag_grad")[1].split("# reverse sweep")[0]
    assert "dist += v * dt\n" in forward and "*= 0.99\n" in forward
    assert "-= c * v" in forward
    # the model's own `x = x + e` keeps its spelling
    assert "spread = spread + 1.0\n" in forward
    # reference: SymPy on the loop unrolled
    c, v0, dt = sympy.symbols("c v0 dt")
    v, dist = v0, 0
    for _ in range(4):
        v = v - c * v * v * dt
        dist = dist + v * dt
        v = v * sympy.Float(0.99)
    model = 2 * dist + 1
    point = {c: 0.3, v0: 2.0, dt: 0.1}
    _, grads = build(AUGMENTED, "drag")["drag_grad"](0.3, 2.0, 0.1)
    for got, symbol in zip(grads, (c, v0, dt), strict=True):
        assert rel_err(got, float(sympy.diff(model, symbol).subs(point))) < 1e-13


UNDERSCORE_PARAM = """
def h(x):
    return x * 2.0, 5.0


def f(x, _):
    y = x * _
    a, _ = h(y)
    return a
"""


def test_an_unread_element_never_takes_a_parameter_named_underscore():
    # the reverse reads the parameter `_` after the unpacking: printing the
    # discard as `_` would hand it the helper's second value
    text = gradwright.generate(UNDERSCORE_PARAM, ["f"], wrt=["x"])
    assert "    a, unused_1 = h(y)\n" in text.split("def f_grad")[1]
    _, (x_bar,) = build(UNDERSCORE_PARAM, "f", ["x"])["f_grad"](1.5, 3.0)
    assert x_bar == 2.0 * 3.0  # by hand: f = 2 x _
    # nor a module's `_` the function reads (bound in a comprehension only, the
    # element is no local of the function: a `_` there would shadow the global)
    gettext = """
BOOK = [(95.0, 3), (100.0, -5), (110.0, 4)]
def _(text):
    return text
def f(spot):
    sizes = [q for _, q in BOOK]
    label = _("total")
    return sum(sizes) * spot
"""
    text = gradwright.generate(gettext, ["f"])
    assert "_, q = BOOK" not in text.split("def f_grad")[1]
    assert build(gettext, "f")["f_grad"](2.0) == (4.0, (2.0,))  # by hand: 2 spot


REUSED = """
LOG = [(0.5, 1.0, 2.0), (1.5, 3.0, 4.0)]


def f(a, b):
    w = a * b
    s = w * a
    for t, w, v in LOG:
        s = s * a + v * t
    return s
"""


def test_an_unread_element_never_takes_the_name_of_a_value_kept():
    # the row's unread `w` would overwrite the `w = a * b` the reverse reads: it
    # takes `_` instead (the layout check sees the write either way)
    forward = gradwright.generate(REUSED, ["f"]).split("def f_grad")[1]
    assert "t, _, v = LOG[t_index]" in forward.split("# reverse sweep")[0]
    _, (a_bar, b_bar) = build(REUSED, "f")["f_grad"](1.3, 0.7)
    # by hand: f = a^4 b + a + 6
    assert rel_err(a_bar, 4.0 * 1.3**3 * 0.7 + 1.0) < 1e-15
    assert rel_err(b_bar, 1.3**4) < 1e-15


HEATER = """
def heater(gain, dt):
    temp = 20.0
    for _ in range(5):
        temp += dt * (gain * 3.0 - (temp - 20.0))
    return temp
"""


def test_a_carried_adjoint_minus_a_term_prints_as_minus_equals_against_sympy():
    reverse = gradwright.generate(HEATER, ["heater"]).split("# reverse sweep")[1]
    assert "        temp_bar -= temp_1_bar\n" in reverse
    assert "temp_bar = temp_bar -" not in reverse
    # reference: SymPy on the loop unrolled
    gain, dt = sympy.symbols("gain dt")
    temp = sympy.Integer(20)
    for _ in range(5):
        temp = temp + dt * (gain * 3 - (temp - 20))
    _, grads = build(HEATER, "heater")["heater_grad"](0.7, 0.1)
    for got, symbol in zip(grads, (gain, dt), strict=True):
        exact = float(sympy.diff(temp, symbol).subs({gain: 0.7, dt: 0.1}))
        assert rel_err(got, exact) < 1e-14


LEVEL = """
def level(a, xs):
    s = sum(xs)
    return a * s * s
"""

LEVEL_LOOP = """
def level(a, xs):
    s = sum(xs)
    t = 0.0
    for k in range(2):
        t += a * sum(xs)
    return a * s * s + t
"""


@pytest.mark.parametrize("source", [LEVEL, LEVEL_LOOP])
def test_a_sum_adjoint_makes_the_list_against_closed_form(source):
    text = gradwright.generate(source, ["level"])
    reverse = text.split("# reverse sweep")[1]
    if source is LEVEL:
        # the first thing added to xs's adjoint list: the list is made holding it
        assert "xs_bar = [" in reverse and "[0.0] * len(xs)" not in reverse
        assert "for xs_bar_index" not in reverse
    else:  # added to in a loop first: made as zeros, added to in place
        assert "xs_bar = [0.0] * len(xs)" in reverse
    xs = [0.3, -1.2, 2.0]
    value, (a_bar, xs_bar) = build(source, "level")["level_grad"](1.7, list(xs))
    # closed forms by hand, S = sum(xs): a S**2 (+ 2 a S in the loop version)
    s = sum(xs)
    loop = source is LEVEL_LOOP
    assert rel_err(a_bar, s * s + (2.0 * s if loop else 0.0)) < 1e-15
    want = 2.0 * 1.7 * s + (2.0 * 1.7 if loop else 0.0)
    assert all(rel_err(g, want) < 1e-15 for g in xs_bar)


UNREAD_HELPER = """
import math

TABLE = [(0.0, 3.0), (0.5, 3.7), (1.0, 4.2)]


def level(s):
    for (s0, v0), (s1, v1) in zip(TABLE, TABLE[1:]):
        if s <= s1:
            return v0 + (v1 - v0) * (s - s0) / (s1 - s0)
    return TABLE[-1][1]


def step(s, r, amps):
    drop = amps * r * (1.0 - math.exp(-r))
    return level(s) - drop, drop


def misfit(r, amps, s, target):
    v, drop = step(s, r, amps)
    return (v - target) ** 2 + 0.1 * drop
"""


def test_a_helper_no_derivative_of_which_is_read_is_copied_alone():
    # level() reads only s, which no --wrt parameter reaches: its gradient would
    # never be called, so only the copy the forward sweep calls is written
    text = gradwright.generate(UNREAD_HELPER, ["misfit"], ["r"])
    assert "def level(s):" in text and "level_grad" not in text
    assert "def step_adjoint(" in text
    ns = build(UNREAD_HELPER, "misfit", ["r"])
    args = (0.3, 1.5, 0.7, 3.2)
    value, (r_bar,) = ns["misfit_grad"](*args)
    assert value == run_source(UNREAD_HELPER)["misfit"](*args)
    # reference: mpmath central differences at 50 digits
    (exact,) = mp_gradient(mp_function(UNREAD_HELPER, "misfit"), args, [0])
    assert rel_err(r_bar, exact) <= 1e-14


def test_a_value_subtracted_from_its_own_negation_is_doubled():
    # d/dv of 0.5 * v * v reads 0.5 * v twice (one value, numbered once): the
    # sum -a - a is written -(2.0 * a), exact
    source = (
        "import math\n\n\ndef f(v, r, t):\n    d = (r - 0.5 * v * v) * t\n"
        "    s = v * math.sqrt(t)\n    return math.exp(d + s) + d * s\n"
    )
    text = gradwright.generate(source, ["f"], ["v", "r"])
    assert not re.search(r"-(\w+) - \1\b", text), text
    assert "v_bar -= 2.0 * d_bar_1 * d_1" in text, text
    ns = build(source, "f", ["v", "r"])
    v, r, t = 0.7, 0.2, 1.5
    _, (v_bar, r_bar) = ns["f_grad"](v, r, t)
    # closed form, by hand: with d = (r - v^2/2) t and s = v sqrt(t),
    # df/dv = (e^(d+s) + s)(-v t) + (e^(d+s) + d) sqrt(t), df/dr = (e^(d+s) + s) t
    d, s = (r - 0.5 * v * v) * t, v * math.sqrt(t)
    e = math.exp(d + s)
    assert rel_err(v_bar, (e + s) * (-v * t) + (e + d) * math.sqrt(t)) <= 1e-14
    assert rel_err(r_bar, (e + s) * t) <= 1e-14


MAX_OF_LIST = """
def worst(a, b, c):
    errors = [a * a, b * b + 0.5, c * c - 0.25]
    return max(errors) + 0.01 * sum(errors)
"""


@pytest.mark.parametrize("point", [(0.5, 1.5, 0.25), (2.0, 0.1, 0.3), (0.1, 0.2, 1.5)])
def test_a_max_fold_hands_its_adjoint_on_without_copies(point):
    # the reverse of max over a list: where a later element wins it takes the
    # adjoint and the running one drops to 0.0; elsewhere nothing happens (no
    # temporary set to 0.0 or copied back and forth)
    text = gradwright.generate(MAX_OF_LIST, ["worst"])
    reverse = text.split("# reverse sweep")[1]
    assert "largest_bar_1" not in reverse and "else:" not in reverse, reverse
    ns = build(MAX_OF_LIST, "worst")
    _, grads = ns["worst_grad"](*point)
    # closed form: the largest element's own slope plus 0.01 of every slope
    a, b, c = point
    values = [a * a, b * b + 0.5, c * c - 0.25]
    slopes = [2 * a, 2 * b, 2 * c]
    top = values.index(max(values))
    for k in range(3):
        exact = 0.01 * slopes[k] + (slopes[k] if k == top else 0.0)
        assert rel_err(grads[k], exact) <= 1e-15


HELPER_OF_A_HELPER = """
def h0(a, b=1.5):
    return b * a


def h1(a):
    return h0(h0(0.1, a))


def f(x, y, z):
    x, z = z, h0(x, y)
    y = h1(y)
    return x * z + y
"""


def test_a_helper_copied_alone_may_call_a_differentiated_one():
    # found by the helpers family of the long random run: in x alone, h1's
    # derivative is never read (y is no --wrt parameter) while h0's is (h0(x, y));
    # narrowing h0 renumbered h1's reads of its partials and raised KeyError
    text = gradwright.generate(HELPER_OF_A_HELPER, ["f"], ["x"])
    assert "def h1_grad" not in text and "def h0_grad" in text
    ns = build(HELPER_OF_A_HELPER, "f", ["x"])
    _, (x_bar,) = ns["f_grad"](1.25, 0.5, -0.75)
    # closed form: f = z * (y * x) + h1(y), so df/dx = z * y
    assert rel_err(x_bar, -0.75 * 0.5) <= 1e-15


KEPLER_STEP = """
import math


def kepler(mean_anomaly, ecc, tol=1e-13):
    e_anom = mean_anomaly
    for _ in range(40):
        step = (e_anom - ecc * math.sin(e_anom) - mean_anomaly) / (
            1.0 - ecc * math.cos(e_anom)
        )
        e_anom -= step
        if abs(step) < tol:
            break
    return e_anom
"""


@pytest.mark.parametrize("point", [(0.3, 0.1), (2.5, 0.6), (-1.0, 0.3)])
def test_a_newton_step_against_the_implicit_function_theorem(point):
    # (a second inlining that wrote the step's negated quotient into its readers
    # was taken out: it gave a wrong gradient in a random program)
    wrt = ["mean_anomaly", "ecc"]
    ns = build(KEPLER_STEP, "kepler", wrt)
    e_anom, (m_bar, e_bar) = ns["kepler_grad"](*point)
    # implicit-function theorem on E - e sin E = M (closed form):
    # dE/dM = 1 / (1 - e cos E), dE/de = sin E / (1 - e cos E)
    ecc = point[1]
    denominator = 1.0 - ecc * math.cos(e_anom)
    assert rel_err(m_bar, 1.0 / denominator) < 1e-12
    assert rel_err(e_bar, math.sin(e_anom) / denominator) < 1e-12


STAND_IN_HELPER = """
import math


def shape(s):
    return math.log1p(s * s)


def f(a, s):
    return a * a * shape(s)
"""


def test_a_helper_copied_alone_keeps_its_target_stand_ins():
    # review finding: shape() is copied alone (s is no --wrt parameter), and on
    # MicroPython its log1p is the stand-in _gw_log1p, which the module then
    # lacked (NameError when f_grad ran)
    text = gradwright.generate(STAND_IN_HELPER, ["f"], ["a"], target="micropython")
    assert "def shape_grad" not in text and "def _gw_log1p(" in text
    namespace: dict = {}
    exec(compile(text, "<f_grad>", "exec"), namespace)
    _, (a_bar,) = namespace["f_grad"](2.0, 0.5)
    # closed form: d/da a^2 log1p(s^2) = 2 a log1p(s^2); the stand-in is within a
    # few ulp of CPython's log1p
    assert rel_err(a_bar, 4.0 * math.log1p(0.25)) <= 1e-14


DESCENDING = """
def f(x, n, m):
    s = 0.0
    for i in range(n, m, -1):
        s = s * 0.5 + x * i
    for k in range(n + 2, 3, -1):
        s = s * x
    return s
"""


def test_the_reverse_of_a_descending_range_counts_up_as_written():
    text = gradwright.generate(DESCENDING, ["f"], wrt=["x"])
    _, reverse = _sweeps(text, "f")
    # reversed(range(n + 2, 3, -1)) is range(4, n + 3); reversed(range(n, m, -1))
    # is range(m + 1, n + 1): no reversed() of a backwards range
    assert "for k in range(4, n + 3):" in reverse
    assert "for i in range(m + 1, n + 1):" in reverse
    assert "reversed(" not in reverse
    ns = run_source(text)
    model: dict = {}
    exec(DESCENDING, model)
    x = sympy.Symbol("x")
    for n, m in [(5, 1), (3, -2), (1, 4), (7, 7), (2, 1)]:
        # reference: SymPy's derivative of the model run on a symbol
        exact = sympy.diff(model["f"](x, n, m), x).subs(x, sympy.Rational(7, 10))
        _, (x_bar,) = ns["f_grad"](0.7, n, m)
        assert rel_err(x_bar, float(exact)) < 1e-14


CATENARY = """
import math


def sag_tension(span, weight, sag, tol=1e-12):
    a = span * span / (8.0 * sag)
    for _ in range(50):
        c = math.cosh(span / (2.0 * a))
        s = math.sinh(span / (2.0 * a))
        f = a * c - a - sag
        df = c - 1.0 - span / (2.0 * a) * s
        step = f / df
        a -= step
        if abs(step) < tol * a:
            break
    return weight * a
"""


def test_a_value_written_three_times_is_recomputed_once():
    wrt = ["span", "weight", "sag"]
    text = gradwright.generate(CATENARY, ["sag_tension"], wrt=wrt)
    _, reverse = _sweeps(text, "sag_tension")
    # span / (2.0 * a) in three statements: recomputed once per reverse iteration
    assert reverse.count("2.0 * a_2\n") == 1 and reverse.count("= span / ") == 1
    module = build(CATENARY, "sag_tension", wrt)
    value, (span_bar, weight_bar, sag_bar) = module["sag_tension_grad"](100.0, 2.0, 5.0)
    # reference: the implicit function theorem on a cosh(u) - a - sag = 0,
    # u = span / (2a) (textbook): da/dspan = -(sinh(u) / 2) / D, da/dsag = 1 / D,
    # D = cosh(u) - 1 - u sinh(u)
    a = value / 2.0
    u = 100.0 / (2.0 * a)
    slope = math.cosh(u) - 1.0 - u * math.sinh(u)
    assert rel_err(weight_bar, a) < 1e-15
    assert rel_err(span_bar, 2.0 * -(math.sinh(u) / 2.0) / slope) < 1e-9
    assert rel_err(sag_bar, 2.0 / slope) < 1e-9


GROWTH = """
def grow(x, k):
    y = x
    while y < 10.0:
        y = y * k + 1.0
    return y * k
"""


def test_a_while_loop_counter_does_not_look_like_a_version_of_the_models_k():
    text = gradwright.generate(GROWTH, ["grow"])
    _, reverse = _sweeps(text, "grow")
    assert "for iteration in reversed(range(iterations)):" in reverse
    assert "k_1" not in text
    module = build(GROWTH, "grow")
    _, grads = module["grow_grad"](0.7, 1.9)
    # reference: mpmath central differences at 50 digits (no loop exit nearby)
    exact = mp_gradient(mp_function(GROWTH, "grow"), [0.7, 1.9], [0, 1])
    for got, want in zip(grads, exact, strict=True):
        assert rel_err(got, float(want)) < 1e-13
