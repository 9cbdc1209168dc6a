"""Golden files: the committed sample outputs are exactly what the generator writes.

Any change to the generated text shows up here and, once regenerated, in review as
a diff of samples/*_grad.py. Regenerate with the command in each file's header.
"""

from __future__ import annotations

import shlex
from pathlib import Path

import pytest

import gradwright

ROOT = Path(__file__).resolve().parents[1]
GOLDEN = sorted(ROOT.glob("samples/*_grad.py"))


def _command(text: str) -> list[str]:
    for line in text.splitlines():
        if line.startswith("# command: "):
            return shlex.split(line.removeprefix("# command: "))
    raise AssertionError("no command line in the header")


def test_there_are_golden_files() -> None:
    assert len(GOLDEN) >= 2


@pytest.mark.parametrize("golden", GOLDEN, ids=lambda p: p.name)
def test_regenerated_output_is_byte_identical(golden: Path) -> None:
    committed = golden.read_text(encoding="utf-8")
    words = _command(committed)
    assert words[:2] == ["gradwright", "gen"]
    args = words[2:]
    source_path = args[0]
    output = args[args.index("-o") + 1]
    wrt = args[args.index("--wrt") + 1].split(",") if "--wrt" in args else None
    functions = [a for a in args[1 : args.index("-o")] if not a.startswith("-")]
    if wrt is not None:
        functions = [f for f in functions if f != ",".join(wrt)]
    assert output == golden.relative_to(ROOT).as_posix()
    source = (ROOT / source_path).read_text(encoding="utf-8")
    regenerated = gradwright.generate(
        source, functions, wrt, path=source_path, output=output
    )
    assert regenerated == committed
