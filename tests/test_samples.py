"""The committed sample gradients (samples/*_grad.py) against outside references.

tests/test_golden.py checks that each committed module is byte for byte what the
generator writes; this file checks what those modules compute. Every sample is
called at several points, and every ``--wrt`` parameter its header names (every
element of an array parameter) is compared with:

- SymPy's ``diff`` of the model, where the model is straight-line code (thermistor,
  cable_sag, fuel_hedge, greenhouse_net): the sample's own text run on SymPy symbols
  (``support.sympy_function``; greenhouse_net on object arrays of symbols), the
  derivative evaluated at the exact float inputs at 30 digits;
- mpmath central differences at 50 digits (``support.mp_gradient``) of the sample's
  own text run in mpmath (``support.mp_function``), where it loops and branches
  (kiln_cooling).

Tolerance: 1e-12 relative unless a test says otherwise and why. The gradients are
tens to a few hundred rounded operations (about 1e-14 relative when nothing cancels);
where the model itself subtracts nearly equal numbers, the tests pick points that
keep the condition number small enough for 1e-12 and assert that they do.
"""

from __future__ import annotations

from collections.abc import Callable
from functools import cache
from pathlib import Path

import mpmath
import numpy as np
import pytest
import sympy
from support import (
    mp_function,
    mp_gradient,
    rel_err,
    run_source,
    same_bits,
    sample_command,
    sympy_function,
    sympy_value,
)

ROOT = Path(__file__).resolve().parents[1]
SAMPLES = ROOT / "samples"
SAMPLE_NAMES = sorted(
    p.stem for p in SAMPLES.glob("*.py") if not p.name.endswith("_grad.py")
)


def source_of(sample: str) -> str:
    return (SAMPLES / f"{sample}.py").read_text(encoding="utf-8")


def committed(sample: str) -> tuple[dict, str, list[str] | None]:
    """The committed gradient module, executed; its function and --wrt names."""
    golden = SAMPLES / f"{sample}_grad.py"
    functions, wrt = sample_command(golden)
    assert len(functions) == 1, functions
    namespace: dict = {}
    text = golden.read_text(encoding="utf-8")
    exec(compile(text, str(golden), "exec"), namespace)
    return namespace, functions[0], wrt


def params_of(namespace: dict, func: str) -> list[str]:
    code = namespace[func].__code__
    return list(code.co_varnames[: code.co_argcount])


def call_committed(sample: str, point: tuple) -> tuple[float, dict, list[str]]:
    """value, {wrt name: gradient entry} and the parameter names; the value is
    checked to be the model's own result, bit for bit."""
    namespace, func, wrt = committed(sample)
    params = params_of(namespace, func)
    value, grads = namespace[f"{func}_grad"](*point)
    primal = run_source(source_of(sample))[func](*point)
    assert same_bits(value, primal)  # every sample returns one float
    names = params if wrt is None else wrt
    assert len(grads) == len(names)
    return value, dict(zip(names, grads, strict=True)), params


def assert_close(got: float, exact: mpmath.mpf, tolerance: float, what: str) -> None:
    err = rel_err(got, exact)
    assert (
        err <= tolerance
    ), f"{what}: gradwright {got!r}, reference {exact} ({err:.3g})"


# ---------------------------------------------------------------------------------
# straight-line scalar samples: SymPy diff


#: points for each straight-line scalar sample (inside the model's meaningful range)
SYMPY_POINTS = {
    # (a, b, c, resistance, kelvin): Steinhart-Hart-like coefficients for a 10 kOhm
    # probe, readings a few kelvin off the model (see the condition check below)
    "thermistor": [
        (1.129e-3, 2.341e-4, 8.775e-8, 10000.0, 295.0),
        (1.1e-3, 2.4e-4, 9.0e-8, 3300.0, 321.0),
        (1.2e-3, 2.2e-4, 1.0e-7, 25000.0, 280.0),
    ],
    # (a, span): catenary parameter and mast distance in metres
    "cable_sag": [(30.0, 40.0), (12.5, 38.0), (20.0, 39.5)],
    # (spot, strike, vol, rate, years): in, at and out of the money
    "fuel_hedge": [
        (102.5, 100.0, 0.35, 0.03, 0.0833),
        (95.0, 100.0, 0.2, 0.01, 0.5),
        (80.0, 100.0, 0.5, 0.05, 1.5),
    ],
}


@pytest.mark.parametrize("sample", sorted(SYMPY_POINTS))
def test_straight_line_sample_against_sympy(sample: str) -> None:
    namespace, func, _ = committed(sample)
    params = params_of(namespace, func)
    symbols = sympy.symbols(params, real=True)
    model = sympy_function(source_of(sample), func)(*symbols)
    by_name = dict(zip(params, symbols, strict=True))
    for point in SYMPY_POINTS[sample]:
        _, grads, _ = call_committed(sample, point)
        subs = dict(zip(symbols, point, strict=True))
        for name, grad in grads.items():
            # reference: SymPy diff of the sample's own text, at 30 digits
            exact = sympy_value(sympy.diff(model, by_name[name]), subs)
            assert_close(grad, exact, 1e-12, f"{sample} d/d{name} at {point}: SymPy")


def test_thermistor_points_are_well_conditioned() -> None:
    # every gradient carries err = 1 / inv_t - kelvin, computed in floats from
    # 1 / inv_t ~ 300 K; its rounding (~1e-13 K) is within 1e-12 of err only when
    # |err| is above ~0.1 K: the points are a kelvin or more off the model
    fit = run_source(source_of("thermistor"))["fit_loss"]
    for point in SYMPY_POINTS["thermistor"]:
        assert fit(*point) > 1.0, point  # err**2 > 1, so |err| > 1 K


# ---------------------------------------------------------------------------------
# the sample with loops and a branch: mpmath central differences

#: (k_conv, k_rad, start_temp, readings, dt, steps_per_reading): a hot kiln
#: cooling, one that crosses the heater's safe point (700 K) mid-run, and one
#: that starts below it
KILN_POINTS = [
    (0.003, 0.002, 1250.0, [1175.0, 1105.0, 1045.0], 2.0, 5),
    (0.004, 0.002, 760.0, [735.0, 712.0, 696.0], 2.0, 5),
    (0.0025, 0.0015, 690.0, [680.0, 671.0, 665.0, 660.0], 1.5, 4),
]


def test_kiln_cooling_against_mpmath() -> None:
    source = source_of("kiln_cooling")
    f_mp = mp_function(source, "kiln_loss")
    for point in KILN_POINTS:
        _, grads, params = call_committed("kiln_cooling", point)
        active = [params.index(name) for name in grads]
        # reference: mpmath central differences of the sample's own text, 50 digits
        # (mp_gradient refuses a point where a branch flips within the step)
        reference = mp_gradient(f_mp, point, active)
        for (name, grad), exact in zip(grads.items(), reference, strict=True):
            what = f"kiln_cooling d/d{name} at {point}: mpmath central difference"
            assert_close(grad, exact, 1e-12, what)


def test_kiln_points_take_both_sides_of_the_heater_branch() -> None:
    # the branch `HEATER if temp < SAFE_POINT else 0.0` must be exercised both ways
    ns = run_source(source_of("kiln_cooling"))
    temps = []
    ns["cooling_rate"] = _recording(ns["cooling_rate"], temps)
    for point in KILN_POINTS:
        ns["kiln_loss"](*point)
    assert min(temps) < ns["SAFE_POINT"] < max(temps)


def _recording(function, record: list):
    def wrapped(temp, *args):
        record.append(temp)
        return function(temp, *args)

    return wrapped


# ---------------------------------------------------------------------------------
# the NumPy sample: SymPy diff over object arrays of symbols

#: one batch of 8 invented readings of 4 features, and the logged humidity
_DATA = np.random.default_rng(40)
FEATURES = _DATA.normal(size=(8, 4))
HUMIDITY = _DATA.uniform(0.3, 0.9, size=8)
#: the wrt parameters' shapes: 5 hidden units (b2 is a Python float)
GREENHOUSE_WRT = {"W1": (4, 5), "b1": (5,), "w2": (5,), "b2": None}


def _greenhouse_point(seed: int) -> tuple:
    """(W1, b1, w2, b2, features, humidity) with parameters drawn from ``seed``."""
    g = np.random.default_rng(seed)
    return (
        0.6 * g.normal(size=(4, 5)),
        0.2 * g.normal(size=5),
        0.6 * g.normal(size=5),
        float(g.uniform(0.3, 0.7)),
        FEATURES,
        HUMIDITY,
    )


@cache
def _greenhouse_derivative() -> Callable:
    """SymPy diff of the sample's own text in every wrt element, as one function of
    the flat parameter values (sympy.lambdify into mpmath)."""
    symbols = {
        name: (
            sympy.Symbol(name)
            if shape is None
            else np.array(
                sympy.symbols(f"{name}_0:{int(np.prod(shape))}"), dtype=object
            ).reshape(shape)
        )
        for name, shape in GREENHOUSE_WRT.items()
    }
    # the data as exact rationals, so SymPy does not round them
    exact = np.vectorize(sympy.Rational, otypes=[object])
    model = sympy_function(source_of("greenhouse_net"), "humidity_loss")(
        *symbols.values(), exact(FEATURES), exact(HUMIDITY)
    )
    flat = [s for array in symbols.values() for s in np.ravel(array)]
    return sympy.lambdify(flat, [sympy.diff(model, s) for s in flat], "mpmath")


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_greenhouse_net_against_sympy(seed: int) -> None:
    point = _greenhouse_point(seed)
    _, grads, params = call_committed("greenhouse_net", point)
    assert list(grads) == list(GREENHOUSE_WRT)
    for name, shape in GREENHOUSE_WRT.items():
        assert np.shape(grads[name]) == (shape or ()), name
        assert np.shape(point[params.index(name)]) == (shape or ()), name
    values = [v for name in grads for v in np.ravel(point[params.index(name)])]
    # reference: SymPy diff of the sample's own text, evaluated in mpmath at 30
    # digits at the exact float inputs
    with mpmath.workdps(30):
        exact = _greenhouse_derivative()(*[mpmath.mpf(v) for v in values])
    got = [float(v) for name in grads for v in np.ravel(grads[name])]
    for k, (ours, ref) in enumerate(zip(got, exact, strict=True)):
        assert_close(ours, ref, 1e-12, f"greenhouse_net entry {k} (seed {seed}): SymPy")


# ---------------------------------------------------------------------------------
# every sample, every wrt parameter


#: (amp_m2, phase_m2, amp_s2, phase_s2): near the fit and away from it
TIDE_POINTS = [
    (0.95, 0.1, 0.2, 0.4),
    (1.1, -0.3, 0.05, 1.2),
    (0.4, 2.0, 0.6, -0.7),
]


def test_tide_gauge_against_mpmath() -> None:
    # module-level data (a frozen dataclass, a table, a dict) read by a loop
    source = source_of("tide_gauge")
    f_mp = mp_function(source, "tide_misfit")
    for point in TIDE_POINTS:
        _, grads, params = call_committed("tide_gauge", point)
        active = [params.index(name) for name in grads]
        # reference: mpmath central differences of the sample's own text, 50 digits
        reference = mp_gradient(f_mp, point, active)
        for (name, grad), exact in zip(grads.items(), reference, strict=True):
            what = f"tide_gauge d/d{name} at {point}: mpmath central difference"
            assert_close(grad, exact, 1e-12, what)


def test_every_sample_has_a_reference_test() -> None:
    # a new sample without a test here fails
    tested = set(SYMPY_POINTS) | {"kiln_cooling", "greenhouse_net", "tide_gauge"}
    assert tested == set(SAMPLE_NAMES)
