"""Algebra a person does by hand on a NumPy model's reverse sweep.

Rewrites on array expressions whose number-valued parts are known from the shapes
(``shapes.py``); those on sums, selects and element adjoints are in
``array_rewrites.py``:

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
from gradwright.sweeps.array_rewrites import (
    made_of_numbers,
    rearranged,
    summed_out,
    unkept,
)
from gradwright.sweeps.broadcasting import Fitter
from gradwright.sweeps.optimize import substitute


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
        expr = unkept(summed_out(expr, fitter), fitter)
        return _factor(simplify(rearranged(expr, fitter)), fitter)

    for stmt in sweep.statements:
        stmt = _map(stmt, change)
        if (
            isinstance(stmt, AdjointAssign)
            and not stmt.accumulate
            and writes[stmt.var] == 1
            and stmt.var not in keep
            and stmt.var.shape == "scalar"
        ):
            if made_of_numbers(stmt.expr, fitter):
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
        if made_of_numbers(c, fitter) and not made_of_numbers(x, fitter):
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
