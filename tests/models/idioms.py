"""Idioms of naturally written models (zip, enumerate, reversed, tuples as values,
comprehension sums with filters, module-level tables unpacked by row), for the
MicroPython runs. Invented data."""

import math

READINGS = [(0.0, 1.02), (0.5, 0.83), (1.0, 0.61), (2.0, 0.37)]
GAINS = (0.8, 1.1, 0.95)


def decay_fit(k, c0):
    loss = 0.0
    for t, c in READINGS:
        r = c0 * math.exp(-k * t) - c
        loss += r * r
    return loss


def weighted(a, xs):
    total = 0.0
    for i, x in enumerate(xs, 1):
        total += i * math.sin(a * x)
    for g, x in zip(GAINS, reversed(xs)):  # noqa: B905 (MicroPython: no strict=)
        total += g * x * a
    return total


def filtered(a, xs):
    return sum((a * x - 1.0) ** 2 for x in xs if x > 0.0) + sum([a * x for x in xs])


def state_step(x, v, dt):
    state = (x, v)
    for _ in range(3):
        p, q = state
        state = (p + dt * q, q - dt * math.sin(p))
    energy = 0.5 * state[1] ** 2 + 1.0 - math.cos(state[0])
    return energy
