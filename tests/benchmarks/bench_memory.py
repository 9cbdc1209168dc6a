"""Memory of the saved values in a time-stepping model, by step count.

Not a timed test: prints figures. The reverse sweep of a loop needs what each
iteration saved, so peak memory should grow linearly with the step count and hold
only what the reverse sweep reads. The second table is a while loop, whose trip
count is known only when it ends: its saved lists grow by one slot per iteration
run, so memory should be linear in the iterations actually run.
Run: python tests/benchmarks/bench_memory.py
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

WHILE_MODEL = """
def coast(speed, drag, dt, t_end):
    t = 0.0
    x = 0.0
    v = speed
    while t < t_end:
        v = v - dt * drag * v * v
        x = x + dt * v
        t = t + dt
    return x
"""


def _peaks(primal, grad, args: tuple) -> tuple[int, int]:
    tracemalloc.start()
    primal(*args)
    primal_peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    tracemalloc.start()
    grad(*args)
    grad_peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    return primal_peak, grad_peak


def while_loop() -> None:
    namespace: dict = {}
    exec(
        compile(gradwright.generate(WHILE_MODEL, ["coast"]), "coast", "exec"), namespace
    )
    print()
    print("while t < t_end (iterations known only when the loop ends)")
    header = f"{'iterations':>10} {'primal peak':>12} {'gradient peak':>14}"
    print(f"{header} {'bytes/iter':>10}")
    previous = None
    for dt in (1e-2, 1e-3, 1e-4):
        args = (30.0, 0.02, dt, 10.0)
        t, runs = 0.0, 0  # the iterations the loop runs (the same floating point)
        while t < args[3]:
            t, runs = t + dt, runs + 1
        primal_peak, grad_peak = _peaks(
            namespace["coast"], namespace["coast_grad"], args
        )
        growth = "" if previous is None else f"  x{grad_peak / previous:.1f}"
        print(
            f"{runs:10d} {primal_peak:12d} {grad_peak:14d}"
            f" {grad_peak / runs:10.1f}{growth}"
        )
        previous = grad_peak


def main() -> None:
    namespace: dict = {}
    exec(compile(gradwright.generate(MODEL, ["drop"]), "drop", "exec"), namespace)
    grad = namespace["drop_grad"]
    primal = namespace["drop"]
    print(f"{'steps':>8} {'primal peak':>12} {'gradient peak':>14} {'bytes/step':>10}")
    previous = None
    for steps in (10**3, 10**4, 10**5):
        args = (100.0, 0.01, 1e-3, steps)
        primal_peak, grad_peak = _peaks(primal, grad, args)
        growth = "" if previous is None else f"  x{grad_peak / previous:.1f}"
        print(
            f"{steps:8d} {primal_peak:12d} {grad_peak:14d}"
            f" {grad_peak / steps:10.1f}{growth}"
        )
        previous = grad_peak


if __name__ == "__main__":
    main()
    while_loop()
