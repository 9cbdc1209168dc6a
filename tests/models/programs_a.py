"""Invented control-flow models (branches, early returns, loops, lists, helpers,
vector outputs) shared by the MicroPython tests."""

import math


def law(x, k):
    if x < 0:
        y = -k * x
    elif x < 1:
        y = k * x * x
    else:
        y = k * (2 * x - 1)
    z = math.sqrt(x) if x > 0 else 0.0
    return y + z


def clamp(x, lo, hi):
    if x < lo:
        return lo
    if x > hi:
        return hi
    return x * 1.0


def sim(v0, k, dt, steps):
    x = 0.0
    v = v0
    for _ in range(steps):
        a = -k * x
        x = x + dt * v
        v = v + dt * a
    return x


def rosen(x):
    total = 0.0
    for i in range(len(x) - 1):
        total += 100.0 * (x[i + 1] - x[i] ** 2) ** 2 + (1 - x[i]) ** 2
    return total


def polar(r, theta):
    return r * math.cos(theta), r * math.sin(theta)


def sq(u):
    return u * u


def uses_helper(a, b):
    return sq(a) + sq(a * b)
