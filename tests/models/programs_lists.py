"""Invented models whose lists grow and are reduced, shared by the MicroPython
tests: appends, extends, filtered and nested comprehensions, min/max over
generators, math.prod and math.fsum."""

import math


def ledger(rate, base, days):
    costs = []
    for d in days:
        costs.append(base * math.exp(rate * d))
    costs.extend([base, rate * base])
    costs += [rate * rate]
    return sum(costs) + costs[-1] * costs[0]


def band(a, b, xs):
    hi = max((a * x - b) ** 2 for x in xs)
    lo = min([a * x for x in xs if x > 0.0])
    return hi - lo + len([x for x in xs if x > 0.0])


def compound(r, ts):
    return math.prod(1.0 + r * t for t in ts) + math.fsum(r * t for t in ts)


def pairs(a, xs):
    return sum((a * u * v for u in xs for v in xs if u < v), a * a)


KNOTS = [0.0, 0.5, 1.5, 3.0]


def trapezoid(k, ts):
    heights = [1.0 / (1.0 + k * t) for t in ts]
    area = 0.0
    for a, b, fa, fb in zip(ts, ts[1:], heights, heights[1:]):  # noqa: B905
        area += (b - a) * (fa + fb) / 2.0
    for a, b in zip(KNOTS[:-1], KNOTS[1:]):  # noqa: B905
        area += k * k * (b - a)
    return area + sum(list(heights)[:-1])


def kiln_wall(conductivity, temps, steps):
    # explicit 1-D conduction through a wall, two buffers swapped each step
    t = list(temps)
    t_next = [0.0] * len(temps)
    for _ in range(steps):
        t_next[0] = t[0]
        t_next[-1] = t[-1]
        for i in range(1, len(t) - 1):
            t_next[i] = t[i] + conductivity * (t[i + 1] - 2.0 * t[i] + t[i - 1])
        t, t_next = t_next, t
    return max(t[1:-1])
