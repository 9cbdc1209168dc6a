"""Helpers shared by the gradient tests (imported as ``from support import ...``).

- :func:`build` generates a gradient module with gradwright and executes its text.
- :func:`mp_function` runs a model's own source text in mpmath: the source is
  executed with ``math`` replaced by :data:`MP_MATH`, a stand-in whose functions are
  mpmath's, so the same model text is evaluated in high precision.
- :func:`mp_central_diff` is a high-precision central difference of such a model,
  used as an outside reference for gradients.
- :func:`mp_gradient` is the whole reference gradient of such a model: central
  differences in every float argument and every element of every list argument.
- :func:`sympy_function` runs the same source with ``math`` mapped to SymPy's
  functions, so the model becomes a SymPy expression that ``sympy.diff`` can take;
  a NumPy model runs on object arrays of SymPy expressions.
- :func:`sample_command` reads the ``gradwright gen`` command a committed
  ``samples/*_grad.py`` records in its header.
"""

from __future__ import annotations

import builtins
import math
import shlex
import types
from collections.abc import Callable, Sequence
from pathlib import Path

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
    fsum=mpmath.fsum,
    prod=lambda xs, start=1: start * mpmath.fprod(xs),
    radians=lambda x: x * mpmath.pi / 180,
    degrees=lambda x: x * 180 / mpmath.pi,
    floor=lambda x: int(mpmath.floor(x)),
    ceil=lambda x: int(mpmath.ceil(x)),
    trunc=int,
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
        radians=lambda x: x * sympy.pi / 180,
        degrees=lambda x: x * 180 / sympy.pi,
        # the float constants, as the model sees them
        pi=math.pi,
        e=math.e,
        tau=math.tau,
        inf=sympy.oo,
    )


#: NumPy's elementwise functions -> the math name whose SymPy function they apply
_NUMPY_ELEMENTWISE = {
    **{
        name: name
        for name in (
            "exp log log1p expm1 exp2 log2 log10 sqrt cbrt sin cos tan tanh sinh"
            " cosh fabs hypot"
        ).split()
    },
    "arcsin": "asin",
    "arccos": "acos",
    "arctan": "atan",
    "arcsinh": "asinh",
    "arccosh": "acosh",
    "arctanh": "atanh",
    "arctan2": "atan2",
    "abs": "fabs",
    "absolute": "fabs",
}


def _sympy_extreme(function):
    """np.max or np.min over object arrays: SymPy's ``Max``/``Min`` of the elements
    along ``axis`` (None, an int or a tuple), as NumPy would pick them."""
    import numpy

    def reduce(x, axis=None, keepdims=False):
        x = numpy.asarray(x, dtype=object)
        if axis is None:
            axis = tuple(range(x.ndim))
        axes = tuple(a % x.ndim for a in (axis if isinstance(axis, tuple) else (axis,)))
        rest = [a for a in range(x.ndim) if a not in axes]
        moved = numpy.transpose(x, rest + list(axes))
        rows = moved.reshape(moved.shape[: len(rest)] + (-1,))
        out = numpy.empty(rows.shape[:-1], dtype=object)
        for index in numpy.ndindex(out.shape):
            out[index] = function(*rows[index])
        if keepdims:
            out = out.reshape([1 if a in axes else n for a, n in enumerate(x.shape)])
        return out if out.ndim else out[()]

    return reduce


def _sympy_norm(x, axis=None):
    """The square root of the sum of squares, over all elements or along axis."""
    import numpy
    import sympy

    x = numpy.asarray(x, dtype=object)
    if axis is None:
        return sympy.sqrt(sum(e**2 for e in numpy.ravel(x)))
    return numpy.frompyfunc(sympy.sqrt, 1, 1)(numpy.sum(x * x, axis=axis))


def _sympy_interp(x, xp, fp):
    """np.interp as a SymPy Piecewise per element: fp[0] before the table, the
    segment [xp[i], xp[i + 1]) linear, fp[-1] from the last knot on."""
    import numpy
    import sympy

    xp = [sympy.nsimplify(v) for v in xp]
    fp = [sympy.nsimplify(v) for v in fp]

    def one(t):
        pieces = [(fp[0], t < xp[0])]
        for i in range(len(xp) - 1):
            slope = (fp[i + 1] - fp[i]) / (xp[i + 1] - xp[i])
            pieces.append((fp[i] + slope * (t - xp[i]), t < xp[i + 1]))
        pieces.append((fp[-1], True))
        return sympy.Piecewise(*pieces)

    return numpy.frompyfunc(one, 1, 1)(numpy.asarray(x, dtype=object))


def _sympy_numpy(sympy_math) -> types.SimpleNamespace:
    """numpy over object arrays of SymPy expressions: the elementwise functions
    apply SymPy's, max/min/maximum/minimum/clip are ``Max`` and ``Min``, norm is the
    square root of the sum of squares; sums, means, products, ``@``, ``**``, shapes,
    joins and ``where`` on a numeric condition work on object arrays as they are."""
    import numpy
    import sympy

    namespace = types.SimpleNamespace(**vars(numpy))
    for name, math_name in _NUMPY_ELEMENTWISE.items():
        function = getattr(sympy_math, math_name)
        arity = 2 if math_name in ("atan2", "hypot") else 1
        setattr(namespace, name, numpy.frompyfunc(function, arity, 1))
    namespace.maximum = numpy.frompyfunc(sympy.Max, 2, 1)
    namespace.minimum = numpy.frompyfunc(sympy.Min, 2, 1)
    namespace.clip = numpy.frompyfunc(
        lambda x, lo, hi: sympy.Min(sympy.Max(x, lo), hi), 3, 1
    )
    namespace.max = namespace.amax = _sympy_extreme(sympy.Max)
    namespace.min = namespace.amin = _sympy_extreme(sympy.Min)
    namespace.linalg = types.SimpleNamespace(norm=_sympy_norm)
    namespace.interp = _sympy_interp
    return namespace


def sympy_function(source: str, func: str) -> Callable:
    """``func`` from ``source``, executed with ``math`` mapped to SymPy's functions.

    Called with SymPy symbols it returns the model as a SymPy expression (``abs``,
    ``min`` and ``max`` become ``Abs``, ``Min`` and ``Max``). ``%`` and ``//`` on
    symbols give ``Mod`` and ``floor``, which SymPy does not differentiate. A model
    that imports numpy gets :func:`_sympy_numpy` instead: called with object arrays
    of SymPy symbols (and exact ``sympy.Rational`` data), it returns the expression.
    """
    import sympy

    sympy_math = _sympy_math()

    def importer(name, globals=None, locals=None, fromlist=(), level=0):
        if name == "math":
            return sympy_math
        if name == "numpy":
            return _sympy_numpy(sympy_math)
        return builtins.__import__(name, globals, locals, fromlist, level)

    sympy_builtins = dict(vars(builtins))
    sympy_builtins.update(
        __import__=importer,
        abs=sympy.Abs,
        min=sympy.Min,
        max=sympy.Max,
        float=lambda x: x,  # the identity on numbers, kept symbolic
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


def mp_partial(
    f_mp: Callable, point: Sequence[float], index: int, digits: int = 50
) -> mpmath.mpf:
    """:func:`mp_central_diff`, also where the derivative is exactly zero.

    The self-check there is relative, so a zero derivative (``w * s + (1 - w) * s``
    in ``w``) is refused on its rounding noise; it is then taken as
    d(f + x)/dx - 1, and kept as 0 when below 10**-(digits // 2)."""
    try:
        return mp_central_diff(f_mp, point, index, digits)
    except ValueError:

        def plus_coordinate(*coords):
            return f_mp(*coords) + coords[index]

        with mpmath.workdps(2 * digits):
            estimate = mp_central_diff(plus_coordinate, point, index, digits) - 1
            if abs(estimate) < mpmath.mpf(10) ** -(digits // 2):
                return mpmath.mpf(0)
        raise


def mp_gradient(
    f_mp: Callable, args: Sequence, active: Sequence[int], digits: int = 50
) -> list:
    """The reference gradient of ``f_mp(*args)`` in the arguments ``active``.

    One :func:`mp_partial` per coordinate: a float argument gets an
    ``mpmath.mpf``, a list argument a list with one per element; the other
    arguments (integers, data) stay as given.
    """
    slots = []  # (argument index, list index or None) per flat coordinate
    for p in active:
        if isinstance(args[p], list):
            slots += [(p, k) for k in range(len(args[p]))]
        else:
            slots.append((p, None))

    def flat_model(*coords):
        call = [list(a) if isinstance(a, list) else a for a in args]
        for (p, k), c in zip(slots, coords, strict=True):
            if k is None:
                call[p] = c
            else:
                call[p][k] = c
        return f_mp(*call)

    point = [args[p] if k is None else args[p][k] for p, k in slots]
    flat = [mp_partial(flat_model, point, j, digits) for j in range(len(point))]
    grads: list = []
    for (_, k), d in zip(slots, flat, strict=True):
        if k is None:
            grads.append(d)
        elif k == 0:
            grads.append([d])
        else:
            grads[-1].append(d)
    return grads


def command_words(golden: Path) -> list[str]:
    """The ``# command:`` line of a generated module's header, split as a shell
    would (``["gradwright", "gen", FILE, FUNC, ..., "-o", OUT]``)."""
    for line in golden.read_text(encoding="utf-8").splitlines():
        if line.startswith("# command: "):
            return shlex.split(line.removeprefix("# command: "))
    raise AssertionError(f"no command line in {golden.name}")


def sample_command(golden: Path) -> tuple[list[str], list[str] | None]:
    """The functions and ``--wrt`` names of a committed ``*_grad.py``, from its
    header's ``gradwright gen FILE FUNC ... [--wrt a,b] -o OUT`` (``--wrt`` None:
    every parameter)."""
    words = command_words(golden)
    assert words[:2] == ["gradwright", "gen"], words
    functions: list[str] = []
    wrt: list[str] | None = None
    rest = iter(words[3:])
    for word in rest:
        if word in ("--wrt", "-o", "--target", "--shape"):
            value = next(rest)
            if word == "--wrt":
                wrt = value.split(",")
        else:
            functions.append(word)
    return functions, wrt
