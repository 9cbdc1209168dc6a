"""Memory of the saved values in a time-stepping model, by step count.

Not a timed test: prints figures. The reverse sweep of a loop needs what each
iteration saved, so peak memory should grow linearly with the step count and hold
only what the reverse sweep reads. Run: python tests/benchmarks/bench_memory.py
"""

from __future__ import annotations

import tracemalloc

import gradwright

MODEL = """
def drop(height, drag, dt, steps):
    y = height
    v = 0.0
    for _ in range(steps):
        a = -9.81 - drag * v * abs(v)
        y = y + dt * v
        v = v + dt * a
    return y * y + v
"""


def main() -> None:
    namespace: dict = {}
    exec(compile(gradwright.generate(MODEL, ["drop"]), "drop", "exec"), namespace)
    grad = namespace["drop_grad"]
    primal = namespace["drop"]
    print(f"{'steps':>8} {'primal peak':>12} {'gradient peak':>14} {'bytes/step':>10}")
    previous = None
    for steps in (10**3, 10**4, 10**5):
        args = (100.0, 0.01, 1e-3, steps)
        tracemalloc.start()
        primal(*args)
        primal_peak = tracemalloc.get_traced_memory()[1]
        tracemalloc.stop()
        tracemalloc.start()
        grad(*args)
        grad_peak = tracemalloc.get_traced_memory()[1]
        tracemalloc.stop()
        growth = "" if previous is None else f"  x{grad_peak / previous:.1f}"
        print(
            f"{steps:8d} {primal_peak:12d} {grad_peak:14d}"
            f" {grad_peak / steps:10.1f}{growth}"
        )
        previous = grad_peak


if __name__ == "__main__":
    main()
