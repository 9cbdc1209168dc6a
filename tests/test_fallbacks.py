"""Tests of ``gradwright.fallbacks``: accuracy, MicroPython runs, the probe.

Each fallback's source is exec'd in CPython (with ``import math``) and checked
against mpmath at 50 digits, at fixed edge points and at seeded random points
spread over the whole domain (tiny, subnormal, moderate and huge inputs of
both signs). Errors are measured in ulps of the exact result; for a normal
result 1 ulp is at most 2.2e-16 relative (2**-52).

Bounds, and why they hold (measured maxima are from sweeps of 60,000-80,000
points; the points here are fewer, to keep the suite fast):

* cbrt <= 1 ulp: a pow estimate plus one Newton step whose residual is
  computed exactly leaves only the final rounding (measured 0.50 ulp).
* exp2 <= 1 ulp: it is ``math.pow(2.0, x)``, and pow is accurate to < 1 ulp
  in both glibc and MicroPython's libm (see PROBE.md; measured 0.51 ulp).
* hypot <= 1 ulp: exact squares, compensated sum, one corrected sqrt
  (measured 0.75 ulp, at subnormal results).
* log1p <= 2 ulp (4.4e-16 relative): ``log(u)`` (< 1 ulp) plus a correction
  smaller than the result, then one rounding (measured 1.44 ulp).
* fsum: exact, i.e. equal to the correctly rounded true sum.

The MicroPython tests need node and the npm package pinned in
``tests/micropython`` (``npm ci --prefix tests/micropython``); they skip
without them, or fail if ``GRADWRIGHT_REQUIRE_MICROPYTHON=1``.
"""

from __future__ import annotations

import ast
import importlib.util
import math
import random
import shutil
import subprocess
import sys
from collections.abc import Callable, Iterator
from fractions import Fraction
from pathlib import Path
from types import ModuleType

import pytest

ROOT = Path(__file__).resolve().parent.parent
MICROPYTHON_DIR = ROOT / "tests" / "micropython"
if str(MICROPYTHON_DIR) not in sys.path:
    sys.path.insert(0, str(MICROPYTHON_DIR))

import harness  # noqa: E402

mpmath = pytest.importorskip("mpmath")

REFERENCE = "mpmath at 50 digits"


def _load_fallbacks() -> ModuleType:
    name = "_gradwright_fallbacks_under_test"
    spec = importlib.util.spec_from_file_location(
        name, ROOT / "src" / "gradwright" / "emission" / "fallbacks.py"
    )
    assert spec is not None and spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    sys.modules[name] = module  # dataclasses look the module up here
    spec.loader.exec_module(module)
    return module


fallbacks = _load_fallbacks()
FALLBACKS = fallbacks.FALLBACKS


def helper(name: str) -> Callable[..., float]:
    """The fallback for ``math.<name>``, compiled from its source text."""
    namespace: dict[str, object] = {"math": math}
    exec(fallbacks.helper_sources([name]), namespace)
    function = namespace[FALLBACKS[name].helper_name]
    assert callable(function)
    return function


def ulps(got: float, exact: object) -> float:
    """|got - exact| in units of the last place of the exact value."""
    exact_mpf = mpmath.mpf(exact)
    return float(abs(mpmath.mpf(got) - exact_mpf) / math.ulp(float(exact_mpf)))


def same(a: float, b: float) -> bool:
    """Bitwise-equal floats, except that all NaNs are equal."""
    if a != a or b != b:
        return a != a and b != b
    return a == b and math.copysign(1.0, a) == math.copysign(1.0, b)


def log_uniform(rng: random.Random, lo: float, hi: float, n: int) -> Iterator[float]:
    """``n`` floats of both signs with log10 of the magnitude in [lo, hi]."""
    for _ in range(n):
        yield rng.choice((-1.0, 1.0)) * 10.0 ** rng.uniform(lo, hi)


def check_accuracy(
    name: str,
    points: list[tuple[float, ...]],
    exact: Callable[..., object],
    max_ulps: float,
) -> float:
    """Assert the fallback for ``name`` is within ``max_ulps`` of ``exact``."""
    function = helper(name)
    worst = 0.0
    with mpmath.workdps(50):
        for args in points:
            got = function(*args)
            want = exact(*[mpmath.mpf(a) for a in args])
            err = ulps(got, want)
            rel = float(abs(mpmath.mpf(got) - want) / abs(want)) if want else 0.0
            assert err <= max_ulps, (
                f"{name}{args}: got {got!r}, {REFERENCE} gives {mpmath.nstr(want, 20)}"
                f" ({err:.3f} ulp, relative error {rel:.3g})"
            )
            worst = max(worst, err)
    return worst


# --- accuracy in CPython, against mpmath at 50 digits ----------------------


def test_log1p_accuracy() -> None:
    rng = random.Random(1001)
    fixed = [1e-300, 5e-324, 1e-17, 1e-9, 1e-5, 0.5, 1.0, 2.0, 1e10, 1e300, 1.7e308]
    fixed += [-x for x in fixed if x < 1.0]
    fixed += [-0.5, -0.999999, -1.0 + 2.0**-52, -1.0 + 2.0**-30, 2.0**-52, 2.0**-53]
    points = fixed + [x for x in log_uniform(rng, -320.0, 308.0, 3000) if x > -1.0]
    points += [rng.uniform(-1.0, 1.0) for _ in range(2000)]
    points += [rng.uniform(-1e-8, 1e-8) for _ in range(500)]
    points += [-1.0 + rng.uniform(0.0, 1e-3) for _ in range(500)]
    # Reference: mpmath at 50 digits (mpmath.log1p).
    check_accuracy("log1p", [(x,) for x in points if x > -1.0], mpmath.log1p, 2.0)


def test_log1p_special_values() -> None:
    log1p = helper("log1p")
    assert same(log1p(0.0), 0.0) and same(log1p(-0.0), -0.0)
    assert log1p(math.inf) == math.inf
    assert math.isnan(log1p(math.nan))
    for x in (-1.0, -2.0, -1e300, -math.inf):
        with pytest.raises(ValueError):
            log1p(x)
        with pytest.raises(ValueError):
            math.log1p(x)


def test_exp2_accuracy() -> None:
    rng = random.Random(1002)
    fixed = [1e-300, -1e-300, 1e-17, -1e-17, 1e-9, 0.5, -0.5, 1.0, 10.5, -10.5]
    fixed += [100.25, 1023.5, 1023.999, -1022.0, -1022.5, -1060.3, -1074.0]
    points = fixed + [rng.uniform(-1074.0, 1023.999) for _ in range(3000)]
    points += list(log_uniform(rng, -300.0, 2.0, 2000))
    # Reference: mpmath at 50 digits (2 ** x).
    check_accuracy("exp2", [(x,) for x in points], lambda x: mpmath.power(2, x), 1.0)


def test_exp2_special_values() -> None:
    exp2 = helper("exp2")
    for k in range(-1074, 1024):
        assert exp2(float(k)) == math.ldexp(1.0, k)
    assert exp2(math.inf) == math.inf and exp2(-math.inf) == 0.0
    assert exp2(-1e10) == 0.0 and math.isnan(exp2(math.nan))
    for x in (1024.0, 1e10, 1.7e308):
        with pytest.raises(OverflowError):
            exp2(x)
        with pytest.raises(OverflowError):
            math.exp2(x)


def real_cbrt(x: object) -> object:
    return mpmath.sign(x) * mpmath.cbrt(abs(x))


def test_cbrt_accuracy() -> None:
    rng = random.Random(1003)
    fixed = [1e-300, 5e-324, 1e-310, 1e-17, 1e-9, 1e-3, 0.5, 2.0, 3.0, 10.0]
    fixed += [1e10, 1e300, 1.7976931348623157e308, 2.0**-1022, 2.0 ** (1 / 3)]
    points = fixed + [-x for x in fixed] + list(log_uniform(rng, -323.5, 308.2, 4000))
    points += [rng.uniform(0.5, 8.0) for _ in range(1000)]
    # Reference: mpmath at 50 digits (real cube root).
    check_accuracy("cbrt", [(x,) for x in points], real_cbrt, 1.0)


def test_cbrt_exact_and_special_values() -> None:
    cbrt = helper("cbrt")
    for k in range(1, 2000):
        assert cbrt(float(k**3)) == k and cbrt(float(-(k**3))) == -k
    for k in range(-358, 341):
        assert cbrt(math.ldexp(1.0, 3 * k)) == math.ldexp(1.0, k)
    assert same(cbrt(0.0), 0.0) and same(cbrt(-0.0), -0.0)
    assert cbrt(math.inf) == math.inf and cbrt(-math.inf) == -math.inf
    assert math.isnan(cbrt(math.nan))


def exact_hypot(*coordinates: object) -> object:
    return mpmath.sqrt(mpmath.fsum([c * c for c in coordinates]))


def test_hypot_accuracy() -> None:
    rng = random.Random(1004)
    points: list[tuple[float, ...]] = [
        (3.0, 4.0),
        (1e-300, 1e-300),
        (5e-324, 5e-324),
        (5e-324, 1e-310),
        (1e-17, 1.0),
        (1e-9, 1e-9),
        (1e300, 1e300),
        (1e308, 1e308),
        (1.7976931348623157e308, 1.0),
        (1e300, 1e-300),
        (-2.5, 7.0),
        (-1e-200, -3e-200),
        (1.0, 1.0, 1.0),
        (1e10, -1e10, 1e10, 1e-10),
        (2.5,),
        (-7.0,),
        (1e-300, 2e-300, 3e-300, 4e-300, 5e-300),
    ]
    for _ in range(3000):
        n = rng.choice((1, 2, 2, 2, 2, 3, 4, 6))
        scale = rng.uniform(-320.0, 307.0)
        coords = log_uniform(rng, scale - rng.uniform(0.0, 20.0), scale, n)
        points.append(tuple(coords))
    # Reference: mpmath at 50 digits (sqrt of the exact sum of squares).
    check_accuracy("hypot", points, exact_hypot, 1.0)


def test_hypot_special_values() -> None:
    hypot = helper("hypot")
    assert hypot() == 0.0 and hypot(0.0, -0.0) == 0.0 and hypot(-3.0) == 3.0
    assert hypot(3, 4) == 5.0 and hypot(-5.0, 12.0) == 13.0
    assert (
        hypot(math.inf, math.nan) == math.inf and hypot(math.nan, -math.inf) == math.inf
    )
    assert math.isnan(hypot(math.nan, 1.0)) and math.isnan(hypot(2.0, math.nan))
    # Overflow gives inf, as in CPython's math.hypot.
    assert hypot(1.7e308, 1.7e308) == math.inf == math.hypot(1.7e308, 1.7e308)
    assert hypot(1e308, 1e308, 1e308) == math.hypot(1e308, 1e308, 1e308)


def test_fsum_correctly_rounded() -> None:
    rng = random.Random(1005)
    fsum = helper("fsum")
    cases: list[list[float]] = [
        [],
        [1.0],
        [0.1] * 10,
        [1e100, 1.0, -1e100, 1e-100],
        [1e16, 1.0, 1e-16],
        [1.0, 1e100, 1.0, -1e100],
        [2.0**53, 1.0, -(2.0**-53)],
        [5e-324, 5e-324, -1e-323],
        [1.7976931348623157e308, -1.7976931348623157e308, 1.0],
    ]
    for _ in range(4000):
        n = rng.randint(0, 25)
        top = rng.choice((5.0, 20.0, 300.0))
        values = list(log_uniform(rng, -20.0, top, n))
        if rng.random() < 0.4:
            values += [-v * rng.choice((1.0, 1.0 + 2.0**-52)) for v in values[: n // 2]]
        rng.shuffle(values)
        cases.append(values)
    for values in cases:
        # Reference: the exact rational sum, correctly rounded by Fraction.
        exact = float(sum((Fraction(v) for v in values), Fraction(0)))
        got = fsum(values)
        assert got == exact, (values, got, exact)
        assert got == math.fsum(values)
        assert fsum(iter(values)) == got


def test_fsum_special_values() -> None:
    fsum = helper("fsum")
    assert fsum([math.inf, 1.0]) == math.inf and fsum([-math.inf]) == -math.inf
    assert math.isnan(fsum([math.nan, 1.0])) and math.isnan(fsum([math.inf, math.nan]))
    assert fsum([1, 2, 3]) == 6.0
    for values in ([math.inf, -math.inf], [1.0, -math.inf, math.inf]):
        with pytest.raises(ValueError):
            fsum(values)
    with pytest.raises(OverflowError):
        fsum([1e308, 1e308, -1e308])
    with pytest.raises(OverflowError):
        math.fsum([1e308, 1e308, -1e308])


# --- the fallback sources themselves ---------------------------------------

PRESENT_IN_MICROPYTHON = frozenset(
    name
    for name in (
        "sin cos tan asin acos atan atan2 sinh cosh tanh asinh acosh atanh "
        "exp expm1 exp2 log log1p log2 log10 sqrt cbrt hypot pow erf erfc fabs "
        "copysign pi e tau inf nan isfinite isnan isinf floor ceil trunc fmod "
        "frexp ldexp modf gamma lgamma degrees radians factorial fsum"
    ).split()
    if name not in fallbacks.MICROPYTHON_MISSING
)


def test_fallback_table_consistent() -> None:
    missing = fallbacks.MICROPYTHON_MISSING
    assert set(FALLBACKS) == missing - fallbacks.NO_ACCURATE_FALLBACK
    assert fallbacks.NO_ACCURATE_FALLBACK <= missing
    helper_names = {f.helper_name for f in FALLBACKS.values()}
    for name, fallback in FALLBACKS.items():
        assert fallback.name == name
        assert fallback.helper_name == "_gw_" + name
        assert set(fallback.needs) <= helper_names - {fallback.helper_name}


@pytest.mark.parametrize("name", sorted(FALLBACKS))
def test_fallback_source_uses_only_micropython_features(name: str) -> None:
    fallback = FALLBACKS[name]
    tree = ast.parse(fallback.source)
    assert len(tree.body) == 1 and isinstance(tree.body[0], ast.FunctionDef)
    assert tree.body[0].name == fallback.helper_name
    assert fallback.source.endswith("\n") and not fallback.source.endswith("\n\n")
    for node in ast.walk(tree):
        assert not isinstance(node, (ast.JoinedStr, ast.Import, ast.ImportFrom))
        if isinstance(node, ast.Attribute) and isinstance(node.value, ast.Name):
            if node.value.id == "math":
                assert node.attr in PRESENT_IN_MICROPYTHON, node.attr
        if isinstance(node, ast.Name) and node.id.startswith("_gw_"):
            assert node.id == fallback.helper_name or node.id in fallback.needs


@pytest.mark.parametrize("name", sorted(FALLBACKS))
def test_fallback_source_is_black_formatted(name: str) -> None:
    black = pytest.importorskip("black")
    source = FALLBACKS[name].source
    mode = black.Mode(target_versions={black.TargetVersion.PY310})
    assert black.format_str(source, mode=mode) == source


def test_fallback_sources_are_ruff_clean() -> None:
    if importlib.util.find_spec("ruff") is not None:
        ruff = [sys.executable, "-m", "ruff"]
    elif shutil.which("ruff") is not None:
        ruff = [str(shutil.which("ruff"))]
    else:
        pytest.skip("ruff is not installed")
    module = "import math\n\n\n" + fallbacks.helper_sources(FALLBACKS)
    # The project's ruff settings apply: the stdin file name is inside src/.
    proc = subprocess.run(
        [*ruff, "check", "--stdin-filename", "src/gradwright/_gw_helpers.py", "-"],
        input=module,
        capture_output=True,
        text=True,
        cwd=ROOT,
    )
    assert proc.returncode == 0, proc.stdout + proc.stderr


def test_helper_sources_deterministic() -> None:
    names = ["log1p", "hypot", "no_such_function", "log1p"]
    text = fallbacks.helper_sources(names)
    assert text == fallbacks.helper_sources(reversed(names))
    assert text == FALLBACKS["hypot"].source + "\n\n" + FALLBACKS["log1p"].source
    assert fallbacks.helper_sources([]) == ""


# --- under the real MicroPython interpreter --------------------------------


def _literal(value: object) -> str:
    """MicroPython-readable source for a float, or a list/tuple of floats."""
    if isinstance(value, (list, tuple)):
        items = ", ".join(_literal(v) for v in value)
        if isinstance(value, list):
            return f"[{items}]"
        return f"({items},)" if value else "()"
    assert isinstance(value, float)
    if value != value:
        return "float('nan')"
    if math.isinf(value):
        return "float('inf')" if value > 0 else "-float('inf')"
    return repr(value)


def _micropython_cases() -> list[tuple[str, tuple[object, ...]]]:
    rng = random.Random(2024)
    cases: list[tuple[str, tuple[object, ...]]] = []
    singles = [1e-300, 5e-324, 1e-17, 1e-9, 0.5, 1.0, 3.0, 27.0, 1e10, 1e300]
    singles += [-x for x in singles] + [0.0, -0.0, math.inf, -math.inf, math.nan]
    singles += list(log_uniform(rng, -300.0, 300.0, 60))
    for x in singles:
        cases.append(("log1p", (x,)))
        cases.append(("cbrt", (x,)))
    for x in [-1.0, -0.999999, -1.0 + 2.0**-52] + [
        rng.uniform(-1, 1) for _ in range(20)
    ]:
        cases.append(("log1p", (x,)))
    exps = [1e-300, 1e-17, 0.5, -0.5, 10.5, 1023.5, 1024.0, -1060.3, -1074.0, -1100.0]
    exps += [rng.uniform(-1074.0, 1023.0) for _ in range(40)] + [math.inf, math.nan]
    cases += [("exp2", (x,)) for x in exps]
    pairs = [(3.0, 4.0), (1e-300, 1e-300), (5e-324, 5e-324), (1e300, 1e300)]
    pairs += [(1.7e308, 1.7e308), (math.inf, math.nan), (math.nan, 1.0), (0.0, -0.0)]
    pairs += [tuple(log_uniform(rng, -300.0, 300.0, 2)) for _ in range(40)]
    pairs += [(1.0, 2.0, 3.0), (2.5,), ()]
    cases += [("hypot", p) for p in pairs]
    sums: list[list[float]] = [[], [0.1] * 10, [1e100, 1.0, -1e100], [1e308, 1e308]]
    sums += [[math.inf, -math.inf], [math.nan, 1.0], [1e16, 1.0, 1e-16]]
    for _ in range(30):
        values = list(log_uniform(rng, -20.0, 20.0, rng.randint(1, 12)))
        sums.append(values + [-v for v in values[:3]])
    cases += [("fsum", (values,)) for values in sums]
    return cases


DRIVER = """

def _gw_enc(x):
    if x != x:
        return "nan"
    if x == float("inf"):
        return "inf"
    if x == -float("inf"):
        return "-inf"
    m, e = math.frexp(x)
    sign = "-" if math.copysign(1.0, x) < 0 else ""
    return sign + str(int(math.fabs(m) * 9007199254740992.0)) + "*2^" + str(e - 53)


def _gw_run(i, fn, args):
    try:
        out = _gw_enc(fn(*args))
    except Exception as exc:
        out = "error:" + type(exc).__name__
    print(str(i) + "\\t" + out)

"""


def _driver_source() -> tuple[str, list[tuple[str, tuple[object, ...]]]]:
    cases = _micropython_cases()
    lines = ["import math", "", "", fallbacks.helper_sources(FALLBACKS), DRIVER]
    for i, (name, args) in enumerate(cases):
        helper_name = FALLBACKS[name].helper_name
        lines.append(f"_gw_run({i}, {helper_name}, {_literal(args)})")
    return "\n".join(lines) + "\n", cases


def _decode(text: str) -> float:
    if text in ("nan", "inf", "-inf"):
        return float(text)
    mantissa, exponent = text.split("*2^")
    value = math.ldexp(int(mantissa.lstrip("-")), int(exponent))
    return -value if mantissa.startswith("-") else value


#: the accuracy each fallback claims (module docstring), in ulps of the exact result,
#: and the exact function in mpmath; fsum is checked for exact rounding instead
MAX_ULPS = {"cbrt": 1.0, "exp2": 1.0, "hypot": 1.0, "log1p": 2.0}
EXACT: dict[str, Callable[..., object]] = {
    "cbrt": real_cbrt,
    "exp2": lambda x: mpmath.power(2, x),
    "hypot": exact_hypot,
    "log1p": mpmath.log1p,
}


def test_micropython_bounds_cover_every_fallback() -> None:
    assert set(MAX_ULPS) == set(EXACT) == set(FALLBACKS) - {"fsum"}


@pytest.mark.micropython
def test_fallbacks_agree_under_micropython(tmp_path: Path) -> None:
    harness.require_micropython()
    source, cases = _driver_source()
    micro = harness.run_micropython(source).splitlines()
    script = tmp_path / "driver.py"
    script.write_text(source, encoding="utf-8")
    cpython = subprocess.run(
        [sys.executable, str(script)], capture_output=True, text=True, check=True
    ).stdout.splitlines()
    assert len(micro) == len(cpython) == len(cases)
    for (name, args), mp_line, cp_line in zip(cases, micro, cpython, strict=True):
        mp_out = mp_line.split("\t")[1]
        cp_out = cp_line.split("\t")[1]
        where = f"{name}{args}: MicroPython {mp_out}, CPython {cp_out}"
        if mp_out.startswith("error:") or cp_out.startswith("error:"):
            assert mp_out == cp_out, where
            continue
        a, b = _decode(mp_out), _decode(cp_out)
        if a != a or b != b or math.isinf(a) or math.isinf(b) or b == 0.0:
            assert same(a, b), where
        else:
            # The board's own result meets the bound the module docstring claims,
            # against mpmath at 50 digits (the two libms may differ in the last
            # bit of log/pow/sqrt, so the board is not compared with CPython here)
            if name == "fsum":
                # the exact rational sum, correctly rounded by Fraction
                (values,) = args
                assert a == float(sum(map(Fraction, values), Fraction(0))), where
                continue
            with mpmath.workdps(50):
                err = ulps(a, EXACT[name](*[mpmath.mpf(x) for x in args]))
            assert err <= MAX_ULPS[name], f"{where}: {err:.3f} ulp, {REFERENCE}"


@pytest.mark.micropython
def test_probe_missing_names_match_interpreter() -> None:
    harness.require_micropython()
    probe = harness.run_probe_micropython()
    assert probe.info["implementation_version"] == fallbacks.MICROPYTHON_VERSION
    assert probe.info["mantissa_bits"] == "53"
    assert probe.missing_math == fallbacks.MICROPYTHON_MISSING
    assert PRESENT_IN_MICROPYTHON == frozenset(n for n, ok in probe.math.items() if ok)


@pytest.mark.micropython
def test_harness_reports_python_errors() -> None:
    harness.require_micropython()
    assert harness.run_micropython("print(1.0 / 3.0)\nprint('ok')\n") == (
        "0.3333333333333333\nok\n"
    )
    with pytest.raises(harness.MicroPythonError) as info:
        harness.run_micropython("print('before')\nraise ValueError('boom')\n")
    assert "ValueError: boom" in info.value.stderr
    assert info.value.stdout == "before\n" and info.value.returncode == 1
    with pytest.raises(harness.MicroPythonError):
        harness.run_micropython("def f(:\n")
