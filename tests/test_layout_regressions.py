"""Wrong gradients found by random programs, and the layout check that stops them.

Each model below once gave a wrong gradient, a value different from the primal, or a
module that failed when called. Every gradient is checked against mpmath central
differences at 50 digits of the model's own source (``support.mp_gradient``), at
points on both sides of each branch; values must equal the primal's bit for bit.
"""

from __future__ import annotations

import time

import pytest
from support import build, mp_function, mp_gradient, rel_err, run_source

import gradwright
from gradwright import GradwrightError
from gradwright.emission import print_sweeps

CASES = {
    # the names-of-their-own layout (taken when sharing names fails the check)
    # gave the value only the reverse sweep recomputes, x / z, the bare name `t1`
    # that the forward's t1 = x already held: the check refused both layouts
    # (found by a long random run)
    "recomputed-value-never-takes-a-held-bare-name": (
        """
def f(x, y):
    t1 = x
    z = t1 if x > t1 else t1
    t7 = z
    k8 = 0
    while k8 < 1:
        k8 += 1
        t1 = x / z
        t7 = t1 if y > 0.5 else t1
        t1 = y
    return t1 * x + 2.0 * z
""",
        ["x", "y"],
        [(0.7, 0.9), (0.7, 0.2), (-1.3, 0.6)],
    ),
    # x * (0.25 * i), invariant in the inner loops, was computed at the head of
    # the outer loop's reverse body: outside the if around them (the layout check
    # refused it); now just before the while loop's reverse, in the if's side
    "invariant-hoisted-within-its-branch": (
        """
def f(x, y, n):
    for i in range(n):
        if y > 0.25 * i:
            x = x * 0.9
            k = 0
            while k < 2:
                k = k + 1
                for j in range(2):
                    y = y * 0.5 + (x * (0.25 * i)) * (x * (0.25 * i))
        else:
            x = x * 1.1
    return x + y
""",
        ["x", "y"],
        [(0.7, 0.9, 3), (0.7, -0.5, 3), (1.3, 2.0, 4)],
    ),
    # a loop on one path of an if zeroed the adjoint on the other path
    "loop-after-early-return": (
        """
def f(x, c):
    if c > 0.0:
        return x * 2.0
    for i in range(2):
        x = x * 0.5
    return x
""",
        ["x"],
        [(0.7, 0.5), (0.7, -0.5)],
    ),
    "loop-inside-if-without-else": (
        """
def f(x, c):
    s = x
    if c > 0.0:
        for i in range(2):
            s = s * 0.5
    return s
""",
        ["x"],
        [(0.7, 0.5), (0.7, -0.5)],
    ),
    # a local list bound in a branch: its adjoint list was made before the test
    "list-bound-in-branch": (
        """
def f(x, c):
    if c > 0.0:
        y = [x, 2.0]
        x = y[0] * y[1]
    return x * x
""",
        ["x"],
        [(0.5, 1.0), (0.5, -1.0)],
    ),
    # a name re-bound in an if inside a loop, read after it
    "rebound-in-if-in-loop": (
        """
def f(x, c):
    a = x
    for i in range(1):
        if c > 0.0:
            a = a * a
        a = a * x
    return a
""",
        ["x"],
        [(0.5, 1.0), (0.5, -1.0)],
    ),
    "rebound-in-if-in-loop-test-reads-it": (
        """
def f(x, a):
    for i in range(1):
        if a < 0.5:
            a = a * 3.0
        x = x * a
    return x
""",
        ["x", "a"],
        [(0.7, 0.3), (0.7, 0.6)],
    ),
    # identical arms aliased two names: the value differed from the primal
    "identical-arms": (
        """
def f(a):
    y = a if a < 0.3 else a
    y = y + 1.0
    return a * y
""",
        ["a"],
        [(0.5,), (0.2,)],
    ),
    # `and`/`or` between numbers select an operand; they were treated as constant
    "and-or-as-values": (
        """
def f(p0, p1):
    t = p0 and p1
    u = p0 * 2.0 or p1
    return t * p0 + u
""",
        ["p0", "p1"],
        [(0.5, 0.7), (-0.25, 0.7)],
    ),
    # a helper call whose value is dead: the forward sweep dropped the call while
    # the reverse still read its partials
    "dead-helper-call-in-loop": (
        """
def h(a):
    return a * a
def f(x):
    t = 0.0
    for i in range(1):
        t = h(x)
        x = x * 0.5
    return x
""",
        ["x"],
        [(0.5,)],
    ),
    # one arm copies, the other computes; the reverse of exp read the new t
    "copying-arm": (
        """
import math
def f(x, c):
    if c > 0.0:
        t = x
    else:
        t = math.exp(x)
    t = t + x
    return t
""",
        ["x"],
        [(0.5, -1.0), (0.5, 1.0)],
    ),
    "list-made-in-loop-body": (
        """
def f(x, c):
    s = 0.0
    for i in range(3):
        tmp = [x * i, 2.0 + x]
        if c > 0:
            tmp[1] = tmp[0] * x
        s = s + tmp[0] * tmp[1]
    return s
""",
        ["x"],
        [(0.5, 1.0), (0.5, -1.0)],
    ),
    # the layout check wrongly refused it (an adjoint accumulated on one side of
    # a branch in an inner loop was lost in the inner loop's summary)
    "nested-loop-if-rebinds-to-parameter": (
        """
def f(x, y):
    for i in range(1):
        for j in range(2):
            if x > 0.0:
                x = y * x
    return x
""",
        ["x", "y"],
        [(1.36, 0.5), (-1.36, -0.94)],
    ),
    # naming a helper call's partials gave the call the re-bound name before the
    # layout chose one, so the reverse test read the helper's value
    "early-return-then-helper-rebinds": (
        """
def h0(a):
    return a

def f(a):
    t2 = a
    if t2 >= 0.1:
        return a
    t2 = h0(t2)
    return t2 * a
""",
        ["a"],
        [(0.25,), (0.05,)],
    ),
    # an adjoint written on one side of a branch in the innermost of three loops
    # was lost in the loop summaries: a false internal error
    "one-sided-adjoint-three-loops-deep": (
        """
def f(x, y, z):
    for i2 in range(2):
        for i3 in range(3):
            for i4 in range(3):
                y = z if i2 > 1 else x
            z = x if x < 1.5 else z * 0.5
    return y
""",
        ["x"],
        [(0.6, 1.3, -0.8), (1.7, 1.3, -0.8)],
    ),
    "three-nested-loops": (
        """
def f(x):
    y = x
    for i in range(2):
        for j in range(i + 1):
            for k in range(2):
                y = y * x
    return y
""",
        ["x"],
        [(0.9,)],
    ),
    # a carried adjoint read negated (-z_bar) was substituted into the swap's
    # start-of-iteration adjoint, then read after z_bar was updated: dz/dx was 0
    "negated-carried-adjoint-in-a-swap": (
        """
def f(x, z):
    t = x
    for i in range(2):
        t, z = z, 0.25 * i - t
    return z + 0.5 * t
""",
        ["x", "z"],
        [(1.0, -1.2)],
    ),
}


@pytest.mark.parametrize("name", sorted(CASES))
def test_regression_case_matches_mpmath(name):
    source, wrt, points = CASES[name]
    module = build(source, "f", wrt)
    primal = run_source(source)["f"]
    reference = mp_function(source, "f")
    params = ["x", "c"] if "def f(x, c)" in source else None
    names = params or [
        n.strip() for n in source.split("def f(")[1].split(")")[0].split(",")
    ]
    active = [names.index(w) for w in wrt]
    for point in points:
        value, grads = module["f_grad"](*point)
        assert value == primal(*point)  # bit-identical to the primal
        expected = mp_gradient(reference, list(point), active)  # mpmath differences
        for got, want in zip(grads, expected, strict=True):
            assert rel_err(got, float(want)) < 1e-12, (name, point, got, want)


def test_differently_bound_lists_on_two_paths_are_located_errors():
    source = """
def f(x, c):
    if c > 0.0:
        y = [x, 2.0]
    else:
        y = [3.0, x]
    return y[0] * y[1]
"""
    with pytest.raises(GradwrightError) as error:
        gradwright.generate(source, ["f"], wrt=["x"])
    text = str(error.value)
    assert "<string>:7:12:" in text and "different list on each path" in text


def test_list_rebound_inside_a_loop_against_closed_form():
    # once a located error; now the rebound list's adjoint is handed on
    source = """
def f(x):
    y = [x, 2.0]
    for i in range(3):
        y = [y[1], y[0] * x]
    return y[0] * y[1]
"""
    namespace: dict = {}
    exec(gradwright.generate(source, ["f"], wrt=["x"]), namespace)
    value, (x_bar,) = namespace["f_grad"](1.3)
    # by hand: [x, 2] -> [2, x^2] -> [x^2, 2x] -> [2x, x^3]; f = 2 x^4, f' = 8 x^3
    assert value == run_source(source)["f"](1.3)  # bit-identical to the primal
    assert rel_err(x_bar, 8 * 1.3**3) < 1e-15


def _nested_loops(depth: int) -> str:
    lines = ["def f(x):", "    y = x"]
    for k in range(depth):
        lines.append("    " * (k + 1) + f"for i{k} in range(1):")
    lines.append("    " * (depth + 1) + "y = y * x")
    lines.append("    return y")
    return "\n".join(lines) + "\n"


def test_deeply_nested_loops_generate_quickly_and_correctly():
    # 19 loops: CPython compiles at most 20 nested blocks, model or module
    start = time.perf_counter()
    module = build(_nested_loops(19), "f", ["x"])
    elapsed = time.perf_counter() - start
    value, (x_bar,) = module["f_grad"](0.7)
    assert value == 0.7 * 0.7
    assert x_bar == 2.0 * 0.7  # d(x*x)/dx, closed form
    # was exponential in the depth (12 levels 0.34 s, 19 about a minute); a wide
    # margin for a loaded machine, not a benchmark
    assert elapsed < 20.0


def test_deeply_nested_ifs_generate():
    lines = ["def f(x, c):", "    y = x"]
    for k in range(40):
        lines.append("    " * (k + 1) + f"if c > {k}.0:")
        lines.append("    " * (k + 2) + "y = y * x")
    lines.append("    return y")
    module = build("\n".join(lines) + "\n", "f", ["x"])
    value, (x_bar,) = module["f_grad"](0.5, 2.5)  # three ifs taken: y = x**4
    assert value == 0.5**4
    assert x_bar == 4 * 0.5**3  # d(x**4)/dx, closed form


def test_long_sum_generates():
    terms = 1200  # past the old recursion limit (490); CPython compiles it
    source = "def f(x):\n    return " + " + ".join(
        f"{k}.5 * x * x" for k in range(terms)
    )
    module = build(source + "\n", "f", ["x"])
    value, (x_bar,) = module["f_grad"](0.25)
    coefficient = sum(k + 0.5 for k in range(terms))
    assert rel_err(x_bar, 2 * coefficient * 0.25) < 1e-12  # d(c x^2)/dx


def test_layout_check_catches_a_broken_layout(monkeypatch):
    """Drop the zero an adjoint gets on the side of a branch that does not touch
    it: the check must refuse the module (x_bar unset when c <= 0)."""
    from gradwright.ir import AdjointAssign, Const, ReverseBranch

    real_block = print_sweeps._Emitter.reverse_block

    def without_zeros(self, statements, depth, out):
        if depth > 1:  # inside a branch side
            statements = tuple(
                s
                for s in statements
                if not (isinstance(s, AdjointAssign) and s.expr == Const("0.0", 0.0))
            )
        return real_block(self, statements, depth, out)

    monkeypatch.setattr(print_sweeps._Emitter, "reverse_block", without_zeros)
    source = """
def f(x, c):
    s = x
    if c > 0.0:
        s = s * x
    return s * 3.0
"""
    assert ReverseBranch  # the statement kind the broken printer mishandles
    with pytest.raises(GradwrightError) as error:
        gradwright.generate(source, ["f"], wrt=["x"])
    assert "internal error" in str(error.value)
    assert "please report" in str(error.value)
    assert "x_bar" in str(error.value)


def test_unsafe_sharing_falls_back_to_one_name_per_value(monkeypatch):
    """The readable layout of this model fails the check; the module written is
    the fallback layout, which passes it and gives the right gradient."""
    source = CASES["rebound-in-if-in-loop"][0]
    failures = []
    real_lay_out = print_sweeps.lay_out

    def spy(*args, **kwargs):
        try:
            return real_lay_out(*args, **kwargs)
        except print_sweeps.LayoutError as error:
            failures.append(error)
            raise

    monkeypatch.setattr("gradwright.emission.module.lay_out", spy)
    module = build(source, "f", ["x"])
    assert len(failures) <= 1
    _, (x_bar,) = module["f_grad"](0.5, 1.0)
    assert x_bar == 3 * 0.5**2  # a = x**3 on this side: 3x^2, closed form


def test_inner_trip_count_read_from_a_list():
    """The saved list of an inner loop is sized by the bound the forward sweep
    has (it raised UnboundLocalError)."""
    source = """
def f(a, ns):
    x = a
    for k in range(len(ns)):
        for s in range(ns[k]):
            x = x * a
    return x
"""
    module = build(source, "f", ["a"])
    ns = [1, 2, 0, 3]
    value, (a_bar,) = module["f_grad"](0.9, ns)
    power = 1 + sum(ns)  # x = a**(1 + sum(ns)): closed form
    assert rel_err(value, 0.9**power) < 1e-14
    assert rel_err(a_bar, power * 0.9 ** (power - 1)) < 1e-13


def test_elementwise_array_helper_with_a_broadcast_operand():
    import numpy as np

    source = """
import numpy as np
def act(u, b):
    return np.tanh(u + b) * 2.0
def f(X, w, b):
    return np.sum(act(X @ w, b) ** 2)
"""
    module = build(source, "f", ["w", "b"])
    rng = np.random.default_rng(1)
    X, w, b = rng.normal(size=(5, 3)), rng.normal(size=3), np.array([0.3])
    _, (w_bar, b_bar) = module["f_grad"](X, w, b)
    # closed form: act = 2 tanh(s), s = Xw + b; d/ds act**2 = 2 act * 2 (1 - tanh**2)
    t = np.tanh(X @ w + b)
    ds = 2 * (2 * t) * 2 * (1 - t**2)
    np.testing.assert_allclose(w_bar, X.T @ ds, rtol=1e-13)
    np.testing.assert_allclose(b_bar, [ds.sum()], rtol=1e-13)
    assert b_bar.shape == b.shape


def test_hypot_at_the_origin_follows_the_abs_convention():
    """hypot(x, 0) is abs(x): at the origin the first argument gets +1, the others
    0 (the project's kink convention, abs'(0) = +1); it raised ZeroDivisionError."""
    source = "import math\ndef f(x, y):\n    return math.hypot(x - x, y - y)\n"
    module = build(source, "f")
    assert module["f_grad"](0.5, 0.25) == (0.0, (0.0, 0.0))  # (1 - 1, 0 - 0)
    source = "import math\ndef f(x, y):\n    return math.hypot(x, y)\n"
    module = build(source, "f")
    assert module["f_grad"](0.0, 0.0) == (0.0, (1.0, 0.0))
    assert module["f_grad"](3.0, 4.0) == (5.0, (0.6, 0.8))  # x/r, y/r: closed form


def test_empty_wrt_is_a_usage_error():
    with pytest.raises(GradwrightError) as error:
        gradwright.generate("def f(x):\n    return x * 2.0\n", ["f"], wrt=[])
    assert "wrt names no parameter" in str(error.value)
    assert "differentiably on  (" not in str(error.value)


def test_numpy_model_number_parameter_gets_a_float():
    """A Python float parameter of an array model got a 0-d array entry."""
    import numpy as np

    source = "import numpy as np\ndef f(w, s):\n    return np.abs(s) + np.sum(w * s)\n"
    module = build(source, "f")
    _, (w_bar, s_bar) = module["f_grad"](np.array([-1.2, -0.3]), -0.75)
    assert type(s_bar) is float
    assert s_bar == -1.0 + (-1.2 - 0.3)  # sign(s) + sum(w): closed form
    np.testing.assert_array_equal(w_bar, [-0.75, -0.75])


EARLY_RETURN_THEN_LOOP = """
import math

def f(x, y, z):
    if (y - x) > math.cos(z) > (1.5 + x * x) ** math.tanh(y):
        if (z >= (z + 0.5)) and ((y >= z) and (x >= y)):
            t6 = ((z ** 3) * (z if y <= x <= 3.0 else z))
            if (y / x) > (y if x < 0.75 < z else x):
                x, z = z, (x - y)
                x = y
                return (t6 + math.asinh(z))
            else:
                t10 = ((x if min(t6, (t6 + 0.5)) == (t6 + 0.5) else t6) * y)
                y = (y if t6 >= x else (t6 - x))
                b7 = t6
            b5 = b7
        elif not (max(x, y) != x):
            b5 = math.log(1.5 + math.atan(z) * math.atan(z))
        elif (-z) < math.copysign(x, (x + 0.5)):
            b5 = ((y / x) ** 2)
        b2 = ((z * z) - math.asinh(z))
    else:
        b2 = (math.asinh(y) if (x <= 2.0) or (y < (y + 0.5)) else 2.0)
    for i11 in range(1):
        z = (x if y > b2 else x)
        z = (z + x)
        b2 = x
    return (y * b2)
"""


LOOP_EXIT_READ_LATE = """
def f(x, y, z):
    y = x
    b2 = z
    for i11 in range(1):
        z = x if b2 else x
        b2 = x
    return y * b2
"""


@pytest.mark.parametrize("source", [EARLY_RETURN_THEN_LOOP, LOOP_EXIT_READ_LATE])
def test_loop_exit_value_read_past_the_reverse_loop(source):
    """The adjoint of `y` is the value of `b2` after the loop; substituted into the
    reverse of `y = x`, past the reverse loop that restores `b2`, it read a restored
    iteration value (the layout check refused both layouts). It stays a statement."""
    module = build(source, "f", ["x"])
    point = (0.6, -0.3, 0.4)
    value, grads = module["f_grad"](*point)
    assert value == run_source(source)["f"](*point)
    reference = mp_gradient(mp_function(source, "f"), list(point), [0])
    assert rel_err(grads[0], float(reference[0])) < 1e-12  # mpmath differences


LIST_FILLED_BY_INNER_LOOP = """
def f(x):
    t = 1.0
    for i in range(2):
        b = [0.0] * 2
        for j in range(2):
            b[j] = x * t
        t = b[0] * b[1]
    return t
"""

COMPREHENSION_IN_A_LOOP = """
def f(x, xs):
    t = 0.0
    for i in range(2):
        t = t + sum(v * x for v in xs)
    return t
"""


def test_list_made_in_a_loop_and_filled_by_an_inner_loop():
    """The list after the inner loop got a name of its own that nothing assigned
    (a comprehension in a loop body is this shape; the layout check refused it)."""
    module = build(LIST_FILLED_BY_INNER_LOOP, "f")
    value, (x_bar,) = module["f_grad"](0.9)
    assert value == run_source(LIST_FILLED_BY_INNER_LOOP)["f"](0.9)
    assert rel_err(x_bar, 6 * 0.9**5) < 1e-14  # t = x**6 by hand


def test_comprehension_in_a_loop_body():
    module = build(COMPREHENSION_IN_A_LOOP, "f", ["x"])
    xs = [0.5, -1.25, 2.0]
    value, (x_bar,) = module["f_grad"](0.7, xs)
    assert value == run_source(COMPREHENSION_IN_A_LOOP)["f"](0.7, xs)
    assert rel_err(x_bar, 2 * sum(xs)) < 1e-15  # t = 2 x sum(xs) by hand


def test_layout_check_catches_a_while_list_appended_in_a_branch(monkeypatch):
    """A while loop's saved lists grow by one slot per iteration. A printer that
    appends a value saved inside a branch (instead of giving every iteration its
    slot first) would shift the slots the reverse sweep restores: the check must
    refuse the module."""
    from gradwright.emission import layout

    def all_appended(self, loop):
        return set(self.saved_lists(loop)), []

    monkeypatch.setattr(layout.Layout, "growing", all_appended)
    source = """
def f(x, a):
    k = 0
    while k < 4:
        k = k + 1
        if x > a:
            x = x * math.sin(x)
        x = x + a
    return x
"""
    with pytest.raises(GradwrightError) as error:
        gradwright.generate("import math\n" + source, ["f"])
    assert "internal error" in str(error.value)
    assert "not one append" in str(error.value)


ATAN2_OF_A_SELECTION = """
import math

def f(x, y):
    t1 = math.atan2(x if x > 0 else 0.5, y)
    return t1
"""


@pytest.mark.parametrize("x", [0.8, -0.3])
def test_shared_value_never_placed_before_the_merge_it_reads(x):
    """atan2's hypot, used twice on one side of the selection's reverse, was made a
    forward value at the top of that side, before the merge it reads existed (the
    layout check refused every atan2 of a conditional expression)."""
    module = build(ATAN2_OF_A_SELECTION, "f")
    y = 0.6
    value, (x_bar, y_bar) = module["f_grad"](x, y)
    assert value == run_source(ATAN2_OF_A_SELECTION)["f"](x, y)
    u = x if x > 0 else 0.5
    # d atan2(u, y) = (y du - u dy) / (u^2 + y^2): textbook closed form
    assert rel_err(x_bar, y / (u * u + y * y) if x > 0 else 0.0) < 1e-15
    assert rel_err(y_bar, -u / (u * u + y * y)) < 1e-15


INNER_WHILE_ONLY_REPLAYED = """
def f(y):
    t1 = y
    k22 = 0
    while k22 < 1:
        k22 = k22 + 1
        k23 = 0
        while k23 < 1:
            k23 = k23 + 1
            y, t1 = t1, y
        t1 = 0.5
    return t1
"""


def test_inner_while_whose_values_are_dead_still_counts_its_trips():
    """No value of the inner while loop is needed forward, so the forward sweep
    dropped it, but the reverse replays it and reads its saved trip counts (the
    layout check refused it; found by the dynamic_loops long run)."""
    module = build(INNER_WHILE_ONLY_REPLAYED, "f")
    value, (y_bar,) = module["f_grad"](0.7)
    assert value == run_source(INNER_WHILE_ONLY_REPLAYED)["f"](0.7)
    assert y_bar == 0.0  # the outer loop runs once and ends with t1 = 0.5: by hand


SWAPPED_BUFFERS = """
def f(y, xs):
    xsu2 = list(xs)
    xsw3 = [0.0] * 2
    for i5 in range(2):
        for k4 in range(2):
            xsw3[k4] = (
                (xsu2[-1] * xsu2[-1])
                if min(xs[1], (xsu2[-1] + 0.375)) != (xsu2[-1] + 0.375)
                else xsu2[k4]
            )
        xsu2, xsw3 = xsw3, xsu2
    return sum(xsu2)
"""


def test_an_element_of_a_swapped_buffer_is_saved_not_read_again():
    # xsu2[-1] was read again in the reverse sweep as if xsu2 were never written
    # after it, but the swap makes xsu2 the buffer the next iteration writes
    # (found by a long list_values run: 67.17 against 23.18)
    module = build(SWAPPED_BUFFERS, "f")
    args = (1.0, [-0.309298537388435, 1.4256669269653848])
    value, grads = module["f_grad"](*args)
    # outside reference: mpmath central differences
    reference = mp_gradient(mp_function(SWAPPED_BUFFERS, "f"), args, [1])
    for got, want in zip(grads[1], reference[0], strict=True):
        assert rel_err(got, want) < 1e-9, (got, want)


def test_layout_check_stops_consensus_past_its_budget(monkeypatch):
    """Past its budget, ``_resolve`` keeps the facts no other implies (sound:
    only facts are lost), the same set whatever order they came in. Six
    branches with a value held on all paths but one: 63 facts whose consensus
    takes more than the ten steps allowed here."""
    from itertools import product

    from gradwright.emission import layout_check
    from gradwright.ir import Var

    monkeypatch.setattr(layout_check, "_CONSENSUS_BUDGET", 10)
    key = ("value", Var(1, "x", "local"))
    branches = [f"b{k}" for k in range(6)]
    paths = [sides for sides in product((0, 1), repeat=6) if any(sides)]
    facts = [(key, frozenset(zip(branches, sides, strict=True))) for sides in paths]
    resolve = layout_check._resolve.__wrapped__
    forward, backward = resolve(frozenset(facts)), resolve(frozenset(facts[::-1]))
    assert forward == backward == frozenset(facts)  # none implies another
    monkeypatch.setattr(layout_check, "_CONSENSUS_BUDGET", 200_000)
    assert resolve(frozenset(facts)) == {(key, frozenset({(b, 1)})) for b in branches}


NESTED_AFTER_RETURN = "def f(x, y, z):\n    if z > 1.0:\n        for i in range(2):\n"
NESTED_AFTER_RETURN += "            return y\n"
for _depth in range(14):
    NESTED_AFTER_RETURN += "    " * (_depth + 1) + f"if y < {_depth + 2}.0:\n"
NESTED_AFTER_RETURN += "    " * 15 + "x = y * y\n    return x\n"


def test_fourteen_nested_ifs_after_a_returning_loop():
    """Generating took 89 s at twelve deep: each branch join doubled the facts of
    a name until a loop head resolved them (2^n paths); joins resolve at once
    now. Reference: mpmath central differences."""
    ns = build(NESTED_AFTER_RETURN, "f")
    for args in ((0.3, 1.5, 2.0), (0.3, 1.5, 0.5), (0.3, 20.5, 0.5)):
        value, grads = ns["f_grad"](*args)
        assert value == ns["f"](*args)
        reference = mp_gradient(mp_function(NESTED_AFTER_RETURN, "f"), args, range(3))
        for got, want in zip(grads, reference, strict=True):
            assert abs(got - want) <= 1e-12 * max(1.0, abs(want)), (got, want)


def test_layout_check_keeps_the_prime_facts_of_a_name():
    """A value held on every path but one through nine branches is nine facts
    (held where branch k took its second side), not the 511 paths one by one: the
    check kept every path, and a while loop holding a few such branches took
    6 s to generate (found by the long dynamic_loops run). Reference: the prime
    implicants of the Boolean function, by hand."""
    from itertools import product

    from gradwright.emission.layout_check import _SAME, _resolve
    from gradwright.ir import Var

    key = ("value", Var(1, "x", "local"))
    branches = [f"b{k}" for k in range(9)]
    paths = [sides for sides in product((0, 1), repeat=9) if any(sides)]
    facts = frozenset(
        (key, frozenset(zip(branches, sides, strict=True))) for sides in paths
    )
    assert _resolve(facts) == {(key, frozenset({(b, 1)})) for b in branches}
    # unchanged on one side, written on the other: kept wherever it held it
    mixed = frozenset(
        {(_SAME, frozenset({("c", 0), ("d", 1)})), (key, frozenset({("c", 1)}))}
    )
    assert (("kept", key), frozenset({("d", 1)})) in _resolve(mixed)


# a random program (found by a long random run, shortened): s4's generator loop is dead,
# and s4's adjoint is zero around the i5 loop (only ever set to 0.0 or copied)
DEAD_GENERATOR = """
import math

def f(x, xs):
    s4 = sum((x - x // (1.25 + math.tanh(x))) for v3 in xs if x >= v3 >= x)
    for i5 in range(1):
        for v6 in xs:
            s4 = x
        if i5 == 1:
            x = x
            s4 = s4
            b9 = (x - s4) // (1.25 + sum(xs))
    return x / (1.25 + sum(xs) * sum(xs))
"""


def test_a_dead_loop_and_a_carried_zero_adjoint_against_closed_form():
    # the forward sweep printed the dead loop with a trip count it had dropped
    # (an internal error); its zero adjoint was carried through the i5 loop
    text = gradwright.generate(DEAD_GENERATOR, ["f"])
    assert "s4_bar" not in text and "for i5" not in text.split("# reverse")[1]
    ns = build(DEAD_GENERATOR, "f")
    for x, xs in ((0.7, [0.2, -1.1, 0.4]), (0.4, [0.4, 0.3]), (1.0, [])):
        value, (x_bar, xs_bar) = ns["f_grad"](x, list(xs))
        assert value == ns["f"](x, list(xs))
        # closed form: f = x / (1.25 + S**2), S = sum(xs)
        s = sum(xs)
        assert rel_err(x_bar, 1.0 / (1.25 + s * s)) < 1e-15
        want = -2.0 * x * s / (1.25 + s * s) ** 2
        assert all(abs(g - want) <= 1e-15 * max(1.0, abs(want)) for g in xs_bar)


def _nested_branch_trace(outer_else_writes: bool, loop_inside: bool):
    """``if p: (if q: x = v else: x = v) else: (x = v or nothing)``, then x read;
    optionally a loop inside the inner branch's side (a state of its own)."""
    from gradwright.emission.layout_check import Trace
    from gradwright.ir import Var

    value = ("value", Var(1, "v", "local"))
    trace = Trace()
    trace.write("y", value)
    with trace.capture() as inner_then:
        trace.write("x", value)
        if loop_inside:
            with trace.capture() as body:
                trace.read("y", value)
            trace.loop(body, ())
    with trace.capture() as inner_else:
        trace.write("x", value)
    with trace.capture() as outer_then:
        trace.branch("q", inner_then, inner_else)
    with trace.capture() as outer_else:
        if outer_else_writes:
            trace.write("x", value)
    trace.branch("p", outer_then, outer_else)
    trace.read("x", value)
    trace.read("y", value)
    return trace


@pytest.mark.parametrize("loop_inside", [False, True])
def test_layout_check_joins_nested_branches(loop_inside):
    # each branch side runs over a layer on the state before it (not a copy):
    # what one path lacks is still found, and what every path has still holds
    from gradwright.emission.layout_check import check

    missing = check(_nested_branch_trace(False, loop_inside))
    assert [(v.name, v.where) for v in missing] == [("x", "")]
    assert check(_nested_branch_trace(True, loop_inside)) == []
