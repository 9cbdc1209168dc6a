"""Gradient time / primal time for the samples and a 200-operation scalar model.

Not a timed test: prints figures. The reverse mode's cheap-gradient bound is about
5x the primal's operation count; our target is a median ratio of at most 2.0 on
CPython. Each function's time is the best of REPEAT runs of NUMBER calls, the
primal's and the gradient's runs interleaved so that both see the same machine load.
Run: python tests/benchmarks/bench_runtime.py
"""

from __future__ import annotations

import os
import statistics
import sys
import timeit
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parents[1]
sys.path.insert(0, str(HERE))

from synthetic import straight_line_model  # noqa: E402

import gradwright  # noqa: E402

CASES = [
    (
        "thermistor",
        "samples/thermistor.py",
        "fit_loss",
        (1.1e-3, 2.4e-4, 9.0e-8, 1.0e4, 298.0),
    ),
    ("cable_sag", "samples/cable_sag.py", "rig_loss", (120.0, 40.0)),
    (
        "fuel_hedge",
        "samples/fuel_hedge.py",
        "call_value",
        (101.0, 100.0, 0.3, 0.02, 0.5),
    ),
]


def _load(source: str, func: str) -> dict:
    namespace: dict = {}
    exec(compile(gradwright.generate(source, [func]), func, "exec"), namespace)
    return namespace


REPEAT = 7
NUMBER = 20000
TARGET = 2.0


def _best_pair(primal, grad, args) -> tuple[float, float]:
    """Best time per call of each over REPEAT runs, interleaved run by run."""
    timers = timeit.Timer(lambda: primal(*args)), timeit.Timer(lambda: grad(*args))
    best = [float("inf"), float("inf")]
    for _ in range(REPEAT):
        for k in (0, 1):
            best[k] = min(best[k], timers[k].timeit(number=NUMBER) / NUMBER)
    return best[0], best[1]


def main() -> None:
    cases = [(n, (ROOT / p).read_text(), f, a) for n, p, f, a in CASES]
    synthetic = straight_line_model(67, seed=3, name="synthetic")  # ~200 primitives
    cases.append(("synthetic-200op", synthetic, "synthetic", (0.3, 0.7, 1.1, 0.2)))
    ratios = []
    print(f"{'model':18} {'primal':>10} {'gradient':>10} {'ratio':>6}")
    for name, source, func, args in cases:
        ns = _load(source, func)
        primal, grad = _best_pair(ns[func], ns[f"{func}_grad"], args)
        ratios.append(grad / primal)
        print(
            f"{name:18} {primal * 1e6:8.2f}us {grad * 1e6:8.2f}us {grad / primal:6.2f}"
        )
    print(
        f"median ratio: {statistics.median(ratios):.2f} (target <= {TARGET});"
        f" load average {os.getloadavg()[0]:.2f} on {os.cpu_count()} CPUs"
    )


if __name__ == "__main__":
    main()
