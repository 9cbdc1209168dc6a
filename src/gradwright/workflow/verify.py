"""``gradwright verify``: the generated gradient against central finite differences.

Unlike ``gen``, this runs code: the generated module, which holds a copy of the
model's function. The finite differences are taken of that copy (it is
bit-identical to the source's function, and needs none of the model file's other
imports).

Step size. For a central difference the truncation error falls as h**2 and the
rounding error grows as eps/h; balancing them gives h proportional to eps**(1/3).
The step for parameter x is h = eps**(1/3) * max(|x|, typ), where typ is the
parameter's typical size (Dennis & Schnabel, *Numerical Methods for Unconstrained
Optimization and Nonlinear Equations*, Appendix A, algorithm A5.6.4, the central
difference gradient; the eps**(1/3) balance is also derived in Nocedal & Wright,
*Numerical Optimization*, 2nd ed., Section 8.1). typ defaults to 1, which gives
h = eps**(1/3) * max(1, |x|); a parameter whose values are far from 1 (a
coefficient of 1e-7, say) needs its size given, by ``--scale`` or through its
``--range`` (the larger magnitude of its ends), or the step swamps it.
x + h and x - h are rounded to floats before the difference is divided by their
actual distance, so the representation error of the step itself does not enter.

Judging an entry: it agrees when
``|g - d| <= rtol * max(|g|, |d|) + noise``, where ``noise`` bounds the rounding error
of the difference itself (64 ulps of ``max(|f(x+h)|, |f(x-h)|)`` over the step) so a
gradient entry that is zero is not failed for the noise of its estimate. The relative
error shown is ``|g - d| / max(|g|, |d|)``.
"""

from __future__ import annotations

import inspect
import sys
import types
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

from gradwright.workflow import nonfinite
from gradwright.workflow.kinds import ARRAY, NUMBER_OR_ARRAY
from gradwright.workflow.points import (
    DEFAULT_LENGTH,
    DEFAULT_RTOL,
    NOISE_ULPS,
    Value,
    describe,
)

__all__ = ["DEFAULT_RTOL", "NOISE_ULPS"]

EPSILON = sys.float_info.epsilon
INTEGER_NOTE = "integer: zero by definition"


@dataclass(frozen=True)
class Entry:
    name: str
    gradient: float
    difference: float | None  # None when f(x +- h) could not be evaluated
    relative_error: float | None
    ok: bool
    note: str = ""


@dataclass
class PointResult:
    point: dict[str, Value]
    entries: list[Entry] = field(default_factory=list)
    skipped: str | None = None  # why the point is outside the model's domain
    problems: list[str] = field(default_factory=list)  # failures other than entries

    @property
    def failed(self) -> bool:
        return bool(self.problems) or any(not e.ok for e in self.entries)


@dataclass(frozen=True)
class Subject:
    """What is verified: the module's text and one function of it."""

    module_text: str
    function: str
    wrt: tuple[str, ...]
    source_label: str | None  # the model file, for locating statements
    source_text: str | None


def call(func: Callable[..., Any], point: Mapping[str, Value]) -> Any:
    """``func`` at ``point``: positional-only parameters by position, others by name."""
    params = inspect.signature(func).parameters
    positional = [
        point[n]
        for n, p in params.items()
        if p.kind is p.POSITIONAL_ONLY and n in point
    ]
    named = {
        n: v
        for n, v in point.items()
        if params[n].kind is not params[n].POSITIONAL_ONLY
    }
    return func(*positional, **named)


def step(x: float, typical: float = 1.0) -> float:
    return EPSILON ** (1 / 3) * max(abs(x), typical)


def central_difference(
    func: Callable[..., Any],
    point: Mapping[str, Value],
    name: str,
    typical: float = 1.0,
    index: int | None = None,
) -> tuple[float, float]:
    """(estimate of d func / d name, bound on its rounding noise); ``index``
    picks an element of a list parameter."""
    value = point[name]
    x = value if index is None else value[index]  # type: ignore[index]
    h = step(x, typical)  # type: ignore[arg-type]
    up_x, down_x = x + h, x - h  # type: ignore[operator]

    def moved(to: float) -> dict[str, Value]:
        if index is None:
            return {**point, name: to}
        changed = value.copy() if hasattr(value, "shape") else list(value)  # type: ignore[union-attr,arg-type]
        changed[index] = to
        return {**point, name: changed}

    up = float(call(func, moved(up_x)))
    down = float(call(func, moved(down_x)))
    width = up_x - down_x
    noise = NOISE_ULPS * EPSILON * max(abs(up), abs(down)) / width
    return (up - down) / width, noise


def load(module_text: str, label: str) -> dict[str, Any]:
    """Execute the generated module (this is where ``verify`` runs user code)."""
    module = types.ModuleType("gradwright_verify_module")
    # registered while it runs: a dataclass among the copied module data looks
    # its module up in sys.modules
    sys.modules[module.__name__] = module
    try:
        exec(compile(module_text, label, "exec"), vars(module))
    finally:
        del sys.modules[module.__name__]
    return vars(module)


def check_point(
    subject: Subject,
    namespace: Mapping[str, Any],
    point: dict[str, Value],
    rtol: float,
    sizes: Mapping[str, float],
    integers: frozenset[str] = frozenset(),
) -> PointResult:
    """One point's table rows; ``integers`` are trip counts and indices, whose
    derivative is zero by definition (the model is piecewise constant in them)."""
    result = PointResult(point)
    primal = namespace[subject.function]
    grad = namespace[f"{subject.function}_grad"]
    try:
        expected = call(primal, point)
    except Exception as error:  # outside the model's domain: not the gradient's fault
        result.skipped = f"{subject.function} raises {type(error).__name__}: {error}"
        return result
    if not nonfinite.is_finite(expected):
        result.skipped = f"{subject.function} is {expected!r} here"
        return result
    try:
        value, grads = call(grad, point)
    except Exception as error:
        result.problems.append(
            f"{subject.function}_grad raises {type(error).__name__}: {error}"
            f" while {subject.function} is finite ({expected!r})"
        )
        result.problems.extend(_explain(subject, point))
        return result
    if not isinstance(grads, tuple) or len(grads) != len(subject.wrt):
        result.problems.append(
            f"the gradient {grads!r} is not a tuple of {len(subject.wrt)} entries"
        )
        return result
    if not _same(value, expected):
        result.problems.append(
            f"the value {value!r} differs from {subject.function}(...) = {expected!r}"
        )
    bad = [n for n, g in zip(subject.wrt, grads, strict=True) if not _finite(g)]
    for name, gradient in zip(subject.wrt, grads, strict=True):
        typical = sizes.get(name, 1.0)
        given = point.get(name)
        if name in integers:
            ok = _finite(gradient) and gradient == 0
            result.entries.append(Entry(name, gradient, None, None, ok, INTEGER_NOTE))
        elif isinstance(given, list) and isinstance(gradient, list):
            for i, element in enumerate(gradient):
                entry = _entry(primal, point, name, element, rtol, typical, i)
                result.entries.append(entry)
        elif hasattr(given, "shape") and hasattr(gradient, "shape"):
            import numpy as np  # array parameters: every element is checked

            for where in np.ndindex(given.shape):  # type: ignore[union-attr]
                element = float(gradient[where])
                entry = _entry(primal, point, name, element, rtol, typical, where)
                result.entries.append(entry)
        else:
            result.entries.append(_entry(primal, point, name, gradient, rtol, typical))
    if not bad and any(not e.ok for e in result.entries):
        result.problems.extend(_accuracy_hints(subject))
    if bad:
        shown = ", ".join(
            repr(g) for n, g in zip(subject.wrt, grads, strict=True) if n in bad
        )
        plural = len(bad) > 1
        result.problems.append(
            f"the value is finite ({value!r}) but gradient entr"
            f"{'ies' if plural else 'y'} {', '.join(bad)} {'are' if plural else 'is'}"
            f" {shown}"
        )
        result.problems.extend(_explain(subject, point))
    return result


def _accuracy_hints(subject: Subject) -> list[str]:
    """Known inaccurate forms in the model: they can spoil the value, the gradient
    and the finite difference alike."""
    hints = []
    for statement in nonfinite.quoted_statements(
        subject.module_text, f"{subject.function}_grad"
    ):
        hint = nonfinite.stable_rewrite(statement)
        if hint is not None:
            hints.append(f"hint: `{statement}`: {hint}")
    return hints


def _same(a: Any, b: Any) -> bool:
    """Bit for bit, for numbers and for arrays alike."""
    if hasattr(a, "shape") or hasattr(b, "shape"):
        import numpy as np

        return bool(np.array_equal(a, b))
    return bool(a == b)


def _finite(value: Any) -> bool:
    return nonfinite.is_finite(value)


def _entry(
    primal: Callable[..., Any],
    point: Mapping[str, Value],
    name: str,
    gradient: float,
    rtol: float,
    typical: float,
    index: int | None = None,
) -> Entry:
    where = ",".join(map(str, index)) if isinstance(index, tuple) else index
    label = name if index is None else f"{name}[{where}]"
    if not _finite(gradient):
        return Entry(label, gradient, None, None, False, "not finite")
    if not isinstance(gradient, (int, float)):
        note = f"unchecked: the entry is a {type(gradient).__name__}"
        return Entry(label, gradient, None, None, True, note)
    try:
        difference, noise = central_difference(primal, point, name, typical, index)
    except Exception as error:
        note = f"unchecked: f(x +- h) raises {type(error).__name__}: {error}"
        return Entry(label, gradient, None, None, True, note)
    if not _finite(difference):
        note = "unchecked: the difference is not finite"
        return Entry(label, gradient, None, None, True, note)
    gap = abs(gradient - difference)
    scale = max(abs(gradient), abs(difference))
    relative = gap / scale if scale > 0 else 0.0
    ok = gap <= rtol * scale + noise
    return Entry(label, gradient, difference, relative, ok)


def _explain(subject: Subject, point: Mapping[str, Value]) -> list[str]:
    """Where the sweep first went non-finite (or raised), and how to rewrite it."""
    found = nonfinite.trace(
        subject.module_text,
        f"{subject.function}_grad",
        lambda grad: call(grad, point),
    )
    lines: list[str] = []
    if found.forward is not None:
        lines += _finding("first non-finite forward value", found.forward, subject)
    if found.reverse is not None:
        lines += _finding("first non-finite adjoint", found.reverse, subject)
    if found.error is not None:
        lines += _finding("", found.error, subject)
    if not lines:
        lines.append("no generated statement produced it (see the return statement)")
    return lines


def _finding(what: str, finding: nonfinite.Finding, subject: Subject) -> list[str]:
    statement = finding.statement
    at = f"generated line {statement.line}"
    if finding.error is not None:
        head = f"raised in the {statement.phase} sweep ({at})"
    else:
        head = f"{what}: {finding.name} = {finding.value!r} ({at})"
    lines = [head]
    if statement.source is not None:
        where = subject.source_label or "source"
        line = None
        if subject.source_text is not None:
            line = nonfinite.locate_source(
                subject.source_text, subject.function, statement.source
            )
        prefix = f"{where}:{line}" if line is not None else where
        lines.append(f"  from {prefix}: {statement.source}")
    if finding.reads:
        reads = ", ".join(f"{n} = {v!r}" for n, v in finding.reads)
        lines.append(f"  it read: {reads}")
    if statement.source is not None:
        hint = nonfinite.stable_rewrite(statement.source)
        if hint is not None:
            lines.append(f"hint: {hint}")
    return lines


# ---------------------------------------------------------------------------------
# the report


def _number(value: Any) -> str:
    if value is None:
        return "-"
    if isinstance(value, float):
        return f"{value:.12g}"
    return repr(value)


def render(subject: Subject, results: Sequence[PointResult], rtol: float) -> str:
    out: list[str] = []
    for result in results:
        out.append(f"{subject.function}_grad at {describe(result.point)}")
        if result.skipped is not None:
            out.append(f"  skipped: {result.skipped} (outside the model's domain)")
            continue
        if not result.entries:
            out.extend(f"  {problem}" for problem in result.problems)
            continue
        rows = [("parameter", "gradient", "finite difference", "rel. error", "")]
        for e in result.entries:
            status = "FAIL" if not e.ok else "ok" if e.difference is not None else ""
            status = f"{status} ({e.note})" if status and e.note else status or e.note
            relative = "-" if e.relative_error is None else f"{e.relative_error:.2e}"
            rows.append(
                (e.name, _number(e.gradient), _number(e.difference), relative, status)
            )
        widths = [max(len(row[i]) for row in rows) for i in range(4)]
        for row in rows:
            cells = [row[i].ljust(widths[i]) for i in range(4)] + [row[4]]
            out.append(("  " + "  ".join(cells)).rstrip())
        for problem in result.problems:
            out.append(f"  {problem}")
    return "\n".join(out) + "\n"


def summary(subject: Subject, results: Sequence[PointResult], rtol: float) -> str:
    checked = [r for r in results if r.skipped is None]
    failed = [r for r in checked if r.failed]
    name = f"{subject.function}_grad"
    if not checked:
        return f"verify: {name}: every point is outside the model's domain"
    unchecked = sum(
        1
        for r in checked
        for e in r.entries
        if e.ok and e.difference is None and e.note != INTEGER_NOTE
    )
    note = f"; {unchecked} entries unchecked" if unchecked else ""
    skipped = len(results) - len(checked)
    note += f"; {skipped} point(s) skipped" if skipped else ""
    if failed:
        return (
            f"verify: {name}: FAILED at {len(failed)} of {len(checked)} point(s)"
            f" (rtol {rtol:g}{note})"
        )
    return (
        f"verify: {name}: agrees with central differences at {len(checked)}"
        f" point(s) (rtol {rtol:g}{note})"
    )


#: how many shape assignments guess_shapes tries before giving up
SHAPE_TRIES = 4096


def guess_shapes(
    primal: Callable[..., Any],
    kinds: Mapping[str, str],
    given: Mapping[str, tuple[int, ...]],
    fixed: Mapping[str, Value],
    draw: Callable[[dict[str, tuple[int, ...]], int | None], list[dict[str, Value]]],
) -> dict[str, tuple[int, ...]]:
    """Shapes for a NumPy model's parameters that ``--shape`` does not give.

    The code says which parameters are arrays and which may be numbers, not their
    shapes: each is tried as a matrix, a vector (and a number where that may be),
    every dimension :data:`points.DEFAULT_LENGTH`, so that products always conform,
    until the model returns a finite number. ``()`` means a number.
    """
    open_names = [
        n
        for n, k in kinds.items()
        if k in (ARRAY, NUMBER_OR_ARRAY) and n not in given and n not in fixed
    ]
    if not open_names:
        return {}
    import itertools
    import warnings

    import numpy as np

    size = DEFAULT_LENGTH
    options = [
        [(size, size), (size,)] if kinds[n] == ARRAY else [(), (size,), (size, size)]
        for n in open_names
    ]
    combinations = itertools.islice(itertools.product(*options), SHAPE_TRIES)
    with warnings.catch_warnings(), np.errstate(all="ignore"):
        warnings.simplefilter("ignore")
        for combination in combinations:
            shapes = dict(zip(open_names, combination, strict=True))
            try:
                result = call(primal, draw({**shapes, **given}, 1)[0])
                if np.ndim(result) == 0 and nonfinite.is_finite(float(result)):
                    return shapes
            except Exception:  # this guess does not fit the model: try the next
                continue
    return {}
