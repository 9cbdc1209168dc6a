"""Golden files: the committed sample outputs are exactly what the generator writes.

Any change to the generated text shows up here and, once regenerated, in review as
a diff of samples/*_grad.py. Regenerate with the command in each file's header.
This checks bytes only; the gradients the committed files compute are checked against
SymPy and mpmath in tests/test_samples.py.
"""

from __future__ import annotations

from pathlib import Path

import pytest
from support import command_words

from gradwright.workflow.cli import main

ROOT = Path(__file__).resolve().parents[1]
GOLDEN = sorted(ROOT.glob("samples/*_grad.py"))


def test_there_are_golden_files() -> None:
    assert len(GOLDEN) >= 2


@pytest.mark.parametrize("golden", GOLDEN, ids=lambda p: p.name)
def test_regenerated_output_is_byte_identical(
    golden: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    words = command_words(golden)
    assert words[:2] == ["gradwright", "gen"]
    assert words[words.index("-o") + 1] == golden.relative_to(ROOT).as_posix()
    monkeypatch.chdir(ROOT)
    status = main([*words[1:], "--check", "--diff"])
    assert status == 0, capsys.readouterr().out
