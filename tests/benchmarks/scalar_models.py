"""Scalar models for the runtime benchmark, of kinds the samples do not cover
(invented scenarios): a binomial tree, an explicit heat scheme, a two-link arm's
reach by atan2 and hypot, and a power-law fit."""

BINOMIAL_TREE = """
import math


def tree_price(spot, strike, vol, rate, years, steps):
    dt = years / steps
    u = math.exp(vol * math.sqrt(dt))
    d = 1.0 / u
    p = (math.exp(rate * dt) - d) / (u - d)
    disc = math.exp(-rate * dt)
    values = [0.0] * (steps + 1)
    for j in range(steps + 1):
        values[j] = max(spot * u**j * d ** (steps - j) - strike, 0.0)
    for i in range(steps - 1, -1, -1):
        for j in range(i + 1):
            hold = disc * (p * values[j + 1] + (1.0 - p) * values[j])
            values[j] = max(hold, strike - spot * u**j * d ** (i - j))
    return values[0]
"""

HEAT_SCHEME = """
def heat_loss(conductivity, source, left, right, cells, steps, dt):
    dx = 1.0 / cells
    r = conductivity * dt / (dx * dx)
    u = [0.0] * (cells + 1)
    v = [0.0] * (cells + 1)
    u[0] = left
    u[cells] = right
    v[0] = left
    v[cells] = right
    for _ in range(steps):
        for i in range(1, cells):
            v[i] = u[i] + r * (u[i - 1] - 2.0 * u[i] + u[i + 1]) + dt * source
        for i in range(1, cells):
            u[i] = v[i]
    total = 0.0
    for i in range(cells + 1):
        total += u[i] * u[i]
    return total * dx
"""

ARM_REACH = """
import math


def reach_cost(l1, l2, q1, q2, tx, ty):
    ex = l1 * math.cos(q1) + l2 * math.cos(q1 + q2)
    ey = l1 * math.sin(q1) + l2 * math.sin(q1 + q2)
    bearing = math.atan2(ey, ex)
    target_bearing = math.atan2(ty, tx)
    dist = math.hypot(ex - tx, ey - ty)
    span = math.hypot(ex, ey)
    return dist * dist + 0.1 * (bearing - target_bearing) ** 2 + 0.01 / span**2
"""

POWER_LAW = """
import math


def power_fit(a, b, c, x1, y1, x2, y2, x3, y3):
    e1 = a * x1**b + c / x1**2 - y1
    e2 = a * x2**b + c / x2**2 - y2
    e3 = a * x3**b + c / x3**2 - y3
    scale = math.sqrt(x1) + math.sqrt(x2) + math.sqrt(x3)
    return (e1 * e1 + e2 * e2 + e3 * e3) / scale + 0.5 * math.log(a * a, 2.0)
"""
