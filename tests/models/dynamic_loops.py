"""Loops whose trip count is known only when they end: while, break, continue,
return inside a loop (run under MicroPython by test_micropython_programs.py)."""

import math


def kepler(mean_anomaly, ecc, tol):
    """Kepler's equation E - e sin E = M by Newton, to a tolerance."""
    E = mean_anomaly
    while True:
        f = E - ecc * math.sin(E) - mean_anomaly
        if abs(f) < tol:
            break
        E = E - f / (1.0 - ecc * math.cos(E))
    return E


def newton_sqrt(a, tol):
    x = a
    while abs(x * x - a) > tol:
        x = 0.5 * (x + a / x)
    return x


def fixed_point(p, tol):
    """x = g(x, p) with g = 0.5 cos(x) + p, iterated to a tolerance."""
    x = 0.0
    change = 1.0
    while change > tol:
        new = 0.5 * math.cos(x) + p
        change = abs(new - x)
        x = new
    return x


def tariff(usage, rate, rise):
    """Tiered tariff: 10 units per tier, each tier dearer; stops at the
    tier the usage ends in."""
    cost = 0.0
    for tier in range(8):
        price = rate * (1.0 + rise * tier)
        if usage <= 10.0:
            cost = cost + usage * price
            break
        cost = cost + 10.0 * price
        usage = usage - 10.0
    return cost


def search(a, xs):
    """Sum over the readings above a threshold, skipping the others."""
    total = 0.0
    for x in xs:
        w = x * a
        if w < 0.5:
            continue
        total = total + w * w
    return total


def first_over(a, xs):
    """Return inside a for loop: the first scaled reading over 2."""
    for x in xs:
        y = x * a
        if y > 2.0:
            return y * y
    return a


def grow_until(a, limit):
    """Return inside a while loop, with a counter bounding it."""
    x = 1.0
    k = 0
    while k < 50:
        x = x * (1.0 + a)
        if x > limit:
            return x * a
        k = k + 1
    return x
