"""Programs with branches, loops, lists, helpers and vector outputs on MicroPython.

Each model is generated with ``--target micropython``, run under the real MicroPython
interpreter (tests/micropython/harness.py), and its values and gradients compared
with CPython's run of the same module text: the same double-precision arithmetic,
so they must agree to 1e-12 relative (common practice for comparing two libm
implementations; most results are bit-identical).

That shows the board agrees; what the module computes is checked against an outside
reference at the same calls: mpmath central differences at 50 digits
(``support.mp_gradient``) of the model's own text run in mpmath
(``support.mp_function``), to 1e-12 relative.
"""

from __future__ import annotations

import ast
import sys
from pathlib import Path

import mpmath
import pytest
from support import mp_function, mp_gradient, rel_err, run_source, same_bits

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
    "dynamic_loops.py": [
        ("kepler_grad", (0.7, 0.3, 1e-13)),
        ("kepler_grad", (2.5, 0.8, 1e-13)),
        ("newton_sqrt_grad", (2.0, 1e-12)),
        ("fixed_point_grad", (0.3, 1e-14)),
        ("tariff_grad", (5.0, 0.2, 0.1)),
        ("tariff_grad", (37.5, 0.2, 0.1)),
        ("tariff_grad", (95.0, 0.2, 0.1)),
        ("search_grad", (0.7, [0.1, 1.0, 2.0, 0.3])),
        ("first_over_grad", (0.7, [0.1, 1.0, 4.0, 0.3])),
        ("first_over_grad", (0.1, [0.1, 1.0, 4.0, 0.3])),
        ("grow_until_grad", (0.1, 3.0)),
        ("grow_until_grad", (0.01, 3.0)),
    ],
    "idioms.py": [
        ("decay_fit_grad", (0.9, 1.05)),
        ("weighted_grad", (0.7, [0.3, -1.2, 2.0])),
        ("filtered_grad", (0.8, [0.5, -1.0, 2.5])),
        ("filtered_grad", (0.8, [-0.5, -1.0])),
        ("state_step_grad", (0.4, -0.2, 0.1)),
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
    "programs_lists.py": [
        ("ledger_grad", (0.3, 2.0, [0.0, 1.0, 2.5])),
        ("band_grad", (0.8, 0.3, [0.5, -1.5, 2.0, 1.0])),
        ("compound_grad", (0.2, [0.5, 1.0, 0.0, 2.0])),
        ("pairs_grad", (0.7, [0.5, -1.0, 2.0])),
        ("trapezoid_grad", (0.7, [0.0, 0.4, 1.1, 2.0])),
        ("kiln_wall_grad", (0.15, [300.0, 420.0, 380.0, 500.0, 290.0], 4)),
    ],
    "programs_inactive.py": [
        ("guarded_grad", (0.7, 1.3)),
        ("guarded_grad", (2.5, -0.4)),
        ("doubling_grad", (0.9, 6)),
        ("rebound_grad", (1.7,)),
        ("springs_grad", (0.1, -0.2, 1.3, 0.1, 0.5, 1.4)),
        ("weighted_grad", (0.6,)),
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


def _check_entry(got: object, exact: object, what: str) -> None:
    """A gradient entry (a float, or a list for a list argument) against mpmath."""
    if isinstance(exact, list):
        assert isinstance(got, list) and len(got) == len(exact), what
        for k, (g, e) in enumerate(zip(got, exact, strict=True)):
            _check_entry(g, e, f"{what}[{k}]")
        return
    assert isinstance(got, float), what
    # 1e-12 relative (absolute where the exact derivative is 0)
    err = rel_err(got, exact)
    assert err <= 1e-12, f"{what}: gradwright {got!r}, mpmath {exact} ({err:.3g})"


def _combine(cotangent: tuple, jacobian_rows: list) -> list:
    """cotangent . J, entry by entry (lists element by element), in mpmath."""
    first = jacobian_rows[0]
    combined = []
    for k, entry in enumerate(first):
        if isinstance(entry, list):
            combined.append(
                [
                    mpmath.fsum(
                        c * row[k][j]
                        for c, row in zip(cotangent, jacobian_rows, strict=True)
                    )
                    for j in range(len(entry))
                ]
            )
        else:
            combined.append(
                mpmath.fsum(
                    c * row[k] for c, row in zip(cotangent, jacobian_rows, strict=True)
                )
            )
    return combined


def _component(f_mp, i: int):  # noqa: ANN001
    return lambda *args: f_mp(*args)[i]


@pytest.mark.parametrize("model", sorted(CALLS))
def test_programs_against_mpmath(model: str) -> None:
    source = (MODELS / model).read_text(encoding="utf-8")
    module = gradwright.generate(source, _functions(source), target="micropython")
    namespace: dict = {}
    exec(compile(module, model, "exec"), namespace)
    plain = run_source(source)
    for name, args in CALLS[model]:
        func, kind = name.rsplit("_", 1)
        arity = plain[func].__code__.co_argcount
        point = args[:arity]
        # integer arguments are trip counts: the result is piecewise constant in
        # them and their entry is 0.0 (README: integer inputs)
        active = [k for k, a in enumerate(point) if not isinstance(a, int)]
        value, grads = namespace[name](*args)
        primal = plain[func](*point)
        if kind == "grad":
            assert same_bits(value, primal), name
            rows = [mp_gradient(mp_function(source, func), point, active)]
            cotangent = (1,)
        else:
            assert len(value) == len(primal), name
            assert all(
                same_bits(a, b) for a, b in zip(value, primal, strict=True)
            ), name
            rows = [
                mp_gradient(_component(mp_function(source, func), i), point, active)
                for i in range(len(primal))
            ]
            cotangent = args[arity] if kind == "vjp" else None
        # reference: mpmath central differences of the model's own text, 50 digits
        if kind == "jacobian":
            assert len(grads) == len(rows), name
            pairs = [(row_got, row) for row_got, row in zip(grads, rows, strict=True)]
        else:
            pairs = [(grads, _combine(cotangent, rows))]
        for got, exact in pairs:
            assert len(got) == len(point), name
            for k, entry in enumerate(got):
                what = f"{name}{args} entry {k}"
                if k in active:
                    _check_entry(entry, exact[active.index(k)], what)
                else:
                    assert entry == 0.0, what


@pytest.mark.parametrize("model", sorted(CALLS))
def test_every_program_is_called(model: str) -> None:
    # a function added to tests/models without calls above fails here (a helper
    # counts as called through the functions that call it)
    tree = ast.parse((MODELS / model).read_text(encoding="utf-8"))
    called = {name.rsplit("_", 1)[0] for name, _ in CALLS[model]}
    for node in tree.body:
        if isinstance(node, ast.FunctionDef) and node.name in called:
            called |= {
                n.func.id
                for n in ast.walk(node)
                if isinstance(n, ast.Call) and isinstance(n.func, ast.Name)
            }
    functions = {n.name for n in tree.body if isinstance(n, ast.FunctionDef)}
    assert functions <= called, sorted(functions - called)


def test_every_model_file_has_calls() -> None:
    assert {p.name for p in MODELS.glob("*.py")} == set(CALLS)
