"""Synthetic straight-line models for the benchmarks (invented, deterministic)."""

from __future__ import annotations

import random

_UNARY = ("math.sin", "math.cos", "math.exp", "math.tanh", "math.log1p", "math.sqrt")


def straight_line_model(statements: int, seed: int = 7, name: str = "model") -> str:
    """A function of four inputs with ``statements`` assignments, each one to three
    primitives over earlier values, ending in a scalar return."""
    rng = random.Random(seed)
    values = ["a", "b", "c", "d"]
    lines = ["import math", "", "", f"def {name}(a, b, c, d):"]
    for i in range(statements):
        x, y = rng.choice(values[-8:]), rng.choice(values)
        kind = i % 5
        if kind == 0:
            rhs = f"{x} * {y} + 0.5"
        elif kind == 1:
            rhs = f"{_UNARY[i % 3]}({x}) - 0.25 * {y}"
        elif kind == 2:
            rhs = f"{x} / (1.0 + {y} * {y})"
        elif kind == 3:
            rhs = f"math.tanh({x} + {y})"
        else:
            rhs = f"{x} * 0.9 + {y} * 0.1"
        target = f"v{i}"
        lines.append(f"    {target} = {rhs}")
        values.append(target)
    lines.append(f"    return {values[-1]} + {values[-2]} * {values[-3]}")
    return "\n".join(lines) + "\n"
