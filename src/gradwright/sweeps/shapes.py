"""Array shapes worked out at generation time, for a NumPy model's reverse sweep.

Each SSA value gets a shape: a tuple of sizes (an int, or a name such as ``n`` from
a declared shape, ``gen --shape X=n,5``), or :class:`Like`, a shape known only to
equal another value's (an undeclared parameter's, or one the rules below cannot
work out). Shapes come from declared shapes, literals and numeric constants (no
shape), elementwise broadcasting, reductions, ``@``, ``.T`` and ``.reshape`` with
literal sizes; nothing is executed. Two names stand for the same size wherever they
appear: the generated gradient checks the declared shapes when it is called
(``_gw_check_shapes``), so a call with other shapes is an error, never a wrong
gradient.

The reverse sweep uses them to drop ``_gw_unbroadcast`` where an operand provably
has its result's shape, to write the sum a known broadcast needs
(``np.sum(g, axis=0)``), and to let an adjoint be *smaller* than its value: the
adjoint of ``np.mean(x)`` is the number ``g / n``, which stands for that number
everywhere in ``x``. The invariant: an adjoint's own shape broadcasts to its
value's, and stands for its broadcast. Rules that need the full array (matrix
products, the generic helpers) get ``np.broadcast_to(g, shape)`` first.
"""

from __future__ import annotations

import re
from collections.abc import Callable, Iterable, Mapping
from dataclasses import replace

from gradwright.calculus.numpy_rules import BROADCASTING
from gradwright.calculus.primitives import OPS
from gradwright.calculus.rules import ELEMENTWISE_OPS, SCALAR_OPS
from gradwright.ir import (
    Apply,
    Atom,
    Branch,
    Const,
    Expr,
    Let,
    Loop,
    Origin,
    SSAFunction,
    Var,
    const,
)
from gradwright.sweeps.shape_algebra import (
    Dim,
    Like,
    Shape,
    broadcast,
    matmul_shape,
    nested_shape,
)
from gradwright.sweeps.text_shapes import copied_shape

#: one-argument primitives whose result has the argument's shape (NumPy's
#: elementwise functions; the scalar rules' functions print as NumPy's)
_SAME = frozenset(
    {"neg", "pos", "not", "copy", "ndcopy", "abs"}
    | {op for op in ELEMENTWISE_OPS - SCALAR_OPS if OPS[op].max_args == 1}
)
#: primitives whose operands broadcast against each other
_BROADCAST = BROADCASTING | {"lt", "le", "gt", "ge", "eq", "ne", "and", "or"}
#: primitives with a number as result
_NUMBER = frozenset(
    {"shape_at", "len", "int", "float", "max", "min"}
    | {op for op, spec in OPS.items() if spec.symbol.startswith("math.")}
)
#: reductions with axis= and keepdims= (a norm without axis= is a number)
_REDUCTIONS = frozenset(
    {"np.sum", "np.mean", "np.prod", "np.max", "np.min", "np.amax", "np.amin"}
    | {"np.linalg.norm"}
)
_MATMUL = frozenset({"matmul", "np.matmul", "np.dot"})


def is_static(shape: Shape | None) -> bool:
    return isinstance(shape, tuple)


def keyword(args: Iterable[Atom], key: str) -> str | None:
    for arg in args:
        if isinstance(arg, Const) and arg.value is None and "=" in arg.text:
            name, _, value = arg.text.partition("=")
            if name == key:
                return value
    return None


def reduced_axes(axis: str | None, rank: int) -> tuple[int, ...] | None:
    """``axis=`` text as sorted non-negative axes (None: all of them)."""
    if axis is None or axis == "None":
        return tuple(range(rank))
    text = axis.strip("()")
    try:
        axes = [int(a) for a in text.split(",") if a.strip()]
    except ValueError:
        return None
    if any(not -rank <= a < rank for a in axes):
        return None
    return tuple(sorted({a % rank for a in axes}))


def reduce_shape(shape: Shape, args: tuple[Atom, ...]) -> Shape | None:
    keepdims = keyword(args, "keepdims") == "True"
    axis = keyword(args, "axis")
    if not isinstance(shape, tuple):
        return () if axis in (None, "None") and not keepdims else None
    axes = reduced_axes(axis, len(shape))
    if axes is None:
        return None
    if keepdims:
        return tuple(1 if k in axes else d for k, d in enumerate(shape))
    return tuple(d for k, d in enumerate(shape) if k not in axes)


class ShapeTable:
    """The shape of every value of one function, from its SSA and the declared
    shapes of its parameters."""

    def __init__(
        self,
        params: tuple[Var, ...],
        body: tuple,
        declared: Mapping[str, tuple[Dim, ...]],
        numbers: Iterable[str] = (),
        data: Mapping[str, tuple[Dim, ...]] | None = None,
        numpy_names: frozenset[str] = frozenset(),
        results: Callable[[str, tuple[Shape, ...]], Shape | None] | None = None,
    ) -> None:
        self.numbers = frozenset(numbers)
        self.data = dict(data or {})
        self.numpy_names = numpy_names
        #: a helper's result shape for its arguments' shapes (call_shapes.py)
        self.results = results
        self.of: dict[Var, Shape] = {}
        #: copied statements (``sigma = X.std(axis=0)``) by their value
        self.copied: dict[Var, Let] = {}
        for p in params:
            self.of[p] = declared[p.base] if p.base in declared else Like(p.uid)
        self._block(body)

    def atom(self, atom: Atom | Expr) -> Shape:
        if isinstance(atom, Var):
            return self.of.get(atom, Like(atom.uid))
        if isinstance(atom, Const):
            if atom.value is not None or atom.text in self.numbers:
                return ()
            found = _data_shape(atom.text, self.data)
            return found if found is not None else Like(atom.text)
        return Like(id(atom))

    def _block(self, statements: tuple) -> None:
        for stmt in statements:
            if isinstance(stmt, Let):
                found = self._let(stmt)
                self.of[stmt.target] = (
                    found if found is not None else Like(stmt.target.uid)
                )
            elif isinstance(stmt, Branch):
                self._block(stmt.then)
                self._block(stmt.orelse)
                for phi in stmt.merges:
                    first, second = self.atom(phi.first), self.atom(phi.second)
                    self.of[phi.target] = (
                        first if first == second else Like(phi.target.uid)
                    )
            else:
                self._loop(stmt)

    def _loop(self, loop: Loop) -> None:
        self.of[loop.index] = ()
        for phi in loop.carried:
            self.of[phi.target] = self.atom(phi.first)
        for _ in range(3):
            self._block(loop.body)
            changed = False
            for phi in loop.carried:
                if self.atom(phi.second) != self.of[phi.target]:
                    self.of[phi.target] = Like(phi.target.uid)
                    changed = True
            if not changed:
                break
        else:  # not settled: nothing about the carried values is known
            for phi in loop.carried:
                self.of[phi.target] = Like(phi.target.uid)
            self._block(loop.body)
        for phi in loop.carried:
            if phi.exit is not None:
                self.of[phi.exit] = self.of[phi.target]

    def _let(self, let: Let) -> Shape | None:
        op, args = let.op, let.args
        if op == "copied" and let.copied is not None:
            self.copied[let.target] = let
            return None
        if op == "written":
            made = self.copied.get(args[0]) if isinstance(args[0], Var) else None
            if made is None or made.copied is None:
                return None
            copied = made.copied
            name = next((n for n, v in copied.writes if v == let.target), None)
            if name is None or copied.guard:
                return None
            names: dict[str, Shape] = {n: () for n in self.numbers}
            names.update(self.data)
            names.update(zip(copied.reads, map(self.atom, made.args), strict=False))
            return copied_shape(copied.text, name, names, self.numpy_names)
        shapes = [self.atom(a) for a in args if not _is_keyword(a)]
        if op in _NUMBER:
            return ()
        if op in _SAME:
            return shapes[0]
        if op.startswith("call:"):
            # a helper may reduce or multiply: its own body says how
            if self.results is None or len(shapes) != len(args):
                return None
            return self.results(op.removeprefix("call:"), tuple(shapes))
        if op in _BROADCAST or op == "ifexp":
            if op == "ifexp":  # in array code only np.where's, elementwise
                shapes = [shapes[0], shapes[2]]
            result: Shape | None = shapes[0] if shapes else ()
            for shape in shapes[1:]:
                result = broadcast(result, shape) if result is not None else None
            return result
        if op in _REDUCTIONS:
            return reduce_shape(shapes[0], args)
        if op in _MATMUL:
            return matmul_shape(shapes[0], shapes[1])
        if op == "np.outer":
            a, b = shapes
            if isinstance(a, tuple) and isinstance(b, tuple) and len(a) == len(b) == 1:
                return a + b
            return None
        if op in ("np.cumsum", "np.diff") and isinstance(shapes[0], tuple):
            if op == "np.cumsum":  # flattened (no axis=)
                count = 1
                for d in shapes[0]:
                    if not isinstance(d, int):
                        return shapes[0] if len(shapes[0]) == 1 else None
                    count *= d
                return (count,)
            last = shapes[0][-1] if shapes[0] else None  # along the last axis
            if isinstance(last, int) and last >= 1:
                return (*shapes[0][:-1], last - 1)
            return None
        if op == "np.array":  # parts of one known shape, stacked on a new axis
            first = shapes[0] if shapes else None
            if isinstance(first, tuple) and all(p == first for p in shapes):
                return (len(shapes), *first)
            return None
        if op == "npindex":
            pattern = args[1].text if isinstance(args[1], Const) else ""
            return index_shape(shapes[0], pattern, args[2:], self.atom)
        if op in ("T", "np.transpose"):
            return tuple(reversed(shapes[0])) if isinstance(shapes[0], tuple) else None
        if op == "reshape":
            dims = [a.value for a in args[1:] if isinstance(a, Const)]
            if len(dims) == len(args) - 1 and all(
                isinstance(d, int) and d > 0 for d in dims
            ):
                return tuple(dims)  # type: ignore[arg-type]
            return None
        return None


def index_shape(
    array: Shape,
    pattern: str,
    values: tuple[Atom, ...],
    shape_of: Callable[[Atom], Shape],
) -> Shape | None:
    """The shape of ``x[...]`` (pattern as lowering writes it: ``{}`` an index,
    ``{}:{}`` a slice, ``:`` all, ``None`` a new axis): an index drops its axis, a
    slice with constant bounds of a known size keeps its length, ``None`` adds an
    axis of size 1; anything else (an array as index, a slice of a named size) is
    not known."""
    pieces = [piece.strip() for piece in pattern.split(",")]
    taking = [piece for piece in pieces if piece != "None"]
    if not isinstance(array, tuple) or len(taking) > len(array):
        return None
    given = iter(values)
    dims = iter(array)
    out: list[Dim] = []
    for piece in pieces:
        if piece == "None":
            out.append(1)
            continue
        dim = next(dims)
        if piece == "{}":
            if shape_of(next(given)) != ():  # an array of indices picks elements
                return None
            continue
        if piece == ":":
            out.append(dim)
            continue
        bounds: list[int | None] = []
        for part in piece.split(":"):
            bound = next(given) if part else None
            if bound is None:
                bounds.append(None)
            elif isinstance(bound, Const) and type(bound.value) is int:
                bounds.append(bound.value)
            else:
                return None
        if not isinstance(dim, int) or bounds[2:] == [0]:
            return None
        out.append(len(range(dim)[slice(*bounds)]))
    return (*out, *array[len(taking) :])


def _data_shape(text: str, data: Mapping[str, tuple[Dim, ...]]) -> Shape | None:
    """The shape of a read of module data as lowering writes it: ``W``, ``W.T``,
    ``W[0]``, and in a NumPy model constant slices, ``LEGS[:, 1]``, ``W[1:3]``,
    ``x[None, :]``."""
    match = re.fullmatch(r"(\w+)((?:\.T|\[[^\[\]]*\])*)", text)
    if match is None or match.group(1) not in data:
        return None
    shape: tuple[Dim, ...] | None = data[match.group(1)]
    for step in re.findall(r"\.T|\[[^\[\]]*\]", match.group(2)):
        if shape is None:
            return None
        if step == ".T":
            shape = tuple(reversed(shape))
        else:
            shape = _literal_index_shape(shape, step[1:-1])
    return shape


def _literal_index_shape(shape: tuple[Dim, ...], text: str) -> tuple[Dim, ...] | None:
    """``shape`` indexed by ``text``: int literals, ``None`` and slices of int
    literals (what lowering copies as a constant read of module data)."""
    out: list[Dim] = []
    dims = iter(shape)
    for piece in (p.strip() for p in text.split(",")):
        if piece == "None":
            out.append(1)
            continue
        dim = next(dims, None)
        if dim is None:
            return None
        try:
            if ":" not in piece:
                k = int(piece)
                if isinstance(dim, int) and not -dim <= k < dim:
                    return None
                continue
            bounds = [int(b) if b.strip() else None for b in piece.split(":")]
        except ValueError:
            return None
        if not isinstance(dim, int) or len(bounds) > 3 or bounds[2:] == [0]:
            return None
        out.append(len(range(dim)[slice(*bounds)]))
    return (*out, *dims)


def literal_shape(statement: str, numpy_names: Iterable[str]) -> Shape | None:
    """The shape of the array ``NAME = <constructor>`` makes, read from its text
    (never run): ``np.array`` of nested lists of number literals, ``np.zeros`` /
    ``np.ones`` / ``np.full`` of literal sizes, ``np.linspace(a, b, k)``,
    ``np.arange(n)``; None for anything else."""
    import ast

    try:
        tree = ast.parse(statement.strip())
    except SyntaxError:
        return None
    if len(tree.body) != 1 or not isinstance(tree.body[0], ast.Assign):
        return None
    call = tree.body[0].value
    if not (
        isinstance(call, ast.Call)
        and isinstance(call.func, ast.Attribute)
        and isinstance(call.func.value, ast.Name)
        and call.func.value.id in set(numpy_names)
        and not call.keywords
        and call.args
    ):
        return None
    name, first = call.func.attr, call.args[0]
    if name == "array" and len(call.args) == 1:
        return nested_shape(first)
    if name in ("zeros", "ones", "full") and len(call.args) == (
        2 if name == "full" else 1
    ):
        items = first.elts if isinstance(first, ast.Tuple) else [first]
        sizes = [_int_literal(item) for item in items]
        return tuple(sizes) if all(n is not None for n in sizes) else None  # type: ignore[arg-type]
    if name == "linspace" and len(call.args) == 3:
        count = _int_literal(call.args[2])
        return (count,) if count is not None else None
    if name == "arange" and len(call.args) == 1:
        stop = _int_literal(first)
        return (max(stop, 0),) if stop is not None else None
    return None


def _int_literal(node: object) -> int | None:
    import ast

    if isinstance(node, ast.Constant) and type(node.value) is int:
        return node.value
    return None


def _is_keyword(atom: Atom) -> bool:
    return isinstance(atom, Const) and atom.value is None and "=" in atom.text


def size_of(dims: Iterable[Dim], sizes: Mapping[str, Var]) -> Expr | None:
    """The product of ``dims`` as an expression (names read their size values)."""
    number = 1
    named: list[Expr] = []
    for d in dims:
        if isinstance(d, int):
            number *= d
        elif d in sizes:
            named.append(sizes[d])
        else:
            return None
    # a float: an adjoint is a float even where a count multiplies a 1.0 away
    expr: Expr | None = const(float(number)) if number != 1 or not named else None
    for item in named:
        expr = item if expr is None else Apply("mul", (expr, item))
    return expr


def shape_expr(shape: tuple[Dim, ...], sizes: Mapping[str, Var]) -> Expr | None:
    items: list[Expr] = []
    for d in shape:
        if isinstance(d, int):
            items.append(const(d))
        elif d in sizes:
            items.append(sizes[d])
        else:
            return None
    return Apply("shape_tuple", tuple(items))


def axis_text(axes: tuple[int, ...]) -> Const:
    inside = str(axes[0]) if len(axes) == 1 else "(" + ", ".join(map(str, axes)) + ")"
    return Const(f"axis={inside}", None)


#: the comment above the check of the declared shapes
SHAPES_DECLARED = "the shapes declared with gen --shape; any others are refused"
SHAPES_CALLED = "the shapes every call in this module passes; any others are refused"


def with_sizes(
    function: SSAFunction, declared: Mapping[str, tuple[Dim, ...]], taken: set[str]
) -> tuple[SSAFunction, dict[str, Var]]:
    """The function with a value per size name of its declared shapes (``n =
    X.shape[0]`` at the start, read by the reverse sweep where it divides by n or
    writes a shape), and those values by name."""
    first = 1 + max([p.uid for p in function.params] + [_last_uid(function.body)])
    origin = Origin("the sizes those shapes name", -1)
    lets: list[Let] = []
    sizes: dict[str, Var] = {}
    for param in function.params:
        for axis, dim in enumerate(declared.get(param.base, ())):
            if isinstance(dim, str) and dim not in sizes:
                kind = "temp" if dim in taken else "local"
                var = Var(first + len(lets), dim, kind)  # type: ignore[arg-type]
                lets.append(Let(var, "shape_at", (param, const(axis)), origin))
                sizes[dim] = var
    if not lets:
        return function, sizes
    return replace(function, body=(*lets, *function.body)), sizes


def _last_uid(statements: tuple) -> int:
    last = 0
    for stmt in statements:
        if isinstance(stmt, Let):
            last = max(last, stmt.target.uid)
        elif isinstance(stmt, Branch):
            merged = [phi.target.uid for phi in stmt.merges]
            last = max(last, _last_uid(stmt.then), _last_uid(stmt.orelse), *merged)
        else:
            carried = [p.target.uid for p in stmt.carried]
            carried += [p.exit.uid for p in stmt.carried if p.exit is not None]
            last = max(last, stmt.index.uid, _last_uid(stmt.body), *carried)
    return last
