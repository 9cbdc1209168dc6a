"""Which array adjoints a NumPy model's reverse sweep may change in place.

``x_bar += g`` adds into the array ``x_bar`` holds; that is right only when no
other name holds the same array. An adjoint is *unshared* when its shape is known
to be its value's (so the sum does not grow it), every write to it is at the top
of the sweep (no branch or loop decides which array it holds), its first write
makes a new array (arithmetic, a NumPy function, a matrix product: not a copy of
another name, a view or a helper's result) and no statement copies it into
another name or takes a view of it. Such an adjoint of a ``wrt`` parameter is also
returned as it is, without ``_gw_shaped`` making it an array of its own again, and
so is a parameter's adjoint whose one write copies an unshared new array that only
it copies and no later statement changes (``x_bar = value_bar_1``).
In-place arithmetic also needs a float array (``+=`` of floats into an int array
is an error): only an adjoint whose first write surely makes floats takes it.

An unshared float adjoint that no statement reads or writes after one that reads
it elementwise, ``y_bar = x_bar * (1.0 - y * y)``, lends that statement its array:
``x_bar *= 1.0 - y * y``, and ``y_bar`` is printed under ``x_bar``'s name from
there on (``ReverseSweep.updates``). On a large array a fresh result costs more
than the arithmetic (new pages are faulted in), and no adjoint array is shared:
the lending adjoint is dead, and the array was never a parameter's or a forward
value's.
"""

from __future__ import annotations

from dataclasses import replace

from gradwright.calculus.primitives import COMPARISONS
from gradwright.calculus.rules import ELEMENTWISE_OPS
from gradwright.ir import (
    AdjointAssign,
    Apply,
    Bar,
    CallAdjoint,
    Const,
    ElementAdjoint,
    Expr,
    PopAdjoint,
    ReverseBranch,
    ReverseLoop,
    ReverseStmt,
    ReverseSweep,
    SpreadAdjoint,
    Var,
    walk,
)
from gradwright.sweeps.broadcasting import Fitter
from gradwright.sweeps.optimize import mentions

#: ops whose result is a new array (or a number), never one of their operands
#: (``copy`` prints as the plain name)
_FRESH = (
    (ELEMENTWISE_OPS - {"copy"})
    | COMPARISONS
    | {"ifexp", "matmul", "np.matmul", "np.dot", "np.outer", "np.sum", "np.einsum"}
)
#: ops whose result may be (a view of) an operand
_VIEWS = frozenset(
    {
        "T",
        "reshape",
        "np.reshape",
        "npindex",
        "copy",
        "np.broadcast_to",
        "np.expand_dims",
        "np.transpose",
        "_gw_unbroadcast",
        "_gw_unreduce",
        "_gw_unmean",
        "_gw_shaped",
    }
)
#: ops whose result is floats whatever their operands are
_ALWAYS_FLOAT = frozenset(
    {"div", "float", "np.mean"}
    | {
        op
        for op in ELEMENTWISE_OPS
        if op.removeprefix("np.")
        in (
            "exp exp2 expm1 log log2 log10 log1p sqrt cbrt sin cos tan sinh cosh tanh"
            " asin acos atan asinh acosh atanh arcsin arccos arctan arcsinh arccosh"
            " arctanh atan2 arctan2 hypot erf erfc"
        ).split()
    }
)
#: ops whose result is floats when an operand is (NumPy's type promotion)
_PROMOTING = frozenset(
    {"add", "sub", "mul", "neg", "pos", "abs", "np.abs", "np.absolute", "np.fabs"}
    | {"np.square", "np.sum", "np.einsum", "matmul", "np.matmul", "np.dot"}
    | {"np.outer", "np.maximum", "np.minimum", "np.clip", "np.where", "ifexp"}
    | {"T", "np.broadcast_to", "np.expand_dims", "np.transpose"}
)
#: an elementwise operator whose left operand can be updated in place (``*=``)
_UPDATES = frozenset({"mul", "add", "sub", "div"})
_COMMUTE = frozenset({"mul", "add"})


def _aliases(expr: Expr) -> set[Var]:
    """Adjoints whose array ``expr`` may be, or be a view of."""
    if isinstance(expr, Bar):
        return {expr.var}
    if isinstance(expr, Apply) and (expr.op in _VIEWS or expr.op not in _FRESH):
        return {v for a in expr.args for v in _aliases(a)}
    return set()


def _surely_float(expr: Expr, floats: set[Var]) -> bool:
    """Whether ``expr`` evaluates to floats (an int or bool array otherwise may,
    where a seed of 1.0 was folded away: ``x_bar = y * z`` of int data)."""
    if isinstance(expr, Const):
        return isinstance(expr.value, float)
    if isinstance(expr, Bar):
        return expr.var in floats
    if isinstance(expr, Apply):
        if expr.op in _ALWAYS_FLOAT:
            return True
        if expr.op in _PROMOTING:
            return any(_surely_float(a, floats) for a in expr.args)
    return False


def _statements(stmt: ReverseStmt) -> list[ReverseStmt]:
    if isinstance(stmt, ReverseBranch):
        return [*stmt.then, *stmt.orelse]
    if isinstance(stmt, ReverseLoop):
        return list(stmt.body)
    return []


def _factors(expr: Expr) -> list[Expr]:
    if isinstance(expr, Apply) and expr.op == "mul":
        return _factors(expr.args[0]) + _factors(expr.args[1])
    return [expr]


def _lending(expr: Expr, lenders: set[Var]) -> tuple[Var, Expr] | None:
    """``expr`` as ``lender op rest`` with the lender's adjoint as left operand,
    for the first adjoint of ``lenders`` it reads once: (lender, rewritten)."""
    if not isinstance(expr, Apply) or expr.op not in _UPDATES:
        return None
    found = [n.var for n in walk(expr) if isinstance(n, Bar) and n.var in lenders]
    once = [v for v in found if found.count(v) == 1]
    if expr.op == "mul":
        # a product's factors in any order (only the rounding may differ)
        factors = _factors(expr)
        for k, factor in enumerate(factors):
            if isinstance(factor, Bar) and factor.var in once and len(factors) > 1:
                rest = factors[:k] + factors[k + 1 :]
                product = rest[0]
                for f in rest[1:]:
                    product = Apply("mul", (product, f))
                return factor.var, Apply("mul", (factor, product))
        return None
    left, right = expr.args
    if isinstance(left, Bar) and left.var in once:
        return left.var, expr
    if expr.op in _COMMUTE and isinstance(right, Bar) and right.var in once:
        return right.var, Apply(expr.op, (right, left))
    return None


def plan_in_place(sweep: ReverseSweep, fitter: Fitter) -> ReverseSweep:
    top: dict[Var, list[AdjointAssign]] = {}
    unfit: set[Var] = set()  # written inside a branch or loop, or shared
    # the statements that may copy an adjoint's array or view it, by adjoint
    aliased_by: dict[Var, list[ReverseStmt]] = {}
    nested_writes: set[Var] = set()

    def visit(stmt: ReverseStmt, nested: bool) -> None:
        exprs: list[Expr] = []
        if isinstance(stmt, AdjointAssign):
            if nested:
                unfit.add(stmt.var)
                nested_writes.add(stmt.var)
            else:
                top.setdefault(stmt.var, []).append(stmt)
            exprs.append(stmt.expr)
        elif isinstance(stmt, (ElementAdjoint, SpreadAdjoint)):
            exprs.append(stmt.expr)
        elif isinstance(stmt, ReverseBranch):
            exprs.append(stmt.condition)
        elif isinstance(stmt, CallAdjoint):  # the helper may hand its seed back
            exprs += [stmt.seed, *stmt.args]
        for expr in exprs:
            for alias in _aliases(expr):
                unfit.add(alias)
                aliased_by.setdefault(alias, []).append(stmt)
            # an adjoint read twice in one statement stays out of in-place work
        for inner in _statements(stmt):
            visit(inner, True)

    for stmt in sweep.statements:
        visit(stmt, False)
    carried = {carry for carry, _ in sweep.carries}

    def unshared_but_first(var: Var, copied_by: ReverseStmt | None = None) -> bool:
        """Every condition of an unshared adjoint but the first write's op (but
        for one statement's copy of it, ``copied_by``)."""
        writes = top.get(var)
        wanted = fitter.table.atom(var)
        shared = var in unfit and (
            var in nested_writes or aliased_by.get(var) != [copied_by]
        )
        return not (
            writes is None
            or shared
            or var in carried
            or var.shape == "list"
            or writes[0].accumulate
            or not isinstance(wanted, tuple)
            or fitter.adj.get(var) != wanted
            # the first array must have the full shape: += cannot grow it
            or fitter.shape(writes[0].expr) != wanted
            or any(
                fitter.shape(w.expr) is None or any(n == Bar(var) for n in walk(w.expr))
                for w in writes
            )
        )

    fresh: set[Var] = set()
    floats: set[Var] = set()
    updates: dict[Var, Var] = {}
    split: set[Var] = set()
    statements: list[ReverseStmt | None] = list(sweep.statements)
    for position, stmt in enumerate(statements):
        if not isinstance(stmt, AdjointAssign) or stmt.accumulate:
            continue
        var = stmt.var
        if top.get(var, [None])[0] is not stmt:
            continue  # not its first write at the top of the sweep
        if _surely_float(stmt.expr, floats):
            floats.add(var)
        if not unshared_but_first(var):
            continue
        if isinstance(stmt.expr, Apply) and stmt.expr.op in _FRESH:
            fresh.add(var)
        if var in sweep.wrt:
            continue  # a parameter's adjoint keeps its own name and array
        wanted = fitter.table.atom(var)
        lenders = {
            d
            for d in fresh & floats
            if d != var
            and d not in sweep.wrt
            and fitter.table.atom(d) == wanted
            and wanted != ()
            and not any(
                s is not None and mentions(s, d) for s in statements[position + 1 :]
            )
        }
        lent = _lending(stmt.expr, lenders)
        if lent is None:
            continue
        lender, expr = lent
        fresh.add(var)
        floats.add(var)
        moved = _movable(statements, position, lender, expr, fitter, floats)
        if moved is not None:
            # the lender's one write moves here as the update; the rest of the
            # rule, heavier, makes the array
            where, own = moved
            statements[where] = None
            statements[position] = replace(stmt, expr=own)
            split.add(var)
            continue
        # the array is the lender's: unshared, float, of the full shape
        updates[var] = lender
        statements[position] = replace(stmt, expr=expr)
    in_place = frozenset(v for v in fresh & floats if len(top[v]) > 1)
    # a number's adjoint goes through _gw_shaped, which makes it a float (not an
    # int count, not a 0-d array)
    bare = {v for v in sweep.wrt if v in fresh and fitter.table.atom(v) != ()}
    for v in sweep.wrt:
        # x_bar = d, the one write of x_bar and the one copy of d, a new array
        # of x_bar's shape no statement after changes: x_bar is returned as it is
        writes = top.get(v, [])
        if (
            v in bare
            or v in unfit
            or len(writes) != 1
            or writes[0].accumulate
            or not isinstance(writes[0].expr, Bar)
        ):
            continue
        d = writes[0].expr.var
        wanted = fitter.table.atom(v)
        position = statements.index(writes[0])
        first = top.get(d, [None])[0]
        if not (
            d not in sweep.wrt
            and unshared_but_first(d, copied_by=writes[0])
            and isinstance(first, AdjointAssign)
            and isinstance(first.expr, Apply)
            and first.expr.op in _FRESH
            and wanted != ()
            and fitter.table.atom(d) == wanted
            and not any(
                s is not None and d in _written(s) for s in statements[position:]
            )
        ):
            continue
        bare.add(v)
    return replace(
        sweep,
        statements=tuple(s for s in statements if s is not None),
        in_place=in_place,
        bare=frozenset(bare),
        updates=tuple(updates.items()),
        split=frozenset(split),
    )


def _written(stmt: ReverseStmt) -> set[Var]:
    """The adjoints ``stmt`` (or a statement inside it) writes."""
    out: set[Var] = set()
    if isinstance(stmt, AdjointAssign):
        out.add(stmt.var)
    elif isinstance(stmt, (ElementAdjoint, SpreadAdjoint)):
        out.add(stmt.root)
    elif isinstance(stmt, PopAdjoint):
        out |= {stmt.root} | ({stmt.var} if stmt.var is not None else set())
    elif isinstance(stmt, CallAdjoint):
        out |= set(stmt.parts)
    for inner in _statements(stmt):
        out |= _written(inner)
    return out


def _operations(expr: Expr, fitter: Fitter, shape: tuple) -> int:
    """The full-size arrays computing ``expr`` makes (a view or a smaller
    operand's arithmetic costs nothing to count)."""
    return sum(
        isinstance(node, Apply) and fitter.shape(node) == shape for node in walk(expr)
    )


def _movable(
    statements: list[ReverseStmt | None],
    position: int,
    lender: Var,
    expr: Apply,
    fitter: Fitter,
    floats: set[Var],
) -> tuple[int, Apply] | None:
    """``y_bar = x_bar * rest`` where ``x_bar = d`` is the lender's one write,
    elementwise, and ``rest`` takes more array operations than ``d``: the
    position of that write, and ``rest * d`` (printed ``y_bar = rest`` then
    ``y_bar *= d``). Made in that order, the heavier operand's temporaries come
    and go before the lighter one's result is held: ``H_bar_1 = 1.0 - H * H``
    then ``H_bar_1 *= r_bar * W2.T`` holds two full-size arrays at once where
    ``H_bar *= 1.0 - H * H`` holds three."""
    op, (_, rest) = expr.op, expr.args
    writes = [
        k
        for k, s in enumerate(statements[:position])
        if s is not None and lender in _written(s)
    ]
    if op not in _COMMUTE or len(writes) != 1:
        return None
    where = writes[0]
    first = statements[where]
    assert isinstance(first, AdjointAssign)
    defined = first.expr
    shape = fitter.table.atom(lender)
    assert isinstance(shape, tuple)
    between = [s for s in statements[where + 1 : position] if s is not None]
    reads = {n.var for n in walk(defined) if isinstance(n, Bar)}
    if (
        not isinstance(defined, Apply)
        or not isinstance(rest, Apply)
        or rest.op not in _FRESH
        or fitter.shape(rest) != shape
        or not _surely_float(rest, floats)
        or _operations(rest, fitter, shape) <= _operations(defined, fitter, shape)
        # only adjoint statements in between: no loop restores a forward name
        or any(not isinstance(s, AdjointAssign) for s in between)
        or any(mentions(s, lender) or _written(s) & reads for s in between)
    ):
        return None
    return where, Apply(op, (rest, defined))
