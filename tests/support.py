"""Helpers shared by the gradient tests (imported as ``from support import ...``).

- :func:`build` generates a gradient module with gradwright and executes its text.
- :func:`mp_function` runs a model's own source text in mpmath: the source is
  executed with ``math`` replaced by :data:`MP_MATH`, a stand-in whose functions are
  mpmath's, so the same model text is evaluated in high precision.
- :func:`mp_central_diff` is a high-precision central difference of such a model,
  used as an outside reference for gradients.
- :func:`sympy_function` runs the same source with ``math`` mapped to SymPy's
  functions, so the model becomes a SymPy expression that ``sympy.diff`` can take.
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
    with mpmath.workdps(50):
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


def _sympy_math():
    import sympy
    from sympy.codegen import cfunctions

    def log(x, base=None):
        return sympy.log(x) if base is None else sympy.log(x, base)

    def hypot(*xs):
        return sympy.sqrt(sum(x**2 for x in xs))

    return types.SimpleNamespace(
        sin=sympy.sin,
        cos=sympy.cos,
        tan=sympy.tan,
        asin=sympy.asin,
        acos=sympy.acos,
        atan=sympy.atan,
        atan2=sympy.atan2,
        sinh=sympy.sinh,
        cosh=sympy.cosh,
        tanh=sympy.tanh,
        asinh=sympy.asinh,
        acosh=sympy.acosh,
        atanh=sympy.atanh,
        exp=sympy.exp,
        expm1=cfunctions.expm1,
        exp2=cfunctions.exp2,
        log=log,
        log1p=cfunctions.log1p,
        log2=cfunctions.log2,
        log10=cfunctions.log10,
        sqrt=sympy.sqrt,
        # the real cube root (sympy.cbrt is the principal root, complex for x < 0)
        cbrt=lambda x: sympy.real_root(x, 3),
        erf=sympy.erf,
        erfc=sympy.erfc,
        fabs=sympy.Abs,
        pow=sympy.Pow,
        # copysign(x, y) = |x| * sign(y) for y != 0 (C99 Annex F; common practice)
        copysign=lambda x, y: sympy.Abs(x) * sympy.sign(y),
        hypot=hypot,
        # the float constants, as the model sees them
        pi=math.pi,
        e=math.e,
        tau=math.tau,
        inf=sympy.oo,
    )


def sympy_function(source: str, func: str) -> Callable:
    """``func`` from ``source``, executed with ``math`` mapped to SymPy's functions.

    Called with SymPy symbols it returns the model as a SymPy expression (``abs``,
    ``min`` and ``max`` become ``Abs``, ``Min`` and ``Max``). ``%`` and ``//`` on
    symbols give ``Mod`` and ``floor``, which SymPy does not differentiate.
    """
    import sympy

    sympy_math = _sympy_math()

    def importer(name, globals=None, locals=None, fromlist=(), level=0):
        if name == "math":
            return sympy_math
        return builtins.__import__(name, globals, locals, fromlist, level)

    sympy_builtins = dict(vars(builtins))
    sympy_builtins.update(
        __import__=importer, abs=sympy.Abs, min=sympy.Min, max=sympy.Max
    )
    namespace: dict = {"__builtins__": sympy_builtins}
    exec(compile(source, "<model in sympy>", "exec"), namespace)
    return namespace[func]


def sympy_value(expr, subs: dict, digits: int = 30) -> mpmath.mpf:
    """A SymPy expression evaluated at exact float inputs, as an mpmath number."""
    import sympy

    # the model's float literals are exact binary numbers: make them exact
    # rationals, or SymPy would carry them (and the result) at 53 bits only
    expr = sympy.sympify(expr)
    expr = expr.xreplace({c: sympy.Rational(c) for c in expr.atoms(sympy.Float)})
    exact = {symbol: sympy.Rational(value) for symbol, value in subs.items()}
    number = sympy.N(expr, digits, subs=exact)
    if not number.is_real:
        raise ValueError(f"{expr} is not real at {subs}: {number}")
    with mpmath.workdps(digits):
        return mpmath.mpf(str(number))


def mp_central_diff(
    f_mp: Callable, point: Sequence[float], index: int, digits: int = 50
) -> mpmath.mpf:
    """d f / d point[index] by a central difference, good to about ``digits`` digits.

    The model is evaluated at ``2 * digits`` significant digits with a step of
    ``10**-digits`` relative to the coordinate (absolute when it is 0). The
    truncation error, h**2 * f'''(x) / 6, is then near 10**(-2 * digits) relative,
    and the rounding error, |f| * 10**(-2 * digits) / h, near
    10**-digits * |f / (x f')| relative: far below double precision unless the
    derivative is tiny next to the value.
    As a self-check the estimate is repeated with a tenth of the step; the two must
    agree to 10**-(digits // 2) relative, or the reference is refused (a kink or a
    singularity within the step).
    """
    with mpmath.workdps(2 * digits):
        x = [mpmath.mpf(p) for p in point]

        def estimate(h):
            up, down = list(x), list(x)
            up[index] += h
            down[index] -= h
            return (f_mp(*up) - f_mp(*down)) / (2 * h)

        scale = abs(x[index]) if x[index] != 0 else mpmath.mpf(1)
        h = scale * mpmath.mpf(10) ** -digits
        coarse, fine = estimate(h), estimate(h / 10)
        tolerance = mpmath.mpf(10) ** -(digits // 2)
        if abs(coarse - fine) > tolerance * abs(fine):
            raise ValueError(
                f"central difference did not settle at {point}, index {index}:"
                f" {coarse} vs {fine}"
            )
    # the estimate keeps its working-precision digits (no rounding to 53 bits)
    return coarse
