"""``gradwright verify``: finite-difference checks, non-finite adjoints, hints."""

from __future__ import annotations

import math
import re
import sys
from pathlib import Path

import mpmath
import pytest
from workflow_support import SAMPLES, THERMISTOR_RANGE_OPTION, cli, exe

from gradwright.workflow import nonfinite, points, verify

THERMISTOR = str(SAMPLES / "thermistor.py")

LSE = """import math


def lse(a, b):
    s = math.log(math.exp(a) + math.exp(b))
    return 3.0 * s
"""

DAMPED = """def damped(x):
    y = 1e200 * x * x
    return 1.0 / (1.0 + y)
"""

ROOT_SQUARED = """import math


def root_squared(x):
    y = math.sqrt(x)
    return y * y
"""

GROWTH = """import math


def growth(r, t):
    g = math.exp(r * t) - 1.0
    return g / r
"""


def _model(tmp_path: Path, name: str, text: str) -> Path:
    path = tmp_path / f"{name}.py"
    path.write_text(text, encoding="utf-8")
    return path


def _rows(out: str) -> dict[str, list[str]]:
    """The table rows of a verify report: parameter -> its cells."""
    rows = {}
    for line in out.splitlines():
        cells = line.split()
        if line.startswith("  ") and len(cells) >= 5 and cells[0] != "parameter":
            rows[cells[0]] = cells[1:]
    return rows


# ---------------------------------------------------------------------------------
# passing and failing


def test_verify_passes_on_a_correct_model() -> None:
    result = exe(
        "verify", THERMISTOR, "fit_loss", "--range", THERMISTOR_RANGE_OPTION,
        cwd=SAMPLES,
    )  # fmt: skip
    assert result.code == 0, result.out + result.err
    header = result.out.splitlines()[1].split()
    assert header == ["parameter", "gradient", "finite", "difference", "rel.", "error"]
    assert result.out.count("fit_loss_grad at a=") == points.DEFAULT_SAMPLES
    assert set(_rows(result.out)) == {"a", "b", "c", "resistance", "kelvin"}
    assert all(cells[-1] == "ok" for cells in _rows(result.out).values())
    last = result.out.splitlines()[-1]
    assert last == (
        "verify: fit_loss_grad: agrees with central differences at 3 point(s)"
        " (rtol 1e-05)"
    )


def test_verify_at_a_given_point() -> None:
    result = cli(
        "verify", THERMISTOR, "fit_loss", "--wrt", "a,b,c",
        "--at", "a=0.0014,b=0.00024,c=9e-8", "--at", "resistance=8000,kelvin=295",
        "--scale", "a=0.002,b=0.0003,c=1e-7",
        cwd=SAMPLES,
    )  # fmt: skip
    assert result.code == 0, result.out + result.err
    lines = result.out.splitlines()
    assert lines[0] == (
        # integers given with --at stay integers (trip counts, indices)
        "fit_loss_grad at a=0.0014, b=0.00024, c=9e-08, resistance=8000,"
        " kelvin=295"
    )
    assert set(_rows(result.out)) == {"a", "b", "c"}


def _corrupt(tmp_path: Path, old: str, new: str) -> Path:
    module = tmp_path / "thermistor_grad.py"
    text = (SAMPLES / "thermistor_grad.py").read_text()
    assert old in text
    module.write_text(text.replace(old, new))
    return module


def _verify_module(module: Path, run=cli):
    """verify on a thermistor module, at points in the bench ranges."""
    return run(
        "verify", str(module), "fit_loss", "--range", THERMISTOR_RANGE_OPTION,
        cwd=SAMPLES,
    )  # fmt: skip


def test_verify_passes_on_the_committed_module() -> None:
    result = _verify_module(SAMPLES / "thermistor_grad.py")
    assert result.code == 0, result.out
    assert set(_rows(result.out)) == {"a", "b", "c"}  # the module's own wrt


def test_verify_fails_on_a_corrupted_module(tmp_path: Path) -> None:
    module = _corrupt(tmp_path, "b_bar = inv_t_bar * ln_r", "b_bar = -inv_t_bar * ln_r")
    result = _verify_module(module, run=exe)
    assert result.code == 1
    rows = _rows(result.out)
    assert rows["a"][-1] == "ok" and rows["c"][-1] == "ok"
    assert rows["b"][-1] == "FAIL"
    assert float(rows["b"][2]) == pytest.approx(2.0)  # |g - (-g)| / |g|
    assert "FAILED at 3 of 3 point(s)" in result.out.splitlines()[-1]
    assert "Traceback" not in result.err


def test_verify_reports_a_value_that_differs_from_the_primal(tmp_path: Path) -> None:
    module = _corrupt(tmp_path, "value = err * err", "value = err * err * 1.0000001")
    result = _verify_module(module)
    assert result.code == 1
    assert "differs from fit_loss(...)" in result.out


def test_verify_wrt_must_match_a_generated_module() -> None:
    module = str(SAMPLES / "thermistor_grad.py")
    result = cli("verify", module, "fit_loss", "--wrt", "a", cwd=SAMPLES)
    assert result.code == 2
    assert "is with respect to a, b, c, not a" in result.err
    missing = cli("verify", module, "nope", cwd=SAMPLES)
    assert missing.code == 2
    assert "has no generated function nope_grad" in missing.err
    assert "it has gradients of: fit_loss" in missing.err


# ---------------------------------------------------------------------------------
# the classic silent failure: the value is finite, an adjoint is not


def test_a_non_finite_adjoint_is_traced_to_its_source_statement(
    tmp_path: Path,
) -> None:
    # exp(-740) is subnormal (about 4.2e-322); the sum's reciprocal, 1/8.4e-322,
    # overflows to inf in the reverse sweep, while log() of the sum is finite
    model = _model(tmp_path, "lse", LSE)
    result = cli("verify", str(model), "lse", "--at", "a=-740,b=-740", cwd=tmp_path)
    assert result.code == 1
    out = result.out
    assert "the value is finite (-2217.91" in out
    assert "gradient entries a, b are inf, inf" in out
    adjoint = re.search(r"first non-finite adjoint: (\w+_bar) = inf", out)
    assert adjoint is not None, out
    statement = f"{model}:5: s = math.log(math.exp(a) + math.exp(b))"
    assert f"    from {statement}" in out
    assert re.search(r"it read: \w+ = 8\.4e-322", out)
    assert "log-sum-exp shift" in out
    assert "m = max(a, b), then m + math.log(math.exp(a - m) + math.exp(b - m))" in out
    assert "first non-finite forward value" not in out  # the forward sweep was fine


def test_forward_overflow_is_told_apart_from_the_adjoint(tmp_path: Path) -> None:
    # y overflows to inf, 1 / (1 + y) is 0.0, and its derivative -0.0 times
    # dy/dx = inf is nan in the sweep
    model = _model(tmp_path, "damped", DAMPED)
    result = cli("verify", str(model), "damped", "--at", "x=1e160", cwd=tmp_path)
    assert result.code == 1
    assert "the value is finite (0.0) but gradient entry x is nan" in result.out
    assert re.search(r"first non-finite forward value: \w+ = inf", result.out)
    assert re.search(r"first non-finite adjoint: x_bar = nan", result.out)
    assert f"from {model}:2: y = 1e200 * x * x" in result.out


def test_an_exception_in_the_reverse_sweep_is_located(tmp_path: Path) -> None:
    # sqrt(0) is 0, its derivative 0.5 / sqrt(x) divides by zero
    model = _model(tmp_path, "root_squared", ROOT_SQUARED)
    result = cli("verify", str(model), "root_squared", "--at", "x=0", cwd=tmp_path)
    assert result.code == 1
    assert "root_squared_grad raises ZeroDivisionError" in result.out
    assert "while root_squared is finite (0.0)" in result.out
    assert "raised in the reverse sweep" in result.out
    assert f"from {model}:5: y = math.sqrt(x)" in result.out


def test_a_disagreement_points_at_known_inaccurate_forms(tmp_path: Path) -> None:
    # exp(r*t) - 1 keeps ~8 digits at r*t ~ 1e-8: value, gradient and difference
    # are all spoilt, and the table shows it
    model = _model(tmp_path, "growth", GROWTH)
    result = cli(
        "verify", str(model), "growth", "--wrt", "r",
        "--at", "r=6.6e-9,t=1.24", "--scale", "r=1e-8",
        cwd=tmp_path,
    )  # fmt: skip
    assert result.code == 1
    assert "hint: `g = math.exp(r * t) - 1.0`: " in result.out
    assert "write math.expm1(r * t)" in result.out


def test_points_outside_the_domain_are_skipped(tmp_path: Path) -> None:
    model = _model(tmp_path, "root_squared", ROOT_SQUARED)
    result = cli("verify", str(model), "root_squared", "--at", "x=-1", cwd=tmp_path)
    assert result.code == 2
    assert "skipped: root_squared raises ValueError" in result.out
    assert "every point is outside the model's domain" in result.out


# ---------------------------------------------------------------------------------
# options and usage


def test_random_points_follow_the_seed_and_ranges() -> None:
    args = ("verify", THERMISTOR, "fit_loss", "--range", THERMISTOR_RANGE_OPTION)
    first = cli(*args, "--samples", "2", "--seed", "7", cwd=SAMPLES)
    again = cli(*args, "--samples", "2", "--seed", "7", cwd=SAMPLES)
    other = cli(*args, "--samples", "2", "--seed", "8", cwd=SAMPLES)
    assert first.out == again.out != other.out
    heads = [line for line in first.out.splitlines() if " at a=" in line]
    assert len(heads) == 2
    for head in heads:
        values = dict(item.split("=") for item in head.split(" at ", 1)[1].split(", "))
        assert 0.001 <= float(values["a"]) <= 0.002
        assert 1000 <= float(values["resistance"]) <= 20000


def test_the_default_range_and_help_text() -> None:
    assert points.DEFAULT_RANGE == points.Range(0.5, 1.5)
    result = cli("verify", "--help", cwd=SAMPLES)
    assert result.code == 0
    text = " ".join(result.out.split())
    assert "verify RUNS CODE: it executes the generated module" in text
    assert "gen and build never run the model" in text
    top = cli("--help", cwd=SAMPLES)
    assert "RUNS the model's code" in " ".join(top.out.split())


@pytest.mark.parametrize(
    ("args", "message"),
    [
        (["--at", "q=1"], "--at names 'q', which is not a parameter of 'fit_loss'"),
        (["--at", "a"], "--at: expected NAME=VALUE, got 'a'"),
        (["--at", "a=x"], "--at a: 'x' is not a number"),
        (["--at", "a=1,a=2"], "--at: 'a' is given twice"),
        (["--range", "a=2"], "--range a: expected LOW:HIGH"),
        (["--range", "a=2:1"], "--range a: LOW must be below HIGH"),
        (["--scale", "a=0"], "--scale a: must be positive"),
        (["--samples", "0"], "--samples must be at least 1"),
        (["--rtol", "0"], "--rtol must be positive"),
    ],
)
def test_bad_options_exit_two(args: list[str], message: str) -> None:
    result = cli("verify", THERMISTOR, "fit_loss", *args, cwd=SAMPLES)
    assert result.code == 2
    assert message in result.err
    assert "Traceback" not in result.err


def test_a_model_that_cannot_be_generated_exits_two(tmp_path: Path) -> None:
    model = _model(
        tmp_path,
        "bad",
        "def f(x):\n    with x:\n        x = 0\n    return x\n",
    )
    result = cli("verify", str(model), "f", cwd=tmp_path)
    assert result.code == 2
    assert result.err.startswith(f"{model}:2:")


# ---------------------------------------------------------------------------------
# the pieces


def test_step_rule() -> None:
    # h = eps**(1/3) * max(|x|, typical size)
    eps = sys.float_info.epsilon
    assert verify.step(0.0) == eps ** (1 / 3)
    assert verify.step(-250.0) == eps ** (1 / 3) * 250.0
    assert verify.step(1e-9, 1e-8) == eps ** (1 / 3) * 1e-8


def test_central_difference_is_accurate_and_its_noise_bound_is_small() -> None:
    # closed form: d/dx sin(x) = cos(x). A central difference's truncation error
    # is h**2 / 6 * |f'''(x)| (Taylor's theorem): about 1.3e-8 at x = 40
    def f(x: float) -> float:
        return math.sin(x)

    for x in (0.0, 0.3, 2.5, 40.0):
        slope, noise = verify.central_difference(f, {"x": x}, "x")
        assert abs(slope - math.cos(x)) < 1e-7
        assert 0 <= noise < 1e-7


@pytest.mark.parametrize(
    ("statement", "expected"),
    [
        (
            "s = math.log(1.0 + math.exp(z))",
            "max(z, 0.0) + math.log1p(math.exp(-abs(z)))",
        ),
        ("return log(1 + exp(w * x))", "max(w * x, 0.0) + math.log1p"),
        ("u = math.log(1.0 + t)", "math.log1p(t)"),
        ("u = math.log(t + 1)", "math.log1p(t)"),
        ("g = math.exp(r * t) - 1.0", "math.expm1(r * t)"),
        ("s = math.log(math.exp(a) + math.exp(b) + math.exp(c))", "m = max(a, b, c)"),
        ("s = math.log(math.exp(a))", "log(exp(u)) is u: write a"),
    ],
)
def test_stable_rewrite_hints(statement: str, expected: str) -> None:
    hint = nonfinite.stable_rewrite(statement)
    assert hint is not None and expected in hint


@pytest.mark.parametrize(
    "statement",
    ["s = math.log(x)", "s = math.log(2.0 + x)", "y = math.exp(x) - 2.0", "x += 1"],
)
def test_no_hint_where_none_is_known(statement: str) -> None:
    assert nonfinite.stable_rewrite(statement) is None


def _softplus_rewrite(u: float) -> float:
    return max(u, 0.0) + math.log1p(math.exp(-abs(u)))


def _shifted_lse(a: float, b: float) -> float:
    m = max(a, b)
    return m + math.log(math.exp(a - m) + math.exp(b - m))


@pytest.mark.parametrize("u", [-800.0, -30.0, -1e-12, 0.0, 0.5, 30.0, 800.0])
def test_the_softplus_rewrite_is_right_where_the_naive_form_breaks(u: float) -> None:
    with mpmath.workdps(50):  # reference: mpmath at 50 digits
        exact = float(mpmath.log(1 + mpmath.exp(u)))
    assert _softplus_rewrite(u) == pytest.approx(exact, rel=1e-15, abs=1e-300)


@pytest.mark.parametrize(("a", "b"), [(-740.0, -740.0), (800.0, 799.0), (0.1, -3.0)])
def test_the_log_sum_exp_shift_is_right_where_the_naive_form_breaks(
    a: float, b: float
) -> None:
    with mpmath.workdps(50):  # reference: mpmath at 50 digits
        exact = float(mpmath.log(mpmath.exp(a) + mpmath.exp(b)))
    assert _shifted_lse(a, b) == pytest.approx(exact, rel=1e-15)


def test_locate_source_finds_the_statement_in_its_function() -> None:
    source = (
        "def g(x):\n    y = x\n    return y\n\n\ndef f(x):\n    y = x\n    return y\n"
    )
    assert nonfinite.locate_source(source, "f", "y = x") == 7
    assert nonfinite.locate_source(source, "g", "y = x") == 2
    assert nonfinite.locate_source(source, "f", "z = 1") is None


def test_choose_points_keeps_defaults_of_constants() -> None:
    params = points.signature_of("def f(a, /, b, c=2.0, *, d, e=1.0):\n  pass\n", "f")
    assert [(p.name, p.positional_only, p.has_default) for p in params] == [
        ("a", True, False),
        ("b", False, False),
        ("c", False, True),
        ("d", False, False),
        ("e", False, True),
    ]
    chosen = points.choose_points(params, ("b", "e"), {"d": 3.0}, {}, 2, 0)
    assert len(chosen) == 2
    for point in chosen:
        assert list(point) == ["a", "b", "d", "e"]  # c keeps its default
        assert point["d"] == 3.0
        assert all(0.5 <= point[n] <= 1.5 for n in ("a", "b", "e"))
    assert chosen[0] != chosen[1]
    assert points.choose_points(params, ("b",), {"a": 1, "b": 2, "d": 3}, {}, 5, 0) == [
        {"a": 1, "b": 2, "d": 3}
    ]


def test_call_passes_positional_only_by_position() -> None:
    def f(a, /, b, *, c):
        return (a, b, c)

    assert verify.call(f, {"a": 1, "b": 2, "c": 3}) == (1, 2, 3)


LIST_LSE = """import math


def lse_list(xs):
    t = 0.0
    for i in range(len(xs)):
        t += math.exp(xs[i])
    return math.log(t)
"""


def test_list_parameters_are_checked_element_by_element(tmp_path: Path) -> None:
    model = _model(tmp_path, "lse_list", LIST_LSE)
    good = cli(
        "verify", str(model), "lse_list", "--at", "xs=[0.5,1.5,-2]", cwd=tmp_path
    )
    assert good.code == 0, good.out
    assert set(_rows(good.out)) == {"xs[0]", "xs[1]", "xs[2]"}
    bad = cli("verify", str(model), "lse_list", "--at", "xs=[-740,-741]", cwd=tmp_path)
    assert bad.code == 1
    assert "gradient entry xs is [inf, inf]" in bad.out
    assert f"from {model}:8: return math.log(t)" in bad.out
    assert re.search(r"it read: t = 5\.73e-322", bad.out)


def test_verify_draws_arrays_for_a_numpy_model() -> None:
    # array parameters: drawn with --shape, each element checked by central differences
    result = cli(
        "verify", "greenhouse_net.py", "humidity_loss", "--wrt", "W1,b2",
        "--shape", "W1=4x3,b1=3,w2=3,features=5x4,humidity=5",
        "--samples", "1",
        cwd=SAMPLES,
    )  # fmt: skip
    assert result.code == 0, result.out + result.err
    rows = _rows(result.out)
    assert {f"W1[{i},{j}]" for i in range(4) for j in range(3)} <= set(rows)
    assert "b2" in rows
    assert "W1=<4x3 array>" in result.out.splitlines()[0]


def test_verify_shapes_read_as_gen_writes_them() -> None:
    # gen's --shape X=n,5 notation (commas) and verify's 4x3 both work in verify;
    # a comma followed by NAME= starts the next parameter
    written = points.parse_shapes(["W1=4,3", "b1=3", "features=5x4,humidity=5"])
    assert written == {"W1": (4, 3), "b1": (3,), "features": (5, 4), "humidity": (5,)}
    assert points.parse_shapes(["W1=4X3,b1=3"]) == {"W1": (4, 3), "b1": (3,)}
    result = cli(
        "verify", "greenhouse_net.py", "humidity_loss", "--wrt", "b2",
        "--shape", "W1=4,3", "--shape", "b1=3", "--shape", "w2=3",
        "--shape", "features=5,4", "--shape", "humidity=5", "--samples", "1",
        cwd=SAMPLES,
    )  # fmt: skip
    assert result.code == 0, result.out + result.err
    assert "W1=<4x3 array>" in result.out.splitlines()[0]
    symbolic = cli(
        "verify", "greenhouse_net.py", "humidity_loss", "--shape", "W1=n,3", cwd=SAMPLES
    )
    assert symbolic.code == 2 and "needs positive sizes as numbers" in symbolic.err


def test_verify_keeps_integer_trip_counts() -> None:
    result = cli(
        "verify", "kiln_cooling.py", "kiln_loss", "--wrt", "k_conv,k_rad,start_temp",
        "--at", "readings=[1150.0,1010.0,905.0],dt=0.5,steps_per_reading=20",
        "--at", "k_conv=0.012,k_rad=0.035,start_temp=1290.0",
        cwd=SAMPLES,
    )  # fmt: skip
    assert result.code == 0, result.out + result.err
    assert "steps_per_reading=20" in result.out


# ---------------------------------------------------------------------------------
# parameter kinds: lists, trip counts, indices and arrays are drawn as such


def _sample_targets() -> list[tuple[str, list[str]]]:
    """(model file, functions) of every committed sample, from its header."""
    import shlex

    found = []
    for golden in sorted(SAMPLES.glob("*_grad.py")):
        for line in golden.read_text(encoding="utf-8").splitlines():
            if line.startswith("# command: "):
                words = shlex.split(line.removeprefix("# command: "))
                functions = []
                for word in words[3:]:
                    if word.startswith("-"):
                        break
                    functions.append(word)
                found.append((Path(words[2]).name, functions))
    return found


@pytest.mark.parametrize(("model", "functions"), _sample_targets(), ids=str)
@pytest.mark.parametrize("generated", [False, True], ids=["model", "module"])
def test_every_sample_verifies_with_only_samples(
    model: str, functions: list[str], generated: bool
) -> None:
    path = model.replace(".py", "_grad.py") if generated else model
    result = cli("verify", path, *functions, "--samples", "2", cwd=SAMPLES)
    assert result.code == 0, result.out + result.err
    assert result.out.count("agrees with central differences at 2 point(s)") == len(
        functions
    )
    assert "unchecked" not in result.out


def test_there_are_samples_to_verify() -> None:
    assert len(_sample_targets()) >= 5


def test_kiln_draws_a_list_and_a_trip_count() -> None:
    result = cli("verify", "kiln_cooling.py", "kiln_loss", "--samples", "1",
                 "--length", "readings=4", cwd=SAMPLES)  # fmt: skip
    assert result.code == 0, result.out
    first = result.out.splitlines()[0]
    assert re.search(r"readings=\[[^]]*,[^]]*,[^]]*,[^]]*\]", first)  # 4 elements
    assert re.search(r"steps_per_reading=[1-4]$", first)  # an int, not a float
    rows = _rows(result.out)
    assert {"readings[0]", "readings[3]"} <= set(rows)
    assert " ".join(rows["steps_per_reading"]).endswith("integer: zero by definition")


def test_kinds_read_from_the_code() -> None:
    from gradwright.workflow.kinds import parameter_kinds

    source = (
        "def h(ys, k):\n    return ys[k]\n\n\n"
        "def f(a, xs, n, m, k2):\n"
        "    s = 0.0\n    t = 2 * n\n"
        "    for i in range(t):\n        s += a * xs[i % len(xs)]\n"
        "    return s + h(xs, k2) + m\n"
    )
    assert parameter_kinds(source, "f") == {
        "a": "number",
        "xs": "list",
        "n": "trip count",  # through the local t
        "m": "number",
        "k2": "index",  # through the helper h
    }
    numpy = "import numpy as np\n\n\ndef g(W, b, x):\n    return np.sum(x @ W + b)\n"
    assert parameter_kinds(numpy, "g") == {
        "W": "array",
        "b": "number or array",
        "x": "array",
    }


def test_a_failing_guess_is_named(tmp_path: Path) -> None:
    model = _model(
        tmp_path, "shifted", "def shifted(a, xs, k):\n    return a * xs[k + 3]\n"
    )
    result = cli("verify", str(model), "shifted", "--wrt", "a", cwd=tmp_path)
    assert result.code == 2  # every point raises IndexError: outside the domain
    assert "IndexError" in result.out
    assert (
        "parameter kinds guessed from the model's code: xs a list of 3"
        " (--length xs=K); k an index (--range)" in result.out
    )
    longer = cli("verify", str(model), "shifted", "--wrt", "a", "--length", "xs=6",
                 "--range", "k=0:2",
                 cwd=tmp_path)  # fmt: skip
    assert longer.code == 0, longer.out
    assert "guessed" not in longer.out


def test_a_length_makes_a_list_whatever_the_guess(tmp_path: Path) -> None:
    # `lengths` is only zipped with the active list, so its code does not say
    # it is a list: --length says so (it was drawn as a number, and every
    # point raised TypeError)
    model = _model(
        tmp_path,
        "reach",
        "import math\n\n\ndef reach(q, lengths):\n    x = 0.0\n"
        "    for joint, length in zip(q, lengths):\n"
        "        x += length * math.cos(joint)\n    return x * x\n",
    )
    result = cli("verify", str(model), "reach", "--wrt", "q", "--length", "q=3",
                 "--length", "lengths=3", cwd=tmp_path)  # fmt: skip
    assert result.code == 0, result.out
    assert "agrees with central differences at 3 point(s)" in result.out


def test_integer_range_and_length_errors(tmp_path: Path) -> None:
    model = _model(
        tmp_path, "rep", "def rep(a, n):\n    for _ in range(n):\n"
        "        a = a * 0.5\n    return a\n"
    )  # fmt: skip
    empty = cli("verify", str(model), "rep", "--range", "n=1.2:1.8", cwd=tmp_path)
    assert empty.code == 2 and "no integer lies in 1.2:1.8" in empty.err
    bad = cli("verify", str(model), "rep", "--length", "n=0", cwd=tmp_path)
    assert bad.code == 2 and "--length n: expected a positive whole number" in bad.err
    wide = cli("verify", str(model), "rep", "--range", "n=5:7", cwd=tmp_path)
    assert wide.code == 0, wide.out
    assert all(re.search(r"n=[567]$", line) for line in wide.out.splitlines()
               if line.startswith("rep_grad at"))  # fmt: skip


def test_numpy_shapes_are_found_without_shape_options() -> None:
    result = cli("verify", "greenhouse_net.py", "humidity_loss", "--samples", "1",
                 cwd=SAMPLES)  # fmt: skip
    assert result.code == 0, result.out
    first = result.out.splitlines()[0]
    assert "W1=<3x3 array>" in first and "features=<3x3 array>" in first
    assert "W1[2,2]" in _rows(result.out)
