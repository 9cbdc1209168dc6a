"""Generation time for synthetic straight-line models, split by stage.

Not a timed test: prints figures. Goals (issue 11): 1,000 statements in at most
0.8 s end to end through the command line, and doubling the size at most 2.1x the
time up to 16,000 statements. Also checks that whole-module black leaves the output
unchanged (up to 4,000 statements: black on the whole output is slow itself).

Stages: parse (libcst, and indexing the module), quote (slicing the statements the
comments quote out of the source, from CPython's parse), passes (SSA, reverse sweep,
optimisation), render (layout, printing, templates), black on the copied primal and
black on long generated statements. `cli` runs `gradwright gen` in a fresh
interpreter, imports included.
Run: python tests/benchmarks/bench_generation.py [sizes...]
"""

from __future__ import annotations

import subprocess
import sys
import tempfile
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

from synthetic import straight_line_model  # noqa: E402

from gradwright import api  # noqa: E402
from gradwright.emission import formatting, module, print_sweeps  # noqa: E402
from gradwright.lowering import frontend  # noqa: E402

CLI_SIZES = (1000, 2000)
BLACK_CHECK_UP_TO = 4000


class _Clock:
    """Wraps ``owner.name`` to add up the time spent inside it."""

    def __init__(self, owner: Any, name: str) -> None:
        self.owner, self.name = owner, name
        self.original: Callable[..., Any] = getattr(owner, name)
        self.seconds = 0.0

    def __enter__(self) -> _Clock:
        def timed(*args: Any, **kwargs: Any) -> Any:
            start = time.perf_counter()
            try:
                return self.original(*args, **kwargs)
            finally:
                self.seconds += time.perf_counter() - start

        setattr(self.owner, self.name, timed)
        return self

    def __exit__(self, *exc: object) -> None:
        setattr(self.owner, self.name, self.original)


def measure(statements: int) -> dict[str, float]:
    source = straight_line_model(statements)
    with (
        _Clock(frontend, "_statement_spans") as quote,
        _Clock(formatting, "_black") as black_all,
        _Clock(formatting, "_black_block") as black_primal,
        _Clock(print_sweeps, "check") as layout_check,
        api._collector_paused(),
    ):
        t0 = time.perf_counter()
        index = frontend.parse_module(source, "synthetic.py")
        t1 = time.perf_counter()
        compiled = api.compile_with_callees(index, ["model"], None)
        t2 = time.perf_counter()
        text = module.render_module(index, compiled, "gradwright gen synthetic.py")
        t3 = time.perf_counter()
    if statements <= BLACK_CHECK_UP_TO:
        assert formatting.format_code(text) == text, "output not black-stable"
    black_statements = black_all.seconds - black_primal.seconds
    return {
        "parse": t1 - t0,
        "quote": quote.seconds,
        "passes": t2 - t1 - quote.seconds,
        "render": t3 - t2 - black_all.seconds - layout_check.seconds,
        "check": layout_check.seconds,
        "black primal": black_primal.seconds,
        "black stmts": black_statements,
        "total": t3 - t0,
        "lines": len(text.splitlines()),
    }


def cli_seconds(statements: int) -> float:
    """`gradwright gen` end to end in a fresh interpreter (best of three)."""
    with tempfile.TemporaryDirectory() as folder:
        model = Path(folder) / "model.py"
        model.write_text(straight_line_model(statements), encoding="utf-8")
        command = [sys.executable, "-m", "gradwright", "gen", "model.py", "model"]
        best = float("inf")
        for _ in range(3):
            start = time.perf_counter()
            subprocess.run(command, cwd=folder, check=True, stdout=subprocess.DEVNULL)
            best = min(best, time.perf_counter() - start)
        return best


def main(sizes: list[int]) -> None:
    columns = ("parse", "quote", "passes", "render", "check", "black primal")
    columns += ("black stmts",)
    print(
        f"{'stmts':>6} {'lines':>6} "
        + " ".join(f"{c:>12}" for c in columns)
        + f" {'total':>7} {'x prev':>6} {'cli':>6}"
    )
    previous: tuple[int, float] | None = None
    for n in sizes:
        m = measure(n)
        growth = ""
        if previous is not None:
            growth = f"{m['total'] / previous[1]:.2f}"
        cli = f"{cli_seconds(n):6.2f}" if n in CLI_SIZES else ""
        print(
            f"{n:6d} {int(m['lines']):6d} "
            + " ".join(f"{m[c]:12.3f}" for c in columns)
            + f" {m['total']:7.2f} {growth:>6} {cli:>6}",
            flush=True,
        )
        previous = (n, m["total"])


if __name__ == "__main__":
    main([int(a) for a in sys.argv[1:]] or [1000, 2000, 4000, 8000, 16000])
