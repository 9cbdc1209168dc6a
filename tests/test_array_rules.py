"""The array (NumPy) rules of ``calculus.rules`` against SymPy, one case per rule.

Each rule in ``rules.ARRAY_OPS`` gets a small model ``def f(...)`` whose lowered SSA
uses that primitive, differentiated by gradwright, and compared element by element
with SymPy's ``diff`` of the same model text run on object arrays of SymPy symbols
(``support.sympy_function``: ``np.exp`` applies ``sympy.exp`` elementwise,
``np.max`` is ``sympy.Max`` of the elements, ``@`` and the reductions work on
object arrays as they are), the data as exact rationals, the derivative evaluated
at the exact float inputs at 30 digits (``support.sympy_value``). Results are
weighted by data (``w``) or passed through a nonlinearity so each element's adjoint
differs.

Tolerance: 1e-12 relative per entry (absolute where the exact entry is 0), as for
the scalar rules (tests/test_rules.py): each entry is a handful of rounded operations
(the largest error measured is 7e-15, in the product rule), while a wrong rule (a
missing factor, a transposed product, a dropped broadcast sum, a misplaced adjoint)
is off by O(1); every rule here scaled by 1.001 fails its case.

``test_every_array_rule_has_a_case`` fails when a rule has no case here, as
tests/test_rules.py does for the scalar rules; ``test_case_exercises_its_primitive``
checks that each case really lowers to its primitive.
"""

from __future__ import annotations

import random
from collections.abc import Callable
from dataclasses import dataclass, field

import mpmath
import numpy as np
import pytest
import sympy
from support import build, rel_err, run_source, same_bits, sympy_function, sympy_value

from gradwright.calculus.rules import ARRAY_OPS
from gradwright.lowering.frontend import check_function, parse_module
from gradwright.lowering.ssa import lower

TOLERANCE = 1e-12  # see the module docstring

Data = Callable[[np.random.Generator], dict]


@dataclass(frozen=True)
class ArrayCase:
    id: str
    op: str  # the RULES key this case is about
    params: tuple[str, ...]
    body: str  # the body of ``def f(params):``
    data: Data  # the arguments, by name, from a seeded generator
    wrt: tuple[str, ...] = ("x",)
    notes: dict = field(default_factory=dict)

    @property
    def source(self) -> str:
        lines = "\n".join(f"    {line}" for line in self.body.splitlines())
        return f"import numpy as np\n\n\ndef f({', '.join(self.params)}):\n{lines}\n"


def uniform(lo: float, hi: float, shape: tuple) -> Callable:
    return lambda g: g.uniform(lo, hi, size=shape)


def signed(lo: float, hi: float, shape: tuple) -> Callable:
    """Magnitudes in [lo, hi], random signs (away from the kink at 0)."""
    return lambda g: g.uniform(lo, hi, size=shape) * g.choice([-1.0, 1.0], size=shape)


def normal(shape: tuple) -> Callable:
    return lambda g: g.normal(size=shape)


def distinct(shape: tuple) -> Callable:
    """Distinct values in [0.55, 1.65], 0.1 apart: no ties for max and min, no
    zeros for prod."""
    count = int(np.prod(shape))
    return lambda g: np.linspace(0.55, 1.65, count)[g.permutation(count)].reshape(shape)


def data(**makers: Callable) -> Data:
    return lambda g: {name: make(g) for name, make in makers.items()}


#: elementwise functions: name -> where their arguments are drawn from (inside the
#: domain, away from kinks and poles)
UNARY = {
    "exp": uniform(-2.0, 2.0, (2, 3)),
    "log": uniform(0.2, 5.0, (2, 3)),
    "log1p": uniform(-0.8, 3.0, (2, 3)),
    "expm1": uniform(-2.0, 2.0, (2, 3)),
    "exp2": uniform(-3.0, 3.0, (2, 3)),
    "log2": uniform(0.2, 5.0, (2, 3)),
    "log10": uniform(0.2, 5.0, (2, 3)),
    "sqrt": uniform(0.2, 5.0, (2, 3)),
    "cbrt": signed(0.2, 8.0, (2, 3)),
    "sin": uniform(-3.0, 3.0, (2, 3)),
    "cos": uniform(-3.0, 3.0, (2, 3)),
    "tan": uniform(-1.4, 1.4, (2, 3)),
    "tanh": uniform(-3.0, 3.0, (2, 3)),
    "sinh": uniform(-3.0, 3.0, (2, 3)),
    "cosh": uniform(-3.0, 3.0, (2, 3)),
    "arcsin": uniform(-0.9, 0.9, (2, 3)),
    "arccos": uniform(-0.9, 0.9, (2, 3)),
    "arctan": uniform(-10.0, 10.0, (2, 3)),
    "arcsinh": uniform(-10.0, 10.0, (2, 3)),
    "arccosh": uniform(1.1, 10.0, (2, 3)),
    "arctanh": uniform(-0.9, 0.9, (2, 3)),
    "abs": signed(0.1, 5.0, (2, 3)),
    "absolute": signed(0.1, 5.0, (2, 3)),
    "fabs": signed(0.1, 5.0, (2, 3)),
    "square": uniform(-3.0, 3.0, (2, 3)),
}

CASES = [
    ArrayCase(
        name,
        f"np.{name}",
        ("x", "w"),
        f"return np.sum(w * np.{name}(x))",
        data(x=sample, w=normal((2, 3))),
    )
    for name, sample in UNARY.items()
] + [
    # two arguments, one broadcast against the other (its adjoint is summed back)
    ArrayCase(
        "arctan2-row",
        "np.arctan2",
        ("a", "X", "w"),
        "return np.sum(w * np.arctan2(a, X))",
        data(a=signed(0.2, 2.0, (3,)), X=signed(0.2, 2.0, (2, 3)), w=normal((2, 3))),
        wrt=("a", "X"),
    ),
    ArrayCase(
        "hypot-column",
        "np.hypot",
        ("X", "a", "w"),
        "return np.sum(w * np.hypot(X, a))",
        data(X=signed(0.2, 2.0, (2, 3)), a=signed(0.2, 2.0, (2, 1)), w=normal((2, 3))),
        wrt=("X", "a"),
    ),
    ArrayCase(
        "power-row-exponent",
        "np.power",
        ("X", "a", "w"),
        "return np.sum(w * np.power(X, a))",
        data(X=uniform(0.3, 3.0, (2, 3)), a=uniform(-1.5, 2.5, (3,)), w=normal((2, 3))),
        wrt=("X", "a"),
    ),
    ArrayCase(
        "maximum-column",
        "np.maximum",
        ("a", "X", "w"),
        "return np.sum(w * np.maximum(a, X))",
        # a's two values sit between X's (no ties), so each wins some elements
        data(
            a=lambda g: np.array([[0.95], [1.35]]),
            X=distinct((2, 3)),
            w=normal((2, 3)),
        ),
        wrt=("a", "X"),
    ),
    ArrayCase(
        "minimum-float",
        "np.minimum",
        ("X", "a", "w"),
        "return np.sum(w * np.minimum(X, a))",
        data(X=distinct((2, 3)), a=lambda g: 1.15, w=normal((2, 3))),
        wrt=("X", "a"),
    ),
    ArrayCase(
        "where-on-data",
        "np.where",
        ("a", "X", "c", "w"),
        "return np.sum(w * np.where(c > 0.0, a * X, X - a))",
        data(
            a=normal((3,)),
            X=normal((2, 3)),
            c=lambda g: np.array([[1.0, -1.0, 1.0], [-1.0, -1.0, 1.0]]),
            w=normal((2, 3)),
        ),
        wrt=("a", "X"),
    ),
    ArrayCase(
        "clip-float-bounds",
        "np.clip",
        ("X", "lo", "hi", "w"),
        "return np.sum(w * np.clip(X, lo, hi))",
        # elements well below, inside and above [0.7, 1.6]
        data(
            X=lambda g: np.array([[0.1, 0.9, 2.4], [1.2, 1.9, 0.3]]),
            lo=lambda g: 0.7,
            hi=lambda g: 1.6,
            w=normal((2, 3)),
        ),
        wrt=("X", "lo", "hi"),
    ),
    # reductions, through sin(3 * .) so each reduced element's adjoint differs
    ArrayCase(
        "sum-axis-keepdims",
        "np.sum",
        ("x",),
        "return np.sum(np.sin(3.0 * np.sum(x, axis=1, keepdims=True)))",
        data(x=normal((3, 4))),
    ),
    ArrayCase(
        "mean-axis0",
        "np.mean",
        ("x",),
        "return np.sum(np.sin(3.0 * np.mean(x, axis=0)))",
        data(x=normal((3, 4))),
    ),
    ArrayCase(
        "prod-axis1",
        "np.prod",
        ("x",),
        "return np.sum(np.sin(3.0 * np.prod(x, axis=1)))",
        data(x=distinct((3, 4))),
    ),
    ArrayCase(
        "max-axis1",
        "np.max",
        ("x",),
        "return np.sum(np.sin(3.0 * np.max(x, axis=1)))",
        data(x=distinct((3, 4))),
    ),
    ArrayCase(
        "amax-all",
        "np.amax",
        ("x",),
        "return np.sin(3.0 * np.amax(x)) + np.sum(x * x)",
        data(x=distinct((2, 3))),
    ),
    ArrayCase(
        "min-axis0-keepdims",
        "np.min",
        ("x",),
        "return np.sum(np.sin(3.0 * np.min(x, axis=0, keepdims=True)))",
        data(x=distinct((3, 4))),
    ),
    ArrayCase(
        "amin-axis-tuple",
        "np.amin",
        ("x",),
        "return np.sin(3.0 * np.amin(x, axis=(0, 1))) + np.sum(x * x)",
        data(x=distinct((2, 3))),
    ),
    # matrix products (Giles, 2008) and shapes
    ArrayCase(
        "matmul-operator",
        "matmul",
        ("a", "b", "w"),
        "return np.sum(w * (a @ b))",
        data(a=normal((2, 3)), b=normal((3, 2)), w=normal((2, 2))),
        wrt=("a", "b"),
    ),
    ArrayCase(
        "np-matmul-vector-matrix",
        "np.matmul",
        ("a", "b", "w"),
        "return np.sum(w * np.matmul(a, b))",
        data(a=normal((3,)), b=normal((3, 2)), w=normal((2,))),
        wrt=("a", "b"),
    ),
    ArrayCase(
        "dot-matrix-vector",
        "np.dot",
        ("a", "b", "w"),
        "return np.sum(w * np.dot(a, b))",
        data(a=normal((2, 3)), b=normal((3,)), w=normal((2,))),
        wrt=("a", "b"),
    ),
    ArrayCase(
        "outer",
        "np.outer",
        ("a", "b", "w"),
        "return np.sum(w * np.outer(a, b))",
        data(a=normal((3,)), b=normal((2,)), w=normal((3, 2))),
        wrt=("a", "b"),
    ),
    ArrayCase(
        "T",
        "T",
        ("x", "w"),
        "return np.sum(w * np.sin(x.T))",
        data(x=normal((2, 3)), w=normal((3, 2))),
    ),
    ArrayCase(
        "transpose",
        "np.transpose",
        ("x", "w"),
        "return np.sum(w * np.transpose(x) ** 3)",
        data(x=normal((2, 3)), w=normal((3, 2))),
    ),
    ArrayCase(
        "reshape",
        "reshape",
        ("x", "w"),
        "return np.sum(w * x.reshape(3, 2) ** 2)",
        data(x=normal((2, 3)), w=normal((3, 2))),
    ),
    ArrayCase(
        "norm",
        "np.linalg.norm",
        ("x",),
        "return np.linalg.norm(x)",
        data(x=normal((2, 3))),
    ),
    # reads and joins
    ArrayCase(
        "index-and-slice",
        "npindex",
        ("x",),
        "return np.sum(np.sin(2.0 * (x[1:, :2] * x[0, 1])))",
        data(x=normal((3, 3))),
    ),
    ArrayCase(
        "concatenate-axis1",
        "np.concatenate",
        ("x", "w"),
        "return np.sum(np.sin(np.concatenate([x, w * x], axis=1)))",
        data(x=normal((2, 3)), w=normal((2, 3))),
    ),
    # natural models' array functions (rules at the bottom of calculus/rules.py)
    ArrayCase(
        "cumsum",
        "np.cumsum",
        ("x", "w"),
        "return np.sum(w * np.sin(np.cumsum(x * x)))",
        data(x=normal((5,)), w=normal((5,))),
    ),
    ArrayCase(
        "cumsum-of-a-matrix-flattens",
        "np.cumsum",
        ("x", "w"),
        "return np.sum(w * np.cumsum(x**3))",
        data(x=normal((2, 3)), w=normal((6,))),
    ),
    ArrayCase(
        "diff",
        "np.diff",
        ("x", "w"),
        "return np.sum(w * np.diff(x) ** 3)",
        data(x=normal((6,)), w=normal((5,))),
    ),
    ArrayCase(
        "diff-last-axis",
        "np.diff",
        ("x", "w"),
        "return np.sum(w * np.sin(np.diff(x)))",
        data(x=normal((2, 4)), w=normal((2, 3))),
    ),
    ArrayCase(
        "vstack-rows",
        "np.vstack",
        ("x", "w"),
        "return np.sum(np.vstack([x, w * x, x * x]) ** 3)",
        data(x=normal((4,)), w=normal((4,))),
    ),
    ArrayCase(
        "vstack-matrices",
        "np.vstack",
        ("x", "w"),
        "return np.sum(w * np.sin(np.vstack([x, x[:1, :] * 2.0])))",
        data(x=normal((2, 3)), w=normal((3, 3))),
    ),
    ArrayCase(
        "hstack-vectors",
        "np.hstack",
        ("x", "w"),
        "return np.sum(np.hstack([x, w * x]) ** 3)",
        data(x=normal((3,)), w=normal((3,))),
    ),
    ArrayCase(
        "hstack-matrices",
        "np.hstack",
        ("x", "w"),
        "return np.sum(w * np.sin(np.hstack([x, x * x])))",
        data(x=normal((2, 2)), w=normal((2, 4))),
    ),
    ArrayCase(
        "norm-along-an-axis",
        "np.linalg.norm",
        ("x", "w"),
        "return np.sum(w * np.linalg.norm(x, axis=1))",
        data(x=normal((3, 2)), w=normal((3,))),
    ),
    ArrayCase(
        "interp-constant-tables",
        "np.interp",
        ("x", "w"),
        "return np.sum(w * np.interp(x * x, [0.0, 0.5, 1.5, 4.0], [1.0, -2.0, 3.0, 0.5]))",  # noqa: E501
        data(x=normal((6,)), w=normal((6,))),
    ),
    ArrayCase(
        "stack-last-axis",
        "np.stack",
        ("x", "w"),
        "return np.sum(np.stack([x, x * w], axis=-1) ** 3)",
        data(x=normal((2, 3)), w=normal((2, 3))),
    ),
    ArrayCase(
        "copy-then-change-in-place",
        "ndcopy",
        ("x", "w"),
        "y = x.copy()\ny += w * y\nz = np.copy(y)\nz *= x\n"
        "return np.sum(z * y) + np.sum(x)",
        data(x=normal((2, 3)), w=normal((2, 3))),
    ),
    ArrayCase(
        "array-of-active-parts",
        "np.array",
        ("x", "w"),
        "m = np.array([[x[0] * w[1], np.sum(x)], [w[0], x[1] * x[2]]])\n"
        "return np.sum(np.array([w, x]) ** 2) + np.sum(m @ m)",
        data(x=normal((3,)), w=normal((3,))),
    ),
]


def _ssa_ops(case: ArrayCase) -> set[str]:
    index = parse_module(case.source, "<test>")
    function = lower(index, check_function(index, "f", case.wrt))
    return {let.op for let in function.body}


def _arguments(case: ArrayCase) -> dict:
    g = np.random.default_rng(
        random.Random(f"test_array_rules:{case.id}").getrandbits(32)
    )
    values = case.data(g)
    assert list(values) == list(case.params)
    return values


def _symbolic(case: ArrayCase, values: dict) -> tuple[list, dict]:
    """The arguments for SymPy: a symbol (or object array of symbols) per wrt
    parameter, the data as exact rationals; and the flat symbol -> value map."""
    args, point = [], {}
    for name, value in values.items():
        if name in case.wrt and isinstance(value, float):
            symbol = sympy.Symbol(name, real=True)
            args.append(symbol)
            point[symbol] = value
        elif name in case.wrt:
            count = int(np.size(value))
            symbols = sympy.symbols(f"{name}_0:{count}", real=True)
            args.append(np.array(symbols, dtype=object).reshape(np.shape(value)))
            point.update(zip(symbols, np.ravel(value), strict=True))
        elif isinstance(value, float):
            args.append(sympy.Rational(value))
        else:
            args.append(np.vectorize(sympy.Rational, otypes=[object])(value))
    return args, point


@pytest.mark.parametrize("case", CASES, ids=lambda case: case.id)
def test_array_rule_against_sympy(case: ArrayCase) -> None:
    values = _arguments(case)
    ns = build(case.source, "f", case.wrt)
    value, grads = ns["f_grad"](*values.values())
    assert same_bits(
        float(value), float(run_source(case.source)["f"](*values.values()))
    )
    args, point = _symbolic(case, values)
    model = sympy.sympify(sympy_function(case.source, "f")(*args))
    got, exact = [], []
    for name, grad in zip(case.wrt, grads, strict=True):
        assert np.shape(grad) == np.shape(values[name]), name
        assert isinstance(grad, float) == isinstance(values[name], float), name
        symbols = np.ravel(args[case.params.index(name)])
        for entry, symbol in zip(np.ravel(grad), symbols, strict=True):
            got.append(float(entry))
            # reference: SymPy's diff of the same model, at 30 digits
            exact.append(sympy_value(sympy.diff(model, symbol), point))
    for k, (ours, ref) in enumerate(zip(got, exact, strict=True)):
        assert (
            rel_err(ours, ref) <= TOLERANCE
        ), f"{case.id}: entry {k}: gradwright {ours!r}, SymPy diff {ref}"


@pytest.mark.parametrize("case", CASES, ids=lambda case: case.id)
def test_case_exercises_its_primitive(case: ArrayCase) -> None:
    # a case only covers a rule if the model really lowers to that primitive
    assert case.op in _ssa_ops(case)


def test_every_array_rule_has_a_case() -> None:
    # a new array rule without a case here fails; so does a case for a rule that is
    # gone (the scalar rules are covered in tests/test_rules.py)
    assert {case.op for case in CASES} == set(ARRAY_OPS)
    assert len({case.id for case in CASES}) == len(CASES)


def test_np_tanh_rule_absolute_error_is_a_few_ulp() -> None:
    # rules.py: the array rule 1 - out**2 "has an absolute error of a few ulp"
    # (relative error grows where |x| > 1). Reference: sech(x)**2, the derivative of
    # tanh (textbook), in mpmath at 30 digits. Bound: 4 ulp of 1 (tanh within 1 ulp,
    # its square and the subtraction one rounding each).
    ns = build(
        "import numpy as np\n\n\ndef f(x):\n    return np.sum(np.tanh(x))\n", "f"
    )
    rng = np.random.default_rng(2026)
    x = np.concatenate([rng.uniform(-3.0, 3.0, 400), rng.uniform(-25.0, 25.0, 400)])
    _, (x_bar,) = ns["f_grad"](x)
    with mpmath.workdps(30):
        exact = [mpmath.sech(t) ** 2 for t in x]
        errors = [abs(mpmath.mpf(d) - e) for d, e in zip(x_bar, exact, strict=True)]
    assert max(errors) <= 4 * 2.0**-52, "sech(x)**2 in mpmath"
