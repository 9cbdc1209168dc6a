"""Random model programs, differentiated by gradwright and checked against mpmath.

Hypothesis writes small but valid model programs as source text (3-10 statements):

1. straight-line code over 2-3 float parameters: arithmetic, math functions on safe
   domains (exp of tanh/sin/cos, log/sqrt of 1 + a*a, division by 1 + b*b), abs,
   min, max, %, conditional expressions, re-bound names (parameters included),
   augmented assignments and tuple swaps;
2. if/elif/else chains on comparisons of intermediate values, with early returns;
3. a for-loop (1-6 trips, from an int parameter, a literal or ``len`` of a list
   parameter) carrying 1-2 variables, optionally with a nested loop, a branch inside
   and a local list written and read;
4. a helper function of the same source called once or twice.

Reference for every gradient entry: an mpmath central difference of the same
program text run with ``math`` mapped to mpmath (``support.mp_function`` and
``support.mp_central_diff``, 100 significant digits, step 1e-50, self-checked against
a tenth of the step), good to ~1e-25 relative. ``value`` must equal the primal's result
bit for bit (the copied primal and the source itself).

Away from kinks and switches: each condition, ``abs``/``min``/``max`` argument and
``%`` remainder of a program is also written down as a probe; an instrumented copy
of the program, run in floats, records every probe and every assigned value and math
function argument, and examples with a probe within 1e-6 of switching (where the
float and the mpmath runs could take different branches) or with an intermediate
above 1e4 in magnitude (where an argument's rounding error, 1e4 * 2**-53 ~ 1e-12,
would start to show in sin or cos) are skipped with ``hypothesis.assume``.

Tolerance: |grad - ref| <= 1e-9 * scale, scale = max(|value|, max_k |ref_k|, 1e-30)
(the floor only stops the reference's own ~1e-40 absolute noise from failing a
zero gradient)..
The generated gradient is a few hundred correctly rounded operations on values
bounded by 1e4, each adding ~1e-16 relative to the terms it combines; the terms are
bounded by the largest gradient entry or the value times bounded factors, so the
error stays near 1e-13 * scale with room for cancellation, while a wrong rule or a
dropped contribution is off by a sizable fraction of the scale.
"""

from __future__ import annotations

import builtins
import math
import types
from dataclasses import dataclass, field

import mpmath
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st
from support import build, mp_central_diff, mp_function, run_source, same_bits

from gradwright.diagnostics import GradwrightError

REL_TOL = 1e-9  # see the module docstring
PROBE_MARGIN = 1e-6  # a switch closer than this to flipping skips the example
MAGNITUDE_LIMIT = 1e4  # intermediates above this skip the example
LOOP_SWAPS = True
IDENTICAL_ARMS = True
TWO_CONDITIONALS = True
NESTED_LOOPS = True
SELF_ASSIGN = True
CHAINED = True

SETTINGS = settings(
    max_examples=80,
    deadline=None,
    derandomize=True,
    suppress_health_check=[HealthCheck.filter_too_much, HealthCheck.too_slow],
)

CONSTANTS = (0.5, 1.5, 2.0, 0.75, -1.25, 3.0, 0.1)
# mp_central_diff steps by 1e-50 relative to the coordinate: at a coordinate like
# 1e-292 the step vanishes next to O(1) terms even at 100 digits, so coordinates
# are 0 or at least 1e-3 in magnitude
POINT = st.just(0.0) | st.builds(
    lambda sign, size: sign * size,
    st.sampled_from((1.0, -1.0)),
    st.floats(1e-3, 2.0),
)


# ---------------------------------------------------------------------------------
# programs as statement trees, printed twice: the model and an instrumented copy


@dataclass
class Expr:
    text: str
    probes: list[str] = field(default_factory=list)


@dataclass
class Program:
    """A model's statements; ``lines(instrumented=True)`` adds the probes."""

    funcs: list[tuple[str, list[str], list]]  # (name, params, body statements)

    def source(self, instrumented: bool = False) -> str:
        out = [] if instrumented else ["import math", ""]
        for name, params, body in self.funcs:
            out.append(f"def {name}({', '.join(params)}):")
            out.extend(_lines(body, 1, instrumented))
            out.append("")
        return "\n".join(out) + "\n"


def _lines(body: list, depth: int, instrumented: bool) -> list[str]:
    pad = "    " * depth
    out: list[str] = []
    for stmt in body:
        kind = stmt[0]
        probes = stmt[-1] if instrumented else []
        out.extend(f"{pad}_probe({p})" for p in probes)
        if kind == "assign":  # ("assign", targets, values, probes)
            _, targets, values, _ = stmt
            out.append(f"{pad}{', '.join(targets)} = {', '.join(values)}")
            if instrumented:
                out.extend(f"{pad}_mag({t})" for t in targets)
        elif kind == "aug":  # ("aug", target, op, value, probes)
            _, target, op, value, _ = stmt
            out.append(f"{pad}{target} {op}= {value}")
            if instrumented:
                out.append(f"{pad}_mag({target})")
        elif kind == "return":
            out.append(f"{pad}return {stmt[1]}")
        elif kind == "line":  # ("line", text, probes): a statement without targets
            out.append(f"{pad}{stmt[1]}")
        elif kind == "if":  # ("if", [(cond, body), ...], else_body, probes)
            _, branches, else_body, _ = stmt
            for k, (cond, branch) in enumerate(branches):
                out.append(f"{pad}{'if' if k == 0 else 'elif'} {cond}:")
                out.extend(_lines(branch, depth + 1, instrumented))
            if else_body:
                out.append(f"{pad}else:")
                out.extend(_lines(else_body, depth + 1, instrumented))
        elif kind == "for":  # ("for", var, range_text, body, probes)
            _, var, range_text, loop_body, _ = stmt
            out.append(f"{pad}for {var} in range({range_text}):")
            out.extend(_lines(loop_body, depth + 1, instrumented))
        else:  # pragma: no cover - generator bug in this file
            raise AssertionError(kind)
    return out


# ---------------------------------------------------------------------------------
# expressions on safe domains

UNARY = (
    "math.sin({a})",
    "math.cos({a})",
    "math.tanh({a})",
    "math.atan({a})",
    "math.erf({a})",
    "math.exp(math.tanh({a}))",
    "math.exp(math.sin({a}))",
    "math.exp(0.5 * math.cos({a}))",
    "math.log(1.0 + {a} * {a})",
    "math.sqrt(1.0 + {a} * {a})",
    "math.log1p({a} ** 2)",
    "math.hypot({a}, 1.0)",
    "(1.0 + {a} * {a}) ** 1.5",
    "({a} ** 2)",
    "({a} ** 3)",
    "(-{a})",
)
BINARY = (
    "({a} + {b})",
    "({a} - {b})",
    "({a} * {b})",
    "({a} / (1.0 + {b} * {b}))",
    "({a} / {c})",
)


@st.composite
def expressions(draw, names: list[str], depth: int = 2, kinks: bool = True) -> Expr:
    """An expression over ``names`` that always mentions at least one name."""
    if depth <= 0 or draw(st.integers(0, 3)) == 0:
        return Expr(draw(st.sampled_from(names)))
    kind = draw(
        st.sampled_from(
            ("unary", "binary", "binary", "kink") if kinks else ("unary", "binary")
        )
    )
    a = draw(expressions(names, depth - 1, kinks))
    if kind == "unary":
        form = draw(st.sampled_from(UNARY))
        return Expr(form.format(a=a.text), a.probes)
    if kind == "binary":
        form = draw(st.sampled_from(BINARY))
        if draw(st.booleans()):
            b = draw(expressions(names, depth - 1, kinks))
        else:
            b = Expr(repr(draw(st.sampled_from(CONSTANTS))))
        if draw(st.booleans()):
            a, b = b, a  # the name may sit on either side
            if not any(n in a.text for n in names):
                a, b = b, a
        c = repr(draw(st.sampled_from(CONSTANTS)))
        return Expr(form.format(a=a.text, b=b.text, c=c), a.probes + b.probes)
    b = draw(expressions(names, depth - 1, kinks))
    choice = draw(st.sampled_from(("abs", "min", "max", "mod", "ifexp")))
    probes = a.probes + b.probes
    if choice == "abs":
        return Expr(f"abs({a.text})", probes + [a.text])
    if choice in ("min", "max"):
        return Expr(f"{choice}({a.text}, {b.text})", probes + [f"{a.text} - {b.text}"])
    if choice == "mod":
        rem = f"{a.text} % 1.75"
        return Expr(f"({rem})", probes + [rem, f"{rem} - 1.75"])
    left, right = draw(expressions(names, 1, False)), draw(expressions(names, 1, False))
    op = draw(st.sampled_from(("<", ">", "<=", ">=")))
    if a.text == b.text and not IDENTICAL_ARMS:
        b = Expr(f"({b.text} + 0.5)", b.probes)
    text = f"({a.text} if {left.text} {op} {right.text} else {b.text})"
    return Expr(text, probes + [f"{left.text} - {right.text}"])


@st.composite
def condition(draw, names: list[str]) -> Expr:
    """A comparison (sometimes chained, sometimes with and/or) of two expressions."""
    left = draw(expressions(names, 1))
    right = draw(expressions(names, 1))
    op = draw(st.sampled_from(("<", ">", "<=", ">=")))
    probes = left.probes + right.probes + [f"{left.text} - {right.text}"]
    text = f"{left.text} {op} {right.text}"
    extra = draw(
        st.sampled_from(("", "", "and", "or") + (("chain",) if CHAINED else ()))
    )
    if extra:
        third = draw(expressions(names, 1))
        probes += third.probes
        if extra == "chain":
            text = f"{text} {op} {third.text}"
            probes.append(f"{right.text} - {third.text}")
        else:
            text = f"{text} {extra} {third.text} > 0.25"
            probes.append(f"{third.text} - 0.25")
    return Expr(text, probes)


@st.composite
def straight_statement(draw, names: list[str], fresh: str, kinks: bool = True):
    """One assignment, augmented assignment or tuple swap; updates ``names``."""
    kind = draw(st.sampled_from(("new", "new", "rebind", "aug", "swap")))
    if kind == "swap" and len(names) >= 2:
        i, j = draw(st.permutations(range(len(names))))[:2]
        a, b = names[i], names[j]
        other = draw(expressions(names, 1, kinks))
        if draw(st.booleans()):
            return ("assign", [a, b], [b, a], [])
        return ("assign", [a, b], [b, other.text], other.probes)
    value = draw(expressions(names, 2, kinks))
    if kind == "aug":
        target = draw(st.sampled_from(names))
        op = draw(st.sampled_from(("+", "-", "*", "/")))
        if op == "/":
            return (
                "aug",
                target,
                op,
                f"1.0 + {value.text} * {value.text}",
                value.probes,
            )
        return ("aug", target, op, value.text, value.probes)
    if kind == "rebind":
        target = draw(st.sampled_from(names))
    else:
        target = fresh
        names.append(fresh)
    return ("assign", [target], [value.text], value.probes)


# ---------------------------------------------------------------------------------
# running a program: probes, the generated gradient, the mpmath reference


def _recording_math(record: list[float]):
    def wrap(fn):
        def wrapped(*args):
            record.extend(abs(a) for a in args)
            return fn(*args)

        return wrapped

    names = [n for n in dir(math) if callable(getattr(math, n))]
    return types.SimpleNamespace(**{n: wrap(getattr(math, n)) for n in names})


def probe_run(program: Program, func: str, args) -> tuple[list[float], list[float]]:
    """Run the instrumented copy in floats: (probe values, magnitudes seen)."""
    probes: list[float] = []
    mags: list[float] = []
    ns = {
        "__builtins__": builtins,
        "math": _recording_math(mags),
        "_probe": lambda v: probes.append(abs(v)),
        "_mag": lambda v: mags.append(abs(v)),
    }
    exec(compile(program.source(instrumented=True), "<instrumented>", "exec"), ns)
    result = ns[func](*args)
    mags.append(abs(result))
    return probes, mags


def reference_partial(f_mp, point: list[float], j: int) -> mpmath.mpf:
    """d f / d point[j]: mpmath central difference (support.mp_central_diff).

    Its self-check is relative, so it refuses a derivative that is exactly zero
    (x - sin(x) at 0); then the derivative of f + point[j], which is f' + 1, is
    taken instead and 1 subtracted; that leaves ~1e-100 of truncation, so a result
    below 1e-40 (far below any float gradient here) is the exact zero.
    """
    try:
        return mp_central_diff(f_mp, point, j)
    except ValueError:

        def shifted(*coords):
            return f_mp(*coords) + coords[j]

        with mpmath.workdps(100):
            estimate = mp_central_diff(shifted, point, j) - 1
        return mpmath.mpf(0) if abs(estimate) < 1e-40 else estimate


def _walk(body: list):
    for stmt in body:
        yield stmt
        if stmt[0] == "if":
            for _, branch in stmt[1]:
                yield from _walk(branch)
            yield from _walk(stmt[2])
        elif stmt[0] == "for":
            yield from _walk(stmt[3])


def _is_self_assignment(stmt) -> bool:
    return stmt[0] == "assign" and len(stmt[1]) == 1 and stmt[1] == stmt[2]


def check_program(
    program: Program,
    args: list,
    wrt: list[str] | None = None,
    func: str = "f",
) -> None:
    """The generated gradient of ``func`` against mpmath central differences,
    away from switches and large intermediates."""
    if not SELF_ASSIGN:
        assume(
            not any(
                _is_self_assignment(st_)
                for _, _, b in program.funcs
                for st_ in _walk(b)
            )
        )
    if not TWO_CONDITIONALS:
        assume(all(line.count(" else ") <= 1 for line in program.source().split("\n")))
    probes, mags = probe_run(program, func, args)
    assume(all(p > PROBE_MARGIN for p in probes))
    assume(all(math.isfinite(m) and m < MAGNITUDE_LIMIT for m in mags))
    check_source(program.source(), program.funcs[-1][1], args, wrt, func)


def check_source(
    source: str,
    params: list[str],
    args: list,
    wrt: list[str] | None = None,
    func: str = "f",
) -> None:
    """``value`` is the primal's, bit for bit; each gradient entry agrees with an
    mpmath central difference of ``source`` (see the module docstring)."""
    chosen = list(wrt) if wrt is not None else params
    where = f"\n--- source ---\n{source}--- args: {args!r}, wrt={wrt!r}"

    # the reference: flat float coordinates -> the model in mpmath
    f_mp = mp_function(source, func)
    slots = []  # (param index, list index or None) per flat coordinate
    for name in chosen:
        p = params.index(name)
        if isinstance(args[p], list):
            slots += [(p, k) for k in range(len(args[p]))]
        else:
            slots.append((p, None))

    def flat_model(*coords):
        call = [list(a) if isinstance(a, list) else a for a in args]
        for (p, k), c in zip(slots, coords, strict=True):
            if k is None:
                call[p] = c
            else:
                call[p][k] = c
        return f_mp(*call)

    point = [args[p] if k is None else args[p][k] for p, k in slots]
    refs = [reference_partial(flat_model, point, j) for j in range(len(point))]

    try:
        ns = build(source, func, wrt)
    except GradwrightError as error:
        # the one rejection a valid program may get: no dependence on the wrt names
        assert "does not depend differentiably" in str(error), str(error) + where
        assert all(r == 0 for r in refs), str(error) + where  # mpmath: all zero
        return
    value, grads = ns[func + "_grad"](*args)
    original = run_source(source)[func](*args)
    assert same_bits(value, original), f"value {value!r} != primal {original!r}{where}"
    assert same_bits(value, ns[func](*args)), f"copied primal differs{where}"

    flat = []
    for name, g in zip(chosen, grads, strict=True):
        if isinstance(args[params.index(name)], list):
            assert isinstance(g, list), f"{name}_bar is not a list{where}"
            flat += g
        else:
            flat.append(g)
    assert len(flat) == len(refs), f"gradient shape {grads!r}{where}"
    scale = max([abs(mpmath.mpf(value))] + [abs(r) for r in refs] + [1e-30])
    for j, (g, r) in enumerate(zip(flat, refs, strict=True)):
        # reference: mpmath central difference of the same source (mp_central_diff)
        err = abs(mpmath.mpf(g) - r)
        assert err <= REL_TOL * scale, (
            f"gradient entry {j} ({slots[j]}): got {g!r}, mpmath reference"
            f" {mpmath.nstr(r, 20)}, error {mpmath.nstr(err, 3)}"
            f" > {REL_TOL} * {mpmath.nstr(scale, 5)}{where}"
        )


# ---------------------------------------------------------------------------------
# 1. straight-line programs


@st.composite
def straight_programs(draw):
    params = ["x", "y", "z"][: draw(st.integers(2, 3))]
    names = list(params)
    body = [
        draw(straight_statement(names, f"t{k}")) for k in range(draw(st.integers(2, 9)))
    ]
    result = draw(expressions(names, 2))
    body.append(("return", result.text, result.probes))
    args = [draw(POINT) for _ in params]
    wrt = None
    if draw(st.booleans()):
        wrt = [p for p in params if draw(st.booleans())] or [params[-1]]
    return Program([("f", params, body)]), args, wrt


@SETTINGS
@given(straight_programs())
def test_straight_line_programs(case):
    program, args, wrt = case
    check_program(program, args, wrt)


# ---------------------------------------------------------------------------------
# 2. branches


@st.composite
def branch_block(draw, names: list[str], fresh: str, allow_return: bool):
    """Statements of one branch: assignments to existing names and to ``fresh``."""
    inner = list(names)
    body = []
    for _ in range(draw(st.integers(0, 2))):
        target = draw(st.sampled_from(inner))
        value = draw(expressions(inner, 2))
        op = draw(st.sampled_from(("", "", "+", "*")))
        if op:
            body.append(("aug", target, op, value.text, value.probes))
        else:
            body.append(("assign", [target], [value.text], value.probes))
    if allow_return and draw(st.integers(0, 3)) == 0:
        value = draw(expressions(inner, 2))
        body.append(("return", value.text, value.probes))
        return body, True
    value = draw(expressions(inner, 2))
    body.append(("assign", [fresh], [value.text], value.probes))
    return body, False


@st.composite
def branch_programs(draw):
    params = ["x", "y", "z"][: draw(st.integers(2, 3))]
    names = list(params)
    body = [
        draw(straight_statement(names, f"t{k}")) for k in range(draw(st.integers(0, 3)))
    ]
    for block in range(draw(st.integers(1, 2))):
        fresh = f"b{block}"
        arms = draw(st.integers(1, 3))
        has_else = draw(st.booleans()) or arms == 1 and draw(st.booleans())
        branches, probes, returns = [], [], 0
        total = arms + (1 if has_else else 0)
        for _ in range(arms):
            cond = draw(condition(names))
            arm, returned = draw(branch_block(names, fresh, returns + 1 < total))
            returns += returned
            probes += cond.probes
            branches.append((cond.text, arm))
        else_body = []
        if has_else:
            else_body, returned = draw(branch_block(names, fresh, returns + 1 < total))
        if not has_else:
            # the fresh name must be bound on every path
            body.append(("assign", [fresh], [draw(expressions(names, 1)).text], []))
        body.append(("if", branches, else_body, probes))
        names.append(fresh)
        if draw(st.booleans()):
            body.append(draw(straight_statement(names, f"u{block}")))
    result = draw(expressions(names, 2))
    body.append(("return", result.text, result.probes))
    args = [draw(POINT) for _ in params]
    return Program([("f", params, body)]), args


@SETTINGS
@given(branch_programs())
def test_branching_programs(case):
    program, args = case
    check_program(program, args)


# ---------------------------------------------------------------------------------
# 3. loops


@st.composite
def loop_programs(draw):
    mode = draw(st.sampled_from(("int", "literal", "list")))
    trips = draw(st.integers(1, 6))
    params = ["x", "y"]
    args: list = [draw(POINT), draw(POINT)]
    wrt = None
    if mode == "int":
        params.append("n")
        args.append(trips)
        count = "n"
        wrt = ["x", "y"]
    elif mode == "literal":
        count = str(trips)
    else:
        params.insert(0, "v")
        args.insert(0, [draw(POINT) for _ in range(trips)])
        count = "len(v)"
    names = ["x", "y"]
    body = []
    carried = ["s"] if draw(st.booleans()) else ["s", "w"]
    for name in carried:
        value = draw(expressions(names, 1, kinks=False))
        body.append(("assign", [name], [value.text], value.probes))
    use_list = draw(st.booleans())
    if use_list:
        body.append(("line", f"buf = [0.0] * {count}", []))
    loop_names = names + carried + ["(0.25 * i)"] + (["v[i]"] if mode == "list" else [])
    loop = []
    for _ in range(draw(st.integers(1, 3))):
        target = draw(st.sampled_from(carried))
        value = draw(expressions(loop_names, 2))
        if draw(st.booleans()):
            loop.append(("assign", [target], [value.text], value.probes))
        else:
            op = draw(st.sampled_from(("+", "-", "*")))
            if op == "*":  # keep the carried product bounded over six trips
                loop.append(
                    ("aug", target, op, f"math.tanh({value.text})", value.probes)
                )
            else:
                loop.append(("aug", target, op, value.text, value.probes))
    if len(carried) == 2 and LOOP_SWAPS and draw(st.booleans()):
        loop.append(("assign", ["s", "w"], ["w", "s"], []))
    if draw(st.booleans()):
        cond = draw(condition(loop_names))
        target = draw(st.sampled_from(carried))
        then = draw(expressions(loop_names, 2))
        other = draw(expressions(loop_names, 2))
        branches = [(cond.text, [("assign", [target], [then.text], then.probes)])]
        else_body = []
        if draw(st.booleans()):
            else_body = [("aug", target, "+", other.text, other.probes)]
        loop.append(("if", branches, else_body, cond.probes))
    if NESTED_LOOPS and draw(st.booleans()):
        inner_count = draw(st.sampled_from(("2", "i + 1", "i")))
        value = draw(expressions(loop_names + ["(0.5 * j)"], 1))
        target = draw(st.sampled_from(carried))
        inner = [("aug", target, "+", f"0.5 * math.sin({value.text})", value.probes)]
        loop.append(("for", "j", inner_count, inner, []))
    if use_list:
        value = draw(expressions(loop_names, 2))
        loop.append(("line", f"buf[i] = {value.text}", value.probes))
        read = draw(st.sampled_from(carried))
        loop.append(("aug", read, "+", "0.5 * buf[i]", []))
    body.append(("for", "i", count, loop, []))
    tail = carried + (["buf[0]", f"buf[{count} - 1]"] if use_list else [])
    result = draw(expressions(tail + names, 2))
    body.append(("return", result.text, result.probes))
    return Program([("f", params, body)]), args, wrt


@SETTINGS
@given(loop_programs())
def test_loop_programs(case):
    program, args, wrt = case
    check_program(program, args, wrt)


# ---------------------------------------------------------------------------------
# 4. helpers


@st.composite
def helper_programs(draw):
    hparams = ["u", "v"][: draw(st.integers(1, 2))]
    hnames = list(hparams)
    hbody = [
        draw(straight_statement(hnames, f"h{k}"))
        for k in range(draw(st.integers(0, 3)))
    ]
    if draw(st.integers(0, 2)) == 0:
        cond = draw(condition(hnames))
        early = draw(expressions(hnames, 2))
        hbody.append(
            (
                "if",
                [(cond.text, [("return", early.text, early.probes)])],
                [],
                cond.probes,
            )
        )
    hresult = draw(expressions(hnames, 2))
    hbody.append(("return", hresult.text, hresult.probes))

    params = ["x", "y", "z"][: draw(st.integers(2, 3))]
    names = list(params)
    body = []
    for k in range(draw(st.integers(1, 2))):
        if draw(st.booleans()):
            body.append(draw(straight_statement(names, f"t{k}")))
        call_args = [draw(expressions(names, 1)) for _ in hparams]
        if k == 1 and draw(st.booleans()):
            call_args[0] = Expr("c0")  # a call on the result of the first call
        text = f"helper({', '.join(a.text for a in call_args)})"
        probes = [p for a in call_args for p in a.probes]
        body.append(("assign", [f"c{k}"], [text], probes))
        names.append(f"c{k}")
    result = draw(expressions(names, 1))
    body.append(("return", result.text, result.probes))
    args = [draw(POINT) for _ in params]
    return Program([("helper", hparams, hbody), ("f", params, body)]), args


@SETTINGS
@given(helper_programs())
def test_helper_programs(case):
    program, args = case
    check_program(program, args)


# ---------------------------------------------------------------------------------
# regressions found by the random programs above, minimized by hand


def test_regression_swap_in_loop():
    source = """\
def f(x, y):
    s = x
    w = y
    for i in range(1):
        s, w = w, s
    return 2.0 * s + 3.0 * w
"""
    # f = 2 y + 3 x: gradient (3, 2) by inspection; checked against mpmath
    # central differences (mp_central_diff); gradwright returns (3.0, 3.0)
    check_source(source, ["x", "y"], [0.5, 0.25])


def test_regression_conditional_with_identical_arms():
    source = """\
def f(x, y):
    s = y + (x if y < 1.0 else x)
    return s * x
"""
    # f = (y + x) * x: value 0.1875 and gradient (y + 2 x, x) = (1.0, 0.25) by
    # inspection; checked against mpmath central differences (mp_central_diff).
    # gradwright returns value 0.5625 and gradient (1.5, 0.75)
    check_source(source, ["x", "y"], [0.25, 0.5])


def test_regression_two_conditionals_in_one_statement():
    source = """\
def f(x, y):
    s = (x if x < y else y) + (x if y < x else y)
    return s
"""
    # f = min + max = x + y = 1.75 at (0.75, 1.0), gradient (1, 1) by inspection;
    # checked against mpmath central differences (mp_central_diff).
    # gradwright's value is 2.0 (y + y)
    check_source(source, ["x", "y"], [0.75, 1.0])


def test_regression_nested_loop_restores():
    source = """\
def f(x):
    s = x
    for i in range(1):
        s = s * s
        for j in range(1):
            s = s * s
    return s
"""
    # f = x**4: gradient 4 x**3 = 1.6875 at 0.75 by inspection; checked against
    # mpmath central differences (mp_central_diff). gradwright returns 1.265625
    check_source(source, ["x"], [0.75])


def test_regression_self_assignment_then_rebind():
    source = """\
import math

def f(x):
    t = math.cos(x)
    x = x
    x = t
    return x
"""
    # f = cos(x): gradient -sin(0) = 0 at x = 0 by inspection; checked against
    # mpmath central differences (mp_central_diff). gradwright returns -sin(1)
    check_source(source, ["x"], [0.0])


def test_regression_chained_comparison_crash():
    source = """\
import math

def f(x, y):
    x, y = y, x
    if x < (x / (1.0 + 0.5 * 0.5)) < (x / (1.0 + 1.5 * 1.5)):
        return math.sin(x)
    else:
        b0 = x
    return x
"""
    # f = y on this path at (0.0, 1.0): gradient (0, 1) by inspection; checked
    # against mpmath central differences (mp_central_diff)
    check_source(source, ["x", "y"], [0.0, 1.0])
