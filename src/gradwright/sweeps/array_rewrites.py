"""Rewrites a person makes on a NumPy model's array adjoints (``factoring.tidy``
applies them to every expression):

- a sign, a number factor or a number divisor of a summed array outside the sum
  (``-np.sum(g, axis=1)``, ``np.sum(g * w) / total``), and a kept axis indexed
  away again folded into the sum (``np.sum(g, axis=0, keepdims=True)[0, :]`` is
  the column sums);
- ``(A.T @ B).T`` as ``B.T @ A``; two complementary selects as one
  (``np.where(c, a, k * b)``); a choice between numbers as Python's conditional;
- element adjoints of a short vector gathered into one ``np.array([a, b])``.

Exact, but for ``np.sum(c * g)`` as ``c * np.sum(g)``, which reassociates (see
``factoring.py``).
"""

from __future__ import annotations

from gradwright.calculus.algebra import number, simplify, split_sign
from gradwright.ir import Apply, Bar, Const, Expr, Var, const, walk
from gradwright.sweeps.broadcasting import Fitter, column_sums
from gradwright.sweeps.shapes import axis_text, keyword, reduced_axes

_ARITHMETIC = frozenset({"add", "sub", "mul", "div", "neg"})


def made_of_numbers(expr: Expr, fitter: Fitter) -> bool:
    """Arithmetic on constants and number-valued forward values only."""
    for node in walk(expr):
        if isinstance(node, Apply) and node.op not in _ARITHMETIC:
            return False
        if isinstance(node, Bar):
            return False
        if isinstance(node, (Var, Const)) and fitter.table.atom(node) != ():
            return False
    return True


#: sums -> the position of the array they add up
_SUMS = {"np.sum": 0, "np.einsum": 1}


def summed_out(expr: Expr, fitter: Fitter) -> Expr:
    """``np.sum(-g, axis=1)`` as ``-np.sum(g, axis=1)``, and a number factor of a
    summed array outside the sum: the sign or the number applies to the (smaller)
    sum, not to every element."""
    if not isinstance(expr, Apply):
        return expr
    expr = Apply(expr.op, tuple(summed_out(a, fitter) for a in expr.args))
    place = _SUMS.get(expr.op)
    if place is None or len(expr.args) <= place:
        return expr
    summed = expr.args[place]
    if not isinstance(summed, Apply):
        return expr
    negative, magnitude = split_sign(summed)
    op = "neg"
    if negative:  # (also -g * w, whose minus split_sign finds on the left)
        inner, factor = magnitude, None
    elif summed.op == "mul" and any(_is_number(a, fitter) for a in summed.args):
        k = 0 if _is_number(summed.args[0], fitter) else 1
        inner, factor, op = summed.args[1 - k], summed.args[k], "mul"
    elif summed.op == "div" and _is_number(summed.args[1], fitter):
        inner, factor, op = summed.args[0], summed.args[1], "div"
    else:
        return expr
    args = expr.args[:place] + (inner,) + expr.args[place + 1 :]
    total = summed_out(Apply(expr.op, args), fitter)
    if factor is None:
        return Apply("neg", (total,))
    return Apply(op, (factor, total) if op == "mul" else (total, factor))


def unkept(expr: Expr, fitter: Fitter) -> Expr:
    """``np.sum(g, axis=0, keepdims=True)[0, :]`` as ``np.sum(g, axis=0)`` (a
    sign between them too): the kept axes taken off again by indexing them at 0."""
    if not isinstance(expr, Apply):
        return expr
    expr = Apply(expr.op, tuple(unkept(a, fitter) for a in expr.args))
    if expr.op != "npindex" or not isinstance(expr.args[1], Const):
        return expr
    inner, negative = expr.args[0], False
    if isinstance(inner, Apply) and inner.op == "neg":
        inner, negative = inner.args[0], True
    if not (
        isinstance(inner, Apply)
        and inner.op == "np.sum"
        and keyword(inner.args, "keepdims") == "True"
    ):
        return expr
    pieces = [p.strip() for p in expr.args[1].text.split(",")]
    values = iter(expr.args[2:])
    taken = []
    for k, piece in enumerate(pieces):
        if piece == "{}" and number(next(values)) == 0:
            taken.append(k)
        elif piece != ":":
            return expr
    shape = fitter.shape(inner.args[0])
    if not isinstance(shape, tuple) or len(pieces) != len(shape):
        return expr
    if reduced_axes(keyword(inner.args, "axis"), len(shape)) != tuple(taken):
        return expr
    if taken == [0] and len(shape) == 2:
        summed = column_sums(inner.args[0])
    else:
        summed = Apply("np.sum", (inner.args[0], axis_text(tuple(taken))))
    return Apply("neg", (summed,)) if negative else summed


def rearranged(expr: Expr, fitter: Fitter) -> Expr:
    """Two rewrites a person makes: ``(A.T @ B).T`` as ``B.T @ A`` (the adjoint of
    ``X @ W.T`` in ``W``), and ``np.where(c, a, 0.0) + k * np.where(c, 0.0, b)``
    as ``np.where(c, a, k * b)`` (a leaky ReLU's slope: one select, not two and a
    sum; each element is the one term that was not zero)."""
    if not isinstance(expr, Apply):
        return expr
    if expr.op in ("add", "npscatter"):  # before the terms change
        expr = _gathered(expr, fitter) or expr
    expr = Apply(expr.op, tuple(rearranged(a, fitter) for a in expr.args))
    inner = expr.args[0] if expr.op == "T" else None
    if isinstance(inner, Apply) and inner.op == "matmul":
        left, right = inner.args
        if isinstance(left, Apply) and left.op == "T":
            return Apply("matmul", (Apply("T", (right,)), left.args[0]))
    if expr.op == "ifexp" and all(fitter.shape(a) == () for a in expr.args):
        # a choice between numbers: Python's conditional, not an array's np.where
        return Apply("numselect", expr.args)
    if expr.op == "add":
        first, second = (_scaled_select(a, fitter) for a in expr.args)
        if first is not None and second is not None and first[1] == second[1]:
            (k1, c, a1, b1), (k2, _, a2, b2) = first, second
            zero = const(0.0)
            if b1 == zero and a2 == zero:
                return Apply("ifexp", (_times(k1, a1), c, _times(k2, b2)))
            if a1 == zero and b2 == zero:
                return Apply("ifexp", (_times(k2, a2), c, _times(k1, b1)))
    return expr


#: the longest vector whose element adjoints are written out as np.array([...])
_SHORT = 4


def _gathered(expr: Expr, fitter: Fitter) -> Expr | None:
    """A sum holding adjoints of elements of one short vector (``x[0]``, ``x[1]``,
    each a scatter into zeros) as one ``np.array([a, b])``, zeros where no term
    is (a state vector's element reads)."""
    terms: list[Expr] = []
    _add_terms(expr, terms)
    places: dict[Expr, dict[int, Expr]] = {}
    first: dict[Expr, int] = {}
    rest: list[tuple[int, Expr]] = []
    for k, term in enumerate(terms):
        entry = _element_adjoint(term, fitter)
        if entry is None:
            rest.append((k, term))
            continue
        vector, position, value = entry
        slots = places.setdefault(vector, {})
        first.setdefault(vector, k)
        before = slots.get(position)
        slots[position] = value if before is None else Apply("add", (before, value))
    if not places:
        return None
    for vector, slots in places.items():
        (size,) = fitter.table.atom(vector)  # type: ignore[misc]
        items = tuple(slots.get(j, const(0.0)) for j in range(size))
        if len(slots) == size:  # no 0.0 to make it floats: int adjoints would not
            items += (Const("dtype=float", None),)
        rest.append((first[vector], Apply("np.array", items)))
    rest.sort(key=lambda item: item[0])
    total = rest[0][1]
    for _, term in rest[1:]:
        total = Apply("add", (total, term))
    return total


def _add_terms(expr: Expr, out: list[Expr]) -> None:
    if isinstance(expr, Apply) and expr.op == "add":
        for arg in expr.args:
            _add_terms(arg, out)
    else:
        out.append(expr)


def _element_adjoint(expr: Expr, fitter: Fitter) -> tuple[Expr, int, Expr] | None:
    """``_gw_scatter(v, x, np.s_[k])`` with x a short vector of known length and
    v a number: (x, k, v)."""
    if not (isinstance(expr, Apply) and expr.op == "npscatter" and len(expr.args) == 4):
        return None
    value, vector, pattern, index = expr.args
    shape = fitter.table.atom(vector)
    position = number(index)
    if not (
        isinstance(pattern, Const)
        and pattern.text == "{}"
        and isinstance(shape, tuple)
        and len(shape) == 1
        and isinstance(shape[0], int)
        and shape[0] <= _SHORT
        and type(position) is int
        and -shape[0] <= position < shape[0]
        and fitter.shape(value) == ()
    ):
        return None
    return vector, position % shape[0], value  # type: ignore[operator]


def _scaled_select(
    expr: Expr, fitter: Fitter
) -> tuple[Expr | None, Expr, Expr, Expr] | None:
    """``k * np.where(c, a, b)`` (k a number, or none): (k, c, a, b)."""
    factor: Expr | None = None
    if isinstance(expr, Apply) and expr.op == "mul":
        for k, part in enumerate(expr.args):
            if _is_number(part, fitter):
                factor, expr = part, expr.args[1 - k]
                break
    if isinstance(expr, Apply) and expr.op == "ifexp":
        a, c, b = expr.args
        return factor, c, a, b
    return None


def _times(factor: Expr | None, expr: Expr) -> Expr:
    return expr if factor is None else simplify(Apply("mul", (factor, expr)))


def _is_number(expr: Expr, fitter: Fitter) -> bool:
    return fitter.shape(expr) == () and made_of_numbers(expr, fitter)
