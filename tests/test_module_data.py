"""Module-level data the models read: tables, dicts, NumPy arrays computed at import,
a frozen dataclass of settings, parameter defaults naming them.

References, each beside its test:

- a least-squares line through a module-level table: the normal equations (the
  closed form of the minimum), where the gradient vanishes, and the gradient's
  closed form 2 * sum(r * x), 2 * sum(r) elsewhere;
- NIST StRD Misra1a (y = b1 * (1 - exp(-b2 * x))): the certified parameters and
  residual sum of squares (values from memory, confirmed by the certified residual
  sum of squares they reproduce to 10 digits), where the gradient is near zero;
- the rest: mpmath central differences of the model's own text (support.mp_function,
  support.mp_gradient).

The data are copied into the generated module as text: it must run on its own in an
empty directory, and generating must never run the model file.
"""

from __future__ import annotations

import math
import subprocess
import sys
from pathlib import Path

import pytest
from support import build, mp_function, mp_gradient, rel_err, run_source

import gradwright
from gradwright.diagnostics import GradwrightError

sys.path.insert(0, str(Path(__file__).resolve().parent / "micropython"))

from harness import require_micropython, run_micropython  # noqa: E402

LINE_FIT = """\
import math

# (hour, reading) pairs from an invented tank gauge
SAMPLES = [
    (0.0, 1.2),
    (1.0, 2.9),
    (2.0, 5.1),  # a gust
    (3.0, 7.2),
    (4.0, 8.8),
]


def line_loss(slope, intercept):
    total = 0.0
    for i in range(len(SAMPLES)):
        r = slope * SAMPLES[i][0] + intercept - SAMPLES[i][1]
        total += r * r
    return total
"""


def _normal_equations(points: list[tuple[float, float]]) -> tuple[float, float]:
    n = len(points)
    sx = sum(x for x, _ in points)
    sy = sum(y for _, y in points)
    sxx = sum(x * x for x, _ in points)
    sxy = sum(x * y for x, y in points)
    slope = (n * sxy - sx * sy) / (n * sxx - sx * sx)
    return slope, (sy - slope * sx) / n


def test_line_fit_over_a_module_table() -> None:
    ns = build(LINE_FIT, "line_loss")
    points = run_source(LINE_FIT)["SAMPLES"]
    # reference: the normal equations' minimum, where the gradient vanishes
    slope, intercept = _normal_equations(points)
    value, (g_slope, g_intercept) = ns["line_loss_grad"](slope, intercept)
    assert value == ns["line_loss"](slope, intercept)
    assert abs(g_slope) < 1e-12 and abs(g_intercept) < 1e-12
    # reference: d/da sum r^2 = 2 sum r x, d/db = 2 sum r, at another point
    a, b = 1.7, 0.4
    residuals = [(a * x + b - y, x) for x, y in points]
    _, (g_a, g_b) = ns["line_loss_grad"](a, b)
    assert rel_err(g_a, 2 * sum(r * x for r, x in residuals)) < 1e-13
    assert rel_err(g_b, 2 * sum(r for r, _ in residuals)) < 1e-13


ROWS_BY_NAME = """\
# (hour, reading) rows of the invented tank gauge, three containers
AS_TUPLES = [(0.0, 1.2), (1.0, 2.9), (2.0, 5.1), (3.0, 7.2), (4.0, 8.8)]
AS_LISTS = [[0.0, 1.2], [1.0, 2.9], [2.0, 5.1], [3.0, 7.2], [4.0, 8.8]]
AS_TUPLE = ((0.0, 1.2), (1.0, 2.9), (2.0, 5.1), (3.0, 7.2), (4.0, 8.8))


def by_row(slope, intercept):
    total = 0.0
    for row in AS_TUPLES:
        r = slope * row[0] + intercept - row[1]
        total += r * r
    return total


def by_picked_row(slope, intercept):
    total = 0.0
    for i in range(len(AS_LISTS)):
        row = AS_LISTS[i]
        r = slope * row[0] + intercept - row[1]
        total += r * r
    return total


def by_columns(slope, intercept):
    hours = [row[0] for row in AS_TUPLE]
    readings = [row[1] for row in AS_TUPLE]
    total = 0.0
    for x, y in zip(hours, readings):
        r = slope * x + intercept - y
        total += r * r
    return total
"""


@pytest.mark.parametrize("func", ["by_row", "by_picked_row", "by_columns"])
def test_a_row_of_a_module_table_is_indexed_by_name(func: str) -> None:
    """``for row in TABLE: row[0]`` (tuples, lists, a tuple of tuples): the row
    is module data, indexed again as data."""
    ns = build(ROWS_BY_NAME, func)
    points = run_source(ROWS_BY_NAME)["AS_TUPLES"]
    a, b = 1.7, 0.4
    value, (g_a, g_b) = ns[f"{func}_grad"](a, b)
    assert value == ns[func](a, b)
    # reference: d/da sum r^2 = 2 sum r x, d/db = 2 sum r (textbook closed form)
    residuals = [(a * x + b - y, x) for x, y in points]
    assert rel_err(g_a, 2 * sum(r * x for r, x in residuals)) < 1e-13
    assert rel_err(g_b, 2 * sum(r for r, _ in residuals)) < 1e-13


# NIST StRD Misra1a, values from memory: the certified residual sum of squares
# 1.2455138894E-01 reproduced to 10 digits below confirms the copied data.
MISRA1A = """\
import math

X = (77.6, 114.9, 141.1, 190.8, 239.9, 289.0, 332.8,
     378.4, 434.8, 477.3, 536.8, 593.1, 689.1, 760.0)
Y = (10.07, 14.73, 17.94, 23.93, 29.61, 35.18, 40.02,
     44.82, 50.76, 55.05, 61.01, 66.40, 75.47, 81.78)


def misra1a_ssr(b1, b2):
    total = 0.0
    for i in range(len(X)):
        r = Y[i] - b1 * (1.0 - math.exp(-b2 * X[i]))
        total = total + r * r
    return total
"""


def test_misra1a_certified_minimum() -> None:
    ns = build(MISRA1A, "misra1a_ssr")
    b1, b2 = 2.3894212918e02, 5.5015643181e-04
    value, (g1, g2) = ns["misra1a_ssr_grad"](b1, b2)
    assert value == ns["misra1a_ssr"](b1, b2)
    assert rel_err(value, 1.2455138894e-01) < 1e-9
    # the certified values carry 11 digits: the scaled gradient is that small
    # (a step of 1e-6 in either parameter makes it about 100 times larger)
    assert abs(g1 * b1) / value < 1e-4 and abs(g2 * b2) / value < 1e-4
    reference = mp_gradient(mp_function(MISRA1A, "misra1a_ssr"), [b1, b2], [0, 1])
    _, (f1, f2) = ns["misra1a_ssr_grad"](b1 * 1.001, b2 * 0.999)
    far = mp_gradient(
        mp_function(MISRA1A, "misra1a_ssr"), [b1 * 1.001, b2 * 0.999], [0, 1]
    )
    # at the minimum the gradient cancels: compare on the scale of the far one
    assert abs(g1 - reference[0]) < 1e-9 * abs(far[0])
    assert abs(g2 - reference[1]) < 1e-9 * abs(far[1])
    assert rel_err(f1, far[0]) < 1e-10 and rel_err(f2, far[1]) < 1e-10


SETTINGS = """\
import math
from dataclasses import dataclass


@dataclass(frozen=True)
class Oven:
    gain: float  # kelvin per watt
    lag: float


OVEN = Oven(gain=0.8, lag=3.5)
LEVELS = {"idle": 20.0, "bake": 180.0}
STEPS = [[0.5, 1.0], [1.5, 2.0], [2.5, 4.0]]
SPAN = 2.0 * LEVELS["idle"]


def oven_error(power, tau, span=SPAN):
    total = 0.0
    for i in range(len(STEPS)):
        t = STEPS[i][0] * OVEN.lag
        reached = LEVELS["idle"] + OVEN.gain * power * (1.0 - math.exp(-t / tau))
        total = total + STEPS[i][1] * (reached - LEVELS["bake"]) ** 2
    return total / span + sum(STEPS[1]) / len(STEPS)
"""


def test_dataclass_dict_and_nested_tables() -> None:
    ns = build(SETTINGS, "oven_error", ["power", "tau"])
    f_mp = mp_function(SETTINGS, "oven_error")
    for point in ([210.0, 2.5], [150.0, 0.7]):
        value, grads = ns["oven_error_grad"](*point)
        assert value == ns["oven_error"](*point)
        assert value == run_source(SETTINGS)["oven_error"](*point)
        # reference: mpmath central differences of the model's own text
        for g, ref in zip(grads, mp_gradient(f_mp, point, [0, 1]), strict=True):
            assert rel_err(g, ref) < 1e-12


ARRAYS = """\
import numpy as np

HORIZON = 3.0
TIMES = np.linspace(0.0, HORIZON, 7)
WEIGHTS = np.array([1.0, 2.0, 2.0, 2.0, 2.0, 2.0, 1.0]) / 12.0
TARGET = 4.0 * np.exp(-0.5 * TIMES) + 1.0


def decay_misfit(amplitude, rate, floor):
    model = amplitude * np.exp(-rate * TIMES) + floor
    return np.sum(WEIGHTS * (model - TARGET) ** 2)
"""


def test_numpy_arrays_computed_at_import() -> None:
    ns = build(ARRAYS, "decay_misfit")
    point = [3.0, 0.8, 1.5]
    value, grads = ns["decay_misfit_grad"](*point)
    assert value == run_source(ARRAYS)["decay_misfit"](*point)
    # reference: mpmath central differences over the same (float) arrays
    source_ns = run_source(ARRAYS)
    times, weights, target = (source_ns[k] for k in ("TIMES", "WEIGHTS", "TARGET"))

    def f_mp(a, k, c):
        import mpmath

        return mpmath.fsum(
            float(w) * (a * mpmath.exp(-k * float(t)) + c - float(y)) ** 2
            for t, w, y in zip(times, weights, target, strict=True)
        )

    for g, ref in zip(grads, mp_gradient(f_mp, point, [0, 1, 2]), strict=True):
        assert rel_err(float(g), ref) < 1e-11
    # at the generating parameters the misfit and its gradient vanish
    _, at_truth = ns["decay_misfit_grad"](4.0, 0.5, 1.0)
    assert all(abs(float(g)) < 1e-14 for g in at_truth)


SIDE_EFFECT = """\
import math
from pathlib import Path

RATES = [0.25, 0.5]  # per hour
Path("touched.txt").write_text("the model file ran")
LOG = open("log.txt", "w")
print("loaded", len(RATES))


def growth(k, n: int):
    return math.exp(k * RATES[n])


if __name__ == "__main__":
    print(growth(1.0, 1))
"""


def test_generated_module_is_self_contained_and_the_file_never_runs(
    tmp_path: Path,
) -> None:
    model = tmp_path / "model.py"
    model.write_text(SIDE_EFFECT)
    out = tmp_path / "out"
    out.mkdir()
    subprocess.run(
        [sys.executable, "-m", "gradwright", "gen", str(model), "growth"]
        + ["--wrt", "k", "-o", str(out / "growth_grad.py")],
        cwd=tmp_path,
        check=True,
    )
    assert not (tmp_path / "touched.txt").exists()
    assert not (tmp_path / "log.txt").exists()
    text = (out / "growth_grad.py").read_text()
    assert "RATES = [0.25, 0.5]  # per hour" in text
    assert "touched" not in text and "__main__" not in text and "LOG" not in text
    assert "loaded" not in text  # a report, not a change of RATES
    # imported on its own, in a directory holding nothing else
    run = subprocess.run(
        [sys.executable, "-c", "import growth_grad as g; print(g.growth_grad(0.3, 1))"],
        cwd=out,
        capture_output=True,
        text=True,
        check=True,
    )
    assert run.stdout.strip() == repr((math.exp(0.15), (0.5 * math.exp(0.15),)))
    assert sorted(p.name for p in out.iterdir() if p.name != "__pycache__") == [
        "growth_grad.py"
    ]


def test_mutated_table_keeps_its_mutations() -> None:
    # a statement that may change a needed value in place is copied with it
    source = (
        "SCALES = []\n"
        "for k in range(3):\n"
        "    SCALES.append(1.0 + k)\n"
        "UNUSED = print\n\n\n"
        "def f(x):\n"
        "    return x * SCALES[2]\n"
    )
    text = gradwright.generate(source, ["f"])
    assert "SCALES.append(1.0 + k)" in text and "UNUSED" not in text
    ns = build(source, "f")
    assert ns["f_grad"](2.0) == (6.0, (3.0,))


def test_index_made_from_an_active_value() -> None:
    # an element of module data is piecewise constant in its (integer) index:
    # reference: d/dx (x * TABLE[int(x)]) = TABLE[int(x)] between the jumps
    source = "TABLE = [1.0, 2.0, 3.0]\n\n\ndef f(x):\n    return TABLE[int(x)] * x\n"
    assert build(source, "f")["f_grad"](1.5) == (3.0, (2.0,))


def test_helper_indexing_module_data_with_its_parameter() -> None:
    # the helper's index parameter gets a zero partial (its NAME_grad is for
    # every parameter); reference: d/dx (x * sum(TABLE)) = sum(TABLE) = 6
    source = (
        "TABLE = [1.0, 2.0, 3.0]\n\n\n"
        "def term(x, k):\n    return x * TABLE[k]\n\n\n"
        "def total(x):\n    s = 0.0\n    for i in range(3):\n"
        "        s += term(x, i)\n    return s\n"
    )
    assert build(source, "total")["total_grad"](0.5) == (3.0, (6.0,))


def test_index_from_a_parameter_left_out_of_wrt() -> None:
    source = "GAINS = (0.5, 2.0, 4.0)\n\n\ndef f(x, n):\n    return GAINS[n] * x * x\n"
    ns = build(source, "f", ["x"])
    # reference: d/dx (g x^2) = 2 g x
    assert ns["f_grad"](3.0, 2) == (36.0, (24.0,))


def test_name_bound_twice_is_copied_with_both_bindings() -> None:
    source = "SCALE = 2.0\nSCALE = SCALE + 1.0  # recalibrated\n\n\ndef f(x):\n"
    source += "    return x * x * SCALE\n"
    assert "SCALE = SCALE + 1.0  # recalibrated" in gradwright.generate(source, ["f"])
    # reference: d/dx (3 x^2) = 6 x
    assert build(source, "f")["f_grad"](2.0) == (12.0, (12.0,))


BUILTINS = """\
import math


def tariff(x, y):
    band = int(x * 3.0)
    step = round(y) + math.floor(y) + math.ceil(x) + math.trunc(x * y)
    rate = pow(x, 2.5) * math.radians(y) + math.degrees(x) * 0.01
    return rate * step + band * y + round(x, 1) * y + min(x, float("inf"))
"""


def test_piecewise_constant_and_simple_builtins() -> None:
    # int, round, floor, ceil, trunc have zero derivative between their jumps;
    # pow is **, radians and degrees scale. Reference: mpmath central differences
    # of the same text (math -> mpmath), at points away from the jumps
    ns = build(BUILTINS, "tariff")
    f_mp = mp_function(BUILTINS, "tariff")
    for point in ([0.9, 1.3], [2.2, 0.6], [1.43, 2.71]):
        value, grads = ns["tariff_grad"](*point)
        assert value == run_source(BUILTINS)["tariff"](*point)
        for g, ref in zip(grads, mp_gradient(f_mp, point, [0, 1]), strict=True):
            assert rel_err(g, ref) < 1e-12
    text = gradwright.generate(BUILTINS, ["tariff"])
    assert "int(x * 3.0)" in text and 'float("inf")' in text


@pytest.mark.parametrize(
    ("body", "message", "hint"),
    [
        ("return pow(x, 2.0, 5)", "pow() takes two arguments here", "(x ** y) % m"),
        ('return x * float("2.5")', "float() of a string", 'float("inf")'),
        ("return int(x)", "does not depend", None),
    ],
)
def test_builtin_rejections(body: str, message: str, hint: str | None) -> None:
    with pytest.raises(GradwrightError) as error:
        gradwright.generate(f"def f(x):\n    {body}\n", ["f"])
    diagnostic = error.value.diagnostic
    assert message in diagnostic.message
    assert diagnostic.location is not None
    if hint is not None:
        assert hint in (diagnostic.hint or "")


def test_measures_of_module_data() -> None:
    source = (
        "RATES = [0.5, 2.0, 1.25]\n\n\n"
        "def f(x):\n"
        "    spread = min(RATES) / len(RATES)\n"
        "    return x * sum(RATES, 1.0) + max(RATES) * x * x + spread\n"
    )
    ns = build(source, "f")
    # reference: d/dx (4.75 x + 2 x^2 + c) = 4.75 + 4 x
    value, (g,) = ns["f_grad"](1.5)
    assert value == run_source(source)["f"](1.5)
    assert g == 4.75 + 4.0 * 1.5


@pytest.mark.parametrize(
    ("body", "message", "hint"),
    [
        (
            "    TABLE[0] = x\n    return x",
            "a model may read it, not change it",
            "t[i]",
        ),
        ("    return sum(TABLE, x)", "may depend on a --wrt parameter", "+ sum(TABLE)"),
        ("    return x * TABLE[0, 1]", "one index at a time", "TABLE[i][j]"),
    ],
)
def test_module_data_rejections(body: str, message: str, hint: str) -> None:
    source = "TABLE = [1.0, 2.0]\n\n\ndef f(x):\n" + body + "\n"
    with pytest.raises(GradwrightError) as error:
        gradwright.generate(source, ["f"])
    diagnostic = error.value.diagnostic
    assert message in diagnostic.message
    assert diagnostic.location is not None and diagnostic.location.line >= 5
    assert hint in (diagnostic.hint or "")


DISTANCE = """\
import math
from math import dist as gap


def spread(x, y):
    return math.dist((x, y), (1.0, 2.5)) + gap([x], [3.0]) * y
"""


def test_math_dist_of_points_written_out() -> None:
    # math.dist is hypot of the differences, bit for bit (same CPython routine)
    ns = build(DISTANCE, "spread")
    for x, y in ((0.3, -1.2), (4.0, 2.5), (1.0, 7.0)):
        value, (g_x, g_y) = ns["spread_grad"](x, y)
        assert value == run_source(DISTANCE)["spread"](x, y)
        # reference: d|p - q| / dp = (p - q) / |p - q| (closed form)
        r = math.hypot(x - 1.0, y - 2.5)
        assert rel_err(g_x, (x - 1.0) / r + math.copysign(1.0, x - 3.0) * y) < 1e-14
        assert rel_err(g_y, (y - 2.5) / r + abs(x - 3.0)) < 1e-14
    with pytest.raises(GradwrightError) as error:
        gradwright.generate(
            "import math\n\n\ndef f(x, p):\n    return math.dist(p, (x,))\n", ["f"]
        )
    assert "math.hypot(x1 - x2" in (error.value.diagnostic.hint or "")


def test_module_tables_under_micropython() -> None:
    # the copied tables run under the real MicroPython interpreter; reference: the
    # normal equations' minimum (zero gradient) and the same module under CPython
    require_micropython()
    text = gradwright.generate(LINE_FIT, ["line_loss"], target="micropython")
    slope, intercept = _normal_equations(run_source(LINE_FIT)["SAMPLES"])
    call = f"print(repr(line_loss_grad({slope!r}, {intercept!r})))\n"
    printed = run_micropython(text + "\n" + call)
    value, (g_slope, g_intercept) = eval(printed.strip())  # a tuple of floats
    expected = run_source(text)["line_loss_grad"](slope, intercept)
    assert rel_err(value, expected[0]) < 1e-15
    assert abs(g_slope) < 1e-12 and abs(g_intercept) < 1e-12


UNPACKED = """
import math

LINKS = (0.35, 0.25)
SAMPLES = [(0.0, 1.0), (0.5, 0.8), (1.5, 0.45)]


def arm_cost(q1, q2):
    l1, l2 = LINKS
    x = l1 * math.cos(q1) + l2 * math.cos(q1 + q2)
    y = l1 * math.sin(q1) + l2 * math.sin(q1 + q2)
    return (x - 0.4) ** 2 + (y - 0.2) ** 2


def decay_loss(k):
    loss = 0.0
    for i in range(len(SAMPLES)):
        t, c = SAMPLES[i]
        loss += (math.exp(-k * t) - c) ** 2
    return loss
"""


def test_unpacking_module_tuples_and_rows() -> None:
    module = {**build(UNPACKED, "arm_cost"), **build(UNPACKED, "decay_loss")}
    primal = run_source(UNPACKED)
    q1, q2 = 0.6, -0.4
    value, (g1, g2) = module["arm_cost_grad"](q1, q2)
    assert value == primal["arm_cost"](q1, q2)
    # two-link planar arm: the textbook Jacobian of (x, y) in (q1, q2)
    l1, l2 = 0.35, 0.25
    x = l1 * math.cos(q1) + l2 * math.cos(q1 + q2)
    y = l1 * math.sin(q1) + l2 * math.sin(q1 + q2)
    jx = (-l1 * math.sin(q1) - l2 * math.sin(q1 + q2), -l2 * math.sin(q1 + q2))
    jy = (l1 * math.cos(q1) + l2 * math.cos(q1 + q2), l2 * math.cos(q1 + q2))
    for g, k in ((g1, 0), (g2, 1)):
        assert rel_err(g, 2 * (x - 0.4) * jx[k] + 2 * (y - 0.2) * jy[k]) < 1e-14
    value, (k_bar,) = module["decay_loss_grad"](0.7)
    assert value == primal["decay_loss"](0.7)
    samples = [(0.0, 1.0), (0.5, 0.8), (1.5, 0.45)]
    # d/dk sum (exp(-k t) - c)^2 = sum -2 t exp(-k t) (exp(-k t) - c), by hand
    want = sum(
        -2 * t * math.exp(-0.7 * t) * (math.exp(-0.7 * t) - c) for t, c in samples
    )
    assert rel_err(k_bar, want) < 1e-14


LEG_TABLE = """
import numpy as np

LEGS = np.array([[12.0, 0.5], [8.5, 2.1], [20.0, -1.2]])


def cost(m, k):
    force = m * LEGS[:, 1] + k * LEGS[:, 0] ** 2
    return np.sum(force * force) + np.sum(LEGS[1:, 0] * m) + LEGS[-1, 1] * k
"""


def test_constant_slices_of_a_module_array_in_a_numpy_model() -> None:
    text = gradwright.generate(LEG_TABLE, ["cost"], shapes={"m": (), "k": ()})
    # read as written, their shapes (3,) and (2,) known: no generic helper
    assert "LEGS[:, 1]" in text and "LEGS[1:, 0]" in text and "LEGS[-1, 1]" in text
    assert "_gw_unbroadcast" not in text and "_gw_unreduce" not in text
    ns: dict = {}
    exec(compile(text, "<grad>", "exec"), ns)
    value, (m_bar, k_bar) = ns["cost_grad"](0.7, -0.3)
    legs = [[12.0, 0.5], [8.5, 2.1], [20.0, -1.2]]
    force = [0.7 * b + -0.3 * a * a for a, b in legs]
    # reference by hand: d/dm = sum(2 f b) + sum(a[1:]), d/dk = sum(2 f a^2) + b[-1]
    m_exact = sum(2 * f * b for f, (_, b) in zip(force, legs, strict=True)) + 28.5
    k_exact = sum(2 * f * a * a for f, (a, _) in zip(force, legs, strict=True)) - 1.2
    assert rel_err(m_bar, m_exact) < 1e-14 and rel_err(k_bar, k_exact) < 1e-14
    assert value == run_source(LEG_TABLE)["cost"](0.7, -0.3)
