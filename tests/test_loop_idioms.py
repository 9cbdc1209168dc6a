"""Loops written the way engineers write them: zip, enumerate, reversed, tuples of
values, nested targets. Each gradient against a closed form or mpmath central
differences (named beside the check); values bit-identical to the primal."""

from __future__ import annotations

import math

import pytest
from support import build, mp_function, mp_gradient, rel_err, run_source, same_bits

import gradwright

LINE_FIT = """
def line_loss(a, b, xs, ys):
    total = 0.0
    for x, y in zip(xs, ys):
        r = a * x + b - y
        total += r * r
    return total
"""

XS = [0.5, 1.25, 2.0, 3.5, 4.0]
YS = [1.1, 2.3, 3.2, 5.9, 6.1, 99.0]  # one more: zip stops at the shortest


def test_line_fit_with_zip_against_normal_equations():
    module = build(LINE_FIT, "line_loss", ["a", "b"])
    primal = run_source(LINE_FIT)["line_loss"]
    n = len(XS)
    ys = YS[:n]
    # least-squares line by the normal equations (textbook closed form)
    mx, my = sum(XS) / n, sum(ys) / n
    sxx = sum((x - mx) ** 2 for x in XS)
    sxy = sum((x - mx) * (y - my) for x, y in zip(XS, ys, strict=True))
    slope = sxy / sxx
    intercept = my - slope * mx
    value, (a_bar, b_bar) = module["line_loss_grad"](slope, intercept, XS, YS)
    assert value == primal(slope, intercept, XS, YS)
    scale = sum(abs(x * y) for x, y in zip(XS, ys, strict=True))
    assert abs(a_bar) < 1e-12 * scale and abs(b_bar) < 1e-12 * scale
    # elsewhere: d/da = 2 sum r x, d/db = 2 sum r (closed form)
    a, b = 1.3, -0.2
    _, (a_bar, b_bar) = module["line_loss_grad"](a, b, XS, YS)
    residuals = [a * x + b - y for x, y in zip(XS, ys, strict=True)]
    assert (
        rel_err(a_bar, 2 * sum(r * x for r, x in zip(residuals, XS, strict=True)))
        < 1e-13
    )
    assert rel_err(b_bar, 2 * sum(residuals)) < 1e-13


def test_zip_gradient_in_the_data_lists():
    module = build(LINE_FIT, "line_loss", ["xs", "ys"])
    a, b = 1.3, -0.2
    _, (xs_bar, ys_bar) = module["line_loss_grad"](a, b, XS, YS)
    n = len(XS)
    for k in range(n):
        r = a * XS[k] + b - YS[k]
        assert rel_err(xs_bar[k], 2 * r * a) < 1e-13  # closed form
        assert rel_err(ys_bar[k], -2 * r) < 1e-13
    assert ys_bar[n] == 0.0  # past the shortest: never read


def test_enumerate_with_a_start():
    source = """
def weighted(a, xs):
    s = 0.0
    for i, x in enumerate(xs, 1):
        s = s + i * a * x * x
    return s
"""
    module = build(source, "weighted")
    xs = [0.5, -1.5, 2.0]
    value, (a_bar, xs_bar) = module["weighted_grad"](0.75, xs)
    assert value == run_source(source)["weighted"](0.75, xs)
    # closed form: d/da = sum (i+1) x_i^2, d/dx_i = 2 (i+1) a x_i
    assert rel_err(a_bar, sum((i + 1) * x * x for i, x in enumerate(xs))) < 1e-14
    for i, x in enumerate(xs):
        assert rel_err(xs_bar[i], 2 * (i + 1) * 0.75 * x) < 1e-14


def test_horner_over_reversed_coefficients():
    source = """
def poly(x, coeffs):
    p = 0.0
    for c in reversed(coeffs):
        p = p * x + c
    return p
"""
    module = build(source, "poly")
    coeffs = [0.5, -1.25, 2.0, 0.75]  # c0 + c1 x + c2 x^2 + c3 x^3
    x = 1.3
    value, (x_bar, c_bar) = module["poly_grad"](x, coeffs)
    assert value == run_source(source)["poly"](x, coeffs)
    # closed form: p'(x) = sum k c_k x^(k-1); dp/dc_k = x^k
    assert (
        rel_err(x_bar, sum(k * c * x ** (k - 1) for k, c in enumerate(coeffs) if k))
        < 1e-14
    )
    for k in range(len(coeffs)):
        assert rel_err(c_bar[k], x**k) < 1e-14


def test_loop_over_a_tuple_of_values():
    source = """
import math
def spread(q1, q2, q3):
    s = 0.0
    for q in (q1, q2, q3):
        s = s + math.sin(q) * q
    return s
"""
    module = build(source, "spread")
    point = (0.3, -1.1, 2.2)
    value, grads = module["spread_grad"](*point)
    assert value == run_source(source)["spread"](*point)
    for q, g in zip(point, grads, strict=True):
        assert rel_err(g, math.cos(q) * q + math.sin(q)) < 1e-14  # product rule


def test_loop_over_rows_written_out():
    source = """
import math
def misfit(a, m1, m2, m3, r1, r2, r3):
    total = 0.0
    for m, r in [(m1, r1), (m2, r2), (m3, math.sqrt(r3))]:
        total += (a * math.sin(m) - r) ** 2
    return total
"""
    module = build(source, "misfit")
    point = (1.3, 0.2, -0.7, 1.9, 0.4, -0.5, 0.8)
    value, grads = module["misfit_grad"](*point)
    assert value == run_source(source)["misfit"](*point)
    a, ms, rs = point[0], point[1:4], (point[4], point[5], math.sqrt(point[6]))
    errs = [a * math.sin(m) - r for m, r in zip(ms, rs, strict=True)]
    # by hand: d/da = 2 sum e sin m, d/dm = 2 e a cos m, d/dr = -2 e (the third
    # through the square root: -2 e / (2 sqrt r3))
    want = [2.0 * sum(e * math.sin(m) for e, m in zip(errs, ms, strict=True))]
    want += [2.0 * e * a * math.cos(m) for e, m in zip(errs, ms, strict=True)]
    want += [-2.0 * errs[0], -2.0 * errs[1], -errs[2] / math.sqrt(point[6])]
    for got, exact in zip(grads, want, strict=True):
        assert rel_err(got, exact) < 1e-14
    # rows of unequal length are a located error
    uneven = source.replace("(m3, math.sqrt(r3))", "(m3,)")
    with pytest.raises(gradwright.GradwrightError, match="different lengths .1, 2."):
        gradwright.generate(uneven, ["misfit"])


def test_an_index_is_named_for_the_first_target_that_is_not_underscore():
    source = """
BOOK = [(95.0, 3), (100.0, -5), (110.0, 4)]
def book(spot):
    sizes = [q for _, q in BOOK]
    total = 0.0
    for _, size in zip(sizes, sizes):
        total += size * spot * spot
    return total
"""
    text = gradwright.generate(source, ["book"])
    assert "for q_index in range(len(BOOK)):" in text and "__index" not in text
    assert "for size_index in " in text
    _, (spot_bar,) = build(source, "book")["book_grad"](1.5)
    assert spot_bar == 2.0 * 1.5 * (3 - 5 + 4)  # by hand: d/ds sum(q) s^2


def test_loop_over_a_tuple_bound_to_a_name():
    source = """
def reduce_speed(r1, r2, rpm=3000.0):
    stages = (r1, r2)
    efficiency = 1.0
    for r in stages:
        rpm = rpm / r
        efficiency *= 1.0 - 0.02 * r
    return rpm * efficiency
"""
    module = build(source, "reduce_speed")
    point = (3.0, 4.5, 2500.0)
    value, (g1, g2, g_rpm) = module["reduce_speed_grad"](*point)
    assert value == run_source(source)["reduce_speed"](*point)
    r1, r2, rpm = point
    # f = rpm (1 - 0.02 r1)(1 - 0.02 r2) / (r1 r2): logarithmic derivative by hand
    f = rpm * (1 - 0.02 * r1) * (1 - 0.02 * r2) / (r1 * r2)
    assert rel_err(g1, f * (-0.02 / (1 - 0.02 * r1) - 1 / r1)) < 1e-14
    assert rel_err(g2, f * (-0.02 / (1 - 0.02 * r2) - 1 / r2)) < 1e-14
    assert rel_err(g_rpm, f / rpm) < 1e-14


@pytest.mark.parametrize("n", [0, 1, 4])
def test_reversed_range_and_nested_targets(n):
    source = """
def mixed(x, xs, ys):
    acc = x
    for i in reversed(range(len(xs))):
        acc = acc * x + i * xs[i]
    for k, (u, v) in enumerate(zip(xs, ys)):
        acc = acc + k * u * v * x
    return acc
"""
    module = build(source, "mixed")
    xs = [0.5, -0.25, 1.5, 0.75][:n]
    ys = [1.25, 0.5, -2.0, 0.25, 9.0][: n + 1]
    point = (0.9, xs, ys)
    value, grads = module["mixed_grad"](*point)
    assert value == run_source(source)["mixed"](*point)
    if n == 0:  # zero-trip loops: acc = x (closed form); ys is never read
        assert grads == (1.0, [], [0.0])
        return
    reference = mp_gradient(mp_function(source, "mixed"), list(point), [0, 1, 2])
    flat = [grads[0], *grads[1], *grads[2]]  # mpmath central differences, 50 digits
    want = [reference[0], *reference[1], *reference[2]]
    for got, expected in zip(flat, want, strict=True):
        assert rel_err(got, float(expected)) < 1e-12


COMPREHENSIONS = """
import math
def fit(a, b, xs, ys):
    loss = 0.5 * sum((a * x + b - y) ** 2 for x, y in zip(xs, ys) if x > 0.0)
    preds = [math.exp(a * x) for x in xs]
    return loss + sum(p * b for p in preds) + sum([a * i for i in range(2, 5)])
"""


def test_comprehensions_against_sympy():
    import sympy

    module = build(COMPREHENSIONS, "fit", ["a", "b"])
    xs, ys = [0.5, -1.0, 2.0], [1.0, 0.2, 3.0, 4.0]
    a, b = sympy.symbols("a b")
    # the same model written out by hand for SymPy (x > 0 keeps x = 0.5 and 2.0)
    loss = sympy.Rational(1, 2) * sum(
        (a * sympy.Float(x) + b - sympy.Float(y)) ** 2
        for x, y in zip(xs, ys, strict=False)
        if x > 0.0
    )
    model = loss + sum(sympy.exp(a * sympy.Float(x)) * b for x in xs)
    model += sum(a * i for i in range(2, 5))
    point = {a: 0.7, b: -0.3}
    value, (a_bar, b_bar) = module["fit_grad"](0.7, -0.3, xs, ys)
    assert value == run_source(COMPREHENSIONS)["fit"](0.7, -0.3, xs, ys)
    assert rel_err(a_bar, float(sympy.diff(model, a).evalf(30, subs=point))) < 1e-13
    assert rel_err(b_bar, float(sympy.diff(model, b).evalf(30, subs=point))) < 1e-13


def test_filtered_sum_of_nothing_is_the_int_zero_the_primal_gives():
    source = "def f(a, xs):\n    return sum(a * x for x in xs if x > 0.0)\n"
    module = build(source, "f")
    primal = run_source(source)["f"]
    for xs in ([-1.0, -2.0], [], [-1.0, 2.0, 3.0]):
        value, (a_bar, _) = module["f_grad"](1.5, xs)
        assert same_bits(value, primal(1.5, xs))  # int 0 when every term is dropped
        assert a_bar == sum(x for x in xs if x > 0.0)  # d/da of a * sum: by hand


def test_comprehension_with_two_for_clauses_against_closed_form():
    source = "def f(x, xs):\n    return sum(x * u * v for u in xs for v in xs)\n"
    module = build(source, "f", ["x"])
    xs = [0.5, -1.25, 2.0]
    value, (x_bar,) = module["f_grad"](0.3, xs)
    assert value == run_source(source)["f"](0.3, xs)
    # d/dx of x * sum_u sum_v u*v is (sum xs)^2 (closed form)
    assert rel_err(x_bar, math.fsum(xs) ** 2) < 1e-15


def test_loop_targets_are_not_visible_after_the_loop():
    source = """
def f(x, xs, ys):
    s = 0.0
    for u, v in zip(xs, ys):
        s = s + u * v * x
    return s + v
"""
    with pytest.raises(gradwright.GradwrightError) as error:
        gradwright.generate(source, ["f"], wrt=["x"])
    assert "assigned only inside the loop" in str(error.value)


def test_loop_over_module_level_rows():
    source = """
import math

SAMPLES = [(0.5, 4.1), (1.0, 3.6), (2.0, 2.7), (4.0, 1.6)]
DOSE = 100.0


def pk_loss(volume, k_el):
    total = 0.0
    for t, conc in SAMPLES:
        predicted = DOSE / volume * math.exp(-k_el * t)
        total += (math.log(predicted) - math.log(conc)) ** 2
    return total / len(SAMPLES)
"""
    import sympy

    module = build(source, "pk_loss")
    v, k = sympy.symbols("v k")
    samples = [(0.5, 4.1), (1.0, 3.6), (2.0, 2.7), (4.0, 1.6)]
    model = sum(
        (sympy.log(100 / v * sympy.exp(-k * t)) - sympy.log(sympy.Float(c))) ** 2
        for t, c in samples
    ) / len(samples)
    value, (v_bar, k_bar) = module["pk_loss_grad"](12.0, 0.3)
    assert value == run_source(source)["pk_loss"](12.0, 0.3)
    point = {v: 12.0, k: 0.3}  # SymPy diff of the same model written by hand
    assert rel_err(v_bar, float(sympy.diff(model, v).evalf(30, subs=point))) < 1e-13
    assert rel_err(k_bar, float(sympy.diff(model, k).evalf(30, subs=point))) < 1e-13


PACK = """
# (open-circuit voltage, internal resistance) per cell
CELLS = [(3.71, 0.021), (3.69, 0.024), (3.72, 0.019)]


def cell(ocv, r_int, current):
    drop = current * r_int
    return ocv - drop, drop * current


def pack_cost(current, wiring_r, target_v):
    total_v = 0.0
    heat = 0.0
    for ocv, r in CELLS:
        v, loss = cell(ocv, r, current)
        total_v += v
        heat += loss
    total_v -= current * wiring_r
    return (total_v - target_v) ** 2 + 0.05 * (heat + current**2 * wiring_r)
"""


def test_a_table_row_the_reverse_reads_whole_is_unpacked_as_written():
    import sympy

    text = gradwright.generate(PACK, ["pack_cost"], wrt=["current", "wiring_r"])
    reverse = text.split("# reverse sweep")[-1]
    # both elements of the row recomputed: one unpacking, not a row name and
    # an element read per name
    assert "        ocv, r = CELLS[ocv_index]\n" in reverse
    assert "row" not in reverse
    module = build(PACK, "pack_cost", ["current", "wiring_r"])
    i, w = sympy.symbols("i w")
    cells = [(3.71, 0.021), (3.69, 0.024), (3.72, 0.019)]
    volts = sum(sympy.Float(o) - i * sympy.Float(r) for o, r in cells) - i * w
    heat = sum(i * sympy.Float(r) * i for _, r in cells) + i**2 * w
    model = (volts - 11.0) ** 2 + sympy.Float(0.05) * heat
    _, (i_bar, w_bar) = module["pack_cost_grad"](1.3, 0.8, 11.0)
    point = {i: 1.3, w: 0.8}  # SymPy diff of the same model written by hand
    assert rel_err(i_bar, float(sympy.diff(model, i).evalf(30, subs=point))) < 1e-13
    assert rel_err(w_bar, float(sympy.diff(model, w).evalf(30, subs=point))) < 1e-13


TUPLE_STATE = """
import math


def swing(x, v, dt):
    state = (x, v)
    for _ in range(3):
        p, q = state
        state = (p + dt * q, q - dt * math.sin(p))
    if state[0] > 0.0:
        state = (state[1], state[0] * x)
    a, b = state
    return a * b + state[-1]
"""


@pytest.mark.parametrize("point", [(0.3, 0.5, 0.1), (-0.8, 0.5, 0.1)])
def test_tuple_state_through_a_loop_and_a_branch(point):
    module = build(TUPLE_STATE, "swing", ["x", "v"])
    value, grads = module["swing_grad"](*point)
    assert value == run_source(TUPLE_STATE)["swing"](*point)
    reference = mp_gradient(mp_function(TUPLE_STATE, "swing"), list(point), [0, 1])
    for got, want in zip(grads, reference, strict=True):  # mpmath differences
        assert rel_err(got, float(want)) < 1e-12


def test_returning_a_tuple_name():
    source = "def g(x, y):\n    pair = (x * y, x + y)\n    return pair\n"
    module = build(source, "g")
    value, jac = module["g_jacobian"](0.5, 2.0)
    assert value == (1.0, 2.5)
    assert jac == ((2.0, 0.5), (1.0, 1.0))  # d(xy, x+y)/d(x, y): closed form


def test_tuple_used_as_a_number_is_a_located_error():
    source = "def g(x, y):\n    pair = (x, y)\n    return pair * 2.0\n"
    with pytest.raises(gradwright.GradwrightError) as error:
        gradwright.generate(source, ["g"])
    assert "<string>:3:12:" in str(error.value)
    assert "'pair' is a tuple of 2 numbers" in str(error.value)


def test_loop_over_a_local_table_copied_as_written():
    """`rays = [...]` reads no active value, so it is copied as written; a loop over
    its rows reads them like module data (it was taken for a dict's keys)."""
    source = """
def spot(f1):
    rays = [(1.0, 0.0), (-1.0, 0.02)]
    total = 0.0
    for h, u in rays:
        u = u - h / f1
        total += u * u
    return total
"""
    module = build(source, "spot")
    value, (f1_bar,) = module["spot_grad"](40.0)
    assert value == run_source(source)["spot"](40.0)
    rays = [(1.0, 0.0), (-1.0, 0.02)]
    # d/df1 sum (u - h/f1)^2 = sum 2 (u - h/f1) h / f1^2, by hand
    want = sum(2 * (u - h / 40.0) * h / 40.0**2 for h, u in rays)
    assert rel_err(f1_bar, want) < 1e-14


ROWS = """
def weighted_fit(a, b, rows):
    total = 0.0
    for k, (x, y) in enumerate(rows):
        total += (k + 1) * (a * x + b - y) ** 2
    for x, _ in rows:
        total += 0.5 * (a * x) ** 2
    return total
"""


def test_rows_of_a_list_parameter_unpacked_in_the_loop_target():
    # `for k, (x, y) in enumerate(rows)` over a list of rows the caller passes:
    # printed as the model unpacks them, not read item by item
    text = gradwright.generate(ROWS, ["weighted_fit"], ["a", "b"])
    assert "x, y = rows[k]" in text
    ns = build(ROWS, "weighted_fit", ["a", "b"])
    rows = [(0.5, 1.25), (1.5, 2.0), (-0.75, 0.25)]
    value, (a_bar, b_bar) = ns["weighted_fit_grad"](1.1, -0.3, rows)
    assert value == ns["weighted_fit"](1.1, -0.3, rows)
    # closed form (the derivative of each squared residual, by hand)
    a, b = 1.1, -0.3
    r = [(k + 1, x, a * x + b - y) for k, (x, y) in enumerate(rows)]
    exact_a = sum(2 * w * e * x for w, x, e in r) + sum(a * x * x for x, _ in rows)
    exact_b = sum(2 * w * e for w, x, e in r)
    assert rel_err(a_bar, exact_a) <= 1e-14 and rel_err(b_bar, exact_b) <= 1e-14


def test_rows_of_a_list_in_wrt_are_a_located_error():
    # review finding: with the list itself in --wrt, the rows' items were read
    # as data and its gradient came back as zeros
    with pytest.raises(gradwright.GradwrightError) as caught:
        gradwright.generate(ROWS, ["weighted_fit"], ["a", "rows"], path="m.py")
    text = caught.value.diagnostic.render()
    assert text.startswith("m.py:4:13: error: the rows this loop target unpacks")
    assert "leave it out of --wrt" in text


SMOOTHNESS = """
def roughness(q, w):
    return w * sum((a - b) ** 2 for a, b in zip(q[1:], q[:-1]))
"""


def test_zip_of_two_slices_of_one_length_counts_once():
    import sympy

    text = gradwright.generate(SMOOTHNESS, ["roughness"], wrt=["q"])
    # both slices have max(len(q) - 1, 0) elements: no min() of the two
    assert "min(" not in text and text.count("max(len(q) - 1, 0)") == 1
    module = build(SMOOTHNESS, "roughness", ["q"])
    qs = sympy.symbols("q0:4")
    model = 0.5 * sum((a - b) ** 2 for a, b in zip(qs[1:], qs[:-1], strict=True))
    point = [0.3, -1.2, 0.8, 2.0]
    _, (q_bar,) = module["roughness_grad"](point, 0.5)
    for k, symbol in enumerate(qs):
        # reference: SymPy's derivative of the model written by hand
        exact = sympy.diff(model, symbol).subs(dict(zip(qs, point, strict=True)))
        assert rel_err(q_bar[k], float(exact)) < 1e-15
    # one element and none: the loops run no times
    assert module["roughness_grad"]([0.3], 0.5)[1] == ([0.0],)
    assert module["roughness_grad"]([], 0.5)[1] == ([],)


ARM = """
import math


def link(x, y, angle, length, joint):
    angle = angle + joint
    return x + length * math.cos(angle), y + length * math.sin(angle), angle


def reach(q, lengths, tx, ty):
    x, y, angle = 0.0, 0.0, 0.0
    for joint, length in zip(q, lengths):
        x, y, angle = link(x, y, angle, length, joint)
    return (x - tx) ** 2 + (y - ty) ** 2
"""


def test_a_helper_carrying_a_loops_state_hands_its_adjoints_on_directly():
    import sympy

    text = gradwright.generate(ARM, ["reach"], wrt=["q"])
    reverse = text.split("def reach_grad")[1].split("# reverse sweep")[1]
    # the call writes the carried adjoints: no x_bar = x_bar_1 copies after it
    assert "x_bar, y_bar, angle_bar, joint_bar_1 = link_adjoint(" in reverse
    assert "x_bar = x_bar_1" not in reverse
    module = build(ARM, "reach", ["q"])
    qs = sympy.symbols("q0:3")
    lengths = [1.0, 0.7, 0.4]
    x = y = angle = sympy.Integer(0)
    for joint, length in zip(qs, lengths, strict=True):
        angle = angle + joint
        x, y = x + length * sympy.cos(angle), y + length * sympy.sin(angle)
    model = (x - 1.2) ** 2 + (y - 0.5) ** 2
    point = [0.3, -0.9, 1.4]
    _, (q_bar,) = module["reach_grad"](point, lengths, 1.2, 0.5)
    for k, symbol in enumerate(qs):
        # reference: SymPy's derivative of the model written by hand
        exact = sympy.diff(model, symbol).evalf(
            30, subs=dict(zip(qs, point, strict=True))
        )
        assert rel_err(q_bar[k], float(exact)) < 1e-14


PART_UPDATED = """
import math


def h(a, b):
    return a * 0.5 + math.sin(b), b


def f(x, n):
    y = 0.0
    for i in range(n):
        z = x
        x, y = h(x, y)
        y = y + z
    return x
"""


def test_a_helper_part_updated_after_the_call_is_not_written_into_the_carry():
    # found by review: x_bar_1 += y_bar between the call and x_bar = x_bar_1;
    # folding the copy into the call lost that contribution (d/dx was 0.25)
    module = build(PART_UPDATED, "f", ["x"])
    _, (x_bar,) = module["f_grad"](0.6, 2)
    # reference by hand: x2 = 0.5 x1 + sin(y1) = 0.25 x + sin(x): 0.25 + cos x
    assert rel_err(x_bar, 0.25 + math.cos(0.6)) < 1e-15
    exact = mp_gradient(mp_function(PART_UPDATED, "f"), [0.6, 2], [0])
    assert rel_err(x_bar, float(exact[0])) < 1e-14  # and mpmath differences
