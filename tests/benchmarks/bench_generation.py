"""Generation time for synthetic straight-line models, split by stage.

Not a timed test: prints figures. Targets: our own passes at most 25% of the total;
1,000 statements at most 2 s end to end; doubling the size at most 2.2x the time.
Also checks that whole-module black leaves the output unchanged.
Run: python tests/benchmarks/bench_generation.py [sizes...]
"""

from __future__ import annotations

import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

import black  # noqa: E402
import libcst  # noqa: E402
from synthetic import straight_line_model  # noqa: E402

from gradwright import api, emit, formatting, frontend  # noqa: E402


class _BlackClock:
    """Wraps black.format_str to add up the time spent inside it."""

    def __init__(self) -> None:
        self.seconds = 0.0
        self.original = black.format_str

    def __call__(self, *args, **kwargs):  # noqa: ANN002, ANN003, ANN204
        start = time.perf_counter()
        try:
            return self.original(*args, **kwargs)
        finally:
            self.seconds += time.perf_counter() - start


def measure(statements: int) -> dict[str, float]:
    source = straight_line_model(statements)
    clock = _BlackClock()
    formatting.black.format_str = clock  # type: ignore[assignment]
    # the stages generate() runs, with the collector paused as generate() does
    try:
        with api._collector_paused():
            t0 = time.perf_counter()
            libcst.parse_module(source)
            t1 = time.perf_counter()
            index = frontend.parse_module(source, "synthetic.py")
            t2 = time.perf_counter()
            compiled = [api.compile_function(index, "model", None)]
            t3 = time.perf_counter()
            text = emit.render_module(
                index, compiled, "gradwright gen synthetic.py model"
            )
            t4 = time.perf_counter()
    finally:
        formatting.black.format_str = clock.original
    assert black.format_str(text, mode=black.Mode()) == text, "output not black-stable"
    parse = t2 - t1
    passes = t3 - t2
    render = (t4 - t3) - clock.seconds
    total = parse + passes + (t4 - t3)
    return {
        "parse": parse,
        "passes": passes,
        "render": render,
        "black": clock.seconds,
        "total": total,
        "lines": len(text.splitlines()),
        "bare_parse": t1 - t0,
    }


def main(sizes: list[int]) -> None:
    print(
        f"{'stmts':>6} {'lines out':>9} {'parse':>7} {'passes':>7} {'render':>7}"
        f" {'black':>7} {'total':>7} {'passes%':>7} {'x prev':>6}"
    )
    previous: tuple[int, float] | None = None
    for n in sizes:
        m = measure(n)
        growth = ""
        if previous is not None:
            growth = f"{m['total'] / previous[1]:.2f}"
            growth += f"/{n / previous[0]:.0f}x"
        print(
            f"{n:6d} {m['lines']:9d} {m['parse']:7.2f} {m['passes']:7.2f}"
            f" {m['render']:7.2f} {m['black']:7.2f} {m['total']:7.2f}"
            f" {100 * m['passes'] / m['total']:6.1f}% {growth:>6}"
        )
        previous = (n, m["total"])


if __name__ == "__main__":
    main([int(a) for a in sys.argv[1:]] or [1000, 2000, 5000, 10000])
