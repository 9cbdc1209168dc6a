"""The shape of a value a copied statement makes, read from its text (never run).

A statement the lowering copies as written (``lowering/inactive.py``: it reads no
active value) still makes arrays the active data flow meets: a model standardises
its data with ``sigma = X.std(axis=0) + 1e-12`` or starts a sum at
``pred = np.zeros(len(x))``. Their shapes follow from the shapes of the names the
statement reads, by NumPy's own rules for a small set of forms:

- number literals and names of numbers; the names the statement reads, with the
  shapes the table gave them;
- sizes: ``len(x)`` (the first axis), ``x.shape`` and ``x.shape[k]``, int literals
  and tuples of them;
- ``np.zeros``/``ones``/``empty``/``full`` of a size, ``np.zeros_like`` and the
  other ``*_like`` of an array, ``np.array`` of nested number literals,
  ``np.linspace(a, b, k)`` and ``np.arange(n)`` of int literals;
- reductions with ``axis=`` (literal ints) and ``keepdims=`` (a literal bool), as
  NumPy functions or methods: ``sum mean std var max min prod median amax amin``;
- NumPy's one- and two-argument elementwise ufuncs (``np.sqrt``, ``np.maximum``:
  NumPy's own table says which names are ufuncs; those with a core signature,
  ``np.vecdot``, are not elementwise), arithmetic operators (broadcasting), ``@``
  and ``.T``.

Anything else has no known shape (the generic helpers decide at run time). The
shapes are those of NumPy's documented semantics; a declared shape the call breaks
is refused when the gradient is called (``_gw_check_shapes``).
"""

from __future__ import annotations

import ast
from collections.abc import Iterable, Mapping

import numpy

from gradwright.sweeps.shape_algebra import (
    Dim,
    Shape,
    broadcast,
    matmul_shape,
    nested_shape,
)

_REDUCING = frozenset(
    "sum mean std var max min prod median amax amin nansum nanmean".split()
)
_FILLED = frozenset({"zeros", "ones", "empty", "full"})
_LIKE = frozenset({"zeros_like", "ones_like", "empty_like", "full_like"})
#: keywords that leave a reduction's shape as axis= and keepdims= say
_HARMLESS = frozenset({"axis", "keepdims", "ddof", "dtype"})


def copied_shape(
    statement: str,
    target: str,
    names: Mapping[str, Shape],
    numpy_names: Iterable[str],
) -> Shape | None:
    """The shape ``target`` has after ``statement`` (one assignment), or None."""
    try:
        tree = ast.parse(statement.strip())
    except SyntaxError:
        return None
    if len(tree.body) != 1:
        return None
    reader = _Reader(names, frozenset(numpy_names))
    node = tree.body[0]
    if isinstance(node, ast.Assign) and len(node.targets) == 1:
        return reader.assigned(node.targets[0], node.value, target)
    if isinstance(node, ast.AnnAssign) and node.value is not None:
        return reader.assigned(node.target, node.value, target)
    if isinstance(node, ast.AugAssign) and _name(node.target) == target:
        before, added = names.get(target), reader.shape(node.value)
        if before is None or added is None:
            return None
        # an in-place operator cannot grow its target (NumPy refuses)
        return before if broadcast(before, added) == before else None
    return None


def _name(node: ast.expr) -> str | None:
    return node.id if isinstance(node, ast.Name) else None


class _Reader:
    def __init__(self, names: Mapping[str, Shape], numpy_names: frozenset[str]):
        self.names = names
        self.numpy_names = numpy_names

    def assigned(self, target: ast.expr, value: ast.expr, name: str) -> Shape | None:
        if _name(target) == name:
            return self.shape(value)
        if isinstance(target, ast.Tuple) and isinstance(value, ast.Tuple):
            for part, made in zip(target.elts, value.elts, strict=False):
                if _name(part) == name and len(target.elts) == len(value.elts):
                    return self.shape(made)
        return None

    # -- shapes ----------------------------------------------------------------------

    def shape(self, node: ast.expr) -> Shape | None:
        if isinstance(node, ast.Constant):
            return () if type(node.value) in (int, float) else None
        if isinstance(node, ast.Name):
            return self.names.get(node.id)
        if isinstance(node, ast.UnaryOp) and isinstance(node.op, (ast.USub, ast.UAdd)):
            return self.shape(node.operand)
        if isinstance(node, ast.BinOp):
            a, b = self.shape(node.left), self.shape(node.right)
            if a is None or b is None:
                return None
            if isinstance(node.op, ast.MatMult):
                return matmul_shape(a, b)
            return broadcast(a, b)
        if isinstance(node, ast.Attribute) and node.attr == "T":
            inner = self.shape(node.value)
            return tuple(reversed(inner)) if isinstance(inner, tuple) else None
        if isinstance(node, ast.Call):
            return self.call(node)
        return None

    def call(self, node: ast.Call) -> Shape | None:
        func = node.func
        if not isinstance(func, ast.Attribute):
            return None
        if _name(func.value) in self.numpy_names:
            return self.numpy_call(func.attr, node.args, node.keywords)
        if func.attr in _REDUCING and func.attr not in ("median", "amax", "amin"):
            # x.mean(axis=0): the method of an array
            return self.reduced(func.value, node.args, node.keywords)
        return None

    def numpy_call(
        self, name: str, args: list[ast.expr], keywords: list[ast.keyword]
    ) -> Shape | None:
        if name in _REDUCING and args:
            return self.reduced(args[0], args[1:], keywords)
        if keywords:
            return None
        if name in _FILLED and len(args) == (2 if name == "full" else 1):
            return self.size(args[0])
        if name in _LIKE and len(args) == (2 if name == "full_like" else 1):
            return self.shape(args[0])
        if name == "array" and len(args) == 1:
            return nested_shape(args[0])
        if name in ("linspace", "arange"):
            count = (
                _int(args[-1])
                if len(args) == (3 if name == "linspace" else 1)
                else None
            )
            return (max(count, 0),) if count is not None else None
        ufunc = getattr(numpy, name, None)
        if (
            isinstance(ufunc, numpy.ufunc)
            and ufunc.signature is None  # (np.vecdot, np.matvec: not elementwise)
            and ufunc.nout == 1
            and len(args) == ufunc.nin
        ):
            shapes = [self.shape(a) for a in args]
            result: Shape | None = ()
            for s in shapes:
                if s is None or result is None:
                    return None
                result = broadcast(result, s)
            return result
        return None

    def reduced(
        self, array: ast.expr, args: list[ast.expr], keywords: list[ast.keyword]
    ) -> Shape | None:
        shape = self.shape(array)
        if not isinstance(shape, tuple) or any(
            k.arg not in _HARMLESS for k in keywords
        ):
            return None
        given = {k.arg: k.value for k in keywords}
        if args:  # np.mean(x, 0) / x.mean(0): the axis is the first positional
            if len(args) > 1 or "axis" in given:
                return None
            given["axis"] = args[0]
        axis, keep = given.get("axis"), given.get("keepdims")
        keepdims = False
        if keep is not None:
            if not (isinstance(keep, ast.Constant) and type(keep.value) is bool):
                return None
            keepdims = keep.value
        if axis is None or (isinstance(axis, ast.Constant) and axis.value is None):
            axes = tuple(range(len(shape)))
        else:
            items = axis.elts if isinstance(axis, ast.Tuple) else [axis]
            numbers = [_int(item) for item in items]
            if any(n is None or not -len(shape) <= n < len(shape) for n in numbers):
                return None
            axes = tuple(sorted({n % len(shape) for n in numbers}))  # type: ignore[operator]
        if keepdims:
            return tuple(1 if k in axes else d for k, d in enumerate(shape))
        return tuple(d for k, d in enumerate(shape) if k not in axes)

    # -- sizes -----------------------------------------------------------------------

    def size(self, node: ast.expr) -> tuple[Dim, ...] | None:
        """The shape a size argument gives: ``5``, ``(n, 3)``, ``len(x)``,
        ``x.shape``, ``x.shape[0]``."""
        if isinstance(node, ast.Tuple):
            dims = [self.dim(item) for item in node.elts]
            return tuple(dims) if all(d is not None for d in dims) else None  # type: ignore[arg-type]
        if isinstance(node, ast.Attribute) and node.attr == "shape":
            inner = self.shape(node.value)
            return inner if isinstance(inner, tuple) else None
        dim = self.dim(node)
        return (dim,) if dim is not None else None

    def dim(self, node: ast.expr) -> Dim | None:
        number = _int(node)
        if number is not None:
            return number if number >= 0 else None
        if (
            isinstance(node, ast.Call)
            and _name(node.func) == "len"
            and "len" not in self.names
            and len(node.args) == 1
            and not node.keywords
        ):
            return self._axis(node.args[0], 0)
        if (
            isinstance(node, ast.Subscript)
            and isinstance(node.value, ast.Attribute)
            and node.value.attr == "shape"
        ):
            k = _int(node.slice)
            return self._axis(node.value.value, k) if k is not None else None
        return None

    def _axis(self, array: ast.expr, k: int) -> Dim | None:
        shape = self.shape(array)
        if isinstance(shape, tuple) and -len(shape) <= k < len(shape):
            return shape[k]
        return None


def _int(node: ast.expr) -> int | None:
    if isinstance(node, ast.Constant) and type(node.value) is int:
        return node.value
    if (
        isinstance(node, ast.UnaryOp)
        and isinstance(node.op, ast.USub)
        and isinstance(node.operand, ast.Constant)
        and type(node.operand.value) is int
    ):
        return -node.operand.value
    return None
