"""Probe what a Python interpreter offers to generated scalar modules.

Runs unchanged under MicroPython and CPython (no f-strings, only ``sys`` and
``math``). It prints one tab-separated record per line:

    info     <key>      <value>
    math     <name>     yes|no
    feature  <name>     yes|no  <detail>
    value    <name>     <args>  <result>

Floats in ``value`` records are written exactly (see ``enc``) so that the
results of two interpreters can be compared bit for bit.
``harness.py --probe`` runs this file under MicroPython and CPython and writes
``PROBE.md`` from the two outputs.
"""

import math
import sys

MATH_NAMES = (
    "sin cos tan asin acos atan atan2 sinh cosh tanh asinh acosh atanh "
    "exp expm1 exp2 log log1p log2 log10 sqrt cbrt hypot pow erf erfc fabs "
    "copysign pi e tau inf nan isfinite isnan isinf floor ceil trunc fmod "
    "frexp ldexp modf gamma lgamma degrees radians factorial fsum"
).split()

# Each snippet (a tuple of source lines) is exec'd in a fresh namespace and
# must set ``r`` to True. One that sets ``r`` to a string records it as detail.
FEATURES = (
    (
        "f_string",
        (
            "x = 1.5",
            "r = f'{x}|{x:.2f}|{x!r}|{2 * x}' == '1.5|1.50|1.5|3.0'",
        ),
    ),
    ("reversed", ("r = list(reversed([1, 2, 3])) == [3, 2, 1]",)),
    ("reversed_range", ("r = list(reversed(range(3))) == [2, 1, 0]",)),
    ("sum", ("r = sum([1.0, 2.0, 3.5]) == 6.5",)),
    ("sum_start", ("r = sum([1.0, 2.0], 0.5) == 3.5",)),
    ("sum_start_keyword", ("r = sum([1.0], start=2.0) == 3.0",)),
    ("sum_generator", ("r = sum(x * x for x in range(4)) == 14",)),
    (
        "min_max_several_args",
        ("r = min(3.0, 1.0, 2.0) == 1.0 and max(3.0, 1.0, 5.0, 2.0) == 5.0",),
    ),
    ("min_max_iterable", ("r = min([3.0, 1.0]) == 1.0 and max((3.0, 4.0)) == 4.0",)),
    ("min_max_key", ("r = min([3.0, -5.0], key=abs) == 3.0",)),
    ("min_max_default", ("r = min([], default=7.0) == 7.0",)),
    ("abs", ("r = abs(-2.5) == 2.5 and abs(-3) == 3 and abs(-0.0) == 0.0",)),
    (
        "list_repetition",
        (
            "a = [0.0] * 5",
            "r = a == [0.0] * 5 and len(a) == 5 and [0.0] * 0 == []",
        ),
    ),
    (
        "tuple_unpacking",
        (
            "a, b = 1.0, 2.0",
            "(c, d), e = (3.0, 4.0), 5.0",
            "r = (a, b, c, d, e) == (1.0, 2.0, 3.0, 4.0, 5.0)",
        ),
    ),
    (
        "star_unpacking",
        (
            "a, *b = [1, 2, 3]",
            "r = a == 1 and b == [2, 3]",
        ),
    ),
    (
        "swap",
        (
            "a, b = 1, 2",
            "a, b = b, a",
            "r = (a, b) == (2, 1)",
        ),
    ),
    (
        "float_inf_nan",
        (
            "i = float('inf')",
            "n = float('nan')",
            "r = i > 1e308 and -i < -1e308 and n != n and float('-inf') == -i",
        ),
    ),
    (
        "conditional_expression",
        (
            "x = -1.0",
            "r = (x if x > 0 else -x) == 1.0",
        ),
    ),
    (
        "chained_comparison",
        (
            "x = 0.5",
            "r = 0.0 < x < 1.0 and not (1.0 < x < 2.0)",
        ),
    ),
    (
        "math_log_two_args",
        (
            "import math",
            "r = math.log(8.0, 2.0) == 3.0 and "
            "abs(math.log(100.0, 10.0) - 2.0) < 1e-15",
        ),
    ),
    (
        "power_operator",
        ("r = 2.0 ** 3 == 8.0 and 2 ** -1 == 0.5 and 4.0 ** 0.5 == 2.0",),
    ),
    (
        "power_negative_base_fraction_complex",
        (
            "z = (-8.0) ** (1.0 / 3.0)",
            "r = type(z).__name__ == 'complex' or ('result type ' + type(z).__name__)",
        ),
    ),
    ("complex", ("r = (1 + 2j).imag == 2.0",)),
    ("big_int", ("r = 2 ** 100 == 1267650600228229401496703205376",)),
    ("int_of_big_float", ("r = int(2.0 ** 80) == 2 ** 80",)),
    ("true_division_int", ("r = 1 / 2 == 0.5 and 7 // 2 == 3 and -7 // 2 == -4",)),
    (
        "divmod_float",
        (
            "q, m = divmod(7.5, 2.0)",
            "r = q == 3.0 and m == 1.5",
        ),
    ),
    (
        "round_half_even",
        ("r = round(2.5) == 2 and round(0.5) == 0 and round(-1.5) == -2",),
    ),
    (
        "round_ndigits_correct",
        (
            "v = round(2.675, 2)",
            "r = v == 2.67 or ('round(2.675, 2) gives ' + repr(v))",
        ),
    ),
    (
        "repr_roundtrip",
        (
            "vs = (0.1, 1.0 / 3.0, 1e-320, 5e-324, 1.7976931348623157e308)",
            "vs = vs + (2.2250738585072014e-308, 123456789.12345679, -2.5e-17)",
            "r = all(float(repr(v)) == v for v in vs)",
        ),
    ),
    (
        "percent_17g",
        (
            "v = '%.17g' % 0.1",
            "r = v == '0.10000000000000001' or ('gives ' + repr(v))",
        ),
    ),
    ("str_format", ("r = '{:.3f}|{}'.format(1.25, 2) == '1.250|2'",)),
    ("percent_format", ("r = '%.3f|%d|%s' % (1.25, 2, 'a') == '1.250|2|a'",)),
    (
        "lambda",
        (
            "f = lambda x, y=2.0: x * y",
            "r = f(3.0) == 6.0",
        ),
    ),
    (
        "closure_nonlocal",
        (
            "def mk():",
            "    n = 0",
            "    def inc():",
            "        nonlocal n",
            "        n += 1",
            "        return n",
            "    return inc",
            "i = mk()",
            "i()",
            "r = i() == 2",
        ),
    ),
    (
        "keyword_and_star_args",
        (
            "def f(a, *args, b=1.0, **kw):",
            "    return a + sum(args) + b + len(kw)",
            "r = f(1.0, 2.0, 3.0, b=4.0, c=0) == 11.0",
        ),
    ),
    (
        "keyword_only_args",
        (
            "def f(a, *, b):",
            "    return a - b",
            "r = f(3.0, b=1.0) == 2.0",
        ),
    ),
    (
        "annotations_in_def",
        (
            "def f(x: float, n: int = 2) -> float:",
            "    y: float = x * n",
            "    return y",
            "r = f(1.5) == 3.0",
        ),
    ),
    (
        "comprehensions",
        (
            "r = [x * 2 for x in range(3)] == [0, 2, 4] and "
            "{k: k for k in range(2)} == {0: 0, 1: 1} and "
            "{x for x in (1, 1)} == {1}",
        ),
    ),
    (
        "nested_list_index_assign",
        (
            "a = [[0.0] * 2 for _ in range(2)]",
            "a[1][0] += 3.0",
            "r = a == [[0.0, 0.0], [3.0, 0.0]]",
        ),
    ),
    (
        "enumerate_zip",
        (
            "r = list(enumerate('ab')) == [(0, 'a'), (1, 'b')] and "
            "list(zip([1, 2], [3, 4])) == [(1, 3), (2, 4)]",
        ),
    ),
    ("range_step", ("r = list(range(5, 0, -2)) == [5, 3, 1]",)),
    (
        "any_all_sorted",
        ("r = any([0, 1]) and all([1, 1]) and sorted([3, 1, 2]) == [1, 2, 3]",),
    ),
    (
        "isinstance_tuple",
        ("r = isinstance(1.0, (int, float)) and not isinstance(1.0, int)",),
    ),
    ("float_is_integer", ("r = (2.0).is_integer() and not (2.5).is_integer()",)),
    ("walrus", ("r = (y := 3) == 3 and y == 3",)),
    (
        "try_finally",
        (
            "out = []",
            "try:",
            "    out.append(1)",
            "finally:",
            "    out.append(2)",
            "r = out == [1, 2]",
        ),
    ),
    (
        "raise_from",
        (
            "try:",
            "    try:",
            "        1 / 0",
            "    except ZeroDivisionError as e:",
            "        raise ValueError('x') from e",
            "except ValueError:",
            "    r = True",
        ),
    ),
    (
        "global_statement",
        (
            "G = 1",
            "def f():",
            "    global G",
            "    G = 2",
            "f()",
            "r = G == 2",
        ),
    ),
    (
        "docstring",
        (
            "def f():",
            "    'doc'",
            "    return 1",
            "r = f() == 1",
        ),
    ),
    (
        "assert",
        (
            "assert 1 == 1, 'msg'",
            "r = True",
        ),
    ),
    (
        "math_isclose",
        (
            "import math",
            "r = math.isclose(1.0, 1.0 + 1e-12)",
        ),
    ),
    (
        "import_future_annotations",
        (
            "from __future__ import annotations",
            "r = True",
        ),
    ),
    (
        "import_typing",
        (
            "import typing",
            "r = True",
        ),
    ),
    (
        "float_division_by_zero",
        (
            "try:",
            "    1.0 / 0.0",
            "    r = 'no exception'",
            "except ZeroDivisionError:",
            "    r = True",
        ),
    ),
    (
        "exp_overflow_error",
        (
            "import math",
            "try:",
            "    math.exp(1000.0)",
            "    r = 'no exception'",
            "except OverflowError:",
            "    r = True",
            "except Exception as e:",
            "    r = 'raises ' + type(e).__name__ + ': ' + str(e)",
        ),
    ),
    (
        "log_domain_error",
        (
            "import math",
            "try:",
            "    math.log(-1.0)",
            "    r = 'no exception'",
            "except ValueError:",
            "    r = True",
            "except Exception as e:",
            "    r = 'raises ' + type(e).__name__",
        ),
    ),
    (
        "log_zero_error",
        (
            "import math",
            "try:",
            "    math.log(0.0)",
            "    r = 'no exception'",
            "except ValueError:",
            "    r = True",
            "except Exception as e:",
            "    r = 'raises ' + type(e).__name__",
        ),
    ),
    (
        "sqrt_domain_error",
        (
            "import math",
            "try:",
            "    math.sqrt(-1.0)",
            "    r = 'no exception'",
            "except ValueError:",
            "    r = True",
        ),
    ),
    (
        "float_pow_overflow_error",
        (
            "try:",
            "    10.0 ** 400",
            "    r = 'no exception'",
            "except OverflowError:",
            "    r = True",
            "except Exception as e:",
            "    r = 'raises ' + type(e).__name__",
        ),
    ),
    (
        "math_pow_overflow_error",
        (
            "import math",
            "try:",
            "    math.pow(2.0, 1100.0)",
            "    r = 'no exception'",
            "except OverflowError:",
            "    r = True",
            "except Exception as e:",
            "    r = 'raises ' + type(e).__name__ + ': ' + str(e)",
        ),
    ),
    (
        "math_ldexp_overflow_error",
        (
            "import math",
            "try:",
            "    v = math.ldexp(1.0, 2000)",
            "    r = 'no exception, gives ' + repr(v)",
            "except OverflowError:",
            "    r = True",
            "except Exception as e:",
            "    r = 'raises ' + type(e).__name__ + ': ' + str(e)",
        ),
    ),
    ("float_mul_overflow_gives_inf", ("r = 1e308 * 10.0 == float('inf')",)),
    (
        "subnormals",
        (
            "r = 5e-324 > 0.0 and "
            "5e-324 / 2.0 == 0.0 and "
            "2.2250738585072014e-308 / 4.0 > 0.0",
        ),
    ),
    (
        "signed_zero",
        (
            "import math",
            "r = repr(-0.0) == '-0.0' and math.atan2(0.0, -0.0) == math.pi",
        ),
    ),
)

# Points at which every math function that exists is evaluated, so the
# results of two interpreters can be compared.
VALUE_POINTS = {
    "sin": (1e-300, 1e-9, 0.5, 1.0, 3.0, -2.5, 100.0, 1e10),
    "cos": (1e-300, 1e-9, 0.5, 1.0, 3.0, -2.5, 100.0, 1e10),
    "tan": (1e-300, 1e-9, 0.5, 1.0, 1.5, -2.5, 100.0, 1e10),
    "asin": (1e-300, 1e-9, 0.5, -0.9, 0.999999),
    "acos": (1e-9, 0.5, -0.9, 0.999999),
    "atan": (1e-300, 1e-9, 0.5, -2.0, 1e10, 1e300),
    "sinh": (1e-300, 1e-9, 0.5, -2.0, 20.0, 700.0),
    "cosh": (1e-9, 0.5, -2.0, 20.0, 700.0),
    "tanh": (1e-300, 1e-9, 0.5, -2.0, 20.0),
    "asinh": (1e-300, 1e-9, 0.5, -2.0, 1e10, 1e300),
    "acosh": (1.0000001, 1.5, 10.0, 1e10, 1e300),
    "atanh": (1e-300, 1e-9, 0.5, -0.9, 0.999999),
    "exp": (1e-300, 1e-9, 0.5, -2.0, 20.0, 700.0, -700.0, -740.0),
    "expm1": (1e-300, 1e-9, 1e-5, 0.5, -2.0, 20.0, 700.0, -50.0),
    "exp2": (1e-300, 0.5, -2.0, 10.5, 1000.0, -1070.0),
    "log": (1e-300, 1e-9, 0.5, 1.0000001, 2.0, 1e10, 1e300, 5e-324),
    "log1p": (1e-300, 1e-9, -0.5, 1.0, 1e10, 1e300),
    "log2": (1e-300, 0.5, 3.0, 1024.0, 1e300, 5e-324),
    "log10": (1e-300, 0.5, 3.0, 1000.0, 1e300),
    "sqrt": (1e-300, 0.5, 2.0, 1e300, 5e-324),
    "cbrt": (1e-300, -8.0, 2.0, 1e300),
    "erf": (1e-300, 1e-9, 0.1, 0.5, 1.0, -2.0, 3.0, 5.0, 6.0),
    "erfc": (1e-9, 0.1, 0.5, 1.0, -2.0, 3.0, 5.0, 10.0, 26.0),
    "gamma": (1e-9, 0.5, 1.5, 5.0, 10.5, 100.5, 170.5, -0.5, -2.5),
    "lgamma": (1e-9, 0.5, 1.5, 2.5, 10.5, 100.5, 1e10, -0.5, -2.5),
    "fabs": (-1.5, 0.0, 1e300),
    "degrees": (1.0, -0.5),
    "radians": (180.0, -0.5),
    "atan2": ((1.0, 2.0), (-1.0, -2.0), (1e-300, 1.0), (1.0, 1e-300)),
    "pow": ((2.0, 0.5), (10.0, -3.0), (1.0000001, 1e7), (2.0, -1074.0)),
    "hypot": ((3.0, 4.0), (1e300, 1e300), (1e-300, 1e-300)),
    "copysign": ((1.5, -0.0), (-2.0, 3.0)),
    "fmod": ((7.5, 2.0), (-7.5, 2.0), (1e300, 3.0)),
    "ldexp": ((0.75, 10), (1.0, -1074)),
}


def enc(x):
    """Exact text for a float: 'M*2^E' with integer M, E; also inf/nan."""
    if not isinstance(x, float):
        return "py:" + repr(x)
    if x != x:
        return "nan"
    if x == float("inf"):
        return "inf"
    if x == -float("inf"):
        return "-inf"
    m, e = math.frexp(x)
    return str(int(m * 9007199254740992.0)) + "*2^" + str(e - 53)


def emit(*fields):
    print("\t".join([str(f) for f in fields]))


def probe_info():
    emit("info", "version", sys.version)
    impl = sys.implementation
    emit("info", "implementation_name", impl.name)
    emit("info", "implementation_version", ".".join([str(v) for v in impl.version[:3]]))
    emit("info", "implementation", repr(impl))
    emit("info", "platform", sys.platform)
    emit(
        "info",
        "float_info",
        repr(sys.float_info) if hasattr(sys, "float_info") else "absent",
    )
    eps = 1.0
    bits = 0
    while 1.0 + eps / 2.0 > 1.0:
        eps = eps / 2.0
        bits += 1
    emit("info", "epsilon", repr(eps))
    emit("info", "mantissa_bits", bits + 1)
    tiny = 1.0
    while tiny / 2.0 > 0.0:
        tiny = tiny / 2.0
    emit("info", "smallest_positive", repr(tiny))
    emit("info", "max_recursion_depth", recursion_depth())


def recursion_depth():
    """Largest tested depth of plain Python recursion that works."""

    def down(n):
        return 0 if n == 0 else 1 + down(n - 1)

    best = 0
    for depth in (25, 50, 100, 150, 200, 300, 500, 1000, 2000, 5000):
        try:
            down(depth)
        except Exception:
            break
        best = depth
    return best


def probe_math():
    for name in MATH_NAMES:
        emit("math", name, "yes" if hasattr(math, name) else "no")


def probe_features():
    for name, code in FEATURES:
        ns = {}
        try:
            exec("\n".join(code), ns)
            r = ns.get("r", False)
            if r is True:
                emit("feature", name, "yes", "")
            elif isinstance(r, str):
                emit("feature", name, "differs", r)
            else:
                emit("feature", name, "differs", "wrong result")
        except Exception as e:
            emit("feature", name, "no", type(e).__name__ + ": " + str(e))


def probe_values():
    for name in sorted(VALUE_POINTS):
        if not hasattr(math, name):
            continue
        fn = getattr(math, name)
        for arg in VALUE_POINTS[name]:
            args = arg if isinstance(arg, tuple) else (arg,)
            try:
                out = enc(fn(*args))
            except Exception as e:
                out = "error:" + type(e).__name__
            emit("value", name, ",".join([enc(float(a)) for a in args]), out)


probe_info()
probe_math()
probe_features()
probe_values()
