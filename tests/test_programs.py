"""Whole programs with control flow, loops, lists, helpers and tuple results,
differentiated by gradwright and checked against references from outside.

- n-dimensional Rosenbrock over a list: scipy.optimize.rosen_der and rosen.
- Lennard-Jones clusters (triangular double loop): the analytic pair force
  dE/dr = 4 eps (-12 sigma**12 / r**13 + 6 sigma**6 / r**7) (textbook force law,
  recalled from memory) summed over pairs in mpmath; zero force at the pair
  minimum r = 2**(1/6) sigma (textbook fact, recalled from memory).
- Explicit-Euler time stepping (damped oscillator, projectile with drag): mpmath
  central differences of the same model text run in mpmath
  (support.mp_central_diff / support.mp_function).
- Piecewise laws (if/elif/else, conditional expressions, and/or/not, chained
  comparisons) and early returns: sympy.Piecewise and sympy.diff.
- Helpers called from several places: the whole model run through SymPy
  (support.sympy_function) and differentiated with sympy.diff.
- Tuple results: closed-form Jacobians of polar and spherical coordinates.
- Local lists (a circular smoothing filter): SymPy; recurrences with tuple
  assignment: sympy.fibonacci and the angle-addition closed form of rotations.
- Memory of the stored forward values: the generated text's allocations, and
  tracemalloc peaks (figures printed, collect them with ``-s``).

Tolerances are stated beside the checks. The common reasoning: the generated
adjoint and the reference are each at most a few thousand correctly rounded
operations, so they agree to ~1e-13 relative unless the expressions cancel, while a
wrong derivative is off by far more. Every ``value`` is checked to be the primal's
result bit for bit. Data are invented for these tests.
"""

from __future__ import annotations

import ast
import math
import random
import tracemalloc

import mpmath
import pytest
import scipy.optimize
import sympy
from support import (
    build,
    mp_central_diff,
    mp_function,
    rel_err,
    run_source,
    same_bits,
    sympy_function,
    sympy_value,
)

import gradwright


def generated(source: str, func: str, wrt: list[str] | None = None) -> str:
    return gradwright.generate(source, [func], wrt=wrt)


def run_text(text: str) -> dict:
    namespace: dict = {}
    exec(compile(text, "<generated>", "exec"), namespace)
    return namespace


def assert_value_is_primal(ns: dict, source: str, func: str, args, value) -> None:
    """``value`` equals, bit for bit, the copied primal and the source itself."""
    copied = ns[func](*args)
    original = run_source(source)[func](*args)
    if isinstance(value, tuple):
        assert len(value) == len(copied) == len(original)
        for v, c, o in zip(value, copied, original, strict=True):
            assert same_bits(v, c) and same_bits(v, o)
    else:
        assert same_bits(value, copied) and same_bits(value, original)


def sym_derivative(expr, symbol, subs: dict) -> float:
    """d expr / d symbol at the exact float point ``subs``, rounded to a float."""
    return float(sympy_value(sympy.diff(expr, symbol), subs))


# ---------------------------------------------------------------------------------
# Rosenbrock in n dimensions, over a list

ROSEN_INDEXED = """\
def rosen_n(x):
    total = 0.0
    for i in range(len(x) - 1):
        total += 100.0 * (x[i + 1] - x[i] ** 2) ** 2 + (1.0 - x[i]) ** 2
    return total
"""

# the same sum written with `for v in x` and a carried previous element; the first
# pass (prev is v) is weighted by 0.0
ROSEN_ITERATED = """\
def rosen_iter(x):
    total = 0.0
    prev = x[0]
    started = 0.0
    for v in x:
        total += started * (100.0 * (v - prev**2) ** 2 + (1.0 - prev) ** 2)
        prev = v
        started = 1.0
    return total
"""


def _random_point(n: int, seed: int) -> list[float]:
    rng = random.Random(seed)
    return [rng.uniform(-2.0, 2.0) for _ in range(n)]


@pytest.mark.parametrize(
    "source, func", [(ROSEN_INDEXED, "rosen_n"), (ROSEN_ITERATED, "rosen_iter")]
)
@pytest.mark.parametrize("n", [2, 5, 10])
@pytest.mark.parametrize("seed", [11, 12, 13])
def test_rosenbrock_n_against_scipy(source, func, n, seed):
    ns = build(source, func)
    x = _random_point(n, seed)
    value, (x_bar,) = ns[func + "_grad"](x)
    assert_value_is_primal(ns, source, func, (x,), value)
    # scipy.optimize.rosen: the same sum in NumPy order; 1e-14 relative
    assert rel_err(value, float(scipy.optimize.rosen(x))) < 1e-14
    # scipy.optimize.rosen_der: elementwise, within 1e-13 of the gradient's scale
    reference = [float(d) for d in scipy.optimize.rosen_der(x)]
    assert isinstance(x_bar, list) and len(x_bar) == n
    scale = max(abs(d) for d in reference)
    for got, want in zip(x_bar, reference, strict=True):
        assert abs(got - want) <= 1e-13 * scale


# ---------------------------------------------------------------------------------
# Lennard-Jones cluster, triangular double loop

LENNARD_JONES = """\
import math


def cluster_energy(xs, ys, zs, eps, sigma):
    n = len(xs)
    energy = 0.0
    for i in range(n):
        for j in range(i + 1, n):
            dx = xs[i] - xs[j]
            dy = ys[i] - ys[j]
            dz = zs[i] - zs[j]
            r = math.sqrt(dx * dx + dy * dy + dz * dz)
            sr6 = (sigma / r) ** 6
            energy += 4.0 * eps * (sr6 * sr6 - sr6)
    return energy
"""


def _lj_reference_gradient(coords, eps, sigma):
    """-force on each coordinate from the analytic pair law, summed in mpmath:
    dE/dr = 4 eps (-12 sigma**12 / r**13 + 6 sigma**6 / r**7) (textbook force law,
    recalled from memory) along the unit vector between the pair."""
    n = len(coords[0])
    with mpmath.workdps(40):
        grad = [[mpmath.mpf(0)] * n for _ in coords]
        e, s = mpmath.mpf(eps), mpmath.mpf(sigma)
        for i in range(n):
            for j in range(i + 1, n):
                d = [mpmath.mpf(c[i]) - mpmath.mpf(c[j]) for c in coords]
                r = mpmath.sqrt(mpmath.fsum(t * t for t in d))
                de_dr = 4 * e * (-12 * s**12 / r**13 + 6 * s**6 / r**7)
                for axis, t in enumerate(d):
                    grad[axis][i] += de_dr * t / r
                    grad[axis][j] -= de_dr * t / r
        return [[float(g) for g in row] for row in grad]


def _lj_cluster(n: int, seed: int):
    """n particles on a jittered line, neighbours about 1.1 sigma apart."""
    rng = random.Random(seed)
    xs = [1.1 * k + rng.uniform(-0.1, 0.1) for k in range(n)]
    ys = [rng.uniform(-0.3, 0.3) for _ in range(n)]
    zs = [rng.uniform(-0.3, 0.3) for _ in range(n)]
    return xs, ys, zs


@pytest.mark.parametrize("n", [3, 4, 5])
def test_lennard_jones_cluster_against_force_law(n):
    ns = build(LENNARD_JONES, "cluster_energy", wrt=["xs", "ys", "zs"])
    xs, ys, zs = _lj_cluster(n, seed=100 + n)
    eps, sigma = 0.8, 1.05
    args = (xs, ys, zs, eps, sigma)
    value, grads = ns["cluster_energy_grad"](*args)
    assert_value_is_primal(ns, LENNARD_JONES, "cluster_energy", args, value)
    reference = _lj_reference_gradient((xs, ys, zs), eps, sigma)
    # forces of neighbours cancel: compare within 1e-12 of the largest component
    scale = max(abs(g) for row in reference for g in row)
    for got_row, want_row in zip(grads, reference, strict=True):
        assert len(got_row) == n
        for got, want in zip(got_row, want_row, strict=True):
            assert abs(got - want) <= 1e-12 * scale


def test_lennard_jones_cluster_in_a_plane():
    # 2-D: all z = 0; the z gradient is exactly zero (dz = 0 for every pair)
    ns = build(LENNARD_JONES, "cluster_energy", wrt=["xs", "ys", "zs"])
    xs, ys, _ = _lj_cluster(4, seed=7)
    zs = [0.0] * 4
    _, (xs_bar, ys_bar, zs_bar) = ns["cluster_energy_grad"](xs, ys, zs, 1.0, 1.0)
    reference = _lj_reference_gradient((xs, ys, zs), 1.0, 1.0)
    scale = max(abs(g) for row in reference for g in row)
    for got, want in zip(xs_bar + ys_bar, reference[0] + reference[1], strict=True):
        assert abs(got - want) <= 1e-12 * scale
    assert all(g == 0.0 for g in zs_bar)


def test_lennard_jones_pair_at_equilibrium_has_no_force():
    ns = build(LENNARD_JONES, "cluster_energy")
    eps, sigma = 1.3, 0.9
    r_min = 2.0 ** (1.0 / 6.0) * sigma  # the pair minimum (textbook fact)
    args = ([0.0, r_min], [0.0, 0.0], [0.0, 0.0], eps, sigma)
    value, (xs_bar, ys_bar, zs_bar, eps_bar, sigma_bar) = ns["cluster_energy_grad"](
        *args
    )
    # E(r_min) = -eps (textbook fact); E is linear in eps so dE/deps = E / eps
    assert rel_err(value, -eps) < 1e-14
    assert rel_err(eps_bar, -1.0) < 1e-14
    # the size of either term of dE/dr alone, 4 eps 12 sigma**12 / r**13
    scale = 48.0 * eps * sigma**12 / r_min**13
    for g in (*xs_bar, *ys_bar, *zs_bar):
        assert abs(g) <= 1e-12 * scale
    # at r**6 = 2 sigma**6, dE/dsigma = 4 eps (12 s**11/r**12 - 6 s**5/r**6) = 0 too
    # (differentiated by hand)
    assert abs(sigma_bar) <= 1e-12 * scale
    # a pair off the minimum does feel a force: the check above can fail
    _, (xs_bar, *_rest) = ns["cluster_energy_grad"](
        [0.0, 1.05 * r_min], [0.0, 0.0], [0.0, 0.0], eps, sigma
    )
    assert abs(xs_bar[0]) > 1e-3 * scale


# ---------------------------------------------------------------------------------
# time stepping (explicit Euler)

OSCILLATOR = """\
def damped_energy(x0, v0, k, c, dt, steps):
    x = x0
    v = v0
    for _ in range(steps):
        a = -k * x - c * v
        x = x + dt * v
        v = v + dt * a
    return 0.5 * k * x * x + 0.5 * v * v
"""

PROJECTILE = """\
import math

GRAVITY = 9.80665


def shot_height(speed, angle, drag, dt, steps):
    vx = speed * math.cos(angle)
    vy = speed * math.sin(angle)
    x = 0.0
    y = 0.0
    for _ in range(steps):
        s = math.sqrt(vx * vx + vy * vy)
        ax = -drag * s * vx
        ay = -GRAVITY - drag * s * vy
        x += dt * vx
        y += dt * vy
        vx += dt * ax
        vy += dt * ay
    return y + 0.1 * x
"""

TIME_STEPPING = [
    (OSCILLATOR, "damped_energy", (1.0, -0.3, 4.0, 0.3, 0.01), 300),
    (PROJECTILE, "shot_height", (25.0, 0.7, 0.02, 0.005), 200),
]


@pytest.mark.parametrize("source, func, point, steps", TIME_STEPPING)
def test_time_stepping_against_mpmath_central_differences(source, func, point, steps):
    ns = build(source, func)
    value, grads = ns[func + "_grad"](*point, steps)
    assert_value_is_primal(ns, source, func, (*point, steps), value)
    f_mp = mp_function(source, func)

    def model(*p):
        return f_mp(*p, steps)

    for k in range(len(point)):
        # the same Euler model run at 60 digits, central difference step 1e-30
        reference = mp_central_diff(model, point, k, digits=30)
        # a few thousand rounded steps: 1e-11 relative
        assert rel_err(grads[k], float(reference)) < 1e-11


@pytest.mark.parametrize("source, func, point, steps", TIME_STEPPING)
def test_step_count_gradient_is_zero(source, func, point, steps):
    # the result is piecewise constant in an integer trip count: its derivative is
    # reported as 0.0 (common practice)
    ns = build(source, func)
    _, grads = ns[func + "_grad"](*point, steps)
    assert len(grads) == len(point) + 1
    assert same_bits(grads[-1], 0.0)
    # and the result does change with the step count (it is a real parameter)
    assert ns[func](*point, steps) != ns[func](*point, steps + 1)


def _saved_allocations(text: str, func: str) -> list[ast.Assign]:
    tree = ast.parse(text)
    (grad,) = [
        node
        for node in tree.body
        if isinstance(node, ast.FunctionDef) and node.name == func + "_grad"
    ]
    return [
        node
        for node in ast.walk(grad)
        if isinstance(node, ast.Assign)
        and len(node.targets) == 1
        and isinstance(node.targets[0], ast.Name)
        and node.targets[0].id.endswith("_saved")
    ]


@pytest.mark.parametrize("source, func, point, steps", TIME_STEPPING)
def test_stored_values_per_step_are_few_and_sized_by_the_step_count(
    source, func, point, steps
):
    text = generated(source, func)
    assert text.count("_saved = [0.0] *") >= 1
    allocations = _saved_allocations(text, func)
    assert len(allocations) == text.count("_saved = [0.0] *")
    # a fixed small number of values per step (the state, plus sqrt's output)
    assert 1 <= len(allocations) <= 4
    for node in allocations:
        # [0.0] * steps: one slot per step, nothing else
        value = node.value
        assert isinstance(value, ast.BinOp) and isinstance(value.op, ast.Mult)
        assert isinstance(value.left, ast.List)
        assert [ast.literal_eval(e) for e in value.left.elts] == [0.0]
        assert isinstance(value.right, ast.Name) and value.right.id == "steps"
    # each saved list gets exactly one store per forward step
    names = {node.targets[0].id for node in allocations}
    stores = [
        node.targets[0].value.id
        for node in ast.walk(ast.parse(text))
        if isinstance(node, ast.Assign)
        and isinstance(node.targets[0], ast.Subscript)
        and isinstance(node.targets[0].value, ast.Name)
        and node.targets[0].value.id in names
    ]
    assert sorted(stores) == sorted(names)
    assert ".append(" not in text


def _peak_bytes(function, *args) -> int:
    tracemalloc.start()
    try:
        tracemalloc.reset_peak()
        function(*args)
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    return peak


def test_memory_grows_linearly_with_steps():
    ns = build(OSCILLATOR, "damped_energy")
    point = (1.0, -0.3, 4.0, 0.3, 0.01)
    grad = ns["damped_energy_grad"]
    grad(*point, 10)  # warm up
    small = _peak_bytes(grad, *point, 1000)
    large = _peak_bytes(grad, *point, 10000)
    ratio = large / small
    print(
        f"\n[memory] damped_energy_grad tracemalloc peak: steps=1e3 {small} B,"
        f" steps=1e4 {large} B, ratio {ratio:.2f}"
        f" ({large / 10000:.1f} B per step)"
    )
    # linear: ten times the steps, about ten times the memory
    assert 5.0 < ratio < 20.0


# ---------------------------------------------------------------------------------
# piecewise laws

PIECEWISE = """\
import math


def friction(v, mu, k):
    if v < -1.0:
        f = -mu - k * (v + 1.0) ** 2
    elif v <= 1.0:
        f = mu * math.sin(0.5 * math.pi * v)
    else:
        f = mu + k * math.log(v) ** 2
    return f
"""

PIECEWISE_EXPRESSION = """\
import math


def friction_expr(v, mu, k):
    return (
        -mu - k * (v + 1.0) ** 2
        if v < -1.0
        else (
            mu * math.sin(0.5 * math.pi * v)
            if v <= 1.0
            else mu + k * math.log(v) ** 2
        )
    )
"""

_V, _MU, _K = sympy.symbols("v mu k", real=True)
# the model's float pi, exactly
_PI = sympy.Rational(math.pi)
FRICTION_SYMPY = sympy.Piecewise(
    (-_MU - _K * (_V + 1) ** 2, _V < -1),
    (_MU * sympy.sin(_PI * _V / 2), _V <= 1),
    (_MU + _K * sympy.log(_V) ** 2, True),
)

# each side of each boundary, near and far, and the boundaries themselves (where the
# branch the condition selects must supply the derivative)
FRICTION_POINTS = [
    -3.0,
    -1.0 - 2.0**-20,
    -1.0,
    -1.0 + 2.0**-20,
    0.3,
    1.0,
    1.0 + 2.0**-20,
    2.5,
]


@pytest.mark.parametrize(
    "source, func", [(PIECEWISE, "friction"), (PIECEWISE_EXPRESSION, "friction_expr")]
)
@pytest.mark.parametrize("v", FRICTION_POINTS)
def test_piecewise_law_against_sympy_piecewise(source, func, v):
    ns = build(source, func)
    mu, k = 0.6, 1.7
    value, grads = ns[func + "_grad"](v, mu, k)
    assert_value_is_primal(ns, source, func, (v, mu, k), value)
    subs = {_V: v, _MU: mu, _K: k}
    # sympy.Piecewise value and sympy.diff of it: 1e-14 relative
    assert rel_err(value, float(sympy_value(FRICTION_SYMPY, subs))) < 1e-14
    for got, symbol in zip(grads, (_V, _MU, _K), strict=True):
        want = sym_derivative(FRICTION_SYMPY, symbol, subs)
        # 1e-14 relative, or 1e-15 absolute where the derivative nearly vanishes
        # (cos(0.5 pi v) near v = -1 carries the rounding of its argument)
        assert abs(got - want) <= max(1e-14 * abs(want), 1e-15)


@pytest.mark.parametrize("v", FRICTION_POINTS)
def test_conditional_expression_matches_statement_form(v):
    statement = build(PIECEWISE, "friction")["friction_grad"](v, 0.6, 1.7)
    expression = build(PIECEWISE_EXPRESSION, "friction_expr")["friction_expr_grad"](
        v, 0.6, 1.7
    )
    # same operations in the taken branch: the values and every gradient entry
    # agree bit for bit (each form is checked against sympy.Piecewise above)
    assert same_bits(statement[0], expression[0])
    assert len(statement[1]) == len(expression[1]) == 3
    for a, b in zip(statement[1], expression[1], strict=True):
        assert same_bits(a, b), (statement, expression)


LOGIC = """\
def band(x, y):
    if 0.0 < x < 1.0 and not y > 2.0:
        z = x * y
    elif x >= 1.0 or y > 2.0:
        z = x + y * y
    else:
        z = -x * x * y
    return z
"""

_X, _Y = sympy.symbols("x y", real=True)
BAND_SYMPY = sympy.Piecewise(
    (_X * _Y, (_X > 0) & (_X < 1) & sympy.Not(_Y > 2)),
    (_X + _Y**2, (_X >= 1) | (_Y > 2)),
    (-_X * _X * _Y, True),
)


@pytest.mark.parametrize(
    "x, y",
    [
        (0.5, 1.0),  # first branch
        (0.5, 2.0),  # first branch at y == 2 (not y > 2)
        (0.5, 2.5),  # second, through y > 2
        (1.0, 1.0),  # second at x == 1
        (1.5, -1.0),  # second, through x >= 1
        (0.0, 1.0),  # third at x == 0 (0 < x is false)
        (-0.5, 1.5),  # third
    ],
)
def test_boolean_conditions_against_sympy_piecewise(x, y):
    ns = build(LOGIC, "band")
    value, (x_bar, y_bar) = ns["band_grad"](x, y)
    assert_value_is_primal(ns, LOGIC, "band", (x, y), value)
    subs = {_X: x, _Y: y}
    assert rel_err(value, float(sympy_value(BAND_SYMPY, subs))) < 1e-15
    # sympy.diff of the Piecewise, evaluated in the branch sympy's logic selects
    assert rel_err(x_bar, sym_derivative(BAND_SYMPY, _X, subs)) < 1e-15
    assert rel_err(y_bar, sym_derivative(BAND_SYMPY, _Y, subs)) < 1e-15


DEAD_BRANCHES = """\
import math


def root_or_zero(x):
    return math.sqrt(x) if x > 0 else 0.0


def log_or_line(x):
    if x > 0.0:
        y = math.log(x)
    else:
        y = 2.0 * x
    return y


def inverse_or_zero(x):
    return 1.0 / x if x != 0.0 else 0.0
"""


@pytest.mark.parametrize(
    "func, x, want_value, want_grad",
    [
        # closed forms: d sqrt(x) = 1 / (2 sqrt(x)), d log(x) = 1 / x, d 1/x = -1/x**2
        ("root_or_zero", -1.0, 0.0, 0.0),
        ("root_or_zero", 4.0, 2.0, 0.25),
        ("log_or_line", -2.0, -4.0, 2.0),
        ("log_or_line", 0.0, 0.0, 2.0),
        ("log_or_line", 4.0, math.log(4.0), 0.25),
        ("inverse_or_zero", 0.0, 0.0, 0.0),
        ("inverse_or_zero", -2.0, -0.5, -0.25),
    ],
)
def test_untaken_branch_is_not_evaluated(func, x, want_value, want_grad):
    # math.sqrt(-1.0), math.log(-2.0) and 1.0 / 0.0 raise: only the taken side runs
    ns = build(DEAD_BRANCHES, func)
    value, (x_bar,) = ns[func + "_grad"](x)
    assert_value_is_primal(ns, DEAD_BRANCHES, func, (x,), value)
    assert same_bits(value, want_value)
    assert same_bits(x_bar, want_grad)


# ---------------------------------------------------------------------------------
# early returns

EARLY_RETURNS = """\
def clamp(x, lo, hi):
    if x < lo:
        return lo
    if x > hi:
        return hi
    return x


def saturate(u, gain, limit):
    y = gain * u
    if y > limit:
        return limit
    elif y < -limit:
        return -limit
    return y - y**3 / (3.0 * limit**2)
"""


@pytest.mark.parametrize(
    "x, want",
    [
        (-0.5, (0.0, 1.0, 0.0)),  # below: the result is lo
        (0.0, (1.0, 0.0, 0.0)),  # at lo (x < lo false): the result is x
        (0.25, (1.0, 0.0, 0.0)),  # inside
        (1.0, (1.0, 0.0, 0.0)),  # at hi (x > hi false): the result is x
        (1.5, (0.0, 0.0, 1.0)),  # above: the result is hi
    ],
)
def test_clamp_gradient_is_the_selected_argument(x, want):
    # closed form: the result is one of its arguments, whose derivative is 1
    # (common practice)
    ns = build(EARLY_RETURNS, "clamp")
    value, grads = ns["clamp_grad"](x, 0.0, 1.0)
    assert_value_is_primal(ns, EARLY_RETURNS, "clamp", (x, 0.0, 1.0), value)
    assert all(same_bits(g, w) for g, w in zip(grads, want, strict=True))


_U, _G, _L = sympy.symbols("u g L", real=True)
_SAT_Y = _G * _U
SATURATE_SYMPY = sympy.Piecewise(
    (_L, _SAT_Y > _L),
    (-_L, _SAT_Y < -_L),
    (_SAT_Y - _SAT_Y**3 / (3 * _L**2), True),
)


@pytest.mark.parametrize("u", [-3.0, -1.5 / 1.2, -0.7, 0.0, 0.9, 1.5 / 1.2, 2.0])
def test_saturation_with_early_returns_against_sympy(u):
    ns = build(EARLY_RETURNS, "saturate")
    gain, limit = 1.2, 1.5
    value, grads = ns["saturate_grad"](u, gain, limit)
    assert_value_is_primal(ns, EARLY_RETURNS, "saturate", (u, gain, limit), value)
    subs = {_U: u, _G: gain, _L: limit}
    assert rel_err(value, float(sympy_value(SATURATE_SYMPY, subs))) < 1e-14
    for got, symbol in zip(grads, (_U, _G, _L), strict=True):
        want = sym_derivative(SATURATE_SYMPY, symbol, subs)
        # the cubic's pieces cancel near the edges: 1e-14 of the largest term
        assert abs(got - want) <= 1e-14 * max(1.0, abs(want), abs(limit))


# ---------------------------------------------------------------------------------
# helper functions

HELPERS = """\
import math


def sq(u):
    return u * u


def soft(x, scale=1.0):
    return scale * math.log(1.0 + math.exp(x / scale))


def dist(p, q=0.5):
    return math.sqrt(sq(p) + sq(q) + 1.0)


def model(a, b, xs):
    total = soft(a) + soft(b, scale=2.0) + dist(a, q=b)
    for i in range(len(xs)):
        total += sq(xs[i] - a) + soft(x=xs[i] * b, scale=0.5) + dist(xs[i])
    return total + sq(b)
"""


@pytest.mark.parametrize("seed", [1, 2])
def test_helpers_against_sympy(seed):
    ns = build(HELPERS, "model")
    rng = random.Random(seed)
    a, b = rng.uniform(-1.0, 1.0), rng.uniform(-1.0, 1.0)
    xs = [rng.uniform(-2.0, 2.0) for _ in range(4)]
    value, (a_bar, b_bar, xs_bar) = ns["model_grad"](a, b, xs)
    assert_value_is_primal(ns, HELPERS, "model", (a, b, xs), value)
    # the model's own text run through SymPy, then sympy.diff
    sa, sb = sympy.symbols("a b", real=True)
    sxs = list(sympy.symbols("x0:4", real=True))
    expr = sympy_function(HELPERS, "model")(sa, sb, sxs)
    subs = {sa: a, sb: b, **dict(zip(sxs, xs, strict=True))}
    assert rel_err(value, float(sympy_value(expr, subs))) < 1e-14
    assert rel_err(a_bar, sym_derivative(expr, sa, subs)) < 1e-13
    assert rel_err(b_bar, sym_derivative(expr, sb, subs)) < 1e-13
    assert len(xs_bar) == len(xs)
    for got, symbol in zip(xs_bar, sxs, strict=True):
        assert rel_err(got, sym_derivative(expr, symbol, subs)) < 1e-13


def test_each_helper_gets_one_gradient_function():
    text = generated(HELPERS, "model")
    # sq is called from model (twice) and from dist (twice), soft three times, dist
    # twice: one shared gradient function each
    for helper in ("sq", "soft", "dist"):
        assert text.count(f"def {helper}_grad(") == 1
        assert text.count(f"def {helper}(") == 1
    assert text.count("def model_grad(") == 1


# ---------------------------------------------------------------------------------
# tuple results: Jacobians and vector-Jacobian products

COORDINATES = """\
import math


def polar(r, theta):
    return r * math.cos(theta), r * math.sin(theta)


def spherical(r, theta, phi):
    s = math.sin(theta)
    return r * s * math.cos(phi), r * s * math.sin(phi), r * math.cos(theta)
"""


def _polar_jacobian(r, t):
    # closed form, differentiated by hand (common practice)
    return [[math.cos(t), -r * math.sin(t)], [math.sin(t), r * math.cos(t)]]


def _spherical_jacobian(r, t, p):
    # closed form, differentiated by hand (common practice)
    st, ct, sp, cp = math.sin(t), math.cos(t), math.sin(p), math.cos(p)
    return [
        [st * cp, r * ct * cp, -r * st * sp],
        [st * sp, r * ct * sp, r * st * cp],
        [ct, -r * st, 0.0],
    ]


def _det(m):
    if len(m) == 2:
        return m[0][0] * m[1][1] - m[0][1] * m[1][0]
    return (
        m[0][0] * (m[1][1] * m[2][2] - m[1][2] * m[2][1])
        - m[0][1] * (m[1][0] * m[2][2] - m[1][2] * m[2][0])
        + m[0][2] * (m[1][0] * m[2][1] - m[1][1] * m[2][0])
    )


@pytest.mark.parametrize(
    "func, point, closed_form, det",
    [
        # det = r and r**2 sin(theta) (recalled from memory)
        ("polar", (2.0, 0.5), _polar_jacobian, lambda r, t: r),
        ("polar", (0.7, -2.8), _polar_jacobian, lambda r, t: r),
        (
            "spherical",
            (2.0, 0.4, 1.2),
            _spherical_jacobian,
            lambda r, t, p: r * r * math.sin(t),
        ),
        (
            "spherical",
            (1.3, 2.5, -0.9),
            _spherical_jacobian,
            lambda r, t, p: r * r * math.sin(t),
        ),
    ],
)
def test_jacobian_against_closed_form(func, point, closed_form, det):
    ns = run_text(generated(COORDINATES, func))
    value, jac = ns[func + "_jacobian"](*point)
    assert_value_is_primal(ns, COORDINATES, func, point, value)
    want = closed_form(*point)
    assert len(jac) == len(want)
    for got_row, want_row in zip(jac, want, strict=True):
        assert len(got_row) == len(want_row)
        for got, w in zip(got_row, want_row, strict=True):
            # entries can be exactly zero: absolute 1e-15 of the scale r
            assert abs(got - w) <= 1e-15 * max(1.0, point[0])
    assert rel_err(_det([list(row) for row in jac]), det(*point)) < 1e-14


@pytest.mark.parametrize(
    "func, point, closed_form",
    [
        ("polar", (2.0, 0.5), _polar_jacobian),
        ("spherical", (1.3, 2.5, -0.9), _spherical_jacobian),
    ],
)
@pytest.mark.parametrize("seed", [5, 6, 7])
def test_vjp_is_seed_times_jacobian(func, point, closed_form, seed):
    ns = run_text(generated(COORDINATES, func))
    rng = random.Random(seed)
    want_jac = closed_form(*point)
    seed_vector = tuple(rng.uniform(-1.0, 1.0) for _ in want_jac)
    value, grads = ns[func + "_vjp"](*point, seed_vector)
    assert_value_is_primal(ns, COORDINATES, func, point, value)
    assert len(grads) == len(point)
    for j, got in enumerate(grads):
        # seed^T J, the closed-form Jacobian weighted in mpmath
        with mpmath.workdps(40):
            want = float(
                mpmath.fsum(
                    mpmath.mpf(s) * mpmath.mpf(row[j])
                    for s, row in zip(seed_vector, want_jac, strict=True)
                )
            )
        assert abs(got - want) <= 1e-15 * max(1.0, point[0]) * len(seed_vector)


# ---------------------------------------------------------------------------------
# local lists

SMOOTHING = """\
def smoothed_power(x, w):
    n = len(x)
    y = [0.0] * n
    for i in range(n):
        y[i] = w * x[i - 1] + (1.0 - 2.0 * w) * x[i] + w * x[(i + 1) % n]
    for i in range(n):
        y[i] += 0.5 * y[i] * y[i]
    return sum(y)
"""

LITERAL_LIST = """\
def chained(a, b, c):
    y = [a, b, c]
    for i in range(3):
        y[i] = y[i] * y[i - 1]
    return sum(y)
"""


@pytest.mark.parametrize("n", [3, 5])
def test_smoothing_filter_against_sympy(n):
    ns = build(SMOOTHING, "smoothed_power")
    rng = random.Random(n)
    x = [rng.uniform(-2.0, 2.0) for _ in range(n)]
    w = 0.3
    value, (x_bar, w_bar) = ns["smoothed_power_grad"](x, w)
    assert_value_is_primal(ns, SMOOTHING, "smoothed_power", (x, w), value)
    # the filter built symbolically by running the model's text on SymPy symbols:
    # x[i - 1] at i = 0 is the last element there too
    sx = list(sympy.symbols(f"x0:{n}", real=True))
    sw = sympy.Symbol("w", real=True)
    expr = sympy_function(SMOOTHING, "smoothed_power")(sx, sw)
    assert expr.has(sx[-1] * sw)  # the wrap-around term is present
    subs = {sw: w, **dict(zip(sx, x, strict=True))}
    assert rel_err(value, float(sympy_value(expr, subs))) < 1e-14
    assert rel_err(w_bar, sym_derivative(expr, sw, subs)) < 1e-13
    assert len(x_bar) == n
    for got, symbol in zip(x_bar, sx, strict=True):
        assert rel_err(got, sym_derivative(expr, symbol, subs)) < 1e-13


def test_literal_list_with_negative_index():
    ns = build(LITERAL_LIST, "chained")
    a, b, c = 1.5, 2.0, 0.5
    value, grads = ns["chained_grad"](a, b, c)
    assert_value_is_primal(ns, LITERAL_LIST, "chained", (a, b, c), value)
    # y[-1] at i = 0 is c: the sum is a c + a b c + a b c**2 (worked by hand),
    # and sympy.diff of the model's own text agrees
    sa, sb, sc = sympy.symbols("a b c", real=True)
    expr = sympy_function(LITERAL_LIST, "chained")(sa, sb, sc)
    assert sympy.expand(expr - (sa * sc + sa * sb * sc + sa * sb * sc**2)) == 0
    subs = {sa: a, sb: b, sc: c}
    for got, symbol in zip(grads, (sa, sb, sc), strict=True):
        assert rel_err(got, sym_derivative(expr, symbol, subs)) < 1e-15


NEGATIVE_INDICES = """\
def ring(x):
    total = 0.0
    for i in range(len(x)):
        total += x[i] * x[i - 1]
    return total + x[-1] * x[-2] + 0.5 * sum(x) ** 2
"""


def test_parameter_read_with_negative_indices():
    ns = build(NEGATIVE_INDICES, "ring")
    x = [1.25, -2.0, 3.5, 0.75]
    value, (x_bar,) = ns["ring_grad"](x)
    assert_value_is_primal(ns, NEGATIVE_INDICES, "ring", (x,), value)
    sx = list(sympy.symbols("x0:4", real=True))
    expr = sympy_function(NEGATIVE_INDICES, "ring")(sx)
    subs = dict(zip(sx, x, strict=True))
    for got, symbol in zip(x_bar, sx, strict=True):
        assert rel_err(got, sym_derivative(expr, symbol, subs)) < 1e-15


# ---------------------------------------------------------------------------------
# recurrences with tuple assignment

RECURRENCES = """\
def fibonacci_like(a, b, n):
    for _ in range(n):
        a, b = b, a + b
    return b


def weighted(a, b, c, n):
    for _ in range(n):
        a, b = b, a + c * b
    return a * b


def rotate(x, y, cs, sn, n):
    for _ in range(n):
        x, y = cs * x - sn * y, sn * x + cs * y
    return x
"""


@pytest.mark.parametrize("n", [1, 2, 10, 30])
def test_fibonacci_recurrence(n):
    ns = build(RECURRENCES, "fibonacci_like")
    value, (a_bar, b_bar, n_bar) = ns["fibonacci_like_grad"](0.5, 1.25, n)
    assert_value_is_primal(ns, RECURRENCES, "fibonacci_like", (0.5, 1.25, n), value)
    # b_n = F(n) a + F(n + 1) b exactly (sympy.fibonacci)
    assert same_bits(a_bar, float(sympy.fibonacci(n)))
    assert same_bits(b_bar, float(sympy.fibonacci(n + 1)))
    assert same_bits(n_bar, 0.0)


@pytest.mark.parametrize("n", [3, 8])
def test_weighted_recurrence_against_sympy(n):
    ns = build(RECURRENCES, "weighted")
    a, b, c = 0.75, -0.5, 1.3
    value, grads = ns["weighted_grad"](a, b, c, n)
    assert_value_is_primal(ns, RECURRENCES, "weighted", (a, b, c, n), value)
    sa, sb, sc = sympy.symbols("a b c", real=True)
    expr = sympy_function(RECURRENCES, "weighted")(sa, sb, sc, n)
    subs = {sa: a, sb: b, sc: c}
    for got, symbol in zip(grads[:3], (sa, sb, sc), strict=True):
        assert rel_err(got, sym_derivative(expr, symbol, subs)) < 1e-13


@pytest.mark.parametrize("n", [1, 7, 25])
def test_rotation_recurrence_against_angle_addition(n):
    ns = build(RECURRENCES, "rotate", wrt=["x", "y"])
    theta = 0.3
    x, y = 1.5, -0.4
    args = (x, y, math.cos(theta), math.sin(theta), n)
    value, (x_bar, y_bar) = ns["rotate_grad"](*args)
    assert_value_is_primal(ns, RECURRENCES, "rotate", args, value)
    # n rotations by theta are one rotation by n theta (angle addition, common
    # practice): x_n = x cos(n theta) - y sin(n theta)
    assert rel_err(x_bar, math.cos(n * theta)) < 1e-13
    assert rel_err(y_bar, -math.sin(n * theta)) < 1e-13


# ---------------------------------------------------------------------------------
# regressions: generator bugs found while writing these tests


def test_loop_reads_a_carried_value_after_its_update():
    # once through: b_1 = b * (a * b) = a b**2, so d/da = b**2, d/db = 2 a b
    # (worked by hand)
    source = """\
def f(a, b):
    for i in range(1):
        a = a * b
        b = b * a
    return b
"""
    ns = build(source, "f")
    value, (a_bar, b_bar) = ns["f_grad"](2.0, 3.0)
    assert same_bits(value, 18.0)
    assert same_bits(a_bar, 9.0)
    assert same_bits(b_bar, 12.0)


@pytest.mark.parametrize("steps", [1, 2])
def test_branch_in_loop_updates_carried_adjoint_last(steps):
    # the taken branch gives t k**steps: d/dt = k**steps, d/dk = steps t k**(steps-1)
    # (worked by hand)
    source = """\
def f(t, k, steps):
    for i in range(steps):
        if t < 100.0:
            t = t * k
        else:
            t = t * 2.0
    return t
"""
    ns = build(source, "f", wrt=["t", "k"])
    t, k = 1.0, 0.5
    value, (t_bar, k_bar) = ns["f_grad"](t, k, steps)
    assert same_bits(value, t * k**steps)
    assert same_bits(t_bar, k**steps)
    assert same_bits(k_bar, steps * t * k ** (steps - 1))


def test_conditional_expression_in_loop_against_mpmath():
    source = """\
def f(x, k):
    t = 0.0
    for i in range(5):
        t += x * k if t < 1.0 else t * k
        x = x + 0.1
    return t
"""
    ns = build(source, "f")
    point = (0.4, 0.9)
    _, grads = ns["f_grad"](*point)
    f_mp = mp_function(source, "f")
    for k in range(2):
        # away from the switch (t never equals 1.0 here): 50-digit central difference
        assert rel_err(grads[k], float(mp_central_diff(f_mp, point, k))) < 1e-13


def test_branch_without_adjoint_work_in_loop():
    source = """\
def f(t, k):
    for i in range(2):
        t = t * k if t < 100.0 else t
    return t
"""
    text = generated(source, "f")
    ns = run_text(text)
    # t k**2: d/dt = k**2, d/dk = 2 t k (worked by hand)
    value, (t_bar, k_bar) = ns["f_grad"](1.0, 0.5)
    assert (value, t_bar, k_bar) == (0.25, 0.25, 1.0)


NESTED_RETURNS = """
def m(x, y):
    if x > y:
        if x > 2.0:
            return x
    return y * x


def n(x, y):
    if x > y:
        z = x
    else:
        if x < 0.0:
            return y
        z = y
    return z * x


def p(x, y):
    if x > y:
        if x > 2.0:
            return x
        x = x * 2.0
    y = y + 1.0
    return y * x
"""

# Closed forms by hand on each path (a return in a nested if ends only its own path).
NESTED_CASES = [
    ("m", (3.0, 0.5), 3.0, (1.0, 0.0)),
    ("m", (1.5, 0.5), 0.75, (0.5, 1.5)),
    ("m", (0.2, 0.5), 0.1, (0.5, 0.2)),
    ("n", (1.0, 0.5), 1.0, (2.0, 0.0)),
    ("n", (-1.0, 0.5), 0.5, (0.0, 1.0)),
    ("n", (0.2, 0.5), 0.1, (0.5, 0.2)),
    ("p", (3.0, 0.5), 3.0, (1.0, 0.0)),
    ("p", (1.5, 0.5), 4.5, (3.0, 3.0)),
    ("p", (0.2, 0.5), 0.30000000000000004, (1.5, 0.2)),
]


@pytest.mark.parametrize(("name", "point", "value", "grads"), NESTED_CASES)
def test_return_in_a_nested_if_ends_only_its_path(name, point, value, grads):
    ns = build(NESTED_RETURNS, name)
    got_value, got = ns[f"{name}_grad"](*point)
    assert got_value == ns[name](*point) == pytest.approx(value, rel=1e-15)
    assert got == pytest.approx(grads, rel=1e-15, abs=0.0)


LOOP_REGRESSIONS = """
import math


def f(v, x, y):
    s = math.hypot(x, 1.0)
    for i in range(len(v)):
        s = (v[i] + x) ** 3
        if (1.0 + x * x) ** 1.5 < s:
            s = x
        else:
            s += 0.25 * i
    return math.sqrt(1.0 + (y / (1.0 + x * x)) * (y / (1.0 + x * x)))


def g(x, y, n):
    s = y * 0.5
    buf = [0.0] * n
    for i in range(n):
        s = math.exp(math.tanh(y)) if math.exp(0.5 * math.cos(y)) < (s * 0.75) else x
        s = max((1.0 + x * x) ** 1.5, (y / (1.0 + 2.0 * 2.0)))
        for j in range(i + 1):
            s += 0.5 * math.sin(s * 0.1)
        buf[i] = (s * s) * 2.0
        s += 0.5 * buf[i]
    return buf[n - 1]
"""


def test_loop_that_does_not_reach_the_result_has_no_reverse():
    # found by the random programs: the dead loop was replayed and overwrote the
    # stored hypot value the rule for `s = math.hypot(x, 1.0)` reads
    ns = build(LOOP_REGRESSIONS, "f")
    v, x, y = [0.0, 0.0, 0.001], 0.3, 0.7
    _, (v_bar, x_bar, y_bar) = ns["f_grad"](v, x, y)
    # closed form by hand: F = sqrt(1 + u**2), u = y / (1 + x**2), so
    # dF/dx = u / F * (-2 x y / (1 + x**2)**2) and dF/dy = u / F / (1 + x**2);
    # evaluated in mpmath at 30 digits at the float inputs
    with mpmath.workdps(30):
        mx, my = mpmath.mpf(x), mpmath.mpf(y)
        u = my / (1 + mx * mx)
        big_f = mpmath.sqrt(1 + u * u)
        dx = u / big_f * (-2 * mx * my / (1 + mx * mx) ** 2)
        dy = u / big_f / (1 + mx * mx)
    assert v_bar == [0.0, 0.0, 0.0]
    # a dozen roundings on values of order 0.1-1: 1e-14 relative
    assert rel_err(x_bar, dx) <= 1e-14, "closed form by hand (mpmath, 30 digits)"
    assert rel_err(y_bar, dy) <= 1e-14, "closed form by hand (mpmath, 30 digits)"


def test_value_after_an_inner_loop_is_saved_for_the_outer_reverse():
    # found by the random programs: the value after the inner loop, read by the
    # rule for `buf[i] = (s * s) * 2.0`, was never stored per outer iteration
    ns = build(LOOP_REGRESSIONS, "g")
    point = (0.99999, 1.882906735353847)
    _, grads = ns["g_grad"](*point, 5)
    # reference: the same model with the trip count written in, run in mpmath
    fixed = LOOP_REGRESSIONS.replace("def g(x, y, n):", "def g(x, y):")
    fixed = fixed.replace("[0.0] * n", "[0.0] * 5").replace("range(n)", "range(5)")
    fixed = fixed.replace("buf[n - 1]", "buf[4]")
    g_mp = mp_function(fixed, "g")
    for k in (0, 1):  # mpmath 100-digit central differences
        assert rel_err(grads[k], float(mp_central_diff(g_mp, point, k))) < 1e-12
