"""Run Python source under the pinned MicroPython (WebAssembly) interpreter.

The interpreter is the npm package pinned in ``package.json`` beside this
file; install it with ``npm ci --prefix tests/micropython``. Node runs it
through ``run_module.mjs``.

Used by pytest:

* :func:`micropython_available` tells whether node and the package are there.
* :func:`run_micropython` runs source text and returns what it printed.
* :func:`require_micropython` skips a test when MicroPython is missing, or
  fails it when ``GRADWRIGHT_REQUIRE_MICROPYTHON=1`` (as CI sets it).

Run as a script, ``python tests/micropython/harness.py --probe`` runs
``probe_math.py`` under MicroPython and CPython and writes ``PROBE.md``.
"""

from __future__ import annotations

import argparse
import math
import os
import shutil
import subprocess
import sys
import tempfile
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path

HERE = Path(__file__).resolve().parent
RUNNER = HERE / "run_module.mjs"
PACKAGE_NAME = "@micropython/micropython-webassembly-pyscript"
PACKAGE_VERSION = "1.27.0"
PACKAGE_DIR = (
    HERE / "node_modules" / "@micropython" / "micropython-webassembly-pyscript"
)
PROBE_SCRIPT = HERE / "probe_math.py"
PROBE_REPORT = HERE / "PROBE.md"
REQUIRE_ENV = "GRADWRIGHT_REQUIRE_MICROPYTHON"
INSTALL_HINT = "npm ci --prefix tests/micropython"


class MicroPythonError(RuntimeError):
    """MicroPython could not run, or the Python code it ran raised."""

    def __init__(
        self,
        message: str,
        returncode: int | None = None,
        stdout: str = "",
        stderr: str = "",
    ) -> None:
        details = message
        if stderr.strip():
            details += "\n--- MicroPython stderr ---\n" + stderr.rstrip()
        super().__init__(details)
        self.returncode = returncode
        self.stdout = stdout
        self.stderr = stderr


def node_executable() -> str | None:
    """Path of the ``node`` executable, or None if it is not on PATH."""
    return shutil.which("node")


def unavailable_reason() -> str | None:
    """Why MicroPython cannot run here, or None if it can."""
    if node_executable() is None:
        return "node is not on PATH (Node.js 20 runs the MicroPython build)"
    for name in ("package.json", "micropython.mjs", "micropython.wasm"):
        if not (PACKAGE_DIR / name).is_file():
            where = HERE / "node_modules"
            return f"{PACKAGE_NAME} is not installed in {where} (run: {INSTALL_HINT})"
    return None


def micropython_available() -> bool:
    """True if node and the pinned MicroPython package are installed."""
    return unavailable_reason() is None


def require_micropython() -> None:
    """Skip the calling test if MicroPython is missing; fail it if CI requires it.

    With ``GRADWRIGHT_REQUIRE_MICROPYTHON=1`` a missing node or package is a
    test failure, so CI cannot pass by silently skipping the MicroPython tests.
    """
    import pytest

    reason = unavailable_reason()
    if reason is None:
        return
    if os.environ.get(REQUIRE_ENV, "") == "1":
        pytest.fail(f"MicroPython required ({REQUIRE_ENV}=1) but unavailable: {reason}")
    pytest.skip(f"MicroPython unavailable: {reason}")


@dataclass(frozen=True)
class RunResult:
    """What one MicroPython run printed."""

    stdout: str
    stderr: str


def run_micropython_full(source: str, timeout: float = 60) -> RunResult:
    """Run ``source`` under MicroPython; return stdout and stderr.

    Raises :class:`MicroPythonError` if MicroPython is unavailable, times out,
    or the code raised (the traceback is in the error's ``stderr``).
    """
    reason = unavailable_reason()
    if reason is not None:
        raise MicroPythonError(f"MicroPython unavailable: {reason}")
    node = node_executable()
    assert node is not None
    with tempfile.TemporaryDirectory(prefix="gw-micropython-") as tmp:
        path = Path(tmp) / "module_under_test.py"
        path.write_text(source, encoding="utf-8")
        try:
            proc = subprocess.run(
                [node, str(RUNNER), str(path)],
                cwd=HERE,
                capture_output=True,
                text=True,
                encoding="utf-8",
                timeout=timeout,
                stdin=subprocess.DEVNULL,
            )
        except subprocess.TimeoutExpired as exc:
            raise MicroPythonError(
                f"MicroPython run timed out after {timeout} s",
                stdout=_text(exc.stdout),
                stderr=_text(exc.stderr),
            ) from None
    if proc.returncode != 0:
        raise MicroPythonError(
            f"MicroPython exited with status {proc.returncode}",
            returncode=proc.returncode,
            stdout=proc.stdout,
            stderr=proc.stderr,
        )
    return RunResult(stdout=proc.stdout, stderr=proc.stderr)


def run_micropython(source: str, timeout: float = 60) -> str:
    """Run ``source`` under MicroPython and return what it printed to stdout.

    Raises :class:`MicroPythonError` (with MicroPython's stderr, e.g. the
    traceback) if the code raised, timed out, or MicroPython is unavailable.
    """
    return run_micropython_full(source, timeout).stdout


def _text(data: str | bytes | None) -> str:
    if data is None:
        return ""
    if isinstance(data, bytes):
        return data.decode("utf-8", "replace")
    return data


# --- the probe -------------------------------------------------------------


@dataclass
class ProbeResult:
    """Parsed output of ``probe_math.py``."""

    info: dict[str, str] = field(default_factory=dict)
    math: dict[str, bool] = field(default_factory=dict)
    features: dict[str, tuple[str, str]] = field(default_factory=dict)
    values: dict[tuple[str, str], str] = field(default_factory=dict)
    stderr: str = ""

    @property
    def missing_math(self) -> frozenset[str]:
        """Names of the probed ``math`` module that do not exist."""
        return frozenset(name for name, present in self.math.items() if not present)


def parse_probe(stdout: str, stderr: str = "") -> ProbeResult:
    """Parse the tab-separated records printed by ``probe_math.py``."""
    result = ProbeResult(stderr=stderr)
    for line in stdout.splitlines():
        parts = line.split("\t")
        kind = parts[0]
        if kind == "info" and len(parts) == 3:
            result.info[parts[1]] = parts[2]
        elif kind == "math" and len(parts) == 3:
            result.math[parts[1]] = parts[2] == "yes"
        elif kind == "feature" and len(parts) == 4:
            result.features[parts[1]] = (parts[2], parts[3])
        elif kind == "value" and len(parts) == 4:
            result.values[(parts[1], parts[2])] = parts[3]
        elif line.strip():
            raise ValueError(f"unexpected probe line: {line!r}")
    return result


def probe_source() -> str:
    """Text of ``probe_math.py``."""
    return PROBE_SCRIPT.read_text(encoding="utf-8")


def run_probe_micropython(timeout: float = 120) -> ProbeResult:
    """Run the probe under MicroPython."""
    run = run_micropython_full(probe_source(), timeout)
    return parse_probe(run.stdout, run.stderr)


def run_probe_cpython(timeout: float = 120) -> ProbeResult:
    """Run the probe under this CPython, in a fresh process."""
    proc = subprocess.run(
        [sys.executable, str(PROBE_SCRIPT)],
        capture_output=True,
        text=True,
        timeout=timeout,
        check=True,
        stdin=subprocess.DEVNULL,
    )
    return parse_probe(proc.stdout, proc.stderr)


def decode_float(text: str) -> float:
    """Inverse of ``enc`` in ``probe_math.py`` for float values."""
    if text in ("nan", "inf", "-inf"):
        return float(text)
    mantissa, exponent = text.split("*2^")
    return math.ldexp(int(mantissa), int(exponent))


def _mpmath_functions() -> dict[str, Callable[..., object]] | None:
    try:
        import mpmath
    except ImportError:
        return None
    mp = mpmath
    return {
        "sin": mp.sin,
        "cos": mp.cos,
        "tan": mp.tan,
        "asin": mp.asin,
        "acos": mp.acos,
        "atan": mp.atan,
        "sinh": mp.sinh,
        "cosh": mp.cosh,
        "tanh": mp.tanh,
        "asinh": mp.asinh,
        "acosh": mp.acosh,
        "atanh": mp.atanh,
        "exp": mp.exp,
        "expm1": mp.expm1,
        "exp2": lambda x: mp.power(2, x),
        "log": mp.log,
        "log1p": mp.log1p,
        "log2": lambda x: mp.log(x, 2),
        "log10": mp.log10,
        "sqrt": mp.sqrt,
        "cbrt": lambda x: mp.sign(x) * mp.cbrt(abs(x)),
        "erf": mp.erf,
        "erfc": mp.erfc,
        "gamma": mp.gamma,
        "lgamma": lambda x: mp.log(abs(mp.gamma(x))),
        "fabs": mp.fabs,
        "degrees": mp.degrees,
        "radians": mp.radians,
        "atan2": mp.atan2,
        "pow": mp.power,
        "hypot": mp.hypot,
        "ldexp": lambda x, e: mp.ldexp(x, int(e)),
    }


def _ulp_error(got: float, exact: object) -> float:
    """Error of ``got`` in units of the last place of the exact value."""
    import mpmath

    exact_mpf = mpmath.mpf(exact)
    if mpmath.isinf(exact_mpf) or mpmath.isnan(exact_mpf):
        return (
            0.0
            if float(exact_mpf) == got or (got != got and exact_mpf != exact_mpf)
            else math.inf
        )
    unit = math.ulp(float(exact_mpf))
    return float(abs(mpmath.mpf(got) - exact_mpf) / unit)


def accuracy_table(probe: ProbeResult) -> dict[str, float] | None:
    """Largest error in ulps of each probed function vs mpmath at 50 digits."""
    functions = _mpmath_functions()
    if functions is None:
        return None
    import mpmath

    worst: dict[str, float] = {}
    with mpmath.workdps(50):
        for (name, args_text), out in sorted(probe.values.items()):
            if name not in functions or out.startswith("error:"):
                continue
            args = [decode_float(a) for a in args_text.split(",")]
            exact = functions[name](*[mpmath.mpf(a) for a in args])
            err = _ulp_error(decode_float(out), exact)
            worst[name] = max(worst.get(name, 0.0), err)
    return worst


def probe_report(micro: ProbeResult, cpython: ProbeResult) -> str:
    """Markdown text of ``PROBE.md``."""
    lines: list[str] = []
    add = lines.append
    add("# MicroPython probe")
    add("")
    add(
        "Recorded by `python tests/micropython/harness.py --probe`, which runs "
        f"`probe_math.py` under `{PACKAGE_NAME}` {PACKAGE_VERSION} (Node.js) and, "
        f"for comparison, CPython {cpython.info.get('implementation_version', '?')}. "
        "Regenerate it the same way."
    )
    add("")
    add("## Interpreter")
    add("")
    for key in (
        "version",
        "implementation",
        "platform",
        "float_info",
        "epsilon",
        "mantissa_bits",
        "smallest_positive",
        "max_recursion_depth",
    ):
        add(f"- `{key}`: `{micro.info.get(key, '?')}`")
    bits = micro.info.get("mantissa_bits")
    add("")
    add(
        "Floats are IEEE double precision (53-bit significand, subnormals present)."
        if bits == "53" and float(micro.info.get("smallest_positive", "0")) == 5e-324
        else f"WARNING: floats are NOT IEEE double precision (mantissa bits {bits})."
    )
    add("")
    add(
        "`max_recursion_depth` is the deepest plain recursion (of those tried) "
        "that worked inside the probe; the WebAssembly C stack bounds it, "
        "not `sys.setrecursionlimit`."
    )
    add("")
    add("## `math` names")
    add("")
    missing = sorted(micro.missing_math)
    present = sorted(name for name, ok in micro.math.items() if ok)
    add(f"Missing ({len(missing)}): " + ", ".join(f"`{n}`" for n in missing))
    add("")
    add(f"Present ({len(present)}): " + ", ".join(f"`{n}`" for n in present))
    add("")
    add("## Language features")
    add("")
    add(
        "`yes` = works as in CPython; `differs` = runs but behaves differently; "
        "`no` = fails."
    )
    add("")
    add("| feature | MicroPython | detail | CPython |")
    add("| --- | --- | --- | --- |")
    for name, (status, detail) in micro.features.items():
        cp_status = cpython.features.get(name, ("?", ""))[0]
        add(f"| `{name}` | {status} | {detail.replace('|', '/')} | {cp_status} |")
    if micro.stderr.strip():
        add("")
        add("MicroPython wrote to stderr during the probe (e.g. warnings):")
        add("")
        add("```")
        add(micro.stderr.rstrip())
        add("```")
    add("")
    add("## Accuracy of the present `math` functions")
    add("")
    table = accuracy_table(micro)
    cp_table = accuracy_table(cpython)
    if table is None or cp_table is None:
        add("(mpmath not installed: accuracy not measured)")
    else:
        add(
            "Largest error, in ulps of the exact value (mpmath at 50 digits), "
            "at the points listed in `VALUE_POINTS` of `probe_math.py`."
        )
        add("")
        add(
            "The last column counts the points where MicroPython's result is not "
            "bit for bit CPython's (for every probed function, including exact "
            "operations such as `fmod`)."
        )
        add("")
        add(
            "| function | MicroPython max ulps | CPython max ulps "
            "| differs from CPython |"
        )
        add("| --- | --- | --- | --- |")
        for name in sorted({key[0] for key in micro.values}):
            keys = [key for key in micro.values if key[0] == name]
            differ = sum(
                1 for key in keys if micro.values[key] != cpython.values.get(key)
            )
            mp_err = f"{table[name]:.2f}" if name in table else "exact op"
            cp_err = f"{cp_table[name]:.2f}" if name in cp_table else "exact op"
            add(f"| `{name}` | {mp_err} | {cp_err} | {differ} of {len(keys)} points |")
    errors = sorted(
        (name, args, out)
        for (name, args), out in micro.values.items()
        if out.startswith("error:")
        or cpython.values.get((name, args), "").startswith("error:")
    )
    if errors:
        add("")
        add("Points where MicroPython or CPython raised:")
        add("")
        add("| function | arguments | MicroPython | CPython |")
        add("| --- | --- | --- | --- |")
        for name, args, out in errors:
            shown = ", ".join(repr(decode_float(a)) for a in args.split(","))
            cp_out = cpython.values.get((name, args), "?")
            add(f"| `{name}` | {shown} | {_show_value(out)} | {_show_value(cp_out)} |")
    add("")
    return "\n".join(lines)


def _show_value(text: str) -> str:
    if text.startswith("error:"):
        return text[len("error:") :]
    if text.startswith("py:"):
        return text[len("py:") :]
    return repr(decode_float(text))


def main(argv: Sequence[str] | None = None) -> int:
    """Command line: ``--probe`` writes PROBE.md; ``FILE`` runs a file."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument(
        "--probe", action="store_true", help="run probe_math.py, write PROBE.md"
    )
    parser.add_argument(
        "--output",
        default=str(PROBE_REPORT),
        help="where --probe writes ('-' for stdout)",
    )
    parser.add_argument(
        "file", nargs="?", help="a Python file to run under MicroPython"
    )
    args = parser.parse_args(argv)
    reason = unavailable_reason()
    if reason is not None:
        print(f"MicroPython unavailable: {reason}", file=sys.stderr)
        return 2
    if args.probe:
        micro = run_probe_micropython()
        report = probe_report(micro, run_probe_cpython())
        if args.output == "-":
            sys.stdout.write(report)
        else:
            Path(args.output).write_text(report, encoding="utf-8")
            print(f"wrote {args.output}")
        print(
            "MicroPython math lacks: " + " ".join(sorted(micro.missing_math)),
            file=sys.stderr,
        )
        return 0
    if args.file:
        try:
            sys.stdout.write(
                run_micropython(Path(args.file).read_text(encoding="utf-8"))
            )
        except MicroPythonError as exc:
            print(exc, file=sys.stderr)
            return 1
        return 0
    parser.print_help()
    return 2


if __name__ == "__main__":
    sys.exit(main())
