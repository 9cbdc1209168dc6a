"""The ``micropython`` target: generated modules run on the real MicroPython.

Every module here is generated, then run twice with the same driver appended (calls
of the primal and of ``NAME_grad`` at fixed points, results printed with ``repr``):
once under MicroPython 1.27.0 (the pinned WebAssembly build in ``tests/micropython``,
all modules batched into one interpreter start) and once under this CPython. The two
runs must agree to 1e-12 relative; they run the same Python text, so they differ
only where the two C math libraries round differently. For the models of the
primitives that is stricter: every result is bit-identical except the calls listed
in ``LIBM_DIFFERS``, whose results on both interpreters are checked against mpmath
(the model in mpmath, and central differences at 50 digits). The reference for the
stand-ins' own accuracy is mpmath, in ``tests/test_fallbacks.py``; here the
MicroPython-target module is also checked against the default (CPython ``math``)
module under CPython, to 1e-12 relative.

The MicroPython runs need node and the npm package (``npm ci --prefix
tests/micropython``); they skip without them, or fail if
``GRADWRIGHT_REQUIRE_MICROPYTHON=1`` (as CI sets it).
"""

from __future__ import annotations

import ast
import contextlib
import io
import math
import sys
from dataclasses import dataclass
from functools import cache
from pathlib import Path

import black
import mpmath
import pytest
from support import mp_central_diff, mp_function, rel_err, sample_command

import gradwright
from gradwright.calculus.primitives import OPS
from gradwright.calculus.rules import SCALAR_OPS
from gradwright.emission import fallbacks
from gradwright.lowering.frontend import check_function, parse_module
from gradwright.lowering.ssa import lower

ROOT = Path(__file__).resolve().parent.parent
MICROPYTHON_DIR = ROOT / "tests" / "micropython"
if str(MICROPYTHON_DIR) not in sys.path:
    sys.path.insert(0, str(MICROPYTHON_DIR))

import harness  # noqa: E402

RELATIVE_TOLERANCE = 1e-12

# ---------------------------------------------------------------------------------
# models: one function per primitive (every key of rules.RULES, plus //)


@dataclass(frozen=True)
class Case:
    """A model function ``NAME(params)`` with ``body`` and the points to call it at."""

    name: str
    params: tuple[str, ...]
    body: str
    points: tuple[tuple[float, ...], ...]

    def source(self) -> str:
        lines = "\n".join("    " + line for line in self.body.splitlines())
        return f"def {self.name}({', '.join(self.params)}):\n{lines}\n"


def _operator_cases() -> list[Case]:
    xy = ("x", "y")
    pair = ((1.75, -0.625), (-3.5, 2.25))
    return [
        Case("copy_case", xy, "u = x\nv = u\nreturn v * y", pair),
        Case("pos_case", xy, "return +x * y", pair),
        Case("neg_case", xy, "return -x * y", pair),
        Case("add_case", xy, "return x + y", pair),
        Case("sub_case", xy, "return x - y", pair),
        Case("mul_case", xy, "return x * y", pair),
        Case("div_case", xy, "return x / y", pair),
        Case("mod_case", xy, "return x % y", ((7.5, 2.0), (-7.5, 2.25), (7.5, -2.25))),
        Case("floordiv_case", xy, "return x * (x // y)", ((7.5, 2.0), (-7.5, 2.25))),
        Case("pow_case", xy, "return x**y", ((1.75, 2.3), (0.5, -1.25))),
        Case("pow_int_case", xy, "return x**3 * y**-2", pair),
        Case("float_case", xy, "return float(x) * y", pair),
        Case(
            "piecewise_case",
            xy,
            "return x * (int(x) + round(y) + math.floor(x) + math.ceil(y))",
            pair,
        ),
        Case(
            "abs_case", xy, "return abs(x) * y", ((-1.5, 2.0), (0.0, 2.0), (1.5, 2.0))
        ),
        Case(
            "fabs_case",
            xy,
            "return math.fabs(x) * y",
            ((-1.5, 2.0), (0.0, 2.0), (1.5, 2.0)),
        ),
        Case("max_case", xy, "return max(x, y)", ((1.0, 2.0), (2.0, 1.0), (1.5, 1.5))),
        Case("max3_case", xy, "return max(x, y, x * y)", ((1.5, 2.5), (-2.0, 0.5))),
        Case("min_case", xy, "return min(x, y)", ((1.0, 2.0), (2.0, 1.0), (1.5, 1.5))),
        Case("min3_case", xy, "return min(x, y, x * y)", ((1.5, 2.5), (-2.0, 0.5))),
        Case(
            "copysign_case",
            xy,
            "return math.copysign(x, y) * x",
            ((1.5, -2.0), (-1.5, 2.0), (0.0, 1.0)),
        ),
        Case("atan2_case", xy, "return math.atan2(y, x)", ((0.5, -1.5), (-2.0, 0.3))),
        Case("math_pow_case", xy, "return math.pow(x, y)", ((1.75, 2.3), (0.5, -1.25))),
        Case("log_base_case", xy, "return math.log(x, y)", ((12.5, 3.0), (0.3, 7.0))),
        Case("hypot1_case", ("x",), "return math.hypot(x)", ((-2.5,), (3.0,))),
        Case("hypot2_case", xy, "return math.hypot(x, y)", ((3.0, 4.0), (-1e-3, 2.5))),
        Case(
            "hypot3_case",
            ("x", "y", "z"),
            "return math.hypot(x, y, z)",
            ((3.0, 4.0, 12.0), (0.5, -1.25, 2.0)),
        ),
    ]


# points inside each one-argument function's domain, away from its singularities
_UNARY_POINTS: dict[str, tuple[float, ...]] = {
    "sin": (0.7, -2.1),
    "cos": (0.7, -2.1),
    "tan": (0.7, -1.2),
    "asin": (0.3, -0.8),
    "acos": (0.3, -0.8),
    "atan": (0.7, -3.0),
    "sinh": (0.7, -1.9),
    "cosh": (0.7, -1.9),
    "tanh": (0.7, -1.9),
    "asinh": (0.7, -3.5),
    "acosh": (1.7, 12.0),
    "atanh": (0.3, -0.7),
    "exp": (0.7, -1.3),
    "expm1": (0.7, 1e-9, -1.3),
    "exp2": (0.7, -3.3),
    "log": (0.7, 12.5),
    "log1p": (0.7, 1e-9, -0.5),
    "log2": (0.7, 12.5),
    "log10": (0.7, 12.5),
    "sqrt": (0.7, 12.5),
    "cbrt": (0.7, -27.5),
    "erf": (0.3, -1.1),
    "erfc": (0.3, -1.1),
    "radians": (0.7, -135.0),
    "degrees": (0.7, -2.1),
}


def _unary_cases() -> list[Case]:
    return [
        Case(
            f"{name}_case",
            ("x", "y"),
            f"return math.{name}(x) * y",
            tuple((x, -1.25) for x in points),
        )
        for name, points in _UNARY_POINTS.items()
    ]


PRIMITIVE_CASES: tuple[Case, ...] = tuple(_operator_cases() + _unary_cases())
PRIMITIVE_SOURCE = "import math\n\n\n" + "\n\n".join(
    c.source() for c in PRIMITIVE_CASES
)

# ---------------------------------------------------------------------------------
# the math functions MicroPython lacks, in every import spelling

#: primitives whose derivative rule (in rules.RULES) calls math.hypot, which
#: MicroPython lacks: asinh' = 1/hypot(x, 1), atan2' divides by hypot(x, y) twice
_DERIVATIVE_CALLS_HYPOT = ("asinh", "atan2")


_MISSING_CALLS: dict[str, tuple[str, tuple[tuple[float, float], ...]]] = {
    # name: (arguments, points (x, y))
    "cbrt": ("x", ((0.7, 1.3), (-27.5, 0.5))),
    "exp2": ("x", ((0.7, 1.3), (-3.3, 0.5))),
    "hypot": ("x, y", ((3.0, 4.0), (-1e-3, 2.5))),
    "log1p": ("x", ((0.7, 1.3), (1e-9, 0.5), (-0.5, 2.0))),
    # asinh and atan2 are present, but their derivative rules call math.hypot
    "asinh": ("x", ((0.7, 1.3), (-3.5, 0.5))),
    "atan2": ("x, y", ((0.5, -1.5), (-2.0, 0.3))),
}


def _spelling_source(name: str, spelling: str) -> str:
    args, _ = _MISSING_CALLS[name]
    if spelling == "math":
        head, call = "import math", f"math.{name}({args})"
    elif spelling == "alias":
        head, call = "import math as mm", f"mm.{name}({args})"
    elif spelling == "from":
        head, call = f"from math import {name}", f"{name}({args})"
    else:  # imported under another name, beside a name MicroPython has
        head, call = f"from math import sin, {name} as stand", f"stand({args})"
        call += " + sin(y)"
    return f'{head}\n\n\ndef model(x, y):\n    """Doc."""\n    return {call} * y\n'


SPELLINGS = ("math", "alias", "from", "from_as")
SPELLING_CASES = [(name, sp) for name in _MISSING_CALLS for sp in SPELLINGS]

# positional-only parameters are a SyntaxError in MicroPython
POSONLY_SOURCE = """\
import math


def posonly(x, /, y, *, z=2.0):
    return math.log1p(x) * y + z * math.sin(x)
"""
POSONLY_POINTS = ((0.7, 1.3), (2.5, -0.5))

# two functions in one module that share one stand-in
SHARED_SOURCE = """\
import math


def first(x):
    return math.log1p(x) + math.asinh(x)


def second(x, y):
    return math.log1p(x * y) * math.hypot(x, y)
"""
SHARED_POINTS = {"first": ((0.7,), (-0.25,)), "second": ((0.7, 1.3), (2.0, 0.5))}

# ---------------------------------------------------------------------------------
# samples

SAMPLE_SOURCES = sorted(
    p for p in (ROOT / "samples").glob("*.py") if not p.name.endswith("_grad.py")
)

#: points to call each sample function at (inside the model's meaningful range)
SAMPLE_POINTS: dict[str, tuple[tuple[float, ...], ...]] = {
    "rig_loss": ((30.0, 40.0), (12.5, 38.0)),
    "call_value": ((102.5, 100.0, 0.35, 0.03, 0.0833), (95.0, 100.0, 0.2, 0.01, 0.5)),
    "fit_loss": (
        (1.13e-3, 2.34e-4, 8.8e-8, 1.0e4, 298.15),
        (1.1e-3, 2.4e-4, 9.0e-8, 3300.0, 323.15),
    ),
    # (k_conv, k_rad, start_temp, readings, dt, steps_per_reading): a hot kiln
    # cooling, and one that crosses the heater's safe point (700 K) mid-run
    "kiln_loss": (
        (0.003, 0.002, 1250.0, [1175.0, 1105.0, 1045.0], 2.0, 5),
        (0.004, 0.002, 760.0, [735.0, 712.0, 696.0], 2.0, 5),
    ),
    # (amp_m2, phase_m2, amp_s2, phase_s2): tide constituents
    "tide_misfit": ((0.95, 0.1, 0.2, 0.4), (1.1, -0.3, 0.05, 1.2)),
}

#: samples whose default (CPython-target) output runs on MicroPython unmodified
DEFAULT_OUTPUT_RUNS_ON_MICROPYTHON = frozenset(
    {"cable_sag", "fuel_hedge", "kiln_cooling", "thermistor", "tide_gauge"}
)


def _sample_command(sample: Path) -> tuple[list[str], list[str] | None]:
    """Functions and --wrt of the sample, from its committed golden output's header."""
    golden = sample.with_name(sample.stem + "_grad.py")
    if not golden.exists():
        raise AssertionError(f"{sample.name} has no golden output {golden.name}")
    return sample_command(golden)


def _is_scalar(sample: Path) -> bool:
    text = sample.read_text(encoding="utf-8")
    return "import numpy" not in text and "from numpy" not in text


SCALAR_SAMPLES = [s for s in SAMPLE_SOURCES if _is_scalar(s)]

# ---------------------------------------------------------------------------------
# drivers, and running them

DRIVER = """

def _driver_flatten(item, out):
    if isinstance(item, (list, tuple)):
        for part in item:
            _driver_flatten(part, out)
    else:
        out.append(item)


def _driver_show(label, primal, gradient, args):
    try:
        plain = primal(*args)
        value, grads = gradient(*args)
    except Exception as error:
        print(label + "\\terror\\t" + type(error).__name__ + ": " + str(error))
        return
    values = [plain, value]
    _driver_flatten(grads, values)
    print(label + "\\tok\\t" + " ".join([repr(v) for v in values]))

"""


@dataclass(frozen=True)
class Module:
    """A generated module and the calls its driver makes: (label, function, args)."""

    text: str
    calls: tuple[tuple[str, str, tuple[float, ...]], ...]

    def driver(self) -> str:
        lines = [self.text, DRIVER]
        for label, function, args in self.calls:
            lines.append(
                f"_driver_show({label!r}, {function}, {function}_grad, {args!r})"
            )
        return "\n".join(lines) + "\n"


@dataclass(frozen=True)
class Row:
    ok: bool
    values: tuple[float, ...]
    error: str


def _parse(output: str) -> dict[str, Row]:
    rows: dict[str, Row] = {}
    for line in output.splitlines():
        label, status, rest = line.split("\t", 2)
        if status == "ok":
            rows[label] = Row(True, tuple(float(v) for v in rest.split(" ")), "")
        else:
            rows[label] = Row(False, (), rest)
    return rows


def run_cpython(module: Module) -> dict[str, Row]:
    buffer = io.StringIO()
    with contextlib.redirect_stdout(buffer):
        exec(compile(module.driver(), "<generated module>", "exec"), {})
    return _parse(buffer.getvalue())


BATCH_PRELUDE = """
def _batch_run(name, source):
    try:
        exec(source, {})
    except Exception as error:
        print(name + "\\tmodule\\t" + type(error).__name__ + ": " + str(error))
"""


def run_micropython_batch(modules: dict[str, Module]) -> dict[str, dict[str, Row]]:
    """Every module's driver in one MicroPython run, each in a fresh namespace.

    A module that fails as a whole (a SyntaxError, an ImportError) gives one row
    labelled with the module's name and status ``module``.
    """
    parts = [BATCH_PRELUDE]
    for name, module in modules.items():
        parts.append(f"print({name!r} + '\\tbegin\\t')")
        parts.append(f"_batch_run({name!r}, {module.driver()!r})")
    output = harness.run_micropython("\n".join(parts) + "\n", timeout=120)
    results: dict[str, dict[str, Row]] = {}
    current: dict[str, Row] = {}
    for line in output.splitlines():
        label, status, rest = line.split("\t", 2)
        if status == "begin":
            current = results.setdefault(label, {})
        elif status == "module":
            current[label] = Row(False, (), rest)
        else:
            current.update(_parse(line))
    return results


# ---------------------------------------------------------------------------------
# the modules under test


def _calls(function: str, points, prefix: str = ""):  # noqa: ANN001
    return tuple(
        (f"{prefix}{function}@{i}", function, tuple(p)) for i, p in enumerate(points)
    )


def _primitive_module(target: str) -> Module:
    names = [c.name for c in PRIMITIVE_CASES]
    text = gradwright.generate(PRIMITIVE_SOURCE, names, target=target)
    calls = tuple(
        call for case in PRIMITIVE_CASES for call in _calls(case.name, case.points)
    )
    return Module(text, calls)


def _spelling_module(name: str, spelling: str, target: str) -> Module:
    text = gradwright.generate(
        _spelling_source(name, spelling), ["model"], target=target
    )
    return Module(text, _calls("model", _MISSING_CALLS[name][1]))


def _sample_module(sample: Path, target: str) -> Module:
    functions, wrt = _sample_command(sample)
    text = gradwright.generate(
        sample.read_text(encoding="utf-8"),
        functions,
        wrt,
        path=sample.relative_to(ROOT).as_posix(),
        target=target,
    )
    calls = tuple(call for f in functions for call in _calls(f, SAMPLE_POINTS[f]))
    return Module(text, calls)


def _posonly_module(target: str) -> Module:
    text = gradwright.generate(POSONLY_SOURCE, ["posonly"], target=target)
    return Module(text, _calls("posonly", POSONLY_POINTS))


def _shared_module(target: str) -> Module:
    text = gradwright.generate(SHARED_SOURCE, ["first", "second"], target=target)
    calls = tuple(c for f, pts in SHARED_POINTS.items() for c in _calls(f, pts))
    return Module(text, calls)


@cache
def modules() -> dict[str, Module]:
    """Every module under test, by name: ``<target>:<what>``."""
    found: dict[str, Module] = {}
    for target in ("micropython", "cpython"):
        found[f"{target}:primitives"] = _primitive_module(target)
        for name, spelling in SPELLING_CASES:
            found[f"{target}:{name}:{spelling}"] = _spelling_module(
                name, spelling, target
            )
        for sample in SCALAR_SAMPLES:
            found[f"{target}:sample:{sample.stem}"] = _sample_module(sample, target)
        found[f"{target}:posonly"] = _posonly_module(target)
        found[f"{target}:shared"] = _shared_module(target)
    return found


@cache
def _micropython_results() -> dict[str, dict[str, Row]]:
    return run_micropython_batch(modules())


def micropython_results(name: str) -> dict[str, Row]:
    harness.require_micropython()
    return _micropython_results()[name]


def _close(a: float, b: float) -> bool:
    if a == b or (a != a and b != b):
        return True
    return abs(a - b) <= RELATIVE_TOLERANCE * max(abs(a), abs(b))


def _same_bits(a: float, b: float) -> bool:
    return (a == b and math.copysign(1.0, a) == math.copysign(1.0, b)) or (
        a != a and b != b
    )


def assert_rows_agree(
    got: dict[str, Row], expected: dict[str, Row], what: str
) -> tuple[int, int]:
    """Every call succeeded in both and agrees to 1e-12; returns (bit-equal, total)."""
    assert set(got) == set(expected), what
    identical = total = 0
    for label, row in expected.items():
        assert row.ok, f"{what}: {label} failed in the reference run: {row.error}"
        other = got[label]
        assert other.ok, f"{what}: {label} failed: {other.error}"
        assert len(other.values) == len(row.values), label
        for a, b in zip(other.values, row.values, strict=True):
            assert _close(a, b), f"{what}: {label}: {other.values} vs {row.values}"
            identical += _same_bits(a, b)
            total += 1
    return identical, total


def assert_value_is_primal(rows: dict[str, Row], what: str) -> None:
    for label, row in rows.items():
        plain, value = row.values[:2]
        assert _same_bits(plain, value), f"{what}: {label}: grad value is not primal"


# ---------------------------------------------------------------------------------
# tests: the models of every primitive


def test_cases_cover_every_rule() -> None:
    """Each key of rules.RULES is a primitive of some case's lowered SSA."""
    index = parse_module(PRIMITIVE_SOURCE, "<primitives>")
    covered: set[str] = set()
    for case in PRIMITIVE_CASES:
        ssa = lower(index, check_function(index, case.name, None))
        covered |= {let.op for let in ssa.body}
    # MicroPython models are scalar: the array (NumPy) rules are not theirs
    assert set(SCALAR_OPS) <= covered, sorted(set(SCALAR_OPS) - covered)
    assert "floordiv" in covered


#: calls whose results MicroPython 1.27.0 and this CPython's libm round differently
#: in the last bit (MicroPython's own tanh); every other result must be
#: bit-identical, and these are checked against mpmath instead
LIBM_DIFFERS = frozenset({"tanh_case@0"})


def _mp_row(case: Case, point: tuple[float, ...]) -> list[mpmath.mpf]:
    """The case's value twice (primal and f_grad) and each partial derivative: the
    model in mpmath (support.mp_function) and mpmath central differences at 50
    digits (support.mp_central_diff)."""
    f_mp = mp_function("import math\n\n\n" + case.source(), case.name)
    with mpmath.workdps(50):
        value = f_mp(*[mpmath.mpf(x) for x in point])
    partials = [mp_central_diff(f_mp, point, k) for k in range(len(point))]
    return [value, value, *partials]


def test_primitive_models_match_cpython() -> None:
    module = modules()["micropython:primitives"]
    expected = run_cpython(module)
    got = micropython_results("micropython:primitives")
    assert_rows_agree(got, expected, "primitives")
    assert_value_is_primal(got, "primitives (MicroPython)")
    assert_value_is_primal(expected, "primitives (CPython)")
    cases = {case.name: case for case in PRIMITIVE_CASES}
    differing = set()
    for label, row in expected.items():
        board = got[label].values
        if all(_same_bits(a, b) for a, b in zip(board, row.values, strict=True)):
            continue
        differing.add(label)
        name, index = label.split("@")
        case = cases[name]
        reference = _mp_row(case, case.points[int(index)])
        for a, b, exact in zip(board, row.values, reference, strict=True):
            # both within 4 ulp-sized steps (1e-15 relative) of mpmath
            assert rel_err(a, exact) <= 1e-15, f"{label}: MicroPython {a!r}, {exact}"
            assert rel_err(b, exact) <= 1e-15, f"{label}: CPython {b!r}, {exact}"
    assert differing <= LIBM_DIFFERS, sorted(differing - LIBM_DIFFERS)


def test_stand_ins_match_cpython_math() -> None:
    """Under CPython the MicroPython-target module agrees with the default one."""
    micro = run_cpython(modules()["micropython:primitives"])
    default = run_cpython(modules()["cpython:primitives"])
    assert_rows_agree(micro, default, "stand-ins vs CPython math")


def _uses_missing(case: Case) -> bool:
    names = set()
    for name in fallbacks.MICROPYTHON_MISSING:
        if f"math.{name}(" in case.body:
            names.add(name)
    return bool(names) or any(
        f"math.{name}(" in case.body for name in _DERIVATIVE_CALLS_HYPOT
    )


def test_default_primitive_output_on_micropython() -> None:
    """The default output runs on MicroPython exactly where it uses nothing missing."""
    got = micropython_results("cpython:primitives")
    expected = run_cpython(modules()["cpython:primitives"])
    for case in PRIMITIVE_CASES:
        labels = [label for label in expected if label.split("@")[0] == case.name]
        if _uses_missing(case):
            for label in labels:
                assert not got[label].ok, label
                assert got[label].error.startswith("AttributeError"), got[label].error
        else:
            assert_rows_agree(
                {k: got[k] for k in labels}, {k: expected[k] for k in labels}, case.name
            )


# ---------------------------------------------------------------------------------
# tests: the missing functions in each import spelling


@pytest.mark.parametrize(("name", "spelling"), SPELLING_CASES)
def test_missing_function_spellings(name: str, spelling: str) -> None:
    module = modules()[f"micropython:{name}:{spelling}"]
    text = module.text
    stand_in = "hypot" if name in _DERIVATIVE_CALLS_HYPOT else name
    assert f"def _gw_{stand_in}(" in text
    assert_micropython_compatible(text)
    expected = run_cpython(module)
    got = micropython_results(f"micropython:{name}:{spelling}")
    assert_rows_agree(got, expected, f"{name} spelled {spelling}")
    assert_value_is_primal(got, name)
    default = run_cpython(modules()[f"cpython:{name}:{spelling}"])
    assert_rows_agree(expected, default, f"{name} stand-in vs CPython math")
    if spelling == "from_as":
        kept = (
            "sin" if name in fallbacks.MICROPYTHON_MISSING else f"sin, {name} as stand"
        )
        assert f"from math import {kept}\n" in text


@pytest.mark.parametrize(("name", "spelling"), SPELLING_CASES)
def test_default_output_with_missing_function_fails(name: str, spelling: str) -> None:
    """The reason for the target: the default output cannot run these."""
    rows = micropython_results(f"cpython:{name}:{spelling}")
    assert rows and all(not row.ok for row in rows.values())
    errors = {row.error.split(":")[0] for row in rows.values()}
    expected = "ImportError" if spelling.startswith("from") else "AttributeError"
    if name in _DERIVATIVE_CALLS_HYPOT:
        expected = "AttributeError"  # only the reverse sweep needs math.hypot
    assert errors == {expected}, errors


def test_shared_stand_ins_are_emitted_once() -> None:
    module = modules()["micropython:shared"]
    assert module.text.count("def _gw_log1p(") == 1
    assert module.text.count("def _gw_hypot(") == 1
    assert "def _gw_cbrt(" not in module.text
    expected = run_cpython(module)
    assert_rows_agree(micropython_results("micropython:shared"), expected, "shared")


def test_positional_only_parameters() -> None:
    module = modules()["micropython:posonly"]
    assert "def posonly(x, y, *, z=2.0):" in module.text
    assert "def posonly_grad(x, y, *, z=2.0):" in module.text
    expected = run_cpython(module)
    assert_rows_agree(micropython_results("micropython:posonly"), expected, "posonly")
    default = micropython_results("cpython:posonly")
    assert [row.error.split(":")[0] for row in default.values()] == ["SyntaxError"]


# ---------------------------------------------------------------------------------
# tests: the samples


def test_every_sample_is_covered() -> None:
    assert SCALAR_SAMPLES, "no samples found"
    for sample in SCALAR_SAMPLES:
        functions, _ = _sample_command(sample)
        for function in functions:
            assert (
                function in SAMPLE_POINTS
            ), f"add call points for {sample.name}:{function} to SAMPLE_POINTS"
    names = {s.stem for s in SCALAR_SAMPLES}
    assert DEFAULT_OUTPUT_RUNS_ON_MICROPYTHON <= names


@pytest.mark.parametrize("sample", SCALAR_SAMPLES, ids=lambda p: p.stem)
def test_sample_on_micropython(sample: Path) -> None:
    name = f"micropython:sample:{sample.stem}"
    module = modules()[name]
    assert_micropython_compatible(module.text)
    expected = run_cpython(module)
    got = micropython_results(name)
    assert_rows_agree(got, expected, sample.name)
    assert_value_is_primal(got, sample.name)
    default = run_cpython(modules()[f"cpython:sample:{sample.stem}"])
    assert_rows_agree(expected, default, f"{sample.name}: targets differ in CPython")


@pytest.mark.parametrize("sample", SCALAR_SAMPLES, ids=lambda p: p.stem)
def test_sample_default_output_on_micropython(sample: Path) -> None:
    """Which samples' default output runs on MicroPython unmodified (and agrees)."""
    name = f"cpython:sample:{sample.stem}"
    got = micropython_results(name)
    runs = all(row.ok for row in got.values())
    assert runs == (sample.stem in DEFAULT_OUTPUT_RUNS_ON_MICROPYTHON), got
    if runs:
        assert_rows_agree(got, run_cpython(modules()[name]), sample.name)


def test_module_runs_as_a_file() -> None:
    """Not only through exec: the module file itself, as a board would run it."""
    harness.require_micropython()
    module = modules()["micropython:log1p:from"]
    got = _parse(harness.run_micropython(module.driver()))
    assert_rows_agree(got, run_cpython(module), "module file")


# ---------------------------------------------------------------------------------
# tests: the generated text


_MICROPYTHON_MODULES = frozenset({"math", "collections"})


def assert_micropython_compatible(text: str) -> None:
    """No syntax or math name the MicroPython target cannot run."""
    tree = ast.parse(text)
    math_aliases = {"math"}
    for node in ast.walk(tree):
        assert not isinstance(node, ast.JoinedStr), "f-string"
        assert not isinstance(node, (ast.NamedExpr, ast.Match)), type(node)
        if isinstance(node, ast.arguments):
            assert not node.posonlyargs, "positional-only parameters"
        # math, and modules MicroPython has that a sample's copied data imports
        if isinstance(node, ast.Import):
            assert all(a.name in _MICROPYTHON_MODULES for a in node.names), node
            math_aliases |= {
                a.asname for a in node.names if a.asname and a.name == "math"
            }
        if isinstance(node, ast.ImportFrom):
            assert node.module in _MICROPYTHON_MODULES, ast.unparse(node)
            for alias in node.names:
                if node.module == "math":
                    assert alias.name not in fallbacks.MICROPYTHON_MISSING, alias.name
    for node in ast.walk(tree):
        if isinstance(node, ast.Attribute) and isinstance(node.value, ast.Name):
            if node.value.id in math_aliases:
                assert node.attr not in fallbacks.MICROPYTHON_MISSING, node.attr
    assert black.format_str(text, mode=black.Mode()) == text


def test_primitive_module_text() -> None:
    text = modules()["micropython:primitives"].text
    assert_micropython_compatible(text)
    for name in ("cbrt", "exp2", "hypot", "log1p"):
        assert text.count(f"def _gw_{name}(") == 1
    assert "def _gw_fsum(" not in text  # only what the module calls
    lines = text.splitlines()
    assert (
        lines[3]
        == "# command: gradwright gen '<string>' "
        + " ".join(c.name for c in PRIMITIVE_CASES)
        + " --target micropython"
    )
    assert lines[4] == "# target: micropython (math as in MicroPython 1.27.0)"
    # helpers after the imports, before the first model function
    assert lines.index("import math") < lines.index("def _gw_cbrt(x):")
    assert text.index("def _gw_log1p(") < text.index("def copy_case(")


def test_output_is_deterministic() -> None:
    again = gradwright.generate(
        PRIMITIVE_SOURCE, [c.name for c in PRIMITIVE_CASES], target="micropython"
    )
    assert again == modules()["micropython:primitives"].text


def test_default_target_output_unchanged() -> None:
    source = _spelling_source("log1p", "math")
    assert gradwright.generate(source, ["model"]) == gradwright.generate(
        source, ["model"], target="cpython"
    )
    text = gradwright.generate(source, ["model"])
    assert "# target:" not in text and "_gw_" not in text and "math.log1p(x)" in text


def test_regeneration_command_names_the_target() -> None:
    text = gradwright.generate(
        _spelling_source("cbrt", "math"),
        ["model"],
        ["x"],
        path="m.py",
        output="m_grad.py",
        target="micropython",
    )
    assert (
        "# command: gradwright gen m.py model --wrt x -o m_grad.py"
        " --target micropython\n" in text
    )


def test_unknown_target_is_a_value_error() -> None:
    with pytest.raises(ValueError, match="unknown target 'circuitpython'"):
        gradwright.generate("def f(x):\n    return x\n", ["f"], target="circuitpython")


def test_missing_primitives_are_known() -> None:
    """The ops MicroPython lacks all have stand-ins (none is left to the error)."""
    missing_ops = {
        op
        for op, spec in OPS.items()
        if spec.symbol.removeprefix("math.") in fallbacks.MICROPYTHON_MISSING
    }
    assert {OPS[op].symbol for op in missing_ops} == {
        "math.cbrt",
        "math.exp2",
        "math.fsum",
        "math.hypot",
        "math.log1p",
    }
    assert missing_ops <= set(fallbacks.FALLBACKS) - fallbacks.NO_ACCURATE_FALLBACK


# ---------------------------------------------------------------------------------
# tests: located errors


def _error(source: str, monkeypatch: pytest.MonkeyPatch, no_fallback: set[str]):
    monkeypatch.setattr(fallbacks, "NO_ACCURATE_FALLBACK", frozenset(no_fallback))
    with pytest.raises(gradwright.GradwrightError) as info:
        gradwright.generate(source, ["model"], path="model.py", target="micropython")
    return info.value.diagnostic


@pytest.mark.parametrize("spelling", SPELLINGS)
def test_missing_without_stand_in_is_a_located_error(
    spelling: str, monkeypatch: pytest.MonkeyPatch
) -> None:
    source = _spelling_source("log1p", spelling)
    diagnostic = _error(source, monkeypatch, {"log1p"})
    assert diagnostic.message == (
        "math.log1p is not available on MicroPython 1.27.0, and gradwright has no"
        " accurate stand-in for it"
    )
    loc = diagnostic.location
    assert loc is not None and loc.path == "model.py" and loc.line == 6
    callee = {"math": "math.log1p", "alias": "mm.log1p", "from": "log1p"}.get(
        spelling, "stand"
    )
    assert loc.source_line[loc.column : loc.end_column] == callee
    assert "default target" in (diagnostic.hint or "")
    gradwright.generate(source, ["model"])  # the default target is not affected


def test_derivative_needing_missing_function_is_a_located_error(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    source = _spelling_source("asinh", "alias")
    diagnostic = _error(source, monkeypatch, {"hypot"})
    assert diagnostic.message == (
        "the derivative of math.asinh needs math.hypot, which MicroPython 1.27.0"
        " lacks, and gradwright has no accurate stand-in for it"
    )
    loc = diagnostic.location
    assert loc is not None and loc.line == 6
    assert loc.source_line[loc.column : loc.end_column] == "mm.asinh"
    rendered = diagnostic.render()
    assert rendered.startswith("model.py:6:12: error: the derivative of math.asinh")


def test_stand_in_name_clash_is_a_located_error() -> None:
    source = "import math\n\n\ndef model(x, _gw_log1p):\n    return math.log1p(x)\n"
    with pytest.raises(gradwright.GradwrightError) as info:
        gradwright.generate(source, ["model"], target="micropython")
    diagnostic = info.value.diagnostic
    assert "'_gw_log1p'" in diagnostic.message
    assert diagnostic.location is not None and diagnostic.location.line == 4
    # without the stand-in, the name is the model's own business
    gradwright.generate(source, ["model"])


def test_imports_of_missing_names_are_dropped() -> None:
    source = (
        "import math as m\n"
        "from math import fsum, log1p as lp, sin\n"
        "\n\n"
        "def model(x, y):\n"
        "    return sin(x) * m.cos(y)\n"
    )
    default = gradwright.generate(source, ["model"])
    assert "from math import fsum, log1p as lp, sin\n" in default
    text = gradwright.generate(source, ["model"], target="micropython")
    assert "from math import sin\n" in text and "import math as m\n" in text
    assert "fsum" not in text and "lp" not in text and "_gw_" not in text
    assert_micropython_compatible(text)


def test_numpy_model_for_micropython_is_an_error(tmp_path: Path) -> None:
    # MicroPython has no numpy: generating for it would give a module that fails on
    # the board at its first line, so generation says so instead (exit 2)
    model = tmp_path / "m.py"
    model.write_text(
        "import numpy as np\n\n\ndef f(x):\n    return np.sum(x * x)\n",
        encoding="utf-8",
    )
    with pytest.raises(gradwright.GradwrightError) as caught:
        gradwright.generate(model.read_text(), ["f"], path="m.py", target="micropython")
    assert "has no numpy" in caught.value.diagnostic.render()
