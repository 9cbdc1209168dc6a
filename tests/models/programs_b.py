"""Invented models with nested loops, local lists, list iteration, tuple swaps and
helpers inside loops, shared by the MicroPython tests."""

import math

SIGMA = 1.0
EPS = 1.0


def lj(xs, ys):
    n = len(xs)
    energy = 0.0
    for i in range(n):
        for j in range(i + 1, n):
            dx = xs[i] - xs[j]
            dy = ys[i] - ys[j]
            r2 = dx * dx + dy * dy
            s6 = (SIGMA * SIGMA / r2) ** 3
            energy += 4.0 * EPS * (s6 * s6 - s6)
    return energy


def smooth(x, w):
    y = [0.0] * len(x)
    for i in range(len(x)):
        y[i] = w * x[i] + (1 - w) * x[i - 1]
    return sum(y)


def walk(vals, k):
    acc = 0.0
    for v in vals:
        if v > 0:
            acc += k * v * v
        else:
            acc -= math.exp(k * v)
    return acc


def fib(a, b, steps):
    for _ in range(steps):
        a, b = b, a * b
    return b


def piece(x):
    if x < 0:
        if x < -1:
            return -x * 2.0
        return x * x
    return math.sin(x)


def sq(u):
    return u * u


def loop_helper(x, n):
    total = 0.0
    for i in range(n):
        total += sq(x + i)
    return total


def minmax(a, b, c):
    return max(a, b, c) - min(a, b) + abs(a - c)
