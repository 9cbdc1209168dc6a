"""Algebra a person does by hand on a NumPy model's reverse sweep.

Two rewrites, both on array expressions whose number-valued parts are known from
the shapes (``shapes.py``):

- an adjoint that is a number made of numbers (``nll_bar = -1.0 / n``, a mean's
  seed) is written into its uses instead of being a statement of its own;
- a factor that is a number and common to every term of a sum is taken out once:
  ``-1.0 / n * y / p + 1.0 / n * q / r`` becomes ``(q / r - y / p) / n``, one array
  operation per term fewer;
- a number factor of an adjoint read once, by a matrix product, multiplies the
  product's result instead: ``2.0 * (A.T @ r)``, not ``A.T @ (2.0 * r)`` over every
  row.

Taking a factor out of a sum reassociates: the result may differ from the
term-by-term form in the last bit or two, as NumPy's own pairwise sums do from
sequential ones; like the array ``tanh`` rule, array code takes the cheaper form.
"""

from __future__ import annotations

from collections import Counter
from dataclasses import replace

from gradwright.calculus.algebra import number, simplify
from gradwright.ir import (
    AdjointAssign,
    Apply,
    Bar,
    Const,
    Expr,
    ReverseBranch,
    ReverseLoop,
    ReverseStmt,
    ReverseSweep,
    Var,
    const,
    walk,
)
from gradwright.sweeps.broadcasting import Fitter, column_sums
from gradwright.sweeps.optimize import substitute
from gradwright.sweeps.shapes import axis_text, keyword, reduced_axes

_ARITHMETIC = frozenset({"add", "sub", "mul", "div", "neg"})


def _all_statements(statements: tuple[ReverseStmt, ...]) -> list[ReverseStmt]:
    out: list[ReverseStmt] = []
    for stmt in statements:
        out.append(stmt)
        if isinstance(stmt, ReverseBranch):
            out += _all_statements(stmt.then) + _all_statements(stmt.orelse)
        elif isinstance(stmt, ReverseLoop):
            out += _all_statements(stmt.body)
    return out


def tidy(sweep: ReverseSweep, fitter: Fitter) -> ReverseSweep:
    writes = Counter(
        s.var for s in _all_statements(sweep.statements) if isinstance(s, AdjointAssign)
    )
    keep = set(sweep.wrt) | {carry for carry, _ in sweep.carries}
    reads = Counter(
        node.var
        for s in _all_statements(sweep.statements)
        for e in _exprs(s)
        for node in walk(e)
        if isinstance(node, Bar)
    )
    numbers: dict[Var, Expr] = {}
    scaled: dict[Var, tuple[Expr, Expr]] = {}
    out: list[ReverseStmt] = []

    def change(expr: Expr) -> Expr:
        expr = _smaller_side(substitute(expr, numbers), scaled)
        expr = _unkept(_summed_out(expr, fitter), fitter)
        return _factor(simplify(_rearranged(expr, fitter)), fitter)

    for stmt in sweep.statements:
        stmt = _map(stmt, change)
        if (
            isinstance(stmt, AdjointAssign)
            and not stmt.accumulate
            and writes[stmt.var] == 1
            and stmt.var not in keep
            and stmt.var.shape == "scalar"
        ):
            if _made_of_numbers(stmt.expr, fitter):
                numbers[stmt.var] = stmt.expr
                continue
            factor = _number_factor(stmt.expr, fitter)
            if factor is not None and reads[stmt.var] == 1:
                # read once, by a matrix product: the number multiplies its result
                scaled[stmt.var] = factor
                if _read_by_matmul(sweep.statements, stmt.var):
                    continue
                del scaled[stmt.var]
        out.append(stmt)
    return replace(sweep, statements=tuple(out))


def _exprs(stmt: ReverseStmt) -> list[Expr]:
    return [
        getattr(stmt, name)
        for name in ("expr", "index", "seed", "condition")
        if isinstance(getattr(stmt, name, None), (Apply, Bar, Var, Const))
    ]


def _number_factor(expr: Expr, fitter: Fitter) -> tuple[Expr, Expr] | None:
    """``c * x`` with c a number made of numbers: (c, x)."""
    if isinstance(expr, Apply) and expr.op == "mul":
        c, x = expr.args
        if _made_of_numbers(c, fitter) and not _made_of_numbers(x, fitter):
            return c, x
    return None


def _is_scaled_product(node: Expr, var: Var) -> bool:
    return (
        isinstance(node, Apply)
        and node.op in ("matmul", "np.dot")
        and Bar(var) in node.args
    )


def _read_by_matmul(statements: tuple[ReverseStmt, ...], var: Var) -> bool:
    return any(
        _is_scaled_product(node, var)
        for s in _all_statements(statements)
        for e in _exprs(s)
        for node in walk(e)
    )


def _smaller_side(expr: Expr, scaled: dict[Var, tuple[Expr, Expr]]) -> Expr:
    """``A.T @ x_bar`` with ``x_bar = c * x`` as ``c * (A.T @ x)``: the number
    multiplies the product's (smaller) result, not the long vector."""
    if not scaled or not isinstance(expr, Apply):
        return expr
    args = tuple(_smaller_side(a, scaled) for a in expr.args)
    if expr.op in ("matmul", "np.dot"):
        for k, arg in enumerate(args):
            if isinstance(arg, Bar) and arg.var in scaled:
                c, x = scaled[arg.var]
                inner = Apply(expr.op, args[:k] + (x,) + args[k + 1 :])
                return Apply("mul", (c, inner))
    return Apply(expr.op, args)


#: sums -> the position of the array they add up
_SUMS = {"np.sum": 0, "np.einsum": 1}


def _summed_out(expr: Expr, fitter: Fitter) -> Expr:
    """``np.sum(-g, axis=1)`` as ``-np.sum(g, axis=1)``, and a number factor of a
    summed array outside the sum: the sign or the number applies to the (smaller)
    sum, not to every element."""
    if not isinstance(expr, Apply):
        return expr
    expr = Apply(expr.op, tuple(_summed_out(a, fitter) for a in expr.args))
    place = _SUMS.get(expr.op)
    if place is None or len(expr.args) <= place:
        return expr
    summed = expr.args[place]
    if not isinstance(summed, Apply):
        return expr
    if summed.op == "neg":
        inner, factor = summed.args[0], None
    elif summed.op == "mul" and any(_is_number(a, fitter) for a in summed.args):
        k = 0 if _is_number(summed.args[0], fitter) else 1
        inner, factor = summed.args[1 - k], summed.args[k]
    else:
        return expr
    args = expr.args[:place] + (inner,) + expr.args[place + 1 :]
    total = _summed_out(Apply(expr.op, args), fitter)
    return Apply("neg", (total,)) if factor is None else Apply("mul", (factor, total))


def _unkept(expr: Expr, fitter: Fitter) -> Expr:
    """``np.sum(g, axis=0, keepdims=True)[0, :]`` as ``np.sum(g, axis=0)`` (a
    sign between them too): the kept axes taken off again by indexing them at 0."""
    if not isinstance(expr, Apply):
        return expr
    expr = Apply(expr.op, tuple(_unkept(a, fitter) for a in expr.args))
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


def _rearranged(expr: Expr, fitter: Fitter) -> Expr:
    """Two rewrites a person makes: ``(A.T @ B).T`` as ``B.T @ A`` (the adjoint of
    ``X @ W.T`` in ``W``), and ``np.where(c, a, 0.0) + k * np.where(c, 0.0, b)``
    as ``np.where(c, a, k * b)`` (a leaky ReLU's slope: one select, not two and a
    sum; each element is the one term that was not zero)."""
    if not isinstance(expr, Apply):
        return expr
    if expr.op in ("add", "npscatter"):  # before the terms change
        expr = _gathered(expr, fitter) or expr
    expr = Apply(expr.op, tuple(_rearranged(a, fitter) for a in expr.args))
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
    return fitter.shape(expr) == () and _made_of_numbers(expr, fitter)


def _map(stmt: ReverseStmt, change) -> ReverseStmt:  # noqa: ANN001
    if isinstance(stmt, AdjointAssign):
        return replace(stmt, expr=change(stmt.expr))
    if isinstance(stmt, ReverseBranch):
        return replace(
            stmt,
            then=tuple(_map(s, change) for s in stmt.then),
            orelse=tuple(_map(s, change) for s in stmt.orelse),
        )
    if isinstance(stmt, ReverseLoop):
        return replace(stmt, body=tuple(_map(s, change) for s in stmt.body))
    if hasattr(stmt, "expr"):
        return replace(stmt, expr=change(stmt.expr))  # type: ignore[call-arg]
    if hasattr(stmt, "seed"):
        return replace(stmt, seed=change(stmt.seed))  # type: ignore[call-arg]
    return stmt


def _made_of_numbers(expr: Expr, fitter: Fitter) -> bool:
    """Arithmetic on constants and number-valued forward values only."""
    for node in walk(expr):
        if isinstance(node, Apply) and node.op not in _ARITHMETIC:
            return False
        if isinstance(node, Bar):
            return False
        if isinstance(node, (Var, Const)) and fitter.table.atom(node) != ():
            return False
    return True


# -- common factors of a sum ---------------------------------------------------------


def _terms(expr: Expr, negative: bool, out: list[tuple[bool, Expr]]) -> None:
    if isinstance(expr, Apply) and expr.op == "add":
        _terms(expr.args[0], negative, out)
        _terms(expr.args[1], negative, out)
    elif isinstance(expr, Apply) and expr.op == "sub":
        _terms(expr.args[0], negative, out)
        _terms(expr.args[1], not negative, out)
    elif isinstance(expr, Apply) and expr.op == "neg":
        _terms(expr.args[0], not negative, out)
    else:
        out.append((negative, expr))


def _factors(expr: Expr, over: list[Expr], under: list[Expr], negative: bool) -> bool:
    """``expr`` as a product of ``over`` divided by a product of ``under``; the
    sign it carries comes back."""
    if isinstance(expr, Apply) and expr.op == "mul":
        negative = _factors(expr.args[0], over, under, negative)
        return _factors(expr.args[1], over, under, negative)
    if isinstance(expr, Apply) and expr.op == "div":
        negative = _factors(expr.args[0], over, under, negative)
        return _factors(expr.args[1], under, over, negative)
    if isinstance(expr, Apply) and expr.op == "neg":
        return _factors(expr.args[0], over, under, not negative)
    value = number(expr)
    if value is not None and value < 0:
        expr, negative = const(-value), not negative
    if number(expr) != 1:
        over.append(expr)
    return negative


def _product(factors: list[Expr]) -> Expr:
    out: Expr = const(1.0)
    for f in factors:
        out = Apply("mul", (out, f))
    return out


def _factor(expr: Expr, fitter: Fitter) -> Expr:
    if isinstance(expr, Apply) and expr.op not in ("add", "sub"):
        return Apply(expr.op, tuple(_factor(a, fitter) for a in expr.args))
    if not isinstance(expr, Apply):
        return expr
    terms: list[tuple[bool, Expr]] = []
    _terms(expr, False, terms)
    split = []
    for negative, term in terms:
        over: list[Expr] = []
        under: list[Expr] = []
        negative = _factors(term, over, under, negative)
        split.append((negative, over, under))
    common_over = _common([over for _, over, _ in split], fitter)
    common_under = _common([under for _, _, under in split], fitter)
    if len(terms) < 2 or not (common_over or common_under):
        return Apply(expr.op, tuple(_factor(a, fitter) for a in expr.args))
    total: Expr | None = None
    for negative, over, under in split:
        rest = Apply(
            "div",
            (
                _product(_without(over, common_over)),
                _product(_without(under, common_under)),
            ),
        )
        rest = simplify(rest)
        if total is None:
            total = Apply("neg", (rest,)) if negative else rest
        else:
            total = Apply("sub" if negative else "add", (total, rest))
    assert total is not None
    factored = Apply(
        "div",
        (Apply("mul", (total, _product(common_over))), _product(common_under)),
    )
    return simplify(factored)


def _common(groups: list[list[Expr]], fitter: Fitter) -> list[Expr]:
    """The number-valued factors every group has (as many times as each has)."""
    first = groups[0]
    found: list[Expr] = []
    for factor in first:
        if fitter.shape(factor) != () or found.count(factor) >= min(
            g.count(factor) for g in groups
        ):
            continue
        found.append(factor)
    return found


def _without(factors: list[Expr], common: list[Expr]) -> list[Expr]:
    rest = list(factors)
    for factor in common:
        rest.remove(factor)
    return rest
