"""Trip counts and saved-list slots written as a person would write them.

A loop ``for i in range(start, stop, step)`` saves its values in a list with one
slot per iteration. For a constant step the list's length and the slot of the
current iteration are short integer expressions (``steps`` and ``steps - 1 - i``
for ``range(steps - 1, -1, -1)``), with the integer constants of sums folded.
``[0.0] * n`` is empty for a negative ``n``, as the range is, so no ``max`` is
needed.
"""

from __future__ import annotations

from gradwright.ir import Apply, Const, Expr, const


def _int(expr: Expr) -> int | None:
    if (
        isinstance(expr, Const)
        and isinstance(expr.value, int)
        and not isinstance(expr.value, bool)
    ):
        return expr.value
    return None


def _terms(expr: Expr, sign: int, out: list[tuple[int, Expr]]) -> int:
    """Adds ``sign * expr``'s non-constant terms to ``out``; returns its constant."""
    value = _int(expr)
    if value is not None:
        return sign * value
    if isinstance(expr, Apply) and expr.op in ("add", "sub") and len(expr.args) == 2:
        left = _terms(expr.args[0], sign, out)
        return left + _terms(expr.args[1], sign if expr.op == "add" else -sign, out)
    if isinstance(expr, Apply) and expr.op == "neg":
        return _terms(expr.args[0], -sign, out)
    if isinstance(expr, Apply) and expr.op == "pos":
        return _terms(expr.args[0], sign, out)
    out.append((sign, expr))
    return 0


def affine(expr: Expr) -> Expr:
    """``expr`` with its sums' integer constants folded and opposite terms
    cancelled (``steps - 1 + 1`` is ``steps``); exact on integers."""
    terms: list[tuple[int, Expr]] = []
    constant = _terms(expr, 1, terms)
    kept: list[tuple[int, Expr]] = []
    for sign, term in terms:
        opposite = next((k for k, t in enumerate(kept) if t == (-sign, term)), None)
        if opposite is not None:
            del kept[opposite]
        else:
            kept.append((sign, term))
    first = next((k for k, (sign, _) in enumerate(kept) if sign > 0), None)
    if first is None:
        result: Expr = const(constant)
        rest = kept
        constant = 0
    else:
        result = kept[first][1]
        rest = kept[:first] + kept[first + 1 :]
    for sign, term in rest:
        result = Apply("add" if sign > 0 else "sub", (result, term))
    if constant:
        result = Apply("add" if constant > 0 else "sub", (result, const(abs(constant))))
    return result


def slot(index: Expr, start: Expr, step: Expr) -> Expr:
    """The position of iteration ``index`` of ``range(start, stop, step)``."""
    k = _int(step)
    if k is not None and k < 0:
        offset = affine(Apply("sub", (start, index)))
        return offset if k == -1 else Apply("floordiv", (offset, const(-k)))
    offset = affine(Apply("sub", (index, start)))
    return offset if k == 1 else Apply("floordiv", (offset, step))


def count(start: Expr, stop: Expr, step: Expr) -> Expr | None:
    """The length of ``range(start, stop, step)`` when negative stands for empty,
    or None for a step not known when generating."""
    k = _int(step)
    if k is None or k == 0:
        return None
    span = Apply("sub", (stop, start)) if k > 0 else Apply("sub", (start, stop))
    if abs(k) == 1:
        return affine(span)
    return Apply(
        "floordiv", (affine(Apply("add", (span, const(abs(k) - 1)))), const(abs(k)))
    )
