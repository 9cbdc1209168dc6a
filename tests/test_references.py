"""Whole models differentiated by gradwright, against references from outside.

- Black-Scholes call price: the Greeks of Hull, "Options, Futures, and Other
  Derivatives" (formulas recalled from memory), with N and phi from scipy.stats.norm.
- Speelpenning's product: Griewank & Walther, "Evaluating Derivatives".
- A pendulum's total energy: closed form differentiated by hand, and SymPy's diff.
- Rosenbrock in four variables, written out by hand: scipy.optimize.rosen_der.
- Three multi-statement models with re-binding, augmented assignment and tuple
  assignment (``a, b = b, a * b``): mpmath central differences at 50 digits
  (support.mp_central_diff), and a closed form where one exists.
- For every model here: ``value`` is the primal's result bit for bit.

Data are invented for these tests. Tolerances are stated beside each check; the
common reasoning is that gradwright's adjoint and the reference are both a few tens
of correctly rounded operations, so they agree to ~1e-14 relative unless the
expressions cancel, and a wrong derivative is off by far more than any tolerance here.
"""

from __future__ import annotations

import math
import random

import numpy as np
import pytest
import scipy.optimize
import sympy
from scipy.stats import norm
from support import (
    build,
    mp_central_diff,
    mp_function,
    rel_err,
    run_source,
    same_bits,
    sympy_function,
)

# ---------------------------------------------------------------------------------
# the models

BLACK_SCHOLES = """\
import math


def call_price(S, K, sigma, r, T):
    sqrt_t = math.sqrt(T)
    d1 = (math.log(S / K) + (r + 0.5 * sigma**2) * T) / (sigma * sqrt_t)
    d2 = d1 - sigma * sqrt_t
    n1 = 0.5 * (1.0 + math.erf(d1 / math.sqrt(2.0)))
    n2 = 0.5 * (1.0 + math.erf(d2 / math.sqrt(2.0)))
    return S * n1 - K * math.exp(-r * T) * n2
"""

SPEELPENNING = """\
def speelpenning(x0, x1, x2, x3, x4, x5, x6, x7):
    y = x0
    y = y * x1
    y = y * x2
    y = y * x3
    y = y * x4
    y = y * x5
    y = y * x6
    y = y * x7
    return y
"""

PENDULUM = """\
import math

GRAVITY = 9.80665  # standard gravity, m/s**2


def energy(theta, omega, mass, length):
    kinetic = 0.5 * mass * length**2 * omega**2
    potential = mass * GRAVITY * length * (1.0 - math.cos(theta))
    return kinetic + potential
"""

ROSENBROCK = """\
def rosen4(x0, x1, x2, x3):
    return (
        100.0 * (x1 - x0**2) ** 2
        + (1.0 - x0) ** 2
        + 100.0 * (x2 - x1**2) ** 2
        + (1.0 - x1) ** 2
        + 100.0 * (x3 - x2**2) ** 2
        + (1.0 - x2) ** 2
    )
"""

CALIBRATION = """\
import math


def calibration_loss(a, b, c, resistance, kelvin):
    ln_r = math.log(resistance)
    inv_t = a + b * ln_r
    inv_t += c * ln_r**3
    t_model = 1.0 / inv_t
    err = t_model - kelvin
    err = err / kelvin
    # both right-hand sides read the old err
    scale, err = err, err * t_model
    loss = err * err
    loss *= 0.5
    loss += scale**2
    return loss
"""

PROJECTILE = """\
import math

GRAVITY = 9.80665


def projectile_range(speed, angle, height):
    vx, vy = speed * math.cos(angle), speed * math.sin(angle)
    disc = vy * vy
    disc += 2.0 * GRAVITY * height
    flight = (vy + math.sqrt(disc)) / GRAVITY
    # vx becomes the flight time, flight the range (from the old vx and flight)
    vx, flight = flight, vx * flight
    return flight
"""

LOGISTIC = """\
import math


def logistic_loss(w0, w1, bias, x0, x1, label):
    z = w0 * x0 + w1 * x1
    z += bias
    # -log(sigmoid(z)) and -log(1 - sigmoid(z)), through log1p and exp
    neg_log_p = math.log1p(math.exp(-z))
    neg_log_q = z + neg_log_p
    loss = label * neg_log_p + (1.0 - label) * neg_log_q
    p = 1.0 / (1.0 + math.exp(-z))
    # both right-hand sides read the old loss and p
    loss, p = loss + 0.01 * (w0 * w0 + w1 * w1), p * loss
    loss -= 0.001 * p
    return loss
"""

# (source, function, wrt, points): every model in this file, for the value checks
_rng = random.Random("test_references")
BS_POINTS = [
    (42.0, 40.0, 0.2, 0.1, 0.5),
    (100.0, 95.0, 0.25, 0.03, 1.5),
    (100.0, 120.0, 0.3, 0.05, 2.0),
    (55.0, 50.0, 0.15, 0.02, 0.25),
    (20.0, 21.0, 0.4, 0.07, 3.0),
]
SPEELPENNING_POINTS = [
    tuple(_rng.uniform(0.5, 2.0) * _rng.choice((-1.0, 1.0)) for _ in range(8))
    for _ in range(5)
] + [(1.5, -0.5, 2.0, 0.0, 3.0, 0.25, -1.25, 0.75)]
PENDULUM_POINTS = [
    (0.3, 1.2, 0.5, 1.1),
    (-1.0, -0.4, 2.0, 0.75),
    (2.5, 3.0, 0.1, 2.0),
    (0.05, 0.0, 1.0, 1.0),
    (math.pi / 2, 5.0, 1.5, 0.3),
]
ROSEN_POINTS = [tuple(_rng.uniform(-2.0, 2.0) for _ in range(4)) for _ in range(6)]
CALIBRATION_POINTS = [
    (1.129e-3, 2.341e-4, 8.775e-8, 10000.0, 298.15),
    (1.4e-3, 2.37e-4, 9.9e-8, 3300.0, 315.0),
    (1.0e-3, 2.5e-4, 5.0e-8, 25000.0, 280.0),
    (1.2e-3, 2.2e-4, 1.2e-7, 1500.0, 330.0),
    (1.1e-3, 2.4e-4, 7.0e-8, 8000.0, 300.5),
]
PROJECTILE_POINTS = [
    (20.0, 0.6, 1.5),
    (35.0, 0.2, 0.0),
    (8.0, 1.2, 10.0),
    (50.0, 0.785, 2.0),
    (12.5, 0.05, 0.3),
]
LOGISTIC_POINTS = [
    (0.5, -1.2, 0.1, 1.5, 0.3, 1.0),
    (2.0, 0.7, -0.4, -0.8, 1.1, 0.0),
    (-1.5, 0.2, 0.3, 2.5, -1.0, 1.0),
    (0.05, 3.0, -2.0, 0.4, 0.9, 0.0),
    (1.0, 1.0, 0.0, -3.0, -2.0, 1.0),
]

MODELS = {
    "black_scholes": (BLACK_SCHOLES, "call_price", ["S", "sigma", "r", "T"], BS_POINTS),
    "speelpenning": (
        SPEELPENNING,
        "speelpenning",
        [f"x{i}" for i in range(8)],
        SPEELPENNING_POINTS,
    ),
    "pendulum": (
        PENDULUM,
        "energy",
        ["theta", "omega", "mass", "length"],
        PENDULUM_POINTS,
    ),
    "rosenbrock": (ROSENBROCK, "rosen4", ["x0", "x1", "x2", "x3"], ROSEN_POINTS),
    "calibration": (
        CALIBRATION,
        "calibration_loss",
        ["a", "b", "c"],
        CALIBRATION_POINTS,
    ),
    "projectile": (
        PROJECTILE,
        "projectile_range",
        ["speed", "angle", "height"],
        PROJECTILE_POINTS,
    ),
    "logistic": (
        LOGISTIC,
        "logistic_loss",
        ["w0", "w1", "bias"],
        LOGISTIC_POINTS,
    ),
}


def _grad_fn(name: str):
    source, func, wrt, _ = MODELS[name]
    return build(source, func, wrt)[f"{func}_grad"]


# ---------------------------------------------------------------------------------
# (a) Black-Scholes


def _d1_d2(S: float, K: float, sigma: float, r: float, T: float) -> tuple:
    d1 = (math.log(S / K) + (r + 0.5 * sigma**2) * T) / (sigma * math.sqrt(T))
    return d1, d1 - sigma * math.sqrt(T)


@pytest.mark.parametrize("point", BS_POINTS)
def test_black_scholes_greeks(point: tuple) -> None:
    S, K, sigma, r, T = point
    value, (delta, vega, rho, dc_dt) = _grad_fn("black_scholes")(*point)
    d1, d2 = _d1_d2(*point)
    discount = K * math.exp(-r * T)
    # Greeks of a European call: Hull, "Options, Futures, and Other Derivatives"
    # (formulas recalled from memory); N and phi from scipy.stats.norm
    hull = {
        "delta = N(d1)": (delta, norm.cdf(d1)),
        "vega = S phi(d1) sqrt(T)": (vega, S * norm.pdf(d1) * math.sqrt(T)),
        "rho = K T exp(-rT) N(d2)": (rho, discount * T * norm.cdf(d2)),
        # Hull's theta is dC/dt = -dC/dT (t the calendar time, T - t to expiry):
        # theta = -S phi(d1) sigma / (2 sqrt(T)) - r K exp(-rT) N(d2)
        "-theta = dC/dT": (
            dc_dt,
            S * norm.pdf(d1) * sigma / (2 * math.sqrt(T)) + r * discount * norm.cdf(d2),
        ),
        "price = S N(d1) - K exp(-rT) N(d2)": (
            value,
            S * norm.cdf(d1) - discount * norm.cdf(d2),
        ),
    }
    for label, (ours, reference) in hull.items():
        # 1e-12: each side is ~20 roundings; the model's erf-based N and scipy's
        # ndtr are both accurate to a few ulps at these moderate d1, d2, and the
        # delta adjoint cancels two phi terms of size ~3 * N(d1) at most
        assert rel_err(ours, reference) <= 1e-12, (
            f"{label} at {point}: gradwright {ours!r}, Hull with scipy.stats.norm"
            f" {reference!r}"
        )


def test_black_scholes_textbook_example() -> None:
    # Hull's worked example (recalled from memory): S0 = 42, K = 40, r = 10%,
    # sigma = 20%, T = 0.5 gives a call price of 4.76 (to the cent)
    value, _ = _grad_fn("black_scholes")(42.0, 40.0, 0.2, 0.1, 0.5)
    assert abs(value - 4.76) < 0.005, "Hull's example, recalled from memory"


# ---------------------------------------------------------------------------------
# (b) Speelpenning's product


@pytest.mark.parametrize("point", SPEELPENNING_POINTS)
def test_speelpenning(point: tuple) -> None:
    value, grads = _grad_fn("speelpenning")(*point)
    assert len(grads) == 8
    for i, grad in enumerate(grads):
        # Griewank & Walther, "Evaluating Derivatives": Speelpenning's example,
        # dy/dx_i = prod_{j != i} x_j (no division, so exact zeros are fine).
        # 1e-13: at most 7 roundings in the reference, 14 in the adjoint (~3e-15)
        others = math.prod(x for j, x in enumerate(point) if j != i)
        assert (
            rel_err(grad, others) <= 1e-13
        ), f"d/dx{i} at {point}: gradwright {grad!r}, Griewank & Walther {others!r}"


def test_speelpenning_with_a_zero_factor() -> None:
    # Griewank & Walther: dy/dx_i = prod_{j != i} x_j; with x3 == 0 every partial
    # but the third is exactly 0, and the third is the product of the others
    point = SPEELPENNING_POINTS[-1]
    assert point[3] == 0.0
    _, grads = _grad_fn("speelpenning")(*point)
    expected = math.prod(x for j, x in enumerate(point) if j != 3)
    assert expected != 0.0
    assert [g == 0.0 for g in grads] == [j != 3 for j in range(8)]
    assert rel_err(grads[3], expected) <= 1e-13, "Griewank & Walther"


# ---------------------------------------------------------------------------------
# (c) pendulum energy


@pytest.mark.parametrize("point", PENDULUM_POINTS)
def test_pendulum_energy(point: tuple) -> None:
    theta, omega, m, length = point
    g = 9.80665  # the model's GRAVITY
    _, grads = _grad_fn("pendulum")(*point)
    # E = m L^2 w^2 / 2 + m g L (1 - cos theta), the simple pendulum's energy
    # (introductory mechanics, recalled from memory), differentiated by hand:
    closed_form = (
        m * g * length * math.sin(theta),
        m * length**2 * omega,
        0.5 * length**2 * omega**2 + g * length * (1.0 - math.cos(theta)),
        m * length * omega**2 + m * g * (1.0 - math.cos(theta)),
    )
    # and the same derivatives from SymPy's diff of the model text
    symbols = sympy.symbols("theta omega mass length", real=True)
    model = sympy_function(PENDULUM, "energy")(*symbols)
    subs = {s: sympy.Rational(v) for s, v in zip(symbols, point, strict=True)}
    names = ("theta", "omega", "mass", "length")
    for name, grad, ref, symbol in zip(names, grads, closed_form, symbols, strict=True):
        exact = sympy.N(sympy.diff(model, symbol), 30, subs=subs)
        # 1e-13 / 1e-12: a dozen roundings each side. (Against SymPy's exact
        # 1 - cos(theta) the points keep theta >= 0.05: the model's own float
        # 1 - cos(theta) has a relative error near 1e-16 / (theta**2 / 2).)
        assert rel_err(grad, ref) <= 1e-13, f"d/d{name}: closed form (by hand)"
        assert rel_err(grad, float(exact)) <= 1e-12, f"d/d{name}: SymPy diff"


# ---------------------------------------------------------------------------------
# (d) Rosenbrock


@pytest.mark.parametrize("point", ROSEN_POINTS)
def test_rosenbrock_against_scipy(point: tuple) -> None:
    value, grads = _grad_fn("rosenbrock")(*point)
    reference = scipy.optimize.rosen_der(np.array(point))
    # scipy.optimize.rosen_der; the components are sums of terms of both signs,
    # so the tolerance is relative to the size of the terms (|400 x_i (x_{i+1} -
    # x_i^2)| and the like are at most ~1e4 here): 1e-12 * 1e4 absolute
    for i, (ours, ref) in enumerate(zip(grads, reference, strict=True)):
        assert abs(ours - ref) <= 1e-8 and rel_err(ours, ref) <= 1e-11, (
            f"d/dx{i} at {point}: gradwright {ours!r}, scipy.optimize.rosen_der"
            f" {ref!r}"
        )
    assert (
        rel_err(value, scipy.optimize.rosen(np.array(point))) <= 1e-13
    ), "scipy.optimize.rosen"


def test_rosenbrock_minimum() -> None:
    # at the minimum (1, 1, 1, 1) every term vanishes exactly: the value and the
    # gradient equal scipy.optimize.rosen and rosen_der there, exactly (both 0)
    value, grads = _grad_fn("rosenbrock")(1.0, 1.0, 1.0, 1.0)
    assert value == scipy.optimize.rosen(np.ones(4)), "scipy.optimize.rosen"
    reference = tuple(float(d) for d in scipy.optimize.rosen_der(np.ones(4)))
    assert grads == reference, "scipy.optimize.rosen_der"


# ---------------------------------------------------------------------------------
# (e) multi-statement models against mpmath central differences


@pytest.mark.parametrize("name", ["calibration", "projectile", "logistic"])
def test_multi_statement_models_against_mpmath(name: str) -> None:
    source, func, wrt, points = MODELS[name]
    grad_fn = _grad_fn(name)
    f_mp = mp_function(source, func)
    for point in points:
        _, grads = grad_fn(*point)
        assert len(grads) == len(wrt)
        for i, grad in enumerate(grads):
            # reference: mpmath central difference of the same model text, 50 digits
            exact = mp_central_diff(f_mp, point, i)
            # 1e-11: the adjoints are ~40 roundings (~1e-14), but every gradient
            # of the calibration loss carries the factor err = t_model - kelvin,
            # and at the first point t_model = 298.178 K is 0.028 K from the
            # reading: t_model's rounding error (~6e-14 K) is ~2e-12 of err there
            # (measured 2.5e-12), the model's own cancellation, not gradwright's
            assert rel_err(grad, exact) <= 1e-11, (
                f"{func} d/d{wrt[i]} at {point}: gradwright {grad!r}, mpmath"
                f" {exact}"
            )


@pytest.mark.parametrize("point", PROJECTILE_POINTS)
def test_projectile_range_closed_form(point: tuple) -> None:
    speed, angle, height = point
    g = 9.80665
    value, (d_speed, d_angle, d_height) = _grad_fn("projectile")(*point)
    # drag-free range from height h (introductory mechanics, recalled from memory):
    # R = v cos a (v sin a + sqrt(v^2 sin^2 a + 2 g h)) / g, and by hand
    # dR/dh = v cos a / sqrt(v^2 sin^2 a + 2 g h)
    root = math.sqrt((speed * math.sin(angle)) ** 2 + 2.0 * g * height)
    closed = speed * math.cos(angle) * (speed * math.sin(angle) + root) / g
    assert rel_err(value, closed) <= 1e-13, "drag-free range, closed form"
    assert (
        rel_err(d_height, speed * math.cos(angle) / root) <= 1e-12
    ), "dR/dh, closed form by hand"


#: level ground (h = 0), where the range has the simpler closed form below
LEVEL_GROUND_POINTS = [(35.0, 0.2, 0.0), (12.0, 0.9, 0.0), (50.0, 1.3, 0.0)]


@pytest.mark.parametrize("point", LEVEL_GROUND_POINTS)
def test_projectile_level_ground_closed_form(point: tuple) -> None:
    speed, angle, height = point
    g = 9.80665
    value, (d_speed, d_angle, _) = _grad_fn("projectile")(*point)
    # from level ground R = v^2 sin(2a) / g (introductory mechanics, recalled from
    # memory): dR/dv = 2 v sin(2a) / g and dR/da = 2 v^2 cos(2a) / g (by hand)
    assert rel_err(value, speed**2 * math.sin(2.0 * angle) / g) <= 1e-13
    assert rel_err(d_speed, 2.0 * speed * math.sin(2.0 * angle) / g) <= 1e-12
    assert rel_err(d_angle, 2.0 * speed**2 * math.cos(2.0 * angle) / g) <= 1e-12


@pytest.mark.parametrize("point", LOGISTIC_POINTS)
def test_logistic_loss_closed_form(point: tuple) -> None:
    w0, w1, bias, x0, x1, label = point
    _, grads = _grad_fn("logistic")(*point)
    z = w0 * x0 + w1 * x1 + bias
    p = 1.0 / (1.0 + math.exp(-z))
    nll = label * math.log1p(math.exp(-z)) + (1.0 - label) * (
        z + math.log1p(math.exp(-z))
    )
    # d nll / dz = sigmoid(z) - label (common practice: the logistic-regression
    # gradient); the model then adds 0.01 |w|^2 and subtracts 0.001 * p * nll,
    # whose z-derivative is p (1 - p) nll + p (p - label) (product rule, by hand)
    dz = (p - label) - 0.001 * (p * (1.0 - p) * nll + p * (p - label))
    expected = (dz * x0 + 0.02 * w0, dz * x1 + 0.02 * w1, dz)
    for name, ours, ref in zip(("w0", "w1", "bias"), grads, expected, strict=True):
        # 1e-12: both sides ~30 roundings on values of order 1
        assert rel_err(ours, ref) <= 1e-12, f"d/d{name}: logistic gradient, by hand"


# ---------------------------------------------------------------------------------
# (f) the value is the primal's result, bit for bit


@pytest.mark.parametrize("name", sorted(MODELS))
def test_value_is_the_primal_bit_for_bit(name: str) -> None:
    source, func, wrt, points = MODELS[name]
    ns = build(source, func, wrt)
    original = run_source(source)[func]  # the model file itself, run by CPython
    for point in points:
        value, _ = ns[f"{func}_grad"](*point)
        primal = ns[func](*point)
        expected = original(*point)
        assert type(value) is float
        # == alone would accept -0.0 for 0.0: compare hex digits and sign too
        assert value == primal == expected
        assert float.hex(value) == float.hex(primal) == float.hex(expected)
        assert math.copysign(1.0, value) == math.copysign(1.0, expected)
        assert same_bits(value, expected)


# ---------------------------------------------------------------------------------
# a power series with a count exponent, at the origin too

SERIES = """
def series(x, a, n):
    total = 0.0
    for j in range(n):
        total += a / (j + 1) * x**j
    return total
"""


@pytest.mark.parametrize("x", [0.0, -0.0, 0.5, -1.25])
def test_power_series_with_a_count_exponent(x: float) -> None:
    # x**0 is 1 for every x, so its slope is 0: the j == 0 term must not give
    # 0 * x**-1 (ZeroDivisionError at x == 0). Reference: SymPy's diff of the
    # series written out, evaluated exactly at the float x
    ns = build(SERIES, "series", ["x", "a"])
    value, (x_bar, a_bar) = ns["series_grad"](x, 0.75, 5)
    assert value == ns["series"](x, 0.75, 5)
    sx, sa = sympy.symbols("x a")
    written = sum(sa / (j + 1) * sx**j for j in range(5))
    at = {sx: sympy.Rational(x), sa: sympy.Rational(0.75)}
    for got, wrt in ((x_bar, sx), (a_bar, sa)):
        exact = float(sympy.diff(written, wrt).subs(at))
        assert rel_err(got, exact) <= 1e-14, (wrt, got, exact)  # SymPy's diff
