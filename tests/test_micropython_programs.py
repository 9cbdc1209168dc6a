"""Programs with branches, loops, lists, helpers and vector outputs on MicroPython.

Each model is generated with ``--target micropython``, run under the real MicroPython
interpreter (tests/micropython/harness.py), and its values and gradients compared
with CPython's run of the same module text: the same double-precision arithmetic,
so they must agree to 1e-12 relative (common practice for comparing two libm
implementations; most results are bit-identical).
"""

from __future__ import annotations

import ast
import sys
from pathlib import Path

import pytest

import gradwright

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE / "micropython"))

from harness import require_micropython, run_micropython  # noqa: E402

MODELS = HERE / "models"

CALLS = {
    "programs_a.py": [
        ("law_grad", (-0.5, 2.0)),
        ("law_grad", (0.5, 2.0)),
        ("law_grad", (1.5, 2.0)),
        ("clamp_grad", (-0.5, 0.0, 1.0)),
        ("clamp_grad", (0.5, 0.0, 1.0)),
        ("clamp_grad", (1.5, 0.0, 1.0)),
        ("sim_grad", (1.0, 0.7, 0.01, 50)),
        ("rosen_grad", ([1.2, 0.8, -0.3, 2.0],)),
        ("polar_vjp", (2.0, 0.7, (0.3, -1.1))),
        ("polar_jacobian", (2.0, 0.7)),
        ("uses_helper_grad", (0.3, 1.7)),
    ],
    "programs_b.py": [
        ("lj_grad", ([0.0, 1.1, 0.3], [0.0, 0.2, 1.2])),
        ("smooth_grad", ([1.0, 2.0, 4.0], 0.3)),
        ("walk_grad", ([1.0, -2.0, 0.5], 0.4)),
        ("fib_grad", (1.1, 1.3, 5)),
        ("piece_grad", (-2.0,)),
        ("piece_grad", (-0.5,)),
        ("piece_grad", (0.5,)),
        ("loop_helper_grad", (0.5, 3)),
        ("minmax_grad", (1.0, 2.0, 0.5)),
    ],
}


def _functions(source: str) -> list[str]:
    names = [n.name for n in ast.parse(source).body if isinstance(n, ast.FunctionDef)]
    return names


def _flatten(value: object) -> list[float]:
    if isinstance(value, (list, tuple)):
        return [x for item in value for x in _flatten(item)]
    return [float(value)]  # type: ignore[arg-type]


@pytest.mark.micropython
@pytest.mark.parametrize("model", sorted(CALLS))
def test_programs_agree_with_cpython(model: str) -> None:
    require_micropython()
    source = (MODELS / model).read_text(encoding="utf-8")
    module = gradwright.generate(source, _functions(source), target="micropython")
    calls = [
        f"print(repr({name}({', '.join(repr(a) for a in args)})))"
        for name, args in CALLS[model]
    ]
    driver = module + "\n" + "\n".join(calls) + "\n"
    board = run_micropython(driver).strip().splitlines()
    namespace: dict = {}
    exec(compile(module, model, "exec"), namespace)
    assert len(board) == len(CALLS[model])
    for line, (name, args) in zip(board, CALLS[model], strict=True):
        expected = _flatten(namespace[name](*args))
        got = _flatten(ast.literal_eval(line))
        assert len(got) == len(expected), name
        for a, b in zip(got, expected, strict=True):
            assert abs(a - b) <= 1e-12 * max(1.0, abs(b)), (name, a, b)
