"""Lists as values: lists that grow (append, extend, ``+ [v]``, ``+= [v]``),
comprehensions with several clauses and filters, and reductions over sequences and
generators (min, max, math.prod, math.fsum, sum with a start). Each gradient against
an outside reference named beside the check; every value bit-identical to the
primal's."""

from __future__ import annotations

import math

import pytest
from support import build, mp_function, mp_gradient, rel_err, run_source, same_bits

import gradwright

GROWING = """
import math


def spend(rate, base, days):
    costs = []
    for d in days:
        costs.append(base * math.exp(rate * d))
    costs.extend([base, rate * base])
    costs += [rate**2]
    costs = costs + [1.5 * rate]
    return sum(costs) + costs[-1] * costs[0]
"""

DAYS = [0.0, 1.0, 2.5, 4.0]


def test_appends_then_sum_against_sympy():
    import sympy

    module = build(GROWING, "spend", ["rate", "base"])
    r, b = sympy.symbols("r b")
    # the same model written out by hand for SymPy
    costs = [b * sympy.exp(r * sympy.Float(d)) for d in DAYS] + [b, r * b, r**2]
    costs.append(sympy.Rational(3, 2) * r)
    model = sum(costs) + costs[-1] * costs[0]
    point = {r: 0.3, b: 2.0}
    value, (r_bar, b_bar) = module["spend_grad"](0.3, 2.0, DAYS)
    assert same_bits(value, run_source(GROWING)["spend"](0.3, 2.0, DAYS))
    assert rel_err(r_bar, float(sympy.diff(model, r).evalf(30, subs=point))) < 1e-14
    assert rel_err(b_bar, float(sympy.diff(model, b).evalf(30, subs=point))) < 1e-14


FILTERED = """
def kept(a, xs):
    t = [a * x for x in xs if x > 0.0]
    pairs = tuple(a * u * v for u in xs for v in xs if u < v)
    return t[-1] * len(t) + sum(pairs) + len(pairs)
"""


def test_filtered_comprehension_keeps_only_its_terms():
    # a filtered comprehension used as a list once had zeros in place of the
    # filtered terms (a value different from the primal's)
    import sympy

    xs = [0.5, -1.0, 2.0, 0.25]
    module = build(FILTERED, "kept", ["a"])
    value, (a_bar,) = module["kept_grad"](0.7, xs)
    assert same_bits(value, run_source(FILTERED)["kept"](0.7, xs))
    a = sympy.symbols("a")
    # written out by hand: t = [0.5a, 2a, 0.25a], pairs u < v
    positives = [x for x in xs if x > 0.0]
    pairs = [a * u * v for u in xs for v in xs if u < v]
    model = a * positives[-1] * len(positives) + sum(pairs) + len(pairs)
    assert rel_err(a_bar, float(sympy.diff(model, a).evalf(30, subs={a: 0.7}))) < 1e-15


EXTREMES = """
def spread(a, b, xs):
    hi = max((a * x - b) ** 2 for x in xs)
    lo = min([a * x for x in xs])
    return hi - lo
"""


def test_min_max_over_a_generator_against_closed_form():
    xs = [0.5, -1.5, 2.0, 1.0]
    a, b = 0.8, 0.3
    module = build(EXTREMES, "spread", ["a", "b"])
    value, (a_bar, b_bar) = module["spread_grad"](a, b, xs)
    assert same_bits(value, run_source(EXTREMES)["spread"](a, b, xs))
    # closed form: the max term is x = -1.5 ((a x - b)^2 = 2.25), d/da = 2(ax-b)x,
    # d/db = -2(ax-b); the min term is a * (-1.5), d/da = -1.5
    r = a * -1.5 - b
    assert rel_err(a_bar, 2 * r * -1.5 - (-1.5)) < 1e-15
    assert rel_err(b_bar, -2 * r) < 1e-15


def test_min_tie_gives_the_adjoint_to_the_first_element():
    source = "def f(a, b):\n    return min([a, b, a])\n"
    module = build(source, "f", ["a", "b"])
    # min(a, b) at a tie returns a (README: scalar ties), so the first a gets it
    assert module["f_grad"](1.0, 1.0)[1] == (1.0, 0.0)
    assert module["f_grad"](2.0, 1.0)[1] == (0.0, 1.0)


PRODUCT = """
import math


def growth(r, ts):
    return math.prod(1.0 + r * t for t in ts) + math.prod([r, r], start=2.0)
"""


def test_prod_against_sympy():
    import sympy

    ts = [0.5, 1.0, 0.0, 2.0]
    try:
        module = build(PRODUCT, "growth", ["r"])
    except gradwright.GradwrightError:
        pytest.fail("math.prod with start= should generate")
    value, (r_bar,) = module["growth_grad"](0.2, ts)
    assert same_bits(value, run_source(PRODUCT)["growth"](0.2, ts))
    r = sympy.symbols("r")
    model = sympy.prod([1 + r * sympy.Float(t) for t in ts]) + 2 * r * r
    assert rel_err(r_bar, float(sympy.diff(model, r).evalf(30, subs={r: 0.2}))) < 1e-15


FSUM = """
import math


def total(a, xs):
    exact = math.fsum(a * x for x in xs)
    return exact + sum((a * x * x for x in xs), a)
"""


def test_fsum_value_is_fsum_and_its_derivative_the_sum():
    # values chosen so that sum() and fsum() differ in the last bits
    xs = [1e16, 1.0, -1e16, 0.1, 0.7]
    module = build(FSUM, "total", ["a"])
    value, (a_bar,) = module["total_grad"](1.0, xs)
    assert same_bits(value, run_source(FSUM)["total"](1.0, xs))
    # derivative of a * sum(xs) + a * sum(x^2) + a, summed exactly (math.fsum)
    assert a_bar == math.fsum(xs) + math.fsum(x * x for x in xs) + 1.0


def test_fsum_against_mpmath():
    xs = [0.3, -1.2, 2.5]
    module = build(FSUM, "total", ["a"])
    value, grads = module["total_grad"](0.9, xs)
    # mpmath central differences of the model's own text, 50 digits
    (exact,) = mp_gradient(mp_function(FSUM, "total"), [0.9, xs], [0])
    assert rel_err(grads[0], exact) < 1e-13


def test_list_method_hints():
    source = "def f(x):\n    ys = [x]\n    ys.insert(0, x)\n    return ys[0]\n"
    with pytest.raises(gradwright.GradwrightError) as error:
        gradwright.generate(source, ["f"], wrt=["x"])
    assert "list.insert() is not supported" in str(error.value)
    assert "append() and extend()" in str(error.value)


SLICES = """
import math

KNOTS = [0.0, 0.5, 1.5, 3.0]


def trapezoid(k, ts):
    vals = [math.exp(-k * t) for t in ts]
    area = 0.0
    for t0, t1, v0, v1 in zip(ts, ts[1:], vals, vals[1:]):
        area += 0.5 * (t1 - t0) * (v0 + v1)
    for t0, t1 in zip(KNOTS, KNOTS[1:]):
        area += k * (t1 - t0) ** 2
    return area


def path(a, xs, ys):
    length = 0.0
    for x0, x1, y0, y1 in zip(xs[:-1], xs[1:], ys, ys[1:]):
        length += math.hypot(a * (x1 - x0), y1 - y0)
    return length
"""


def test_trapezoid_rule_over_slices_against_closed_form():
    ts = [0.0, 0.4, 1.1, 2.0]
    k = 0.7
    module = build(SLICES, "trapezoid", ["k", "ts"])
    value, (k_bar, ts_bar) = module["trapezoid_grad"](k, ts)
    assert same_bits(value, run_source(SLICES)["trapezoid"](k, ts))
    pairs = list(zip(ts, ts[1:], strict=False))
    knots = [0.0, 0.5, 1.5, 3.0]
    # closed form: d/dk of sum 0.5 h (e^{-k t0} + e^{-k t1}) + k sum h_K^2
    expected = math.fsum(
        0.5 * (t1 - t0) * (-t0 * math.exp(-k * t0) - t1 * math.exp(-k * t1))
        for t0, t1 in pairs
    ) + math.fsum((b - a) ** 2 for a, b in zip(knots, knots[1:], strict=False))
    assert rel_err(k_bar, expected) < 1e-14
    # d/dt_i: each interval [t0, t1] gives 0.5 (f0 + f1) (d(t1 - t0)) + 0.5 h f'
    f = [math.exp(-k * t) for t in ts]
    for i in range(len(ts)):
        parts = []
        if i > 0:  # t_i is the right end of interval i - 1
            h = ts[i] - ts[i - 1]
            parts += [0.5 * (f[i - 1] + f[i]), 0.5 * h * -k * f[i]]
        if i + 1 < len(ts):  # and the left end of interval i
            h = ts[i + 1] - ts[i]
            parts += [-0.5 * (f[i] + f[i + 1]), 0.5 * h * -k * f[i]]
        # the parts cancel: the error is measured against their size
        scale = math.fsum(abs(p) for p in parts)
        assert abs(ts_bar[i] - math.fsum(parts)) < 1e-15 * scale


def test_path_length_over_slices_against_closed_form():
    xs, ys = [0.0, 1.0, 2.5, 2.0], [0.0, 1.0, 0.5, -1.0]
    a = 1.3
    module = build(SLICES, "path", ["a", "xs", "ys"])
    value, (a_bar, xs_bar, ys_bar) = module["path_grad"](a, xs, ys)
    assert same_bits(value, run_source(SLICES)["path"](a, xs, ys))
    # closed form: L = sum sqrt((a dx)^2 + dy^2), dL/da = sum a dx^2 / segment
    segments = [
        (x1 - x0, y1 - y0, math.hypot(a * (x1 - x0), y1 - y0))
        for x0, x1, y0, y1 in zip(xs, xs[1:], ys, ys[1:], strict=False)
    ]
    assert rel_err(a_bar, math.fsum(a * dx * dx / s for dx, _, s in segments)) < 1e-14
    for i in range(len(xs)):
        # dL/dx_i = a^2 (dx_{i-1} / s_{i-1} - dx_i / s_i), likewise y without a^2
        gx = (a * a * segments[i - 1][0] / segments[i - 1][2] if i > 0 else 0.0) - (
            a * a * segments[i][0] / segments[i][2] if i < len(segments) else 0.0
        )
        gy = (segments[i - 1][1] / segments[i - 1][2] if i > 0 else 0.0) - (
            segments[i][1] / segments[i][2] if i < len(segments) else 0.0
        )
        assert rel_err(xs_bar[i], gx) < 1e-14
        assert rel_err(ys_bar[i], gy) < 1e-14


COPIES = """
def copies(a, xs):
    v = [a * x for x in xs]
    c = list(v)
    d = v.copy()
    e = v[:]
    t = tuple(v)
    c.append(a)
    d[0] = d[0] * a
    return sum(c) + d[0] + e[-1] * t[1] + sum(v[-2:]) + sum(xs[1:], a)
"""


def test_copies_are_lists_of_their_own_against_sympy():
    import sympy

    xs = [0.5, -1.0, 2.0]
    module = build(COPIES, "copies", ["a", "xs"])
    value, (a_bar, xs_bar) = module["copies_grad"](0.7, xs)
    assert same_bits(value, run_source(COPIES)["copies"](0.7, xs))
    a = sympy.symbols("a")
    x = sympy.symbols("x0:3")
    v = [a * xi for xi in x]
    model = sum(v) + a + v[0] * a + v[-1] * v[1] + v[1] + v[2] + x[1] + x[2] + a
    point = {a: 0.7, **{xi: val for xi, val in zip(x, xs, strict=True)}}
    assert rel_err(a_bar, float(sympy.diff(model, a).evalf(30, subs=point))) < 1e-15
    for xi, got in zip(x, xs_bar, strict=True):
        assert rel_err(got, float(sympy.diff(model, xi).evalf(30, subs=point))) < 1e-15


HEAT = """
def heat(alpha, u0, steps):
    u = list(u0)
    u_new = [0.0] * len(u0)
    for _ in range(steps):
        for i in range(1, len(u) - 1):
            u_new[i] = u[i] + alpha * (u[i - 1] - 2.0 * u[i] + u[i + 1])
        u_new[0] = u[0]
        u_new[-1] = u[-1]
        u, u_new = u_new, u
    return sum(x * x for x in u)


def rod(alpha, u0, steps):
    u = u0
    for _ in range(steps):
        new = u[:]
        for i in range(1, len(u) - 1):
            new[i] = u[i] + alpha * (u[i - 1] - 2.0 * u[i] + u[i + 1])
        u = new
    return u[1] * u[2]
"""


@pytest.mark.parametrize("func", ["heat", "rod"])
@pytest.mark.parametrize("steps", [0, 1, 2, 5])
def test_double_buffered_diffusion_against_mpmath(func: str, steps: int):
    u0 = [0.0, 1.0, 0.5, 2.0, 0.3, 0.0]
    module = build(HEAT, func, ["alpha", "u0"])
    value, (alpha_bar, u0_bar) = module[f"{func}_grad"](0.2, u0, steps)
    assert same_bits(value, run_source(HEAT)[func](0.2, u0, steps))
    # mpmath central differences of the model's own text, 50 digits
    exact = mp_gradient(mp_function(HEAT, func), [0.2, u0, steps], [0, 1])
    assert rel_err(alpha_bar, exact[0]) < 1e-12
    for got, ref in zip(u0_bar, exact[1], strict=True):
        assert rel_err(got, ref) < 1e-12


def test_rebinding_a_list_another_name_holds_is_a_located_error():
    source = (
        "def f(a, n):\n"
        "    start = [a, 2.0 * a]\n"
        "    u = start\n"
        "    for _ in range(n):\n"
        "        u = [x * a for x in u]\n"
        "    return u[0] + start[1]\n"
    )
    with pytest.raises(gradwright.GradwrightError) as error:
        gradwright.generate(source, ["f"], wrt=["a"])
    text = str(error.value)
    assert "<string>:4:5" in text
    assert "'start' holds the list 'u' starts the loop with" in text
    assert "u = list(start)" in text


INACTIVE_BUFFERS = """
def f(x, y, xs):
    a = [y + y]
    a += [sum(xs), 2.0 * y]
    u = list(a)
    w = [0.0] * 3
    for i in range(2):
        for k in range(3):
            w[k] = a[0] * y + u[k]
        u, w = w, u
    return u[-1] * x + w[0]
"""


def test_double_buffers_with_no_adjoint_still_swap():
    # found by the list_values random family: buffers that do not depend on the
    # --wrt parameter were left unswapped (the layout check refused the module)
    module = build(INACTIVE_BUFFERS, "f", ["x"])
    args = [0.9, 0.7, [1.0, 2.0]]
    value, (x_bar,) = module["f_grad"](*args)
    assert same_bits(value, run_source(INACTIVE_BUFFERS)["f"](*args))
    # mpmath central differences of the model's own text, 50 digits
    (exact,) = mp_gradient(mp_function(INACTIVE_BUFFERS, "f"), args, [0])
    assert rel_err(x_bar, exact) < 1e-13
