"""Helpers shared by the gradient tests (imported as ``from support import ...``).

- :func:`build` generates a gradient module with gradwright and executes its text.
- :func:`mp_function` runs a model's own source text in mpmath: the source is
  executed with ``math`` replaced by :data:`MP_MATH`, a stand-in whose functions are
  mpmath's, so the same model text is evaluated at 50 significant digits.
- :func:`mp_central_diff` is a high-precision central difference of such a model,
  used as an outside reference for gradients.
"""

from __future__ import annotations

import builtins
import math
import types
from collections.abc import Callable, Sequence

import mpmath

import gradwright

# ---------------------------------------------------------------------------------
# generating and running gradient modules


def build(source: str, func: str, wrt: Sequence[str] | None = None) -> dict:
    """Generate the gradient module of ``func`` in ``source`` and execute it.

    Returns the module's namespace: ``ns[func]`` is the copied primal and
    ``ns[func + "_grad"]`` the gradient function.
    """
    text = gradwright.generate(source, [func], wrt=None if wrt is None else list(wrt))
    namespace: dict = {}
    exec(compile(text, f"<gradwright:{func}>", "exec"), namespace)
    return namespace


def run_source(source: str) -> dict:
    """Execute the model source itself (in plain CPython, real ``math``)."""
    namespace: dict = {}
    exec(compile(source, "<model>", "exec"), namespace)
    return namespace


def rel_err(a: float, b: float) -> float:
    """Relative error of ``a`` against the reference ``b`` (absolute when b == 0)."""
    a, b = mpmath.mpf(a), mpmath.mpf(b)
    if b == 0:
        return float(abs(a))
    return float(abs(a - b) / abs(b))


def same_bits(a: float, b: float) -> bool:
    """True when ``a`` and ``b`` are the same value of the same type; for floats,
    the same IEEE bits (same hex digits, same sign of zero, or both NaN)."""
    if type(a) is not type(b):
        return False
    if not isinstance(a, float):
        return a == b
    if math.isnan(a) or math.isnan(b):
        return math.isnan(a) and math.isnan(b)
    return (
        a == b
        and float.hex(a) == float.hex(b)
        and math.copysign(1.0, a) == math.copysign(1.0, b)
    )


# ---------------------------------------------------------------------------------
# the model evaluated in mpmath


def _mp_cbrt(x):
    # mpmath.cbrt is the principal (complex) root for x < 0; math.cbrt is real
    return mpmath.sign(x) * mpmath.cbrt(abs(x))


def _mp_log(x, base=None):
    return mpmath.log(x) if base is None else mpmath.log(x, base)


def _mp_copysign(x, y):
    return abs(x) if y >= 0 else -abs(x)


def _mp_hypot(*xs):
    return mpmath.sqrt(mpmath.fsum(x * x for x in xs))


MP_MATH = types.SimpleNamespace(
    sin=mpmath.sin,
    cos=mpmath.cos,
    tan=mpmath.tan,
    asin=mpmath.asin,
    acos=mpmath.acos,
    atan=mpmath.atan,
    atan2=mpmath.atan2,
    sinh=mpmath.sinh,
    cosh=mpmath.cosh,
    tanh=mpmath.tanh,
    asinh=mpmath.asinh,
    acosh=mpmath.acosh,
    atanh=mpmath.atanh,
    exp=mpmath.exp,
    expm1=mpmath.expm1,
    exp2=lambda x: mpmath.power(2, x),
    log=_mp_log,
    log1p=mpmath.log1p,
    log2=lambda x: mpmath.log(x, 2),
    log10=mpmath.log10,
    sqrt=mpmath.sqrt,
    cbrt=_mp_cbrt,
    erf=mpmath.erf,
    erfc=mpmath.erfc,
    fabs=abs,
    pow=mpmath.power,
    copysign=_mp_copysign,
    hypot=_mp_hypot,
    # the float constants, as the model sees them (not the exact numbers)
    pi=mpmath.mpf(math.pi),
    e=mpmath.mpf(math.e),
    tau=mpmath.mpf(math.tau),
    inf=mpmath.inf,
)


def _import_with_mp_math(name, globals=None, locals=None, fromlist=(), level=0):
    if name == "math":
        return MP_MATH
    return builtins.__import__(name, globals, locals, fromlist, level)


def mp_function(source: str, func: str) -> Callable:
    """``func`` from ``source``, executed with ``math`` mapped to mpmath.

    Module-level float constants stay the floats the model uses; mpmath converts
    them exactly, so this is the model's own function evaluated in high precision.
    """
    mp_builtins = dict(vars(builtins))
    mp_builtins["__import__"] = _import_with_mp_math
    namespace: dict = {"__builtins__": mp_builtins}
    exec(compile(source, "<model in mpmath>", "exec"), namespace)
    return namespace[func]


def mp_central_diff(
    f_mp: Callable, point: Sequence[float], index: int, digits: int = 50
) -> mpmath.mpf:
    """d f / d point[index] by a central difference at ``digits`` significant digits.

    The step is 2**-50 (about 8.9e-16) relative to the coordinate, so the
    truncation error (h**2 / 6 * f''') is near 1e-31 relative and the rounding error
    near 10**-digits / h, about 1e-35. As a self-check the estimate is repeated with
    half the step; the two must agree to 1e-25 relative, or the reference is refused
    (a kink or a singularity within the step, or too few digits).
    """
    with mpmath.workdps(digits):
        x = [mpmath.mpf(p) for p in point]

        def estimate(h):
            up, down = list(x), list(x)
            up[index] += h
            down[index] -= h
            return (f_mp(*up) - f_mp(*down)) / (2 * h)

        scale = max(abs(x[index]), mpmath.mpf(1))
        h = scale * mpmath.mpf(2) ** -50
        coarse, fine = estimate(h), estimate(h / 2)
        size = max(abs(fine), mpmath.mpf(10) ** (-digits // 2))
        if abs(coarse - fine) > mpmath.mpf("1e-25") * size:
            raise ValueError(
                f"central difference did not settle at {point}, index {index}:"
                f" {coarse} vs {fine}"
            )
        return +fine
