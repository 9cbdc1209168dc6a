"""black only where it has work: statements copied as written must be black's output.

The reference is black itself (the pinned release): whatever the shortcuts decide,
the result must equal black's formatting of the whole function.
"""

from __future__ import annotations

import random
import sys
from pathlib import Path

import black
import libcst as cst
import pytest

from gradwright.emission import formatting
from gradwright.lowering.frontend import parse_module

sys.path.insert(0, str(Path(__file__).resolve().parent / "benchmarks"))
from synthetic import straight_line_model  # noqa: E402

ROOT = Path(__file__).resolve().parents[1]
MODE = black.Mode(target_versions={black.TargetVersion.PY310})

# statements black rewrites although they parse: each must not count as settled
REWRITTEN = [
    "x = a**2",
    "x = a ** 2",
    "x = y[a + 1:]",
    "del (a, b)",
    "x = (a)",
    "x = a , b",
    "x = f(a, b,)",
    "x = 'a'",
    "x = 1E5",
    "x = .5",
    "x = 0XFF",
    "x = a  + b",
    "x = a+b",
    "return (x)",
    "print(* a)",
    "x = not(y)",
    "x = f(a = 1)",
    "x = -(-y)",
    "x = y  # note",
    "x = lambda: 0",
    "x = " + " + ".join(f"value_{k}" for k in range(12)),  # too long
]
# statements black leaves alone: the cheap test should see most of these
KEPT = [
    "x = a * b + 0.5",
    "x = math.sin(a) - 0.25 * b",
    "x = a / (1.0 + b * b)",
    "x = (a, b)",
    "x = -y",
    "x = y[-1]",
    "x = f(a=-1)",
    "x = a if b else c",
    "x = not y",
    "x = a @ b",
    "x += 1e-05",
    "return x",
]


@pytest.mark.parametrize("text", REWRITTEN + KEPT)
def test_settled_statements_are_unchanged_by_black(text: str) -> None:
    formatted = black.format_str(text + "\n", mode=MODE)
    if formatting.settled(text, 0):
        assert formatted == text + "\n"


def test_settled_sees_the_canonical_statements() -> None:
    assert [t for t in REWRITTEN if formatting.settled(t, 0)] == []
    assert [t for t in KEPT if not formatting.settled(t, 0)] == []
    long = "x = " + " + ".join(f"v{k}" for k in range(16))
    assert 80 < len(long) <= 88
    assert formatting.settled(long, 0) and not formatting.settled(long, 2)


def _format_function(source: str) -> str:
    index = parse_module(source, "m.py")
    node = next(iter(index.functions.values()))
    return formatting.format_function(node, index.module, index.code)


def _scrambled(seed: int) -> str:
    """A function mixing settled statements with ones black rewrites, blank lines,
    comments, blocks, a docstring, and a header black may rewrite."""
    rng = random.Random(seed)
    header = rng.choice(["def f(a, b, c, d, xs):", "def f(a,b, c, d, xs = 1.0):"])
    lines = [header, "    'Docstring.   '"] if seed % 2 else [header]
    for k in range(60):
        choice = rng.random()
        if choice < 0.1:
            lines.append("")
        elif choice < 0.15:
            lines.append("    # a comment")
        if choice < 0.3:
            lines.append(f"    {rng.choice(REWRITTEN[:18])}")
        elif choice < 0.35:
            lines.append(f"    if a > {k}:\n        b = b  +  1.0")
        else:
            lines.append(f"    {rng.choice(KEPT[:-1])}")
    lines += ["    return a", "    # footer", ""]
    return "\n".join(lines) + "\n"


@pytest.mark.parametrize("seed", range(8))
def test_format_function_equals_black_on_the_whole_function(seed: int) -> None:
    source = _scrambled(seed)
    assert _format_function(source) == black.format_str(source, mode=MODE)


@pytest.mark.parametrize("statements", [50, 450])
def test_format_function_equals_black_on_long_functions(statements: int) -> None:
    source = straight_line_model(statements).split("\n", 3)[3]  # the function
    assert _format_function(source) == black.format_str(source, mode=MODE)


@pytest.mark.parametrize("path", sorted(ROOT.glob("samples/*.py")), ids=str)
def test_format_function_equals_black_on_the_samples(path: Path) -> None:
    index = parse_module(path.read_text(encoding="utf-8"), path.name)
    for node in index.functions.values():
        bare = node.with_changes(leading_lines=[])
        whole = black.format_str(index.module.code_for_node(bare), mode=MODE)
        assert formatting.format_function(bare, index.module, index.code) == whole


def test_a_module_with_nothing_for_black_does_not_load_it() -> None:
    import subprocess

    code = (
        "import sys\n"
        "from gradwright import generate\n"
        "generate('def f(x, y):\\n    z = x * y\\n    return z + x\\n', ['f'])\n"
        "print('black' in sys.modules)\n"
    )
    done = subprocess.run(
        [sys.executable, "-c", code], capture_output=True, text=True, check=True
    )
    assert done.stdout.strip() == "False"


def test_copied_statements_keep_their_source_text() -> None:
    # the copy is a slice of the source, not libcst's re-printing
    source = "def f(x):\n    y = x * 2.0\n    z = y + x\n    return z\n"
    index = parse_module(source, "m.py")
    body = index.functions["f"].body.body
    assert isinstance(body[1], cst.SimpleStatementLine)
    assert index.code(body[1].body[0]) == "z = y + x"


def _black_in_place(text: str, depth: int) -> str:
    """black's formatting of the statement where it stands, ``depth`` blocks deep."""
    lines = [f"{'    ' * k}if c{k}:" for k in range(depth)] + ["    " * depth + text]
    formatted = black.format_str("\n".join(lines) + "\n", mode=MODE)
    return "\n".join(formatted.splitlines()[depth:])


def _conditional(rng: random.Random) -> str:
    def term() -> str:
        k = rng.randint(0, 999)
        return rng.choice(
            [f"math.cosh(v{k}_1)", f"v{k}_bar", f"(v{k} + 1.0)", f"abs(v{k})", "2.0"]
        )

    name = "v" + "x" * rng.randint(1, 40) + "_bar"
    body = " / ".join(term() for _ in range(rng.randint(1, 7)))
    test = f"abs({term()}) < 710.0" if rng.random() < 0.8 else f"{term()} > 0.0"
    orelse = rng.choice(["0.0", term(), f"{term()} * {term()}"])
    op = rng.choice(["=", "+="])
    return f"{name} {op} {body} if {test} else {orelse}"


@pytest.mark.parametrize("seed", range(4))
def test_long_conditionals_are_split_as_black_splits_them(seed: int) -> None:
    rng = random.Random(seed)
    shortcut = 0
    for _ in range(150):
        text = _conditional(rng)
        depth = rng.randint(0, 4)
        if len("    " * depth + text) <= formatting.LINE_LENGTH:
            continue
        shortcut += formatting._wrapped_conditional(text, depth) is not None
        assert formatting.format_statement(text, depth) == _black_in_place(
            text, depth
        ), text
    assert shortcut > 20  # the shortcut was taken, not only black
