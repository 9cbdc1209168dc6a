"""Helpers for the workflow tests: running the CLI and laying out small projects.

- :func:`cli` runs ``gradwright.workflow.cli.main`` in-process, in a given folder,
  capturing
  stdout and stderr (fast: no interpreter start-up per call).
- :func:`exe` runs the real ``python -m gradwright`` in a subprocess, for the tests
  that must show the installed command end to end.
- :func:`project` writes a folder holding sample models and a ``pyproject.toml``
  with the given targets.
"""

from __future__ import annotations

import contextlib
import io
import os
import shutil
import subprocess
import sys
from dataclasses import dataclass
from pathlib import Path

from gradwright.workflow.cli import main

ROOT = Path(__file__).resolve().parents[1]
SAMPLES = ROOT / "samples"

#: plausible bench values for the thermistor sample (its coefficients are tiny)
THERMISTOR_RANGES = (
    "a = [0.001, 0.002], b = [0.0001, 0.0003], c = [1e-8, 1e-7],"
    " resistance = [1000, 20000], kelvin = [250, 350]"
)
THERMISTOR_RANGE_OPTION = (
    "a=0.001:0.002,b=0.0001:0.0003,c=1e-8:1e-7,resistance=1000:20000,kelvin=250:350"
)


@dataclass(frozen=True)
class Result:
    code: int
    out: str
    err: str


def cli(*args: str, cwd: Path) -> Result:
    out, err = io.StringIO(), io.StringIO()
    previous = Path.cwd()
    os.chdir(cwd)
    try:
        with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
            try:
                code = main(list(args))
            except SystemExit as stop:  # argparse usage errors and --help
                code = int(stop.code or 0)
    finally:
        os.chdir(previous)
    return Result(code, out.getvalue(), err.getvalue())


def tool_path() -> str:
    """PATH with this interpreter's scripts folder first (where `gradwright` is)."""
    return os.pathsep.join([str(Path(sys.executable).parent), os.environ["PATH"]])


def exe(*args: str, cwd: Path) -> Result:
    done = subprocess.run(
        [sys.executable, "-m", "gradwright", *args],
        cwd=cwd,
        capture_output=True,
        text=True,
        timeout=120,
        env={**os.environ, "PATH": tool_path()},
    )
    return Result(done.returncode, done.stdout, done.stderr)


def target(
    source: str, functions: list[str], output: str, **extra: str | list[str]
) -> str:
    """One ``[[tool.gradwright.targets]]`` table (extra values are TOML literals
    when given as str, else a list of names)."""
    lines = [
        "[[tool.gradwright.targets]]",
        f'source = "{source}"',
        "functions = [" + ", ".join(f'"{f}"' for f in functions) + "]",
        f'output = "{output}"',
    ]
    for key, value in extra.items():
        key = key.replace("_", "-")
        if isinstance(value, list):
            value = "[" + ", ".join(f'"{v}"' for v in value) + "]"
        lines.append(f"{key} = {value}")
    return "\n".join(lines) + "\n"


THERMISTOR = target(
    "models/thermistor.py",
    ["fit_loss"],
    "models/thermistor_grad.py",
    wrt=["a", "b", "c"],
)
CABLE = target("models/cable_sag.py", ["rig_loss"], "models/cable_sag_grad.py")
HEDGE = target(
    "models/fuel_hedge.py",
    ["call_value"],
    "models/fuel_hedge_grad.py",
    wrt=["spot", "vol"],
)
BROKEN_MODEL = "def halve(x):\n    with x:\n        x = x / 2.0\n    return x\n"
BROKEN = target("models/broken.py", ["halve"], "models/broken_grad.py")


def project(root: Path, *targets: str) -> Path:
    """A project folder with the sample models under models/ and these targets."""
    models = root / "models"
    models.mkdir(parents=True, exist_ok=True)
    for name in ("thermistor.py", "cable_sag.py", "fuel_hedge.py"):
        shutil.copy(SAMPLES / name, models / name)
    (models / "broken.py").write_text(BROKEN_MODEL, encoding="utf-8")
    text = '[project]\nname = "demo"\nversion = "0"\n\n' + "\n".join(targets)
    (root / "pyproject.toml").write_text(text, encoding="utf-8")
    return root


def git(*args: str, cwd: Path, check: bool = True) -> subprocess.CompletedProcess:
    env = {
        **os.environ,
        "GIT_AUTHOR_NAME": "Test",
        "GIT_AUTHOR_EMAIL": "test@example.invalid",
        "GIT_COMMITTER_NAME": "Test",
        "GIT_COMMITTER_EMAIL": "test@example.invalid",
        "PATH": tool_path(),
    }
    return subprocess.run(
        ["git", *args],
        cwd=cwd,
        capture_output=True,
        text=True,
        check=check,
        env=env,
        timeout=120,
    )
