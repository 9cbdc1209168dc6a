"""Gradient time / primal time for the samples, four held-out kinds of model
(scalar_models.py: a binomial tree, a heat scheme, atan2/hypot kinematics, a
power-law fit) and a 200-operation scalar model.

Not a timed test: prints figures. The reverse mode's cheap-gradient bound is about
5x the primal's operation count; our target is a median ratio of at most 2.0 on
CPython. Each function's time is the best of REPEAT runs of about RUN_SECONDS of
calls each, the primal's and the gradient's runs interleaved so that both see the
same machine load.
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

import scalar_models  # noqa: E402
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
#: (name, source text, function, arguments, --wrt) of the held-out models: each
#: differentiated in what its user would fit or ask the sensitivity to
HELD_OUT = [
    (
        "binomial_tree",
        scalar_models.BINOMIAL_TREE,
        "tree_price",
        (100.0, 95.0, 0.25, 0.03, 1.0, 40),
        ("spot", "strike", "vol", "rate", "years"),
    ),
    (
        "heat_scheme",
        scalar_models.HEAT_SCHEME,
        "heat_loss",
        (0.8, 0.5, 1.0, 0.0, 20, 30, 0.001),
        ("conductivity", "source", "left", "right"),
    ),
    (
        "arm_reach",
        scalar_models.ARM_REACH,
        "reach_cost",
        (1.0, 0.7, 0.4, 0.9, 0.8, 1.1),
        ("l1", "l2", "q1", "q2"),
    ),
    (
        "power_fit",
        scalar_models.POWER_LAW,
        "power_fit",
        (2.0, 0.7, 0.3, 1.5, 2.9, 2.5, 4.1, 4.0, 5.3),
        ("a", "b", "c"),
    ),
]


def _load(source: str, func: str, wrt: tuple[str, ...] | None) -> dict:
    namespace: dict = {}
    text = gradwright.generate(source, [func], wrt=wrt)
    exec(compile(text, func, "exec"), namespace)
    return namespace


#: runs per model and seconds per run; raise them on a machine with other load
#: (GRADWRIGHT_BENCH_REPEAT=21 GRADWRIGHT_BENCH_SECONDS=0.2) for steadier figures
REPEAT = int(os.environ.get("GRADWRIGHT_BENCH_REPEAT", "7"))
RUN_SECONDS = float(os.environ.get("GRADWRIGHT_BENCH_SECONDS", "0.05"))
TARGET = 2.0


def _best_pair(primal, grad, args) -> tuple[float, float]:
    """Best time per call of each over REPEAT runs, interleaved run by run."""
    timers = timeit.Timer(lambda: primal(*args)), timeit.Timer(lambda: grad(*args))
    once = timers[1].timeit(number=1)
    number = max(1, int(RUN_SECONDS / max(once, 1e-7)))
    best = [float("inf"), float("inf")]
    for _ in range(REPEAT):
        for k in (0, 1):
            best[k] = min(best[k], timers[k].timeit(number=number) / number)
    return best[0], best[1]


def main() -> None:
    cases = [(n, (ROOT / p).read_text(), f, a, None) for n, p, f, a in CASES]
    cases += HELD_OUT
    synthetic = straight_line_model(67, seed=3, name="synthetic")  # ~200 primitives
    cases.append(
        ("synthetic-200op", synthetic, "synthetic", (0.3, 0.7, 1.1, 0.2), None)
    )
    ratios = []
    held_out = []
    print(f"{'model':18} {'primal':>10} {'gradient':>10} {'ratio':>6}")
    for name, source, func, args, wrt in cases:
        ns = _load(source, func, wrt)
        primal, grad = _best_pair(ns[func], ns[f"{func}_grad"], args)
        ratios.append(grad / primal)
        if any(name == h[0] for h in HELD_OUT):
            held_out.append(grad / primal)
        print(
            f"{name:18} {primal * 1e6:8.2f}us {grad * 1e6:8.2f}us {grad / primal:6.2f}"
        )
    print(f"held-out models: median ratio {statistics.median(held_out):.2f}")
    print(
        f"median ratio: {statistics.median(ratios):.2f} (target <= {TARGET});"
        f" load average {os.getloadavg()[0]:.2f} on {os.cpu_count()} CPUs"
    )


if __name__ == "__main__":
    main()
