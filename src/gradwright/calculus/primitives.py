"""How each primitive is spelled: operator symbol or callee, precedence and arity.

This table knows syntax only; the calculus lives in ``rules.py``. Every ``op`` key that
appears in the IR has an entry here, including the non-differentiable ones the reverse
sweep prints (comparisons and conditional expressions).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

Syntax = Literal[
    "infix",
    "prefix",
    "call",
    "ifexp",
    "copy",
    "subscript",
    "list",
    "repeat",
    "partial",
    "attr",
    "method",
    "index",
    "scatter",
    "listcall",
    "tuple",
]

# Python's binding strengths, loosest first; only their order matters.
PREC_IFEXP = 1
PREC_OR = 2
PREC_AND = 3
PREC_NOT = 4
PREC_COMPARE = 5
#: the comparison ops (elementwise on arrays: a mask)
COMPARISONS = frozenset({"lt", "le", "gt", "ge", "eq", "ne"})
PREC_ADD = 10
PREC_MUL = 11
PREC_UNARY = 12
PREC_POW = 13
PREC_ATOM = 20


@dataclass(frozen=True)
class OpSpec:
    name: str
    syntax: Syntax
    symbol: str
    precedence: int
    min_args: int
    max_args: int | None


def _infix(name: str, symbol: str, precedence: int) -> OpSpec:
    return OpSpec(name, "infix", symbol, precedence, 2, 2)


def _math(name: str, min_args: int = 1, max_args: int | None = 1) -> OpSpec:
    # math.pow is a different primitive from the ** operator (it always returns float)
    key = "math_pow" if name == "pow" else name
    return OpSpec(key, "call", f"math.{name}", PREC_ATOM, min_args, max_args)


_SPECS = [
    OpSpec("copy", "copy", "", PREC_ATOM, 1, 1),
    _infix("add", "+", PREC_ADD),
    _infix("sub", "-", PREC_ADD),
    _infix("mul", "*", PREC_MUL),
    _infix("div", "/", PREC_MUL),
    _infix("floordiv", "//", PREC_MUL),
    _infix("mod", "%", PREC_MUL),
    _infix("pow", "**", PREC_POW),
    OpSpec("neg", "prefix", "-", PREC_UNARY, 1, 1),
    OpSpec("pos", "prefix", "+", PREC_UNARY, 1, 1),
    OpSpec("not", "prefix", "not ", PREC_NOT, 1, 1),
    _infix("and", "and", PREC_AND),
    _infix("or", "or", PREC_OR),
    _infix("lt", "<", PREC_COMPARE),
    _infix("le", "<=", PREC_COMPARE),
    _infix("gt", ">", PREC_COMPARE),
    _infix("ge", ">=", PREC_COMPARE),
    _infix("eq", "==", PREC_COMPARE),
    _infix("ne", "!=", PREC_COMPARE),
    # args are (value_if_true, condition, value_if_false), in printed order
    OpSpec("ifexp", "ifexp", "", PREC_IFEXP, 3, 3),
    # a choice between numbers in array code: Python's conditional, not np.where
    OpSpec("numselect", "ifexp", "", PREC_IFEXP, 3, 3),
    # lists: x[i], [a, b], [fill] * n, len(x), sum(x)
    OpSpec("getitem", "subscript", "", PREC_ATOM, 2, 2),
    # an element of module-level data: no rule, so never active (piecewise
    # constant in its index, and the data itself is constant)
    OpSpec("dataitem", "subscript", "", PREC_ATOM, 2, 2),
    # a statement copied as text, and each name it binds (emission/copied.py
    # prints them; no expression ever holds them)
    OpSpec("copied", "copy", "", PREC_ATOM, 0, None),
    OpSpec("written", "copy", "", PREC_ATOM, 1, 1),
    OpSpec("listlit", "list", "", PREC_ATOM, 0, None),
    OpSpec("newlist", "repeat", "*", PREC_MUL, 2, 2),
    OpSpec("len", "call", "len", PREC_ATOM, 1, 1),
    OpSpec("sum", "call", "sum", PREC_ATOM, 1, 2),
    # a list grown in place (a new version of the same list)
    OpSpec("append", "method", "append", PREC_ATOM, 2, 2),
    # the k-th partial derivative returned with a helper call's value
    OpSpec("partial", "partial", "", PREC_ATOM, 2, 2),
    OpSpec("abs", "call", "abs", PREC_ATOM, 1, 1),
    OpSpec("max", "call", "max", PREC_ATOM, 2, 2),
    OpSpec("min", "call", "min", PREC_ATOM, 2, 2),
    *(
        _math(n)
        for n in (
            "sin cos tan asin acos atan sinh cosh tanh asinh acosh atanh exp expm1"
            " exp2 log1p log2 log10 sqrt cbrt erf erfc fabs"
        ).split()
    ),
    _math("log", 1, 2),
    _math("atan2", 2, 2),
    _math("pow", 2, 2),
    _math("copysign", 2, 2),
    _math("hypot", 1, None),
    _math("radians"),
    # the exactly rounded sum of a list (its derivative is the sum's)
    _math("fsum"),
    _math("degrees"),
    # float(x) is the identity on numbers (kept in the output: int -> float)
    OpSpec("float", "call", "float", PREC_ATOM, 1, 1),
    # piecewise constant, integer results: no rule, so never active
    OpSpec("int", "call", "int", PREC_ATOM, 1, 1),
    OpSpec("round", "call", "round", PREC_ATOM, 1, 2),
    _math("floor"),
    _math("ceil"),
    _math("trunc"),
]


def _np(name: str, min_args: int = 1, max_args: int | None = 1) -> OpSpec:
    return OpSpec(f"np.{name}", "call", f"np.{name}", PREC_ATOM, min_args, max_args)


#: NumPy functions a model may call: name under ``np.`` -> (min, max) arguments,
#: keyword arguments (axis=, keepdims=) included
NUMPY_FUNCTIONS: dict[str, tuple[int, int | None]] = {
    **{
        n: (1, 1)
        for n in (
            "exp log log1p expm1 exp2 log2 log10 sqrt cbrt sin cos tan tanh sinh cosh"
            " arcsin arccos arctan arcsinh arccosh arctanh abs absolute square fabs"
            " transpose"
        ).split()
    },
    **{
        n: (2, 2)
        for n in "arctan2 hypot maximum minimum power dot matmul outer".split()
    },
    "where": (3, 3),
    "clip": (3, 3),
    **{n: (1, 3) for n in ("sum mean prod max min amax amin".split())},
    "linalg.norm": (1, 2),
    # natural models' array functions (rules at the bottom of rules.py)
    "cumsum": (1, 1),
    "diff": (1, 1),
    "vstack": (1, 1),
    "hstack": (1, 1),
    "interp": (3, 3),
    "concatenate": (1, 2),
    "stack": (1, 2),
}

_SPECS += [_np(name, lo, hi) for name, (lo, hi) in NUMPY_FUNCTIONS.items()]
_SPECS += [
    _infix("matmul", "@", PREC_MUL),
    OpSpec("T", "attr", "T", PREC_ATOM, 1, 1),
    OpSpec("reshape", "method", "reshape", PREC_ATOM, 1, None),
    # x.copy() / np.copy(x) of an array: a new array, never a view
    OpSpec("ndcopy", "method", "copy", PREC_ATOM, 1, 1),
    OpSpec("shape_at", "index", "{0}.shape[{1}]", PREC_ATOM, 2, 2),
    # x[...] with a fixed pattern of indices and slices: args (x, pattern, *values)
    OpSpec("npindex", "index", "", PREC_ATOM, 2, None),
    OpSpec("npscatter", "scatter", "_gw_scatter", PREC_ATOM, 3, None),
    OpSpec("np.concatenate", "listcall", "np.concatenate", PREC_ATOM, 1, None),
    OpSpec("np.stack", "listcall", "np.stack", PREC_ATOM, 1, None),
    # np.array([a, b, ...]) of values that depend on the --wrt parameters
    OpSpec("np.array", "listcall", "np.array", PREC_ATOM, 1, None),
    OpSpec("np.vstack", "listcall", "np.vstack", PREC_ATOM, 1, None),
    OpSpec("np.hstack", "listcall", "np.hstack", PREC_ATOM, 1, None),
    *(
        OpSpec(name, "call", name, PREC_ATOM, 1, None)
        for name in (
            "_gw_unbroadcast _gw_unreduce _gw_unmean _gw_unextreme _gw_unprod"
            " _gw_matmul_left"
            " _gw_matmul_right _gw_part _gw_shaped np.reshape np.shape np.take"
            " _gw_uncumsum _gw_undiff _gw_stacked _gw_interp_slope"
            " np.zeros_like np.broadcast_to np.expand_dims np.einsum"
            " np.argmax np.argmin np.arange np.zeros"
        ).split()
    ),
    # a shape written out, (n, 5), for np.broadcast_to in the reverse sweep
    OpSpec("shape_tuple", "tuple", "", PREC_ATOM, 0, None),
    # a helper's tuple result's adjoint, (x_bar, y_bar), its reverse's seed
    OpSpec("seed_tuple", "tuple", "", PREC_ATOM, 0, None),
]

OPS: dict[str, OpSpec] = {spec.name: spec for spec in _SPECS}

#: Functions of the ``math`` module a model may call: name there -> op key.
MATH_FUNCTIONS: dict[str, str] = {
    spec.symbol.removeprefix("math."): spec.name
    for spec in _SPECS
    if spec.symbol.startswith("math.")
}

#: Constants of the ``math`` module a model may read.
MATH_CONSTANTS: dict[str, float] = {
    "pi": 3.141592653589793,
    "e": 2.718281828459045,
    "tau": 6.283185307179586,
    "inf": float("inf"),
}

#: Builtins a model may call; ``min``/``max`` take two or more arguments and are
#: lowered to nested two-argument calls, which select the same element.
BUILTIN_FUNCTIONS: frozenset[str] = frozenset({"abs", "min", "max"})

BINARY_OPERATORS: dict[str, str] = {
    "+": "add",
    "-": "sub",
    "*": "mul",
    "/": "div",
    "//": "floordiv",
    "%": "mod",
    "**": "pow",
}
