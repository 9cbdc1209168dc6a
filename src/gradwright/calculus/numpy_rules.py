"""What a NumPy model's gradient needs beyond the scalar rule table.

The rule table's formulas are written once, over scalar primitives; in a NumPy model
the reverse sweep prints them with NumPy's functions (``cos`` as ``np.cos``, a
conditional as ``np.where``). Broadcasting operands get their adjoint summed back to
their own shape. Matrix rules follow the standard collection of matrix derivative
results for forward and reverse mode (Giles, 2008): for C = A @ B, the adjoints are
A_bar = C_bar @ B^T and B_bar = A^T @ C_bar.

The helpers below are written into a generated module only when it uses them.
"""

from __future__ import annotations

#: scalar rule primitives -> the NumPy function the reverse sweep calls instead
REVERSE_SPELLING: dict[str, str] = {
    "sin": "np.sin",
    "cos": "np.cos",
    "tan": "np.tan",
    "asin": "np.arcsin",
    "acos": "np.arccos",
    "atan": "np.arctan",
    "sinh": "np.sinh",
    "cosh": "np.cosh",
    "tanh": "np.tanh",
    "asinh": "np.arcsinh",
    "acosh": "np.arccosh",
    "atanh": "np.arctanh",
    "exp": "np.exp",
    "expm1": "np.expm1",
    "exp2": "np.exp2",
    "log": "np.log",
    "log1p": "np.log1p",
    "log2": "np.log2",
    "log10": "np.log10",
    "sqrt": "np.sqrt",
    "cbrt": "np.cbrt",
    "hypot": "np.hypot",
    "copysign": "np.copysign",
    "fabs": "np.fabs",
    "abs": "np.abs",
}

#: primitives whose operands may broadcast against each other
BROADCASTING = frozenset(
    {
        "add",
        "sub",
        "mul",
        "div",
        "pow",
        "mod",
        "np.maximum",
        "np.minimum",
        "np.where",
        "np.arctan2",
        "np.hypot",
        "np.clip",
        "np.power",
    }
)

HELPERS: dict[str, str] = {
    "_gw_check_shapes": '''#: each declaration read so far: (name, sizes) per parameter
_GW_DECLARED = {}


def _gw_check_shapes(declared, *values):
    """Refuse arguments of other shapes than those the gradient was written for
    (gen --shape NAME=DIMS, one per word); a name stands for one size wherever it
    appears. The declaration is read once, not at every call."""
    words = _GW_DECLARED.get(declared)
    if words is None:
        words = _GW_DECLARED[declared] = []
        for word in declared.split():
            name, _, text = word.partition("=")
            dims = text.strip("()").split(",")
            words.append((name, [int(d) if d.isdigit() else d for d in dims if d]))
    sizes = {}
    for (name, dims), value in zip(words, values, strict=True):
        shape = np.shape(value)
        fits = len(shape) == len(dims) and all(
            sizes.setdefault(d, s) == s if isinstance(d, str) else d == s
            for d, s in zip(dims, shape, strict=True)
        )
        if not fits:
            wanted = tuple(sizes.get(d, d) for d in dims)
            raise ValueError(
                f"{name} has shape {shape}, but this gradient was generated for"
                f" shape {wanted} (gen --shape {name}=...): generate it again"
                " for these shapes"
            )
''',
    "_gw_unbroadcast": '''def _gw_unbroadcast(g, x):
    """g summed over the axes along which x was broadcast to g's shape."""
    shape = np.shape(x)
    if np.shape(g) == shape:
        return g
    extra = np.ndim(g) - len(shape)
    if extra > 0:
        g = np.sum(g, axis=tuple(range(extra)))
    axes = tuple(k for k, n in enumerate(shape) if n == 1 and np.shape(g)[k] != 1)
    if axes:
        g = np.sum(g, axis=axes, keepdims=True)
    return g if shape else float(g)
''',
    "_gw_unreduce": '''def _gw_unreduce(g, x, axis, keepdims):
    """The adjoint of a sum over axis, spread back over x's shape."""
    if axis is not None and not keepdims:
        g = np.expand_dims(g, axis)
    return np.broadcast_to(g, np.shape(x))
''',
    "_gw_unmean": '''def _gw_unmean(g, x, axis, keepdims):
    """The adjoint of a mean over axis, spread back over x's shape."""
    count = np.size(x) if axis is None else np.prod(np.take(np.shape(x), axis))
    # divide before spreading: the same quotient, computed once per output element
    return _gw_unreduce(np.divide(g, count), x, axis, keepdims)
''',
    "_gw_unextreme": '''def _gw_unextreme(g, x, axis, keepdims, pick):
    """The adjoint of a max or min: the first extreme element gets it all."""
    x = np.asarray(x)
    if axis is None:
        axis = tuple(range(x.ndim))
    axes = tuple(a % x.ndim for a in (axis if isinstance(axis, tuple) else (axis,)))
    rest = [a for a in range(x.ndim) if a not in axes]
    order = rest + list(axes)
    moved = np.transpose(x, order)
    flat = moved.reshape(moved.shape[: len(rest)] + (-1,))
    g = np.squeeze(g, axis=axes) if keepdims else np.asarray(g)
    z = np.zeros(flat.shape)
    where = np.expand_dims(pick(flat, axis=-1), -1)
    np.put_along_axis(z, where, np.expand_dims(g, -1), axis=-1)
    return np.transpose(z.reshape(moved.shape), np.argsort(order))
''',
    "_gw_unprod": '''def _gw_unprod(g, x, axis, keepdims):
    """The adjoint of a product over axis: each element gets the product of the
    others (from running products on both sides, so exact zeros are fine)."""
    x = np.asarray(x, dtype=float)
    if axis is None:
        axis = tuple(range(x.ndim))
    axes = tuple(a % x.ndim for a in (axis if isinstance(axis, tuple) else (axis,)))
    rest = [a for a in range(x.ndim) if a not in axes]
    order = rest + list(axes)
    moved = np.transpose(x, order)
    flat = moved.reshape(moved.shape[: len(rest)] + (-1,))
    ones = np.ones(flat.shape[:-1] + (1,))
    left = np.cumprod(np.concatenate([ones, flat[..., :-1]], axis=-1), axis=-1)
    right = np.cumprod(np.concatenate([ones, flat[..., :0:-1]], axis=-1), axis=-1)
    g = np.squeeze(g, axis=axes) if keepdims else np.asarray(g)
    others = left * right[..., ::-1] * np.expand_dims(g, -1)
    return np.transpose(others.reshape(moved.shape), np.argsort(order))
''',
    "_gw_matmul_left": '''def _gw_matmul_left(g, a, b):
    """The adjoint of a in a @ b (vectors and matrices)."""
    if np.ndim(b) == 1:
        return np.outer(g, b) if np.ndim(a) == 2 else g * b
    if np.ndim(a) != 2:
        return b @ g
    if np.shape(g)[-1] == 1:
        # an outer product (a column times b's row): one multiply, not a gemm
        return g * np.swapaxes(b, -1, -2)
    return g @ np.swapaxes(b, -1, -2)
''',
    "_gw_matmul_right": '''def _gw_matmul_right(g, a, b):
    """The adjoint of b in a @ b (vectors and matrices)."""
    if np.ndim(a) == 1:
        return np.outer(a, g) if np.ndim(b) == 2 else g * a
    if np.ndim(b) != 2:
        return g @ a
    if np.shape(g)[-2] == 1:
        # an outer product (a's column times a row of g): one multiply, not a gemm
        return np.swapaxes(a, -1, -2) * g
    return np.swapaxes(a, -1, -2) @ g
''',
    "_gw_scatter": '''def _gw_scatter(g, x, index):
    """The adjoint of x[index]: g in the selected places, zeros elsewhere."""
    z = np.zeros(np.shape(x))
    z[index] = g
    return z
''',
    "_gw_part": '''def _gw_part(g, k, axis, *parts):
    """The piece of g that np.concatenate took from parts[k]."""
    sizes = [np.shape(p)[axis] for p in parts]
    start = sum(sizes[:k])
    return np.take(g, range(start, start + sizes[k]), axis=axis)
''',
    "_gw_shaped": '''def _gw_shaped(g, x):
    """An adjoint with the shape of its value (a zero becomes an array of zeros),
    in an array of its own that the caller may change."""
    if isinstance(x, (int, float)) and np.ndim(g) == 0:
        return float(g)  # a number gets a number (not a 0-d array)
    if np.shape(g) != np.shape(x):
        return np.zeros(np.shape(x)) + g
    return np.array(g) if isinstance(g, np.ndarray) else g
''',
}

#: helpers that call other helpers
NEEDS: dict[str, tuple[str, ...]] = {"_gw_unmean": ("_gw_unreduce",)}


def helper_sources(names: set[str]) -> str:
    wanted = set(names)
    for name in list(wanted):
        wanted |= set(NEEDS.get(name, ()))
    return "\n\n\n".join(HELPERS[n].rstrip("\n") for n in HELPERS if n in wanted)


# -- natural models' array functions: the helpers of their rules (rules.py) -------

HELPERS.update(
    {
        "_gw_uncumsum": """def _gw_uncumsum(g, x):
    # each input reaches every later partial sum: a cumulative sum from the end
    flat = np.ravel(g)
    return np.reshape(np.cumsum(flat[::-1])[::-1], np.shape(x))
""",
        "_gw_undiff": """def _gw_undiff(g):
    # out[i] = x[i + 1] - x[i] along the last axis
    zero = np.zeros(np.shape(g)[:-1] + (1,))
    return np.concatenate((zero, g), axis=-1) - np.concatenate((g, zero), axis=-1)
""",
        "_gw_stacked": """def _gw_stacked(g, k, kind, *parts):
    # part k's block of a vstack ("v") or hstack ("h") result
    shapes = [np.shape(p) for p in parts]
    if kind == "v":
        axis = 0
        sizes = [s[0] if len(s) == 2 else 1 for s in shapes]
    else:
        axis = 0 if len(shapes[0]) < 2 else 1
        sizes = [s[axis] if s else 1 for s in shapes]
    start = sum(sizes[:k])
    block = np.take(g, np.arange(start, start + sizes[k]), axis=axis)
    return np.reshape(block, shapes[k])
""",
        "_gw_interp_slope": """def _gw_interp_slope(x, xp, fp):
    # the slope of the segment [xp[i], xp[i + 1]) that holds x (from the right
    # at a knot), 0 before the first knot and from the last one on
    xp, fp = np.asarray(xp, dtype=float), np.asarray(fp, dtype=float)
    i = np.searchsorted(xp, x, side="right") - 1
    j = np.clip(i, 0, len(xp) - 2)
    slope = (fp[j + 1] - fp[j]) / (xp[j + 1] - xp[j])
    return np.where((i >= 0) & (i < len(xp) - 1), slope, 0.0)
""",
    }
)
