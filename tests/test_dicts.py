"""Dicts (lowering/dicts.py): loops over constant dicts, and string-keyed dicts of
active values (a list in the SSA, one adjoint list of the same positions)."""

from __future__ import annotations

import math
from pathlib import Path

import pytest
import sympy
from support import build, rel_err, run_source, same_bits

import gradwright

MODEL = (Path(__file__).parent / "models" / "programs_inactive.py").read_text()


def _hooke_forces(point):
    """Minus the forces on each node, by Hooke's law (textbook closed form): a
    spring of stiffness k and rest length r between nodes i and j pulls j towards
    i with k (L - r) along the unit vector from i to j; an anchor of stiffness k
    pulls its node to the origin with k times its position."""
    source = run_source(MODEL)
    names = ("a", "b", "c")
    pos = {n: (point[2 * m], point[2 * m + 1]) for m, n in enumerate(names)}
    grad = {n: [0.0, 0.0] for n in names}
    for i, j, k, rest in source["SPRINGS"]:
        dx, dy = pos[j][0] - pos[i][0], pos[j][1] - pos[i][1]
        length = math.hypot(dx, dy)
        f = k * (length - rest) / length
        grad[j][0] += f * dx
        grad[j][1] += f * dy
        grad[i][0] -= f * dx
        grad[i][1] -= f * dy
    for n, k in source["ANCHORS"].items():
        grad[n][0] += k * pos[n][0]
        grad[n][1] += k * pos[n][1]
    return [g for n in names for g in grad[n]]


@pytest.mark.parametrize(
    "point", [(0.1, -0.2, 1.3, 0.1, 0.5, 1.4), (-0.4, 0.3, 0.9, -0.6, 0.2, 2.0)]
)
def test_spring_network_gradient_is_minus_the_hooke_forces(point):
    ns = build(MODEL, "springs")
    value, grad = ns["springs_grad"](*point)
    assert same_bits(value, run_source(MODEL)["springs"](*point))
    for got, exact in zip(grad, _hooke_forces(point), strict=True):
        assert rel_err(got, exact) < 1e-13  # reference: Hooke's law, closed form


def test_a_dict_of_numbers_is_a_list_with_its_keys_positions():
    text = gradwright.generate(MODEL, ["springs"])
    assert "    px = [xa, xb, xc]\n" in text
    assert '    px_at = {"a": 0, "b": 1, "c": 2}\n' in text
    assert "        dx = px[px_at[j]] - px[px_at[i]]\n" in text
    # one adjoint list of the same positions, handed to the parameters at the end
    assert "    px_bar = [0.0] * len(px)\n" in text
    assert "    xa_bar = px_bar[0]\n" in text


def test_loops_over_constant_dicts():
    text = gradwright.generate(MODEL, ["weighted"])
    # (keys, the weights loop's, is read again by its reverse: weights[name])
    assert "    keys_1 = list(ANCHORS)\n" in text
    assert "        w = ANCHORS[keys_1[w_index]]\n" in text
    ns = build(MODEL, "weighted")
    _, (x_bar,) = ns["weighted_grad"](0.6)
    x = sympy.Symbol("x")
    # 3.5 x + 7 x^2 + 7 sin(x) (weights 0.5 + 3.0; anchors 5 + 2)
    exact = sympy.diff(sympy.Rational(7, 2) * x + 7 * x**2 + 7 * sympy.sin(x), x)
    assert rel_err(x_bar, float(exact.subs(x, 0.6))) < 1e-15  # reference: SymPy


def test_items_of_a_dict_of_active_values():
    source = (
        "def f(a, b):\n"
        '    d = {"a": a, "b": b}\n'
        "    total = 0.0\n"
        "    for name, value in d.items():\n"
        '        if name == "b":\n'
        "            total = total + value * value\n"
        "        else:\n"
        "            total = total + 3.0 * value\n"
        '    return total * d["a"]\n'
    )
    ns = build(source, "f")
    _, grad = ns["f_grad"](1.5, 2.0)
    a, b = sympy.symbols("a b")
    f = (3 * a + b**2) * a
    exact = [float(sympy.diff(f, s).subs({a: 1.5, b: 2.0})) for s in (a, b)]
    assert list(grad) == pytest.approx(exact, rel=1e-15)  # reference: SymPy diff


def _error(source: str) -> str:
    with pytest.raises(gradwright.GradwrightError) as error:
        gradwright.generate(source, ["f"])
    return str(error.value)


def test_dict_errors_say_what_to_write():
    text = _error('def f(x):\n    d = {"a": x}\n    return d["b"]\n')
    assert 'the dict has no key "b"' in text and 'its keys: "a"' in text
    text = _error("def f(x):\n    d = {1: x}\n    return d[1]\n")
    assert "distinct string keys" in text and 'write {"a": xa, "b": xb}' in text
    text = _error(
        "def f(x, ys):\n    t = 0.0\n    for k, v in ys.items():\n"
        "        t = t + v\n    return t * x\n"
    )
    assert "'ys' is not a constant dict" in text
    assert "module-level dict" in text
