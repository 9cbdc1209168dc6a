"""Fitting a NumPy model's adjoints to their values' shapes, with shapes known.

The reverse sweep asks this module three things (see ``shapes.py`` for the shapes
and the invariant that an adjoint may be smaller than its value):

- :meth:`Fitter.fit`: a broadcasting operand's contribution summed back to its own
  shape: nothing when it has the result's shape, ``np.sum(g, axis=..., keepdims=...)``
  when the broadcast is known, the generic ``_gw_unbroadcast`` otherwise;
- :meth:`Fitter.full`: the adjoint as a full array for rules that need one;
- :meth:`Fitter.rule`: reductions and matrix products written out for known
  ranks (for C = A @ B, A_bar = C_bar @ B^T and B_bar = A^T @ C_bar; Giles, 2008),
  instead of the helpers that decide at run time.

It also follows each adjoint's own shape through the sweep (:meth:`record`);
where a branch or a loop makes it uncertain, it is unknown, and the rules that
need a full array get one.
"""

from __future__ import annotations

from collections.abc import Mapping

from gradwright.calculus.algebra import number, simplify
from gradwright.calculus.primitives import COMPARISONS
from gradwright.calculus.rules import ELEMENTWISE_OPS
from gradwright.ir import Apply, Atom, Bar, Const, Expr, Var, const
from gradwright.sweeps.shapes import (
    Dim,
    Shape,
    ShapeTable,
    axis_text,
    broadcast,
    index_shape,
    keyword,
    matmul_shape,
    reduce_shape,
    reduced_axes,
    shape_expr,
    size_of,
)

_ELEMENTWISE = ELEMENTWISE_OPS | COMPARISONS | {"ifexp", "numselect"}
_MATMUL = frozenset({"matmul", "np.matmul", "np.dot"})
#: helpers -> the operand whose shape their result has
_SHAPED_LIKE = {
    "_gw_unbroadcast": 1,
    "_gw_unreduce": 1,
    "_gw_unmean": 1,
    "_gw_unextreme": 1,
    "_gw_unprod": 1,
    "_gw_matmul_left": 1,
    "_gw_matmul_right": 2,
    "npscatter": 1,
}
#: max and min reductions -> the function that picks their first extreme element
_EXTREMES = {
    "np.max": "np.argmax",
    "np.amax": "np.argmax",
    "np.min": "np.argmin",
    "np.amin": "np.argmin",
}
#: ops whose rules read their incoming adjoint elementwise (it may be smaller)
SMALL_OK = _ELEMENTWISE | {"copy", "ndcopy"}


class Fitter:
    def __init__(self, table: ShapeTable, sizes: Mapping[str, Var]) -> None:
        self.table = table
        self.sizes = dict(sizes)
        self.symbol_of = {v: name for name, v in self.sizes.items()}
        #: each adjoint's own shape so far; None: not known
        self.adj: dict[Var, Shape | None] = {}

    # -- following the adjoints' shapes -------------------------------------------

    def snapshot(self) -> dict[Var, Shape | None]:
        return dict(self.adj)

    def restore(self, state: dict[Var, Shape | None]) -> None:
        self.adj = dict(state)

    def merge(self, *states: dict[Var, Shape | None]) -> None:
        keys = set().union(*states)
        self.adj = {
            k: (s[0] if all(x == s[0] for x in s) else None)
            for k in keys
            for s in [[state.get(k) for state in states]]
        }

    def forget(self, var: Var) -> None:
        self.adj[var] = None

    def record(self, var: Var, expr: Expr, accumulate: bool) -> None:
        shape = self.shape(expr)
        if accumulate:
            before = self.adj.get(var)
            shape = (
                broadcast(before, shape)
                if before is not None and shape is not None
                else None
            )
        self.adj[var] = shape

    def shape(self, expr: Expr) -> Shape | None:
        """The shape ``expr`` evaluates to, or None."""
        if isinstance(expr, Bar):
            return self.adj.get(expr.var)
        if isinstance(expr, (Var, Const)):
            return self.table.atom(expr)
        op, args = expr.op, expr.args
        if op == "partial":
            return self.table.atom(args[0])
        if op == "shape_tuple":
            dims: list[Dim] = []
            for item in args:
                if isinstance(item, Const) and isinstance(item.value, int):
                    dims.append(item.value)
                elif isinstance(item, Var) and item in self.symbol_of:
                    dims.append(self.symbol_of[item])
                else:
                    return None
            return tuple(dims)
        if op in ("np.broadcast_to", "np.zeros"):
            return self.shape(args[-1])
        if op == "npindex":  # g[k]: a part of np.array([...])'s adjoint
            pattern = args[1].text if isinstance(args[1], Const) else ""
            whole = self.shape(args[0])
            if whole is None:
                return None
            return index_shape(whole, pattern, args[2:], self.table.atom)
        if op == "np.expand_dims":
            inner = self.shape(args[0])
            axes = (
                reduced_axes(keyword(args, "axis"), len(inner) + 1)
                if isinstance(inner, tuple)
                else None
            )
            if axes is None or len(axes) != 1:
                return None
            return inner[: axes[0]] + (1,) + inner[axes[0] :]  # type: ignore[index]
        if op == "np.arange":  # positions along an axis: np.arange(n)
            size = args[0]
            if isinstance(size, Const) and isinstance(size.value, int):
                return (size.value,)
            return (self.symbol_of[size],) if size in self.symbol_of else None
        if op == "reshape" and all(isinstance(a, Const) for a in args[1:]):
            # positions made a column, .reshape(-1, 1, ...): the -1 keeps the size
            inner = self.shape(args[0])
            ones = [a.value for a in args[2:]]  # type: ignore[union-attr]
            if isinstance(inner, tuple) and len(inner) == 1 and set(ones) <= {1}:
                return inner + (1,) * len(ones)
            return None
        if op in _SHAPED_LIKE:  # helpers that return an array of one operand's shape
            return self.table.atom(args[_SHAPED_LIKE[op]])
        shapes = [self.shape(a) for a in args if not _is_keyword(a)]
        if any(s is None for s in shapes):
            return None
        if op in _ELEMENTWISE:
            result: Shape | None = ()
            for s in shapes:
                result = broadcast(result, s) if result is not None else None  # type: ignore[arg-type]
            return result
        if op in ("np.sum", "np.argmax", "np.argmin"):
            return reduce_shape(shapes[0], args)  # type: ignore[arg-type]
        if op == "np.einsum" and args == (COLUMN_SUMS, args[1]):
            s = shapes[1]
            return s[1:] if isinstance(s, tuple) and len(s) == 2 else None
        if op in _MATMUL:
            return matmul_shape(shapes[0], shapes[1])  # type: ignore[arg-type]
        if op == "T":
            s = shapes[0]
            return tuple(reversed(s)) if isinstance(s, tuple) else None
        if op == "np.outer":
            a, b = shapes
            if isinstance(a, tuple) and isinstance(b, tuple):
                return (*a, *b) if len(a) == len(b) == 1 else None
        return None

    # -- full arrays -----------------------------------------------------------------

    def full(self, g: Expr, value: Var) -> Expr:
        """``g`` (an adjoint of ``value``) as an array of the value's shape."""
        own, wanted = self.shape(g), self.table.atom(value)
        if own == wanted or wanted == ():  # a number's adjoint is a number
            return g
        if isinstance(wanted, tuple):
            shape = shape_expr(wanted, self.sizes)
            if shape is not None:
                return Apply("np.broadcast_to", (g, shape))
        return g

    # -- broadcasting operands -------------------------------------------------------

    def fit(self, total: Expr, var: Var, result: Var) -> Expr:
        """``total`` (a contribution at ``result``'s shape) summed to ``var``'s."""
        t, v = self.table.atom(result), self.table.atom(var)
        c = self.shape(simplify(total))
        if c is None and isinstance(t, tuple):
            total, c = self.full(total, result), t
        if v == t:
            return total
        if isinstance(t, tuple) and isinstance(v, tuple) and isinstance(c, tuple):
            planned = self._sum_to(total, c, v, t)
            if planned is not None:
                return planned
        if c != t and isinstance(t, tuple):
            total = self.full(total, result)
        return Apply("_gw_unbroadcast", (total, var))

    def _sum_to(
        self, g: Expr, c: tuple[Dim, ...], v: tuple[Dim, ...], t: tuple[Dim, ...]
    ) -> Expr | None:
        r, e = len(t), len(c)
        if e > r or len(v) > r:
            return None
        lead: list[int] = []  # axes of g beyond v's rank: summed away
        inner: list[int] = []  # axes where v has size 1: summed, kept
        factor: list[Dim] = []  # axes g is uniform along: its size multiplies
        for k in range(r):
            size = t[k]
            vd = v[k - (r - len(v))] if k >= r - len(v) else None
            cd = c[k - (r - e)] if k >= r - e else None
            if vd is not None and vd != 1 and vd != size:
                return None  # not a broadcast this plan knows
            if cd is not None and cd != 1 and cd != size:
                return None
            if vd == size:
                continue
            if cd is None or cd == 1:
                if size != 1:
                    factor.append(size)
                if cd is not None and vd is None:
                    lead.append(k - (r - e))
                continue
            if vd is None:
                lead.append(k - (r - e))
            else:
                inner.append(k - (r - e))
        if not v:  # a number: everything summed
            out: Expr = Apply("np.sum", (g,)) if e else g
        else:
            out = g
            if lead == [0] and e == 2 and c[1] != 1:
                # (a column's np.sum is contiguous: NumPy's pairwise sum)
                out = column_sums(out)
            elif lead:
                out = Apply("np.sum", (out, axis_text(tuple(lead))))
            if inner:
                shifted = tuple(a - len(lead) for a in inner)
                keep = Const("keepdims=True", None)
                out = Apply("np.sum", (out, axis_text(shifted), keep))
        if factor:
            count = size_of(factor, self.sizes)
            if count is None:
                return None
            out = Apply("mul", (out, count))
        return out

    # -- reductions and matrix products with known shapes ----------------------------

    def rule(
        self, op: str, g: Expr, args: tuple[Atom, ...]
    ) -> tuple[Expr | None, ...] | None:
        """Contributions for ``op``'s arguments written for their known shapes,
        or None to use the rule table (``g`` is the result's adjoint as it is)."""
        if op in ("np.sum", "np.mean"):
            return self._reduction(op, g, args)
        if op in _EXTREMES:
            return self._extreme(op, g, args)
        if op == "npindex":
            return self._axes_only(g, args)
        if op in _MATMUL:
            return self._matmul(g, args)
        if op in ("T", "np.transpose") and self.shape(g) == ():
            return (g,)  # a number stands for itself transposed
        return None

    def _reduction(
        self, op: str, g: Expr, args: tuple[Atom, ...]
    ) -> tuple[Expr | None, ...] | None:
        shape = self.table.atom(args[0])
        if not isinstance(shape, tuple):
            return None
        axes = reduced_axes(keyword(args, "axis"), len(shape))
        if axes is None:
            return None
        rest = (None,) * (len(args) - 1)
        keepdims = keyword(args, "keepdims") == "True"
        # g stands for its broadcast to the result's shape; with keepdims, or with
        # the leading axes reduced, that broadcasts on to x's shape as it is
        if not (keepdims or axes == tuple(range(len(axes)))):
            expanded = self._expanded(g, shape, axes)
            if expanded is None:
                return None
            g = expanded
        if op == "np.mean":
            count = size_of([shape[a] for a in axes], self.sizes)
            if count is None:
                return None
            g = Apply("div", (g, count))
        return (g, *rest)

    def _axes_only(
        self, g: Expr, args: tuple[Atom, ...]
    ) -> tuple[Expr | None, ...] | None:
        """The adjoint of an index that only adds axes (``x[:, None]``) or drops
        axes of size 1 (``peak[:, 0]`` of an (n, 1) array): the same elements, so
        the adjoint is ``g`` indexed the other way (``g[:, 0]``, ``g[:, None]``),
        not a scatter into zeros."""
        shape = self.table.atom(args[0])
        pattern = args[1].text if isinstance(args[1], Const) else ""
        if not isinstance(shape, tuple) or not pattern:
            return None
        dims = iter(shape)
        values = iter(args[2:])
        back: list[str] = []
        for piece in (p.strip() for p in pattern.split(",")):
            if piece == "None":
                back.append("{}")  # index 0 of the axis it added
                continue
            dim = next(dims, None)
            if piece == ":" and dim is not None:
                back.append(":")
            elif piece == "{}" and dim == 1 and number(next(values)) in (0, -1):
                back.append("None")
            else:
                return None
        result = index_shape(shape, pattern, args[2:], self.table.atom)
        if result is None or back.count(":") == len(back):
            return None
        rest = (None,) * (len(args) - 1)
        if self.shape(g) == ():  # a number stands for its broadcast either way
            return (g, *rest)
        added = tuple(k for k, piece in enumerate(back) if piece == "{}")
        if (
            "None" not in back
            and isinstance(g, Apply)
            and g.op == "np.sum"
            and keyword(g.args, "keepdims") == "True"
            and reduced_axes(keyword(g.args, "axis"), len(result)) == added
        ):
            # np.sum(h, axis=0, keepdims=True)[0, :] is np.sum(h, axis=0)
            summed = g.args[0]
            if added == (0,) and self.shape(summed) == result and len(result) == 2:
                return (column_sums(summed), *rest)
            return (Apply("np.sum", (summed, axis_text(added))), *rest)
        if self.shape(g) != result:
            wanted = shape_expr(result, self.sizes)  # type: ignore[arg-type]
            if wanted is None:
                return None
            g = Apply("np.broadcast_to", (g, wanted))
        zeros = (const(0),) * back.count("{}")
        return (Apply("npindex", (g, Const(", ".join(back), None), *zeros)), *rest)

    def _extreme(
        self, op: str, g: Expr, args: tuple[Atom, ...]
    ) -> tuple[Expr | None, ...] | None:
        """A max's or min's adjoint along one axis: the first extreme element of
        each line gets it all, written as a one-hot mask times the adjoint
        (``(np.argmax(Z, axis=1, keepdims=True) == np.arange(10)) * m_bar``).
        Measured at 10^4 x 10, 0.46 ms against the generic helper's 1.07 ms (a
        zeros array, two transposes and a scatter)."""
        shape = self.table.atom(args[0])
        if not isinstance(shape, tuple) or not shape:
            return None
        axes = reduced_axes(keyword(args, "axis"), len(shape))
        if axes is None or len(axes) != 1:
            return None  # over several axes: the helper flattens them
        (axis,) = axes
        size = shape[axis]
        count = const(size) if isinstance(size, int) else self.sizes.get(size)
        own = self.shape(g)
        if count is None or own is None:
            return None
        kept = tuple(d for k, d in enumerate(shape) if k != axis)
        if keyword(args, "keepdims") != "True" and own != () and own == kept:
            g = Apply("np.expand_dims", (g, axis_text(axes)))
        elif own != () and keyword(args, "keepdims") != "True":
            return None  # an adjoint of some other shape: the helper fits it
        pick = Apply(
            _EXTREMES[op], (args[0], axis_text(axes), Const("keepdims=True", None))
        )
        positions: Expr = Apply("np.arange", (count,))
        if axis != len(shape) - 1:  # a column of positions, one row per index
            trailing = (const(1),) * (len(shape) - 1 - axis)
            positions = Apply("reshape", (positions, const(-1), *trailing))
        mask = Apply("eq", (pick, positions))
        if isinstance(simplify(g), Const):  # a bool mask times 1.0 would stay bool
            return (Apply("ifexp", (g, mask, const(0.0))),) + (None,) * (len(args) - 1)
        return (Apply("mul", (mask, g)),) + (None,) * (len(args) - 1)

    def _expanded(
        self, g: Expr, shape: tuple[Dim, ...], axes: tuple[int, ...]
    ) -> Expr | None:
        kept = tuple(d for k, d in enumerate(shape) if k not in axes)
        own = self.shape(g)
        if own != kept:
            target = shape_expr(kept, self.sizes)
            if target is None:
                return None
            g = Apply("np.broadcast_to", (g, target))
        return Apply("np.expand_dims", (g, axis_text(axes)))

    def _matmul(self, g: Expr, args: tuple[Atom, ...]) -> tuple[Expr, Expr] | None:
        a, b = args
        sa, sb = self.table.atom(a), self.table.atom(b)
        out = matmul_shape(sa, sb)
        if out is None or not isinstance(sa, tuple) or not isinstance(sb, tuple):
            return None
        if out != ():
            wanted = shape_expr(out, self.sizes)  # type: ignore[arg-type]
            if self.shape(g) != out:
                if wanted is None:
                    return None
                g = Apply("np.broadcast_to", (g, wanted))
        if len(sa) == 1 and len(sb) == 1:
            return Apply("mul", (g, b)), Apply("mul", (g, a))
        if len(sa) == 2 and len(sb) == 1:
            return Apply("np.outer", (g, b)), Apply("matmul", (Apply("T", (a,)), g))
        if len(sa) == 1 and len(sb) == 2:
            return Apply("matmul", (b, g)), Apply("np.outer", (a, g))
        # an outer product (a column times a row) is one multiply, not a gemm
        left = Apply("mul" if sb[1] == 1 else "matmul", (g, Apply("T", (b,))))
        right = Apply("mul" if sa[0] == 1 else "matmul", (Apply("T", (a,)), g))
        return left, right


#: the subscripts of a 2-D array's column sums
COLUMN_SUMS = Const('"ij->j"', None)


def column_sums(g: Expr) -> Expr:
    """``np.einsum("ij->j", g)``: a 2-D array's column sums. Measured on a tall
    C-ordered array (10^5 x 16), 0.6 ms against ``np.sum(g, axis=0)``'s 2.2 ms
    (a short inner loop per row); it allocates nothing and adds the rows in the
    same order, one after another (the same floats where we compared)."""
    return Apply("np.einsum", (COLUMN_SUMS, g))


def _is_keyword(expr: Expr) -> bool:
    return isinstance(expr, Const) and expr.value is None and "=" in expr.text
