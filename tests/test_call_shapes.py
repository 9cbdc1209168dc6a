"""Shapes across calls between a NumPy model's functions (sweeps/call_shapes.py).

References: Richardson-extrapolated central differences of the model's own text
(``test_numpy.richardson_gradient``, error analysis there) and, for the Huber loss,
its textbook derivative (clip(r, -delta, delta)). The text checks fail if the
run-time helpers (``_gw_unmean``, ``_gw_unbroadcast``, ``np.broadcast_to``) come
back where the shapes are known.
"""

from __future__ import annotations

import numpy as np
import pytest
from test_numpy import assert_close_to_differences

import gradwright

HUBER = """import numpy as np


def huber(r, delta):
    a = np.abs(r)
    return np.where(a <= delta, 0.5 * r * r, delta * (a - 0.5 * delta))


def loss(w, X, y, delta):
    pred = X @ w
    return huber(pred - y, delta).mean() + 0.01 * (w @ w)
"""
HUBER_SHAPES = {"w": (3,), "X": ("n", 3), "y": ("n",), "delta": ()}


def run(source: str, shapes: dict | None, name: str | list[str] = "loss", wrt=None):
    names = [name] if isinstance(name, str) else name
    text = gradwright.generate(source, names, wrt, shapes=shapes)
    namespace: dict = {}
    exec(compile(text, "<grad>", "exec"), namespace)
    model: dict = {}
    exec(compile(source, "<model>", "exec"), model)
    return text, namespace, model


def data(g: np.random.Generator, n: int = 40):
    X = g.normal(size=(n, 3))
    return (
        np.array([0.4, -1.1, 0.8]),
        X,
        X @ np.array([0.2, -0.5, 1.5]) + g.normal(size=n),
    )


def test_a_helper_result_of_known_shape_seeds_a_number():
    text, ns, model = run(HUBER, HUBER_SHAPES, wrt=["w"])
    caller = text.split("def loss_grad")[1]
    # the mean's seed is 1/n at the result's shape; the part comes back at r's
    assert "_gw_unmean" not in text and "_gw_unbroadcast" not in text
    assert "seed=np.broadcast_to(1.0 / n, (n,))" in caller
    assert caller.count("broadcast_to") == 1
    w, X, y = data(np.random.default_rng(7))
    value, (w_bar,) = ns["loss_grad"](w, X, y, 0.8)
    # reference: the Huber loss's derivative is clip(r, -delta, delta) (textbook)
    r = X @ w - y
    exact = X.T @ np.clip(r, -0.8, 0.8) / len(y) + 0.02 * w
    np.testing.assert_allclose(w_bar, exact, rtol=1e-13)
    assert_close_to_differences(model["loss"], (w, X, y, 0.8), 0, w_bar, value)


def test_a_helper_called_with_one_set_of_shapes_is_written_for_them():
    text, ns, _ = run(HUBER, HUBER_SHAPES, wrt=["w"])
    helper = text.split("def huber_adjoint")[1].split("\ndef ")[0]
    assert "# the shapes every call in this module passes" in helper
    assert '_gw_check_shapes("r=n delta=()", r, delta)' in helper
    assert "_gw_unbroadcast" not in helper and "_gw_shaped" not in helper
    # an adjoint function returns no value: the np.where is not made
    assert "value = np.where" not in helper
    # called with other shapes than its calls pass, it refuses
    with pytest.raises(ValueError, match=r"delta has shape \(2,\)"):
        ns["huber_adjoint"](np.ones(4), np.ones(2), seed=np.ones(4))


def test_a_helper_called_with_two_shapes_stays_general():
    source = """import numpy as np


def soft(v, t):
    return np.log(1.0 + np.exp(v - t))


def loss(w, X, b):
    z = X @ w
    return np.sum(soft(z, 0.5)) + np.sum(soft(w, b))
"""
    shapes = {"w": (3,), "X": ("n", 3), "b": ()}
    text, ns, model = run(source, shapes)
    helper = text.split("def soft_adjoint")[1].split("\ndef ")[0]
    assert "_gw_check_shapes" not in helper  # (n,) at one call, (3,) at the other
    g = np.random.default_rng(3)
    w, X, b = g.normal(size=3), g.normal(size=(9, 3)), 0.3
    value, grads = ns["loss_grad"](w, X, b)
    for k, got in enumerate(grads):
        assert_close_to_differences(model["loss"], (w, X, b), k, got, value)


def test_a_helper_of_a_helper_gets_its_shapes_through_both_calls():
    source = """import numpy as np


def inner(u):
    return u * np.tanh(u)


def outer(v, s):
    return inner(v * s).sum(axis=1)


def loss(A, s):
    return np.mean(outer(A, s) ** 2)
"""
    shapes = {"A": ("n", 4), "s": (4,)}
    text, ns, model = run(source, shapes)
    inner = text.split("def inner_adjoint")[1].split("\ndef ")[0]
    assert '_gw_check_shapes("u=n,4", u)' in inner
    assert "_gw_unmean" not in text
    g = np.random.default_rng(11)
    A, s = g.normal(size=(6, 4)), g.normal(size=4)
    value, grads = ns["loss_grad"](A, s)
    for k, got in enumerate(grads):
        assert_close_to_differences(model["loss"], (A, s), k, got, value)


def test_without_declared_shapes_nothing_changes_at_the_calls():
    text, ns, model = run(HUBER, None, wrt=["w"])
    assert "_gw_check_shapes" not in text
    w, X, y = data(np.random.default_rng(5), 12)
    value, (w_bar,) = ns["loss_grad"](w, X, y, 0.8)
    assert_close_to_differences(model["loss"], (w, X, y, 0.8), 0, w_bar, value)


def test_a_target_called_as_a_helper_keeps_a_general_adjoint():
    # g is generated for v=(3,) as a target; f calls it with A @ ones, of shape
    # (n,): its adjoint must not be written (and checked) for g's declared shape
    source = """import numpy as np


def g(v):
    return np.sum(np.tanh(v) * v)


def f(A):
    return g(A @ np.ones(3)) * 0.5
"""
    text, ns, model = run(source, {"A": ("n", 3), "v": (3,)}, ["f", "g"])
    assert "_gw_check_shapes" not in text.split("def g_adjoint")[1].split("\ndef ")[0]
    A = np.random.default_rng(2).normal(size=(5, 3))
    value, (A_bar,) = ns["f_grad"](A)
    assert_close_to_differences(model["f"], (A,), 0, A_bar, value)


def test_the_helpers_of_a_target_also_called_as_a_helper_stay_general():
    # found by review: inner's shapes were read from g's declared table, v=(3,),
    # but g's general adjoint passes inner whatever f passes g, (n,) here
    source = """import numpy as np


def inner(v):
    return np.sin(v) * v


def g(v):
    return np.sum(inner(v) * v)


def f(A):
    return g(A @ np.ones(3))
"""
    _, ns, model = run(source, {"v": (3,), "A": ("n", 3)}, ["f", "g"])
    A = np.random.default_rng(8).normal(size=(4, 3))
    value, (A_bar,) = ns["f_grad"](A)
    assert_close_to_differences(model["f"], (A,), 0, A_bar, value)
    v = np.array([0.3, -0.7, 1.1])
    value, (v_bar,) = ns["g_grad"](v)
    # reference by hand: d/dv sum(sin(v) v^2) = cos(v) v^2 + 2 v sin(v)
    np.testing.assert_allclose(v_bar, np.cos(v) * v * v + 2 * v * np.sin(v), 1e-14)
