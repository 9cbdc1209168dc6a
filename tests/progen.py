"""Random model programs for ``test_random_programs.py``: trees, strategies, checks.

A program is a tree of statements (:class:`Assign`, :class:`Aug`, :class:`If`,
:class:`For`, :class:`Return`) over expression trees (:class:`Ex`). Every
expression form is valid for any real operands (domains are wrapped:
``asin(0.9 * tanh(u))``, ``log(1.5 + u * u)``), and names are only read where they
are bound on every path, so a drawn program is valid by construction; no example is
discarded with ``assume``.

A tree is printed three ways: ``py`` (the model), ``inst`` (the model with every
switch and magnitude recorded, run in floats to place the point away from kinks)
and ``mp`` (the model for mpmath: ``a // b`` becomes ``_floordiv(a, b)``, the one
operator mpmath numbers lack; everything else is the same text).

:func:`evaluate` runs one program at one point and returns an :class:`Outcome`;
:func:`shrink` reduces a failing program while it keeps failing the same way.
"""

from __future__ import annotations

import builtins
import copy
import dataclasses
import math
import os
import random
import re
import time
import types
from collections import Counter
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field

import mpmath
import numpy as np
from hypothesis import strategies as st
from support import MP_MATH, mp_central_diff, same_bits

import gradwright
from gradwright.diagnostics import GradwrightError

# ---------------------------------------------------------------------------------
# programs as trees


@dataclass(eq=False)
class Ex:
    """An expression: ``form`` with ``{0}``, ``{1}``... filled by ``kids``.

    ``inst`` is the instrumented form, ``mp`` the mpmath form where it differs;
    ``kind`` is ``num`` or ``cond``; ``tag`` names the feature it uses (for the
    coverage counts and expected rejections). In ``inst``, ``@k`` marks a recorded
    switch whose tie is broken by moving operand ``k``: :func:`place_point` adds
    ``shift[k]`` to that operand when the tie is permanent (``t < t`` after a copy).
    """

    form: str
    kids: tuple[Ex, ...] = ()
    inst: str | None = None
    mp: str | None = None
    kind: str = "num"
    tag: str = ""
    shift: dict[int, str] = field(default_factory=dict)

    def render(self, mode: str = "py", switches: list | None = None) -> str:
        text = self.form
        if mode == "inst" and self.inst is not None:
            text = self.inst
            for k in range(len(self.kids)):
                if f"@{k}" in text and switches is not None:
                    text = text.replace(f"@{k}", str(len(switches)))
                    switches.append((self, k))
        elif mode == "mp" and self.mp is not None:
            text = self.mp
        kids = [kid.render(mode, switches) for kid in self.kids]
        for k, offset in self.shift.items():
            kids[k] = f"({kids[k]} + {offset})"
        return text.format(*kids)

    def tags(self) -> Iterator[str]:
        if self.tag:
            yield self.tag
        for k in self.kids:
            yield from k.tags()


def leaf(text: str) -> Ex:
    return Ex(text.replace("{", "{{").replace("}", "}}"))


@dataclass
class Assign:
    targets: list[str]
    values: list[Ex]


@dataclass
class Aug:
    target: str
    op: str
    value: Ex


@dataclass
class If:
    arms: list[tuple[Ex, list]]  # (condition, body); the second and later are elif
    orelse: list | None = None


@dataclass
class For:
    var: str
    iter: str  # "range(3)", "xs", "range(n, 0, -1)"
    body: list


@dataclass
class While:
    """``counter = 0`` then ``while counter < limit [and cond]:`` (or ``while
    True:`` with the limit tested first) and ``counter += 1``, then ``body``: a
    counter bounds every while loop, so the program terminates."""

    counter: str
    limit: str
    cond: Ex | None
    body: list
    forever: bool = False


@dataclass
class Jump:
    word: str  # "break" or "continue"


@dataclass
class Return:
    values: list[Ex]


@dataclass
class Raw:
    """A statement written out (``value``'s form may span lines): guards, while
    loops, statements the generator copies as written (the guards_dicts family)."""

    value: Ex


@dataclass
class Func:
    name: str
    params: list[str]
    body: list
    defaults: dict[str, str] = field(default_factory=dict)


@dataclass
class Program:
    funcs: list[Func]  # the target is the last
    numpy: bool = False

    @property
    def target(self) -> Func:
        return self.funcs[-1]

    def source(self, mode: str = "py", switches: list | None = None) -> str:
        out = ["import numpy as np", ""] if self.numpy and mode != "mp" else []
        if mode == "py" and not self.numpy:
            out += ["import math", ""]
        for fn in self.funcs:
            params = [
                f"{p}={fn.defaults[p]}" if p in fn.defaults else p for p in fn.params
            ]
            out.append(f"def {fn.name}({', '.join(params)}):")
            out.extend(_lines(fn.body, 1, mode, switches))
            out.append("")
        return "\n".join(out) + "\n"

    def tags(self) -> set[str]:
        """Features and shapes the program contains (for the coverage counts and
        the expected rejections)."""
        found: set[str] = set()
        helpers = {fn.name for fn in self.funcs[:-1]}
        for fn in self.funcs:
            _shapes(fn.body, found, helpers, fn.params, (), False)
        return found


def _shapes(body, found, helpers, params, context, returned) -> bool:
    """Adds the shape tags of ``body`` (``context``: the enclosing if/for);
    returns whether a return came before the end of it."""
    for stmt in body:
        for e in stmt_exprs(stmt):
            found.update(e.tags())
            text = e.render()
            if "for" in context and any(f"{h}(" in text for h in helpers):
                found.add("call_in_loop")
            if "if" in context and e.tag == "list":
                found.add("list_in_if")
        if isinstance(stmt, Assign | Aug) and "for" in context:
            targets = stmt.targets if isinstance(stmt, Assign) else [stmt.target]
            if set(targets) & set(params):
                found.add("param_rebound_in_loop")
            if "if" in context[context.index("for") :]:
                found.add("rebound_in_if_in_loop")
        if isinstance(stmt, Assign) and any(t[0] == "d" for t in stmt.targets):
            found.add("dead_call_in_loop" if "for" in context else "dead_call")
        if isinstance(stmt, Return) and context:
            returned = True
            if "for" in context:
                found.add("return_in_loop")
        if isinstance(stmt, Jump):
            found.add(stmt.word)
        if isinstance(stmt, While):
            found.add("while_true" if stmt.forever else "while")
            if stmt.cond is not None:
                found.add("while_cond")
            if "for" in context:
                found.add("nested_loop")
            _shapes(stmt.body, found, helpers, params, (*context, "for"), returned)
        if isinstance(stmt, If):
            found.add("elif" if len(stmt.arms) > 1 else "if")
            if "if" in context:
                found.add("nested_if")
            if "for" in context:
                found.add("if_in_loop")
            arms = [arm for _, arm in stmt.arms] + [stmt.orelse or []]
            if any(
                isinstance(a, Assign) and len(a.values) == 1 and not a.values[0].kids
                for arm in arms
                for a in arm[-1:]
            ):
                found.add("copying_arm")
            for arm in arms:
                returned |= _shapes(
                    arm, found, helpers, params, (*context, "if"), False
                )
        if isinstance(stmt, For):
            found.add("for")
            if returned:
                found.add("loop_after_return")
            if "if" in context:
                found.add("loop_in_if")
            if "for" in context:
                found.add("nested_loop")
            if stmt.iter in ("range(0)", "range(2, 2)"):
                found.add("zero_trip")
            if ", -" in stmt.iter:
                found.add("negative_step")
            if not stmt.iter.startswith("range"):
                found.add("for_in_list")
            _shapes(stmt.body, found, helpers, params, (*context, "for"), returned)
    return returned


def _lines(body: list, depth: int, mode: str, sw: list | None = None) -> list[str]:
    pad = "    " * depth
    out: list[str] = []
    for stmt in body:
        if isinstance(stmt, Assign):
            vals = [v.render(mode, sw) for v in stmt.values]
            if mode == "inst":  # record every assigned value's magnitude
                vals = [f"_m({v})" for v in vals]
            out.append(f"{pad}{', '.join(stmt.targets)} = {', '.join(vals)}")
        elif isinstance(stmt, Aug):
            value = stmt.value.render(mode, sw)
            out.append(f"{pad}{stmt.target} {stmt.op}= {value}")
            if mode == "inst":
                out.append(f"{pad}_m({stmt.target})")
        elif isinstance(stmt, Return):
            vals = ", ".join(v.render(mode, sw) for v in stmt.values)
            out.append(f"{pad}return {vals}")
        elif isinstance(stmt, Raw):
            out.extend(pad + line for line in stmt.value.render(mode, sw).split("\n"))
        elif isinstance(stmt, If):
            for k, (cond, arm) in enumerate(stmt.arms):
                head = "if" if k == 0 else "elif"
                out.append(f"{pad}{head} {cond.render(mode, sw)}:")
                out.extend(_lines(arm, depth + 1, mode, sw) or [f"{pad}    pass"])
            if stmt.orelse:
                out.append(f"{pad}else:")
                out.extend(_lines(stmt.orelse, depth + 1, mode, sw))
        elif isinstance(stmt, For):
            out.append(f"{pad}for {stmt.var} in {stmt.iter}:")
            out.extend(_lines(stmt.body, depth + 1, mode, sw) or [f"{pad}    pass"])
        elif isinstance(stmt, While):
            k = stmt.counter
            out.append(f"{pad}{k} = 0")
            test = f"{k} < {stmt.limit}"
            if stmt.cond is not None:
                test += f" and ({stmt.cond.render(mode, sw)})"
            if stmt.forever:
                out.append(f"{pad}while True:")
                out.append(f"{pad}    if not ({test}):")
                out.append(f"{pad}        break")
            else:
                out.append(f"{pad}while {test}:")
            out.append(f"{pad}    {k} = {k} + 1")
            out.extend(_lines(stmt.body, depth + 1, mode, sw))
        elif isinstance(stmt, Jump):
            out.append(f"{pad}{stmt.word}")
        else:  # pragma: no cover - a bug in this file
            raise AssertionError(stmt)
    return out


def walk(body: list) -> Iterator:
    for stmt in body:
        yield stmt
        if isinstance(stmt, If):
            for _, arm in stmt.arms:
                yield from walk(arm)
            yield from walk(stmt.orelse or [])
        elif isinstance(stmt, For | While):
            yield from walk(stmt.body)


def stmt_exprs(stmt) -> list[Ex]:
    if isinstance(stmt, Raw):
        return [stmt.value]
    if isinstance(stmt, Assign | Return):
        return list(stmt.values)
    if isinstance(stmt, Aug):
        return [stmt.value]
    if isinstance(stmt, If):
        return [c for c, _ in stmt.arms]
    if isinstance(stmt, While) and stmt.cond is not None:
        return [stmt.cond]
    return []


# ---------------------------------------------------------------------------------
# expression forms; every form is defined for all real operands


def _f(form: str, inst: str | None = None, tag: str = "", mp: str | None = None):
    return (form, inst, tag, mp)


# unary forms over {0}; the tag names the rule they exercise
BASIC_UNARY = [
    _f("math.sin({0})", tag="sin"),
    _f("math.cos({0})", tag="cos"),
    _f("math.tanh({0})", tag="tanh"),
    _f("math.atan({0})", tag="atan"),
    _f("math.exp(math.tanh({0}))", tag="exp"),
    _f("math.log(1.5 + {0} * {0})", tag="log"),
    _f("math.sqrt(1.0 + {0} * {0})", tag="sqrt"),
    _f("({0} ** 2)", tag="pow_int"),
    _f("(-{0})", tag="neg"),
]
RULE_UNARY = [
    _f("math.tan(0.7 * math.tanh({0}))", tag="tan"),
    _f("math.asin(0.9 * math.tanh({0}))", tag="asin"),
    _f("math.acos(0.9 * math.tanh({0}))", tag="acos"),
    _f("math.sinh({0})", tag="sinh"),
    _f("math.cosh({0})", tag="cosh"),
    _f("math.asinh({0})", tag="asinh"),
    _f("math.acosh(1.5 + {0} * {0})", tag="acosh"),
    _f("math.atanh(0.9 * math.tanh({0}))", tag="atanh"),
    _f("math.expm1({0})", tag="expm1"),
    _f("math.exp2(math.sin({0}))", tag="exp2"),
    _f("math.log2(1.25 + {0} * {0})", tag="log2"),
    _f("math.log10(0.5 + abs({0}))", "math.log10(0.5 + abs(_k(@0, {0})))", "log10"),
    _f("math.log1p({0} * {0})", tag="log1p"),
    _f("math.log(2.0 + {0} * {0}, 3.0)", tag="log_base"),
    _f("math.cbrt({0})", "math.cbrt(_k(@0, {0}))", "cbrt"),
    _f("math.erf({0})", tag="erf"),
    _f("math.erfc({0})", tag="erfc"),
    _f("math.fabs({0})", "math.fabs(_k(@0, {0}))", "fabs"),
    _f("abs({0})", "abs(_k(@0, {0}))", "abs"),
    _f("({0} ** 3)", tag="pow_int"),
    _f("math.pow({0}, 2.0)", tag="pow"),
    _f("(1.0 + {0} * {0}) ** 1.5", tag="pow_real"),
    _f("math.hypot({0}, 1.0)", tag="hypot"),
    _f("({0} % 1.75)", "_mod(@0, {0}, 1.75)", "mod"),
    # // has a zero derivative: subtracted from its operand, the result still varies
    _f(
        "({0} - {0} // 0.75)",
        "({0} - _fdiv(@0, {0}, 0.75))",
        "floordiv",
        "({0} - _floordiv({0}, 0.75))",
    ),
]
BASIC_BINARY = [
    _f("({0} + {1})"),
    _f("({0} - {1})"),
    _f("({0} * {1})"),
    _f("({0} / (1.25 + {1} * {1}))", tag="div"),
]
RULE_BINARY = [
    _f("({0} / {1})", "({0} / _k(@1, {1}))", "div"),
    _f("math.atan2({0}, {1})", "math.atan2(_k(@0, {0}), _k(@1, {1}))", "atan2"),
    _f("math.pow(1.25 + {0} * {0}, {1})", tag="pow_active"),
    _f("(1.5 + {0} * {0}) ** math.tanh({1})", tag="pow_active"),
    _f(
        "math.copysign({0}, {1})", "math.copysign(_k(@0, {0}), _k(@1, {1}))", "copysign"
    ),
    _f("math.log(1.5 + {0} * {0}, 2.0 + {1} * {1})", tag="log_base"),
    _f("math.hypot({0}, {1})", "math.hypot(_k(@0, {0}), {1})", "hypot"),
    _f("({0} % (1.25 + {1} * {1}))", "_mod(@0, {0}, 1.25 + {1} * {1})", "mod_active"),
    _f(
        "({0} - {0} // (1.25 + {1} * {1}))",
        "({0} - _fdiv(@0, {0}, 1.25 + {1} * {1}))",
        "floordiv",
        "({0} - _floordiv({0}, 1.25 + {1} * {1}))",
    ),
    _f("min({0}, {1})", "_min(@1, {0}, {1})", "min"),
    _f("max({0}, {1})", "_max(@1, {0}, {1})", "max"),
]
CONSTANTS = ("0.5", "1.5", "2.0", "0.75", "-1.25", "3.0", "0.1")


def apply(spec, *kids: Ex) -> Ex:
    form, inst, tag, mp = spec
    return Ex(form, tuple(kids), inst, mp, "num", tag)


# ---------------------------------------------------------------------------------
# scopes and knobs


@dataclass
class Knobs:
    """Which shapes a family's programs may contain."""

    statements: tuple[int, int] = (2, 6)
    branches: bool = False
    nested_if: bool = False
    early_return: bool = False
    loops: bool = False
    nested_loops: bool = False
    lists: bool = False
    helpers: bool = False
    tuple_out: bool = False
    boolvalues: bool = False
    rules: bool = True
    kinks: bool = True
    int_param: bool = False
    list_param: bool = False
    # loops over zip/enumerate/reversed/tuples, tuple values, comprehension sums
    idioms: bool = False
    max_depth: int = 2
    #: helpers returning tuples, taking lists, returning lists (vjp form)
    helper_shapes: bool = False
    #: the same sub-expression drawn again, in one expression or a later statement
    #: (the reverse sweep's shared values: one call, one saved read)
    repeats: bool = False
    #: while loops (bounded by a counter), break/continue under conditions,
    #: returns inside loops
    jumps: bool = False
    #: statements copied as written (guards, strings, while loops computing a
    #: constant), dicts of numbers and loops over constant dicts
    inactive: bool = False
    #: lists as values: growing (+ [v], += [v, w]), reductions over sequences and
    #: generators (min, max, math.fsum, sum with a start, several for clauses),
    #: slices (zip(xs, xs[1:])), copies and double buffering (u, w = w, u)
    list_values: bool = False


MAX_RETURNS = 2  # returns inside ifs per function


@dataclass
class Helper:
    name: str
    params: list[str]
    defaults: dict[str, str]
    #: "num" (numbers in, one out), "tuple" (two out), "list_out" (a list and a
    #: number in, a new list out), "list_in" (a list and a number in, one out)
    kind: str = "num"


@dataclass
class Scope:
    """What a statement may read: names bound on every path to it."""

    floats: list[str]
    ints: list[str]
    lists: dict[str, int]  # local lists and list parameters: name -> length
    helpers: list[Helper]
    knobs: Knobs
    fresh: list[int]  # a shared counter for new names
    in_loop: bool = False
    depth: int = 0
    # returns inside ifs so far (shared): each if that may return copies the code
    # after it into its paths, so k of them make 2**k copies (finding F7)
    returns: list[int] = field(default_factory=lambda: [0])
    #: helpers of other shapes (called by statements of their own)
    shaped: list[Helper] = field(default_factory=list)
    # expressions drawn so far where every name they read is still bound (repeats)
    recent: list[Ex] = field(default_factory=list)

    def copy(self) -> Scope:
        return Scope(
            list(self.floats),
            list(self.ints),
            dict(self.lists),
            self.helpers,
            self.knobs,
            self.fresh,
            self.in_loop,
            self.depth,
            self.returns,
            self.shaped,
            list(self.recent),
        )

    def may_return(self) -> bool:
        return self.returns[0] < MAX_RETURNS

    def new_name(self, stem: str = "t") -> str:
        self.fresh[0] += 1
        return f"{stem}{self.fresh[0]}"


# ---------------------------------------------------------------------------------
# strategies


def _reads(sc: Scope) -> list[str]:
    """Float-valued reads: names, list elements, loop indices as floats."""
    reads = list(sc.floats)
    for name, n in sc.lists.items():
        if n:
            reads += [f"{name}[0]", f"{name}[{n - 1}]", f"{name}[-1]"]
        if name.startswith("xs"):
            reads.append(f"sum({name})")
    reads += [f"(0.25 * {i})" for i in sc.ints]
    return reads


@st.composite
def atom(draw, sc: Scope, const: bool = True) -> Ex:
    reads = _reads(sc)
    if const and draw(st.integers(0, 5)) == 0 or not reads:
        return leaf(draw(st.sampled_from(CONSTANTS)))
    # the most recent names are likelier: the program's statements then matter
    weights = sc.floats[-3:]
    if weights and draw(st.booleans()):
        return leaf(draw(st.sampled_from(weights)))
    return leaf(draw(st.sampled_from(reads)))


@st.composite
def num(draw, sc: Scope, depth: int = 2, const: bool = False) -> Ex:
    """A float expression of at most ``depth`` levels; it reads a name unless
    ``const`` (so a gradient can flow through it)."""
    if depth <= 0 or draw(st.integers(0, 3)) == 0:
        return draw(atom(sc, const))
    k = sc.knobs
    if k.repeats and sc.recent and draw(st.integers(0, 2)) == 0:
        return copy.deepcopy(draw(st.sampled_from(sc.recent)))
    drawn = _drawn(draw, sc, depth, const)
    if k.repeats and drawn.kids and not const:
        sc.recent.append(drawn)
    return drawn


def _drawn(draw, sc: Scope, depth: int, const: bool) -> Ex:
    k = sc.knobs
    kinds = ["unary", "binary", "binary"]
    if k.rules:
        kinds += ["rule_unary", "rule_binary"]
    if k.kinks:
        kinds += ["ifexp"]
    if k.boolvalues:
        kinds += ["boolvalue"]
    if sc.helpers:
        kinds += ["call", "call"]
    kind = draw(st.sampled_from(kinds))
    a = draw(num(sc, depth - 1, const))
    if kind == "unary":
        return apply(draw(st.sampled_from(BASIC_UNARY)), a)
    if kind == "rule_unary":
        return apply(draw(st.sampled_from(RULE_UNARY)), a)
    b = draw(num(sc, depth - 1, True))
    if draw(st.booleans()):
        a, b = b, a
    if kind == "binary":
        spec = draw(st.sampled_from(BASIC_BINARY))
        if spec[0] == "({0} - {1})" and a.render() == b.render():
            spec = BASIC_BINARY[0]  # not u - u: that would be a constant
        return apply(spec, a, b)
    if kind == "rule_binary":  # both operands vary (max(3.0, x) is a constant)
        b = draw(num(sc, depth - 1, const))
        return apply(draw(st.sampled_from(RULE_BINARY)), a, distinct(a, b))
    if kind == "ifexp":
        c = draw(cond(sc, 1))  # operands of depth 0: names and constants
        b = draw(num(sc, depth - 1, const))  # both arms vary
        if draw(st.integers(0, 3)) == 0:
            b = a  # identical arms
        return Ex("({1} if {0} else {2})", (c, a, b), tag="ifexp")
    if kind == "boolvalue":
        op = draw(st.sampled_from(("and", "or")))
        inst = f"(_k(@0, {{0}}) {op} {{1}})"
        return Ex(f"({{0}} {op} {{1}})", (a, b), inst, tag=op)
    return draw(call(sc, a, b))


@st.composite
def call(draw, sc: Scope, a: Ex, b: Ex) -> Ex:
    """A call of a helper: positional, by keyword, or leaving a default."""
    h = draw(st.sampled_from(sc.helpers))
    given = [a, b, draw(num(sc, 1))][: len(h.params)]
    required = [p for p in h.params if p not in h.defaults]
    n = draw(st.integers(len(required), len(h.params)))
    style = draw(st.sampled_from(("pos", "kw", "mixed")))
    parts = []
    for idx in range(n):
        p = h.params[idx]
        if style == "kw" or (style == "mixed" and idx > 0):
            parts.append(f"{p}={{{idx}}}")
        else:
            parts.append(f"{{{idx}}}")
    if style == "kw" and n > 1 and draw(st.booleans()):
        parts.reverse()  # keywords in another order
    tag = "call_kw" if style != "pos" else "call"
    if n < len(h.params):
        tag = "call_default"
    return Ex(f"{h.name}({', '.join(parts)})", tuple(given[:n]), tag=tag)


@st.composite
def cond(draw, sc: Scope, depth: int = 2) -> Ex:
    """A condition: comparisons (some chained), ==/!= on exact selections, not,
    and/or, and integer tests on loop indices."""
    kinds = ["cmp", "cmp", "cmp", "eq", "chain"]
    if depth > 0:
        kinds += ["not", "andor"]
    if sc.ints:
        kinds += ["int"]
    kind = draw(st.sampled_from(kinds))
    d = max(depth - 1, 0)
    if kind in ("cmp", "chain"):
        a = draw(num(sc, d))
        b = distinct(a, draw(num(sc, d, True)))
        op = draw(st.sampled_from(("<", "<=", ">", ">=")))
        if kind == "cmp":
            inst = f"_g(@1, {{0}}, {{1}}) {op} {{1}}"
            return Ex(f"{{0}} {op} {{1}}", (a, b), inst, kind="cond", tag="cmp")
        c = distinct(b, draw(num(sc, d, True)))
        return Ex(
            f"{{0}} {op} {{1}} {op} {{2}}",
            (a, b, c),
            f"_g(@1, {{0}}, {{1}}) {op} _g(@2, {{1}}, {{2}}) {op} {{2}}",
            kind="cond",
            tag="chain",
        )
    if kind == "eq":
        # == and != hold exactly on either side of a selection's switch
        a = draw(num(sc, d))
        b = distinct(a, draw(num(sc, d)))
        op = draw(st.sampled_from(("==", "!=")))
        form = draw(
            st.sampled_from(
                (
                    ("max({0}, {1}) OP {0}", "_max(@1, {0}, {1}) OP {0}"),
                    ("min({0}, {1}) OP {1}", "_min(@1, {0}, {1}) OP {1}"),
                    ("abs({0}) OP {0}", "abs(_k(@0, {0})) OP {0}"),
                )
            )
        )
        inst = form[1].replace("OP", op)
        return Ex(form[0].replace("OP", op), (a, b), inst, kind="cond", tag="eq")
    if kind == "int":
        i = draw(st.sampled_from(sc.ints))
        text = draw(
            st.sampled_from(
                (f"{i} == 1", f"{i} != 0", f"{i} > 1", f"{i} % 2 == 0", f"{i} < 2")
            )
        )
        return Ex(text, (), kind="cond", tag="int_cond")
    if kind == "not":
        return Ex("not ({0})", (draw(cond(sc, depth - 1)),), kind="cond", tag="not")
    op = draw(st.sampled_from(("and", "or")))
    a, b = draw(cond(sc, depth - 1)), draw(cond(sc, depth - 1))
    return Ex(f"({{0}}) {op} ({{1}})", (a, b), kind="cond", tag=f"cond_{op}")


LOOP_RANGES = (
    "range(0)",
    "range(1)",
    "range(2)",
    "range(3)",
    "range(1, 3)",
    "range(3, 0, -1)",
    "range(3, -1, -2)",
    "range(2, 2)",
    "range(0, 4, 2)",
)


@st.composite
def loop_iter(draw, sc: Scope) -> tuple[str, str, bool]:
    """(variable, iterable, variable is a float) for a new loop."""
    var = sc.new_name("i")
    options = list(LOOP_RANGES)
    if "n" in sc.ints:
        options += ["range(n)", "range(1, n)", "range(n, 0, -1)", "range(0, n, 2)"]
    outer = [i for i in sc.ints if i != "n"]
    if outer:
        i = draw(st.sampled_from(outer))
        options += [f"range({i})", f"range({i} + 1)", f"range({i}, 3)"]
    lists = [name for name in sc.lists if name.startswith("xs")]
    if lists and draw(st.integers(0, 2)) == 0:
        return var.replace("i", "v"), draw(st.sampled_from(lists)), True
    if lists:
        options.append(f"range(len({lists[0]}))")
    return var, draw(st.sampled_from(options)), False


@st.composite
def statement(draw, sc: Scope, allow_return: bool, tuple_out: int) -> list:
    """One or a few statements; updates ``sc`` with names bound on every path."""
    k = sc.knobs
    kinds = ["new", "new", "new", "rebind", "rebind", "aug", "copy", "swap"]
    if k.branches and sc.depth < k.max_depth:
        kinds += ["if", "if", "select"]
    if k.loops and sc.depth < k.max_depth and (k.nested_loops or not sc.in_loop):
        kinds += ["for", "for"]
    if k.lists:
        kinds += ["list", "listwrite"]
    if sc.helpers:
        kinds += ["deadcall"]
    if k.idioms:
        kinds += ["tuple", "comp"]
        if sc.depth < k.max_depth:
            kinds += ["idiomfor", "idiomfor"]
    if k.list_values:
        kinds += ["lvgrow", "lvreduce", "lvreduce", "lvslice"]
        if sc.depth < k.max_depth:
            kinds += ["lvbuffer"]
    if sc.shaped:
        kinds += ["shapedcall", "shapedcall"]
    if k.inactive:
        kinds += ["guard", "fmt", "dictnum", "dictnum", "constdict", "whileconst"]
    loop_returns = k.jumps or not sc.in_loop
    if allow_return and k.early_return and loop_returns and sc.may_return():
        kinds += ["ifreturn", "ifreturn"]
    if k.jumps and sc.depth < k.max_depth and (k.nested_loops or not sc.in_loop):
        kinds += ["while", "while"]
    if k.jumps and sc.in_loop and sc.may_return():
        kinds += ["jump", "jump", "jump"]
    kind = draw(st.sampled_from(kinds))
    if kind == "new":
        name = sc.new_name()
        value = draw(num(sc))
        sc.floats.append(name)
        return [Assign([name], [value])]
    if kind == "rebind":
        target = draw(st.sampled_from(sc.floats))
        return [Assign([target], [draw(num(sc))])]
    if kind == "aug":
        target = draw(st.sampled_from(sc.floats))
        op = draw(st.sampled_from(("+", "-", "*", "/", "**")))
        value = draw(num(sc))
        if op == "**":
            value = leaf("2")
        if op == "/":
            value = Ex("(1.25 + {0} * {0})", (value,))
        if op == "-" and value.render() == target:
            op = "+"  # not u -= u: that would be a constant
        return [Aug(target, op, value)]
    if kind == "select":  # a conditional expression of names, arms often equal
        a = leaf(draw(st.sampled_from(sc.floats)))
        b = a if draw(st.booleans()) else leaf(draw(st.sampled_from(sc.floats)))
        value = Ex("({1} if {0} else {2})", (draw(cond(sc, 1)), a, b), tag="select")
        name = draw(st.sampled_from([sc.new_name(), *sc.floats]))
        if name not in sc.floats:
            sc.floats.append(name)
        return [Assign([name], [value]), *draw(follow_up(sc, name))]
    if kind == "copy":  # a plain copy (rarely of itself): the aliasing shapes
        name = draw(st.sampled_from([sc.new_name(), sc.new_name(), *sc.floats]))
        source = draw(st.sampled_from(sc.floats))
        if source == name and draw(st.integers(0, 3)):
            name = sc.new_name()
        if name not in sc.floats:
            sc.floats.append(name)
        return [Assign([name], [leaf(source)])]
    if kind == "swap" and len(sc.floats) >= 2:
        a, b = draw(st.permutations(sc.floats))[:2]
        other = draw(st.sampled_from([leaf(a), draw(num(sc, 1))]))
        return [Assign([a, b], [leaf(b), other])]
    if kind == "swap":
        return [Assign([sc.floats[0]], [draw(num(sc))])]
    if kind == "deadcall":  # a call whose result is overwritten or never read
        name = sc.new_name("d")
        value = draw(call(sc, draw(num(sc, 1)), draw(num(sc, 1))))
        out = [Assign([name], [value])]
        if draw(st.booleans()):
            out.append(Assign([name], [draw(num(sc, 1))]))
            sc.floats.append(name)
        return out
    if kind == "shapedcall":
        return draw(shaped_call(sc))
    if kind == "list":
        name = sc.new_name("buf")
        n = draw(st.integers(1, 3))
        if draw(st.booleans()):
            elems = [draw(num(sc, 1)) for _ in range(n)]
            form = "[" + ", ".join(f"{{{j}}}" for j in range(n)) + "]"
            out = [Assign([name], [Ex(form, tuple(elems), tag="list")])]
        else:
            out = [Assign([name], [Ex(f"[0.0] * {n}", tag="list")])]
            # every element written (a zero read back would be a constant)
            out += [Assign([f"{name}[{j}]"], [draw(num(sc, 1))]) for j in range(n)]
        sc.lists[name] = n
        return out
    if kind == "listwrite":
        local = [name for name in sc.lists if name.startswith("buf")]
        if not local:
            return draw(statement(sc, allow_return, tuple_out))
        name = draw(st.sampled_from(local))
        idx = draw(st.integers(0, sc.lists[name] - 1))
        value = draw(num(sc))
        if draw(st.booleans()):
            return [Aug(f"{name}[{idx}]", draw(st.sampled_from("+-*")), value)]
        return [Assign([f"{name}[{idx}]"], [value])]
    if kind == "for":
        var, iterable, is_float = draw(loop_iter(sc))
        inner = sc.copy()
        inner.in_loop = True
        inner.depth += 1
        (inner.floats if is_float else inner.ints).append(var)
        body = draw(block(inner, 1, 3, k.jumps, tuple_out))
        return [For(var, iterable, body)]
    if kind == "while":
        counter = sc.new_name("k")
        limits = ["0", "1", "2", "3", "4"] + (["n"] if "n" in sc.ints else [])
        limit = draw(st.sampled_from(limits))
        test = draw(cond(sc, 1)) if draw(st.booleans()) else None
        inner = sc.copy()
        inner.in_loop = True
        inner.depth += 1
        inner.ints.append(counter)
        body = draw(block(inner, 1, 3, True, tuple_out))
        sc.ints.append(counter)
        return [While(counter, limit, test, body, draw(st.booleans()))]
    if kind == "jump":  # a break or continue under a condition, maybe after work
        inner = sc.copy()
        inner.depth += 1
        before = draw(block(inner, 0, 1, False, tuple_out))
        sc.returns[0] += 1  # each if that may jump copies the rest into its paths
        word = draw(st.sampled_from(("break", "continue")))
        return [If([(draw(cond(sc)), [*before, Jump(word)])], None)]
    if kind in ("tuple", "comp", "idiomfor"):
        return draw(idiom_statement(sc, kind, tuple_out))
    if kind in ("guard", "fmt", "dictnum", "constdict", "whileconst"):
        return draw(inactive_statement(sc, kind))
    if kind.startswith("lv"):
        return draw(list_value_statement(sc, kind, tuple_out))
    if kind in ("if", "ifreturn"):
        stmt = draw(if_statement(sc, kind == "ifreturn", tuple_out))
        last = [s for _, arm in stmt.arms for s in arm[-1:] if isinstance(s, Assign)]
        name = last[0].targets[0] if last else ""
        return [stmt, *draw(follow_up(sc, name))]
    raise AssertionError(kind)  # pragma: no cover


def _sequences(sc: Scope) -> list[str]:
    """Float sequences a loop or comprehension may run over: list parameters,
    tuples of names written out."""
    seqs = [name for name in sc.lists if name.startswith("xs")]
    if len(sc.floats) >= 2:
        seqs.append(f"({sc.floats[0]}, {sc.floats[-1]})")
    return seqs


def _filled(sc: Scope) -> list[str]:
    """Sequences of at least one element: non-empty lists, a tuple of names."""
    seqs = [name for name, n in sc.lists.items() if n and name.startswith("xs")]
    if len(sc.floats) >= 2:
        seqs.append(f"({sc.floats[0]}, {sc.floats[-1]})")
    return seqs


@st.composite
def list_value_statement(draw, sc: Scope, kind: str, tuple_out: int) -> list:
    """Lists as values (the list_values family)."""
    seqs = _filled(sc)
    if kind == "lvgrow" or not seqs:  # a list that grows
        name = sc.new_name("xsl")
        out: list = [Assign([name], [Ex("[{0}]", (draw(num(sc, 1)),), tag="lv_list")])]
        length = 1
        for _ in range(draw(st.integers(1, 3))):
            way = draw(st.sampled_from(("concat", "extend", "loop")))
            if way == "concat":
                grown = Ex(f"{name} + [{{0}}]", (draw(num(sc, 1)),), tag="lv_concat")
                out.append(Assign([name], [grown]))
                length += 1
            elif way == "extend":
                pair = (draw(num(sc, 1)), draw(num(sc, 1)))
                out.append(Aug(name, "+", Ex("[{0}, {1}]", pair, tag="lv_extend")))
                length += 2
            else:
                inner = sc.copy()
                inner.in_loop = True
                var = inner.new_name("i")
                inner.ints.append(var)
                value = Ex("[{0}]", (draw(num(inner, 1)),), tag="lv_grow_loop")
                out.append(For(var, "range(2)", [Aug(name, "+", value)]))
                length += 2
        sc.lists[name] = length
        return out
    seq = draw(st.sampled_from(seqs))
    if kind == "lvreduce":
        name = sc.new_name("s")
        inner = sc.copy()
        var = inner.new_name("v")
        inner.floats.append(var)
        term = draw(num(inner, 2))
        form = draw(
            st.sampled_from(
                (
                    "min",
                    "max",
                    "maxgen",
                    "fsum",
                    "start",
                    "twofor",
                    "filtered",
                )
            )
        )
        if form in ("min", "max"):
            value = Ex(f"{form}({seq})", tag="lv_minmax")
        elif form == "maxgen":
            op = draw(st.sampled_from(("min", "max")))
            value = Ex(f"{op}({{0}} for {var} in {seq})", (term,), tag="lv_minmax")
        elif form == "fsum":
            value = Ex(
                f"math.fsum({{0}} for {var} in {seq})",
                (term,),
                inst=f"sum({{0}} for {var} in {seq})",
                tag="lv_fsum",
            )
        elif form == "start":
            start = draw(num(sc, 1))
            value = Ex(
                f"sum(({{0}} for {var} in {seq}), {{1}})", (term, start), tag="lv_sum"
            )
        elif form == "twofor":
            other = inner.new_name("w")
            inner.floats.append(other)
            term2 = draw(num(inner, 2))
            test = draw(cond(inner, 1))
            second = draw(st.sampled_from(seqs))
            value = Ex(
                f"sum({{0}} for {var} in {seq} for {other} in {second} if {{1}})",
                (term2, test),
                tag="lv_twofor",
            )
        else:
            test = draw(cond(inner, 1))
            value = Ex(
                f"len([{{0}} for {var} in {seq} if {{1}}]) * {{2}}",
                (term, test, draw(atom(sc))),
                tag="lv_filtered",
            )
        sc.floats.append(name)
        return [Assign([name], [value])]
    if kind == "lvslice":
        inner = sc.copy()
        inner.in_loop = True
        inner.depth += 1
        a, b = inner.new_name("v"), inner.new_name("w")
        inner.floats += [a, b]
        name = sc.new_name("s")
        if draw(st.booleans()):
            body = draw(block(inner, 1, 2, False, tuple_out))
            return [For(f"{a}, {b}", f"zip({seq}, {seq}[1:])", body)]
        piece = draw(st.sampled_from(("[1:]", "[:-1]", "[:]")))
        copy = draw(st.sampled_from(("{0}", "list({0})")))
        value = Ex(f"sum({copy.format(seq)}{piece})", tag="lv_slice")
        sc.floats.append(name)
        return [Assign([name], [value])]
    # double buffering: a copy, a second list, and a swap each step
    lists = [name for name, n in sc.lists.items() if n and name.startswith("xs")]
    if not lists:
        return draw(list_value_statement(sc, "lvgrow", tuple_out))
    source = draw(st.sampled_from(lists))
    n = sc.lists[source]
    u, w = sc.new_name("xsu"), sc.new_name("xsw")
    inner = sc.copy()
    inner.in_loop = True
    inner.depth += 1
    k = inner.new_name("k")
    inner.floats += [f"{u}[{k}]", f"{u}[-1]"]
    value = draw(num(inner, 2))
    step = sc.new_name("i")
    cell = For(k, f"range({n})", [Assign([f"{w}[{k}]"], [value])])
    swap = Assign([f"{u}, {w}"], [leaf(w), leaf(u)])
    out = [
        Assign([u], [Ex(f"list({source})", tag="lv_copy")]),
        Assign([w], [Ex(f"[0.0] * {n}", tag="lv_buffer")]),
        For(step, "range(2)", [cell, swap]),
    ]
    sc.lists[u] = n
    return out


@st.composite
def idiom_statement(draw, sc: Scope, kind: str, tuple_out: int) -> list:
    """The idioms of natural models: tuples as values, sums of generator
    expressions with filters, loops over zip/enumerate/reversed/tuples."""
    if kind == "tuple":  # build a tuple, then unpack it or index it
        name = sc.new_name("p")
        elems = (draw(num(sc, 1)), draw(num(sc, 1)))
        out = [Assign([name], [Ex("({0}, {1})", elems, tag="tuple_value")])]
        if draw(st.booleans()):
            a, b = sc.new_name(), sc.new_name()
            out.append(Assign([f"{a}, {b}"], [leaf(name)]))
            sc.floats += [a, b]
        else:
            c = sc.new_name()
            k = draw(st.sampled_from(("0", "1", "-1")))
            out.append(Assign([c], [Ex(f"{name}[{k}] * {{0}}", (draw(atom(sc)),))]))
            sc.floats.append(c)
        return out
    seqs = _sequences(sc)
    if kind == "comp":
        if not seqs:
            return [Assign([sc.new_name()], [draw(num(sc))])]
        seq = draw(st.sampled_from(seqs))
        inner = sc.copy()
        var = inner.new_name("v")
        inner.floats.append(var)
        term = draw(num(inner, 2))
        if draw(st.integers(0, 2)) == 0:  # a list of the terms, read later
            name = sc.new_name("xsc")
            length = sc.lists[seq] if seq in sc.lists else 2
            form = f"[{{0}} for {var} in {seq}]"
            sc.lists[name] = length
            return [Assign([name], [Ex(form, (term,), tag="list_comprehension")])]
        name = sc.new_name("s")
        if draw(st.booleans()):
            form = f"sum({{0}} for {var} in {seq})"
            value = Ex(form, (term,), tag="comprehension")
        else:
            test = draw(cond(inner, 1))
            form = f"sum({{0}} for {var} in {seq} if {{1}})"
            value = Ex(form, (term, test), tag="comprehension")
        sc.floats.append(name)
        return [Assign([name], [value])]
    # a loop over zip / enumerate / reversed / a tuple of names
    inner = sc.copy()
    inner.in_loop = True
    inner.depth += 1
    options = ["reversed(range(3))"]
    if seqs:
        options += ["seq", "enumerate", "reversed"]
    if len(seqs) >= 2 or (seqs and len(sc.floats) >= 2):
        options.append("zip")
    choice = draw(st.sampled_from(options))
    if choice == "reversed(range(3))":
        var = inner.new_name("i")
        inner.ints.append(var)
        target, iterable = var, choice
    elif choice == "zip":
        a, b = inner.new_name("v"), inner.new_name("w")
        first = draw(st.sampled_from(seqs))
        second = draw(st.sampled_from(seqs))
        inner.floats += [a, b]
        target, iterable = f"{a}, {b}", f"zip({first}, {second})"
    elif choice == "enumerate":
        k, v = inner.new_name("i"), inner.new_name("v")
        inner.ints.append(k)
        inner.floats.append(v)
        start = draw(st.sampled_from(("", ", 1")))
        target = f"{k}, {v}"
        iterable = f"enumerate({draw(st.sampled_from(seqs))}{start})"
    else:
        v = inner.new_name("v")
        inner.floats.append(v)
        seq = draw(st.sampled_from(seqs))
        target, iterable = v, (f"reversed({seq})" if choice == "reversed" else seq)
    body = draw(block(inner, 1, 3, False, tuple_out))
    return [For(target, iterable, body)]


@st.composite
def inactive_statement(draw, sc: Scope, kind: str) -> list:
    """Statements that read no active value (copied as written) or only guard
    active ones, and string-keyed dicts: of numbers (active), and constant dicts
    read by lookups and loops."""
    target = draw(st.sampled_from(sc.floats))
    if kind == "guard":
        if draw(st.booleans()):
            form = 'assert {0} is not None, "no value"'
        else:
            form = 'if {0} is None:\n    raise ValueError("no value")'
        return [Raw(Ex(form, (draw(num(sc, 1)),), tag="guard"))]
    if kind == "fmt":
        count = leaf(draw(st.sampled_from(sc.ints))) if sc.ints else leaf("3")
        name = sc.new_name("label")
        return [Assign([name], [Ex('"n=" + str({0})', (count,), tag="copied")])]
    if kind == "whileconst":
        m = sc.new_name("m")
        stop = draw(st.integers(2, 9))
        form = f"{m} = 1\nwhile {m} < {stop}:\n    {m} = {m} * 2"
        return [
            Raw(Ex(form, tag="copied_while")),
            Assign([target], [Ex(f"{{0}} * {m} / 8.0", (leaf(target),))]),
        ]
    inner = sc.copy()
    inner.in_loop = True
    value = inner.new_name("v")
    inner.floats.append(value)
    if kind == "dictnum":
        name = sc.new_name("dk")
        pair = (draw(num(sc, 1)), draw(num(sc, 1)))
        out = [Assign([name], [Ex('{{"a": {0}, "b": {1}}}', pair, tag="dict")])]
        choice = draw(st.sampled_from(("lookup", "items", "keys")))
        if choice == "lookup":
            form = f'{name}["b"] * {{0}} + {name}["a"]'
            out.append(Assign([target], [Ex(form, (draw(atom(sc)),))]))
            return out
        if choice == "items":
            head = f"key, {value}"
            iterable = f"{name}.items()"
        else:
            head, iterable = "key", name
            inner.floats.remove(value)
            inner.floats.append(f"{name}[key]")
        step = Ex("{0} * 0.5 + {1}", (leaf(target), draw(num(inner, 1))))
        return out + [For(head, iterable, [Assign([target], [step])])]
    name = sc.new_name("cd")
    weights = [draw(st.sampled_from(("0.5", "-1.25", "2.0", "0.75"))) for _ in "ab"]
    form = f"{name} = dict(a={weights[0]}, b={weights[1]})"
    out = [Raw(Ex(form, tag="constdict"))]
    if draw(st.booleans()):
        step = Ex(f'{{0}} * {name}["a"] + {{1}}', (leaf(target), draw(num(sc, 1))))
        return out + [Assign([target], [step])]
    view = draw(st.sampled_from(("items", "values")))
    head = f"key, {value}" if view == "items" else value
    step = Ex("{0} * {1} + {2}", (leaf(target), leaf(value), draw(num(inner, 1))))
    return out + [For(head, f"{name}.{view}()", [Assign([target], [step])])]


@st.composite
def shaped_call(draw, sc: Scope) -> list:
    """``u, v = h(...)``, ``p = h(...)`` then ``p[k]``, ``ys = g(xs, a)`` or
    ``t = s(xs, a)`` (a list argument: a list parameter or a local list)."""
    lists = [name for name, n in sc.lists.items() if n]
    usable = [h for h in sc.shaped if h.kind == "tuple" or lists]
    if not usable:
        return [Assign([sc.floats[0]], [draw(num(sc))])]
    h = draw(st.sampled_from(usable))
    if h.kind == "tuple":
        args = [draw(num(sc, 1)) for _ in h.params]
        slots = [f"{{{k}}}" for k in range(len(args))]
        if h.defaults and draw(st.booleans()):
            args, slots = args[:1], slots[:1]  # leaving the default
        elif h.defaults and draw(st.booleans()):
            slots[1] = "b={1}"
        form = f"{h.name}({', '.join(slots)})"
        value = Ex(form, tuple(args), tag="tuple_call")
        if draw(st.booleans()):
            names = [sc.new_name(), sc.new_name()]
            sc.floats += names
            if draw(st.integers(0, 3)) == 0:
                # `u, _ = h(...)`: `_` may be read later or never
                k = draw(st.integers(0, 1))
                sc.floats[sc.floats.index(names[k])] = "_"
                names[k] = "_"
            return [Assign(names, [value])]
        pair, name = sc.new_name("p"), sc.new_name()
        k = draw(st.integers(0, 1))
        other = draw(atom(sc))
        sc.floats.append(name)
        return [
            Assign([pair], [value]),
            Assign([name], [Ex(f"({pair}[{k}] * {{0}} + {pair}[{1 - k}])", (other,))]),
        ]
    given = draw(st.sampled_from(lists))
    value = Ex(f"{h.name}({given}, {{0}})", (draw(num(sc, 1)),), tag=f"{h.kind}_call")
    if h.kind == "list_out":
        name = sc.new_name("buf")
        sc.lists[name] = sc.lists[given]
        return [Assign([name], [value])]
    name = sc.new_name()
    sc.floats.append(name)
    return [Assign([name], [value])]


@st.composite
def shaped_helper(draw, name: str, kind: str, others: list[Helper], shaped, knobs):
    """A helper of another shape: a tuple helper's body is drawn like any
    helper's; a list helper loops over its list (``xs``) with a drawn body."""
    hk = Knobs(
        statements=(0, 3),
        branches=knobs.branches,
        early_return=kind == "tuple",
        rules=knobs.rules,
        kinks=knobs.kinks,
        max_depth=1,
    )
    if kind == "tuple":
        sc = Scope(["a", "b"], [], {}, others, hk, [0], shaped=list(shaped))
        body = draw(block(sc, 0, 3, True, 2))
        if not body or not isinstance(body[-1], Return):
            body.append(Return(draw(returned(sc, 2))))
        defaults = {"b": "0.5"} if draw(st.booleans()) else {}
        return Func(name, ["a", "b"], body, defaults)
    sc = Scope(["a", "c", "acc"], [], {}, others, hk, [0])
    if kind == "list_out":
        inner = Scope(["a", "c"], [], {}, others, hk, [0])
        body = [
            Assign(["ys"], [Ex("[0.0] * len(xs)", tag="list")]),
            For(
                "i",
                "range(len(xs))",
                [Assign(["c"], [leaf("xs[i]")]), Assign(["ys[i]"], [draw(num(inner))])],
            ),
            Return([leaf("ys")]),
        ]
        return Func(name, ["xs", "a"], body)
    after = Scope(["a", "acc"], [], {}, others, hk, [0])  # c: only in the loop
    body = [
        Assign(["acc"], [leaf("a")]),
        For("c", "xs", [Assign(["acc"], [draw(num(sc))])]),
        Return([Ex("(acc + {0})", (draw(num(after, 1)),))]),
    ]
    return Func(name, ["xs", "a"], body)


@st.composite
def follow_up(draw, sc: Scope, name: str) -> list:
    """Often, ``name`` re-bound in terms of itself right after it was selected
    (``t = t + x`` after an if whose arms copy or compute ``t``)."""
    if name not in sc.floats or draw(st.booleans()):
        return []
    other = draw(atom(sc))
    if draw(st.booleans()):
        return [Aug(name, draw(st.sampled_from("+*")), other)]
    return [
        Assign([name], [apply(draw(st.sampled_from(BASIC_BINARY)), leaf(name), other)])
    ]


@st.composite
def if_statement(draw, sc: Scope, must_return: bool, tuple_out: int) -> If:
    """if / elif / else; arms may nest another if, loop, list or return."""
    n_arms = draw(st.integers(1, 3))
    has_else = draw(st.booleans())
    # a name every arm binds (copying in one arm, computing in another)
    shared = sc.new_name("b")
    bodies, scopes = [], []
    for a in range(n_arms + has_else):
        inner = sc.copy()
        inner.depth += 1
        # a return inside a loop only where the family has them
        body = draw(block(inner, 0, 2, sc.knobs.jumps or not sc.in_loop, tuple_out))
        if must_return and a == 0 and not (body and isinstance(body[-1], Return)):
            body.append(Return(draw(returned(inner, tuple_out))))
            sc.returns[0] += 1
        bodies.append(body)
        scopes.append(inner)
    falls = [not (b and isinstance(b[-1], Return)) for b in bodies]
    if has_else and not any(falls):  # some path must reach the code after the if
        bodies[-1].pop()
        falls[-1] = True
    bound_sets = []
    for body, inner, fall in zip(bodies, scopes, falls, strict=True):
        if fall:
            value = leaf(draw(st.sampled_from(inner.floats)))
            if draw(st.integers(0, 2)):
                value = draw(num(inner))
            body.append(Assign([shared], [value]))
            inner.floats.append(shared)
            bound_sets.append(set(inner.floats))
    arms = [(draw(cond(sc)), body) for body in bodies[:n_arms]]
    # names bound on every path that falls through (without an else, none)
    if has_else:
        for name in sorted(set.intersection(*bound_sets)):
            if name not in sc.floats:
                sc.floats.append(name)
    return If(arms, bodies[-1] if has_else else None)


def distinct(a: Ex, b: Ex) -> Ex:
    """``b``, moved off ``a`` when both are the same text (a permanent tie)."""
    return Ex("({0} + 0.5)", (b,)) if a.render() == b.render() else b


@st.composite
def returned(draw, sc: Scope, tuple_out: int) -> list[Ex]:
    """The returned value(s): over the latest names, so the statements matter."""
    values = []
    for _ in range(tuple_out or 1):
        recent = sc.floats[-3:]
        e = leaf(draw(st.sampled_from(recent)))
        for _ in range(draw(st.integers(0, 2))):
            other = draw(num(sc, 1, True))
            op = draw(st.sampled_from(BASIC_BINARY))
            if op[0] == "({0} - {1})" and other.render() == e.render():
                op = BASIC_BINARY[0]  # not u - u
            e = apply(op, e, other)
        values.append(e)
    return values


@st.composite
def block(draw, sc: Scope, lo: int, hi: int, allow_return: bool, tuple_out: int):
    """A block of statements; ends with a return when a path returns early."""
    out: list = []
    for _ in range(draw(st.integers(lo, hi))):
        out += draw(statement(sc, allow_return, tuple_out))
    ending = allow_return and sc.knobs.early_return and sc.may_return()
    if ending and draw(st.integers(0, 4)) == 0:
        out.append(Return(draw(returned(sc, tuple_out))))
        sc.returns[0] += 1
    return out


@dataclass
class RawProgram:
    """A program given as text (the regression tests): no switches to record."""

    text: str
    name: str = "f"
    numpy: bool = False

    def source(self, mode: str = "py", switches: list | None = None) -> str:
        if mode != "mp":
            return self.text
        return self.text.replace("import math\n", "").replace(
            "import numpy as np\n", ""
        )

    @property
    def target(self) -> types.SimpleNamespace:
        return types.SimpleNamespace(name=self.name)

    def tags(self) -> set[str]:
        words = set(self.text.replace("(", " ").replace(")", " ").split())
        return words & {"and", "or"}


@dataclass
class Case:
    """A drawn program and what its point is made of."""

    program: Program
    params: dict[str, str]  # name -> "float" | "int" | "list:N"
    wrt: list[str] | None
    seed: int
    family: str = ""
    #: declared array shapes (gen --shape), for the npshapes family
    shapes: dict[str, tuple] | None = None

    @property
    def tuple_out(self) -> bool:
        return any(
            isinstance(s, Return) and len(s.values) > 1
            for s in walk(self.program.target.body)
        )


@st.composite
def helper_func(draw, name: str, others: list[Helper], knobs: Knobs) -> Func:
    params = ["a", "b"][: draw(st.integers(1, 2))]
    defaults = {}
    if len(params) == 2 and draw(st.booleans()):
        defaults["b"] = draw(st.sampled_from(("0.5", "1.5", "-0.75")))
    hk = Knobs(
        statements=(0, 3),
        branches=knobs.branches,
        early_return=True,
        rules=knobs.rules,
        kinks=knobs.kinks,
        max_depth=1,
    )
    sc = Scope(list(params), [], {}, others, hk, [0])
    body = draw(block(sc, 0, 3, True, 0))
    if not body or not isinstance(body[-1], Return):
        body.append(Return(draw(returned(sc, 0))))
    return Func(name, params, body, defaults)


@st.composite
def programs(draw, knobs: Knobs, family: str) -> Case:
    # and/or as values are rejected or supported (pending): in one program in six,
    # so that a rejection leaves most of the family compared
    if knobs.boolvalues and draw(st.integers(0, 5)):
        knobs = dataclasses.replace(knobs, boolvalues=False)
    floats = ["x", "y", "z"][: draw(st.integers(1, 3))]
    params = {p: "float" for p in floats}
    lists: dict[str, int] = {}
    ints: list[str] = []
    if knobs.int_param and draw(st.booleans()):
        params["n"] = "int"
        ints.append("n")
    if knobs.list_param and draw(st.booleans()):
        n = draw(st.integers(0, 3))
        params["xs"] = f"list:{n}"
        lists["xs"] = n
    funcs: list[Func] = []
    helpers: list[Helper] = []
    shaped: list[Helper] = []
    if knobs.helpers:
        for k in range(draw(st.integers(1, 2))):
            fn = draw(helper_func(f"h{k}", list(helpers), knobs))
            funcs.append(fn)
            helpers.append(Helper(fn.name, fn.params, fn.defaults))
    if knobs.helper_shapes:
        kinds = ("tuple", "list_out", "list_in")
        for k in range(draw(st.integers(1, 3))):
            kind = draw(st.sampled_from(kinds))
            fn = draw(shaped_helper(f"g{k}", kind, list(helpers), list(shaped), knobs))
            funcs.append(fn)
            shaped.append(Helper(fn.name, fn.params, fn.defaults, kind))
    sc = Scope(list(floats), ints, lists, helpers, knobs, [0], shaped=shaped)
    tuple_out = draw(st.sampled_from((0, 2))) if knobs.tuple_out else 0
    body = draw(block(sc, *knobs.statements, True, tuple_out))
    if not body or not isinstance(body[-1], Return):
        body.append(Return(draw(returned(sc, tuple_out))))
    funcs.append(Func("f", list(params), body))
    wrt = None
    if "n" in params:  # an int parameter is never differentiated
        wrt = [p for p in params if params[p] != "int"]
    if draw(st.integers(0, 4)) == 0:  # sometimes a subset
        wrt = [p for p in params if params[p] != "int" and draw(st.booleans())]
        wrt = wrt or [floats[0]]
    seed = draw(st.integers(0, 2**32 - 1))
    return Case(Program(funcs), params, wrt, seed, family)


# ---------------------------------------------------------------------------------
# placing the point away from kinks


MARGIN = 1e-3  # every switch is at least this far (absolute) from flipping
MAGNITUDE = 1e3  # and no intermediate exceeds this in magnitude


class _Recorder:
    """The instrumented program's helpers: each records (switch id, distance to
    flipping) or a magnitude, and returns what the model's own expression would."""

    def __init__(self) -> None:
        self.gaps: list[tuple[int, float]] = []
        self.mags: list[float] = []

    def namespace(self) -> dict:
        gaps, mags = self.gaps, self.mags

        def k(i, v):
            gaps.append((i, abs(v)))
            return v

        def g(i, a, b):
            gaps.append((i, abs(a - b)))
            return a

        def m(v):
            if isinstance(v, list):
                mags.extend(abs(e) for e in v)
            elif isinstance(v, float):
                mags.append(abs(v))
            return v

        def mod(i, a, b):
            q = a / b
            gaps.append((i, abs(q - round(q)) * abs(b)))
            return a % b

        def fdiv(i, a, b):
            mod(i, a, b)
            return a // b

        def mn(i, a, b):
            gaps.append((i, abs(a - b)))
            return min(a, b)

        def mx(i, a, b):
            gaps.append((i, abs(a - b)))
            return max(a, b)

        def wrap(fn):
            def wrapped(*args):
                mags.extend(abs(a) for a in args)
                out = fn(*args)
                mags.append(abs(out))
                return out

            return wrapped

        names = [n for n in dir(math) if callable(getattr(math, n))]
        rec_math = types.SimpleNamespace(**{n: wrap(getattr(math, n)) for n in names})
        return {
            "__builtins__": builtins,
            "math": rec_math,
            "_k": k,
            "_g": g,
            "_m": m,
            "_mod": mod,
            "_fdiv": fdiv,
            "_min": mn,
            "_max": mx,
        }


def clear_switches(program: Program, args: list) -> tuple[bool, set]:
    """Run the instrumented program in floats. Returns (every switch at least
    MARGIN from flipping and every intermediate finite and below MAGNITUDE,
    the (node, operand) of the switches that were too close)."""
    if program.numpy:
        return clear_switches_numpy(program, args)
    rec = _Recorder()
    ns = rec.namespace()
    switches: list = []
    source = program.source("inst", switches)
    try:
        exec(compile(source, "<instrumented>", "exec"), ns)
        result = ns[program.target.name](*args)
    except (ArithmeticError, ValueError):  # a division by a tie (u / (t - t2))
        return False, {switches[i] for i, gap in rec.gaps if gap < MARGIN}
    outs = result if isinstance(result, tuple) else (result,)
    rec.mags.extend(abs(o) for o in outs)
    close = {switches[i] for i, gap in rec.gaps if gap < MARGIN}
    big = not all(math.isfinite(m) and m <= MAGNITUDE for m in rec.mags)
    return not close and not big, close


def point_is_clear(program: Program, args: list) -> bool:
    return clear_switches(program, args)[0]


def draw_args(params: dict[str, str], rnd: random.Random, shrinkage: float) -> list:
    def coordinate() -> float:
        return rnd.choice((1.0, -1.0)) * rnd.uniform(0.25, 0.25 + 1.25 * shrinkage)

    args: list = []
    for kind in params.values():
        if kind == "float":
            args.append(coordinate())
        elif kind == "int":
            args.append(rnd.randint(0, 4))
        else:
            args.append([coordinate() for _ in range(int(kind.split(":")[1]))])
    return args


def place_point(case: Case, attempts: int = 30) -> list | None:
    """A point at which ``case`` is away from every kink, or None.

    Points are redrawn (later ones smaller, against large intermediates); a switch
    that is too close at three points is a tie by construction (``min(t, u)``
    after ``u = t``), and its operand is moved by a constant (the program is
    changed in place: ``min(t, (u + 0.375))``).
    """
    rnd = random.Random(case.seed)
    misses: Counter = Counter()
    for k in range(attempts):
        make = _np_args if case.program.numpy else draw_args
        args = make(case.params, rnd, 1.0 / (1 + k // 10))
        ok, close = clear_switches(case.program, args)
        if ok:
            return args
        for node, operand in close:
            misses[id(node), operand] += 1
            if misses[id(node), operand] % 3 == 0:
                old = float(node.shift.get(operand, "0.0"))
                node.shift[operand] = repr(old + 0.375)
    return None


# ---------------------------------------------------------------------------------
# the check: generated gradient against mpmath central differences


def _floordiv(a, b):
    return mpmath.floor(a / b)


def mp_model(source: str, func: str) -> Callable:
    """``func`` from the ``mp`` rendering, with ``math`` mapped to mpmath
    (support.MP_MATH), evaluated in mpmath numbers when called with them."""
    ns: dict = {"__builtins__": builtins, "math": MP_MATH, "_floordiv": _floordiv}
    exec(compile(source, "<model in mpmath>", "exec"), ns)
    return ns[func]


def reference_partial(f_mp: Callable, point: list, j: int) -> mpmath.mpf:
    """d f / d point[j]: mpmath central difference (support.mp_central_diff, 60
    digits, step 1e-30 relative). Its self-check is relative, so an exactly zero
    derivative is taken as d(f + x_j)/dx_j - 1 and kept as 0 below 1e-20."""
    try:
        return mp_central_diff(f_mp, point, j, digits=30)
    except ValueError:

        def shifted(*coords):
            return f_mp(*coords) + coords[j]

        with mpmath.workdps(60):
            estimate = mp_central_diff(shifted, point, j, digits=30) - 1
        return mpmath.mpf(0) if abs(estimate) < 1e-20 else estimate


# Tolerance, checked per entry: |g_j - r_j| <= REL_TOL * (|r_j| + FLOOR * S), S the
# largest |value| or |r_k| of the example, r_j the mpmath reference (~1e-25 relative).
# The generated gradient is at most a few hundred correctly rounded operations on
# intermediates bounded by MAGNITUDE (1e3), each adding ~1.1e-16 relative to the
# terms it combines; loops multiply that by their trip count (at most ~16 here).
# Entries that come from cancelling terms of size ~S carry an absolute error
# ~1e-13 * S, hence the small floor. Measured over 10,500 programs of the long
# profile: the largest error / (|r_j| + FLOOR * S) was 1.4e-12 (nested loops),
# 2.3e-13 in straight-line code: REL_TOL leaves two orders of margin, while a wrong
# rule or a dropped or doubled contribution is off by a sizable fraction of |r_j|.
REL_TOL = 1e-10
FLOOR = 1e-3
# Doubles end at ~2.2e-308 (subnormals at ~4.9e-324): a value that small underflows
# to 0.0 where the mpmath reference keeps it (x **= 2 repeated from |x| < 1 gives
# -1e-531, and the generated -0.0 is the right double). Intermediates are bounded by
# MAGNITUDE, so a lost 1e-308 grows by at most a few factors of 1e3 before it reaches
# an entry; 1e-290 absolute is far below anything a wrong rule gives at these scales.
UNDERFLOW = 1e-290
# generate() on these programs (at most ~40 lines) takes 10-50 ms; one that takes
# more than this is a complexity blow-up in the generator
SLOW_SECONDS = float(os.environ.get("GRADWRIGHT_RANDOM_SLOW", "10"))
# a file that always holds the program being generated (GRADWRIGHT_RANDOM_TRACE)
TRACE = os.environ.get("GRADWRIGHT_RANDOM_TRACE", "")


@dataclass
class Outcome:
    status: str  # "ok", "expected", "kink", "fail"
    signature: str = ""
    message: str = ""
    nonzero: bool = False
    worst: float = 0.0  # the largest error / (|r| + FLOOR * S) seen


def compare(flat: list, refs: list, scale, where: str) -> Outcome:
    """Each generated entry against its reference (tolerance at REL_TOL)."""
    worst, nonzero = 0.0, False
    for j, (g, r) in enumerate(zip(flat, refs, strict=True)):
        # reference: mpmath central difference of the same program
        err = abs(mpmath.mpf(float(g)) - r)
        bound = abs(r) + FLOOR * scale
        if err > REL_TOL * bound + UNDERFLOW:
            return _fail(
                "gradient wrong",
                f"{where}entry {j}: got {float(g)!r}, mpmath {mpmath.nstr(r, 17)}"
                f" (error {mpmath.nstr(err, 3)})",
            )
        worst = max(worst, float(err / bound) if err > UNDERFLOW else 0.0)
        nonzero = nonzero or r != 0
    return Outcome("ok", nonzero=nonzero, worst=worst)


def _sizes(args: list) -> list:
    """The magnitudes of a scalar model's numeric arguments (list elements too)."""
    out = []
    for arg in args:
        for x in arg if isinstance(arg, (list, tuple)) else [arg]:
            if isinstance(x, (int, float)) and not isinstance(x, bool):
                out.append(abs(mpmath.mpf(float(x))))
    return out


def expected_rejection(error: GradwrightError, tags: set[str]) -> bool:
    """The rejections a program of this generator may get: ``a and b`` / ``a or b``
    as a value (unsupported, pending a decision: a located error naming and/or is
    fine) and a result that does not depend on the wrt names (checked against the
    reference by the caller)."""
    # the message names the operator (quoted), not just "constant or integer"
    named = re.search(r"[`'](and|or)[`']|and/or|\bboolean\b", str(error).split("\n")[0])
    return ("and" in tags or "or" in tags) and named is not None


def _fail(sig: str, msg: str) -> Outcome:
    return Outcome("fail", sig, msg)


def evaluate(case: Case, args: list) -> Outcome:
    """Generate ``case``'s gradient and compare it at ``args`` (placed away from
    kinks) with mpmath; the value must be the primal's bit for bit."""
    if case.program.numpy:
        return evaluate_numpy(case, args)
    program, params = case.program, list(case.params)
    source = program.source()
    func = program.target.name
    chosen = case.wrt if case.wrt is not None else list(params)
    primal = _run_py(source)[func](*args)
    outs = primal if isinstance(primal, tuple) else (primal,)

    def constant() -> bool:  # the reference: every derivative is exactly zero
        refs = _references(program, params, chosen, args, len(outs))
        return all(r == 0 for row in refs for r in row)

    ns = _generate(case, func, constant)
    if isinstance(ns, Outcome):
        return ns
    try:
        if len(outs) > 1:
            value, jac = ns[func + "_jacobian"](*args)
            rows = [list(row) for row in jac]
            seed = [0.75, -1.25][: len(outs)]
            value_vjp, vjp = ns[func + "_vjp"](*args, seed=tuple(seed))
        else:
            value, grads = ns[func + "_grad"](*args)
            rows = [list(grads)]
            value_vjp = value
        copied = ns[func](*args)
    except Exception as error:  # noqa: BLE001
        return _fail(f"run {type(error).__name__}", f"{type(error).__name__}: {error}")
    values = value if isinstance(value, tuple) else (value,)
    for got, want in zip(values, outs, strict=False):
        if len(values) != len(outs) or not same_bits(got, want):
            return _fail(
                "value differs from primal", f"value {value!r}, primal {primal!r}"
            )
    if not (same_bits(copied, primal) if len(outs) == 1 else copied == primal):
        return _fail("copied primal differs", f"{copied!r} vs {primal!r}")
    if value_vjp != value:
        return _fail("vjp value differs", f"{value_vjp!r} vs {value!r}")
    refs = _references(program, params, chosen, args, len(outs))
    nonzero, worst = False, 0.0
    for out_k, (row, ref_row) in enumerate(zip(rows, refs, strict=True)):
        flat: list = []
        for name, g in zip(chosen, row, strict=True):
            if case.params[name].startswith("list"):
                if not isinstance(g, list):
                    return _fail("list entry not a list", f"{name}_bar = {g!r}")
                flat += g
            else:
                flat.append(g)
        if len(flat) != len(ref_row):
            return _fail("gradient shape", f"{row!r}")
        # the inputs' sizes too, as for array models: sin(x) - x at x ~ 1e-14 is
        # 0.0 in doubles, and so is its derivative, where mpmath keeps 1e-40
        scale = max(
            [abs(mpmath.mpf(o)) for o in outs]
            + [abs(r) for r in ref_row]
            + _sizes(args)
        )
        if not all(isinstance(g, float) for g in flat):
            return _fail("entry not a float", f"{row!r}")
        result = compare(flat, ref_row, scale, f"output {out_k}, ")
        if result.status == "fail":
            return result
        nonzero = nonzero or result.nonzero
        worst = max(worst, result.worst)
    if len(outs) > 1:  # the vjp is the seed-weighted sum of the Jacobian's rows
        flat_vjp = [e for g in vjp for e in (g if isinstance(g, list) else [g])]
        flat_jac = [
            [e for g in row for e in (g if isinstance(g, list) else [g])]
            for row in rows
        ]
        for j, g in enumerate(flat_vjp):
            want = sum(s * row[j] for s, row in zip(seed, flat_jac, strict=True))
            if abs(g - want) > 1e-12 * (abs(want) + 1):
                return _fail(
                    "vjp differs from jacobian", f"entry {j}: {g!r} vs {want!r}"
                )
    return Outcome("ok", nonzero=nonzero, worst=worst)


def _generate(case: Case, func: str, constant: Callable[[], bool]) -> dict | Outcome:
    """The generated module's namespace, or the Outcome of a rejection: expected
    for and/or values (see :func:`expected_rejection`) and for a result that
    does not depend on the wrt names when ``constant()`` (the reference) agrees."""
    if TRACE:  # the program about to be generated (to find a hang)
        with open(TRACE, "w") as trace:
            trace.write(f"# wrt={case.wrt!r}\n{case.program.source()}")
    start = time.perf_counter()
    try:
        text = gradwright.generate(
            case.program.source(), [func], wrt=case.wrt, shapes=case.shapes
        )
    except GradwrightError as error:
        if expected_rejection(error, case.program.tags()):
            return Outcome("expected", "boolvalue", str(error))
        if "does not depend differentiably" in str(error) and constant():
            return Outcome("expected", "no-dependence", str(error))
        first = str(error).splitlines()[0].split("error:")[-1].strip()[:60]
        return _fail(f"GradwrightError: {first}", str(error))
    except Exception as error:  # noqa: BLE001 - a crash of the generator
        return _fail(f"generate crash {type(error).__name__}", repr(error))
    seconds = time.perf_counter() - start
    if seconds > SLOW_SECONDS:  # these programs take ~20 ms: a blow-up is a bug
        return _fail("generation slow", f"generate() took {seconds:.1f} s")
    ns: dict = {}
    try:
        exec(compile(text, "<generated>", "exec"), ns)
    except Exception as error:  # noqa: BLE001 - any failure is a finding
        return _fail(f"compile {type(error).__name__}", f"{error}\n{text}")
    return ns


def _run_py(source: str) -> dict:
    ns: dict = {"__builtins__": builtins}
    exec(compile(source, "<model>", "exec"), ns)
    return ns


def _references(program, params, chosen, args, n_out: int) -> list[list]:
    """mpmath central differences of every output in every wrt coordinate."""
    f_mp = mp_model(program.source("mp"), program.target.name)
    slots = []  # (param index, list index or None) per flat coordinate
    for name in chosen:
        p = params.index(name)
        if isinstance(args[p], list):
            slots += [(p, k) for k in range(len(args[p]))]
        else:
            slots.append((p, None))
    point = [args[p] if k is None else args[p][k] for p, k in slots]
    rows = []
    for out_k in range(n_out):

        def flat_model(*coords, out_k=out_k):
            call = [list(a) if isinstance(a, list) else a for a in args]
            for (p, k), c in zip(slots, coords, strict=True):
                if k is None:
                    call[p] = c
                else:
                    call[p][k] = c
            result = f_mp(*call)
            return result[out_k] if isinstance(result, tuple) else result

        rows.append(
            [reference_partial(flat_model, point, j) for j in range(len(point))]
        )
    return rows


# ---------------------------------------------------------------------------------
# shrinking a failure: smaller programs that fail the same way


def _blocks(program: Program) -> list[list]:
    """Every statement list of ``program``, in a fixed order."""
    out: list[list] = []

    def visit(body: list) -> None:
        out.append(body)
        for stmt in body:
            if isinstance(stmt, If):
                for _, arm in stmt.arms:
                    visit(arm)
                if stmt.orelse is not None:
                    visit(stmt.orelse)
            elif isinstance(stmt, For | While):
                visit(stmt.body)

    for fn in program.funcs:
        visit(fn.body)
    return out


def _subexprs(e: Ex, path: tuple = ()) -> Iterator[tuple[tuple, Ex]]:
    yield path, e
    for k, kid in enumerate(e.kids):
        yield from _subexprs(kid, (*path, k))


def _replace(e: Ex, path: tuple, new: Ex) -> Ex:
    if not path:
        return new
    kids = list(e.kids)
    kids[path[0]] = _replace(kids[path[0]], path[1:], new)
    return Ex(e.form, tuple(kids), e.inst, e.mp, e.kind, e.tag, dict(e.shift))


def _expr_slots(stmt) -> list[tuple[Callable, Ex]]:
    """(setter, expression) for every expression a statement holds."""
    slots = []
    if isinstance(stmt, Assign | Return):
        for k, v in enumerate(stmt.values):
            slots.append((lambda new, k=k: stmt.values.__setitem__(k, new), v))
    elif isinstance(stmt, Aug):
        slots.append((lambda new: setattr(stmt, "value", new), stmt.value))
    elif isinstance(stmt, If):
        for k, (c, arm) in enumerate(stmt.arms):
            slots.append(
                (lambda new, k=k, arm=arm: stmt.arms.__setitem__(k, (new, arm)), c)
            )
    elif isinstance(stmt, While) and stmt.cond is not None:
        slots.append((lambda new: setattr(stmt, "cond", new), stmt.cond))
    return slots


def _candidates(case: Case, args: list) -> Iterator[tuple[Case, list]]:
    """Smaller variants of ``case`` (and simpler points), biggest cuts first."""
    n_blocks = len(_blocks(case.program))
    for bi in range(n_blocks):
        for j in range(len(_blocks(case.program)[bi])):
            c = copy.deepcopy(case)
            block_ = _blocks(c.program)[bi]
            stmt = block_[j]
            del block_[j]
            yield c, args
            if isinstance(stmt, If):
                for k in range(len(stmt.arms)):
                    c = copy.deepcopy(case)
                    block_ = _blocks(c.program)[bi]
                    s = block_[j]
                    block_[j : j + 1] = s.arms[k][1]
                    yield c, args
                    if len(s.arms) > 1:
                        c = copy.deepcopy(case)
                        del _blocks(c.program)[bi][j].arms[k]
                        yield c, args
                if stmt.orelse is not None:
                    c = copy.deepcopy(case)
                    block_ = _blocks(c.program)[bi]
                    block_[j : j + 1] = block_[j].orelse
                    yield c, args
                    c = copy.deepcopy(case)
                    _blocks(c.program)[bi][j].orelse = None
                    yield c, args
            if isinstance(stmt, While):
                for change in ("cond", "limit", "forever"):
                    c = copy.deepcopy(case)
                    loop = _blocks(c.program)[bi][j]
                    if change == "cond" and loop.cond is not None:
                        loop.cond = None
                    elif change == "limit" and loop.limit != "1":
                        loop.limit = "1"
                    elif change == "forever" and loop.forever:
                        loop.forever = False
                    else:
                        continue
                    yield c, args
            if isinstance(stmt, For):
                c = copy.deepcopy(case)
                block_ = _blocks(c.program)[bi]
                block_[j : j + 1] = block_[j].body
                yield c, args
                for it in ("range(1)", "range(2)", "range(0)"):
                    if stmt.iter != it and not stmt.iter.startswith("xs"):
                        c = copy.deepcopy(case)
                        _blocks(c.program)[bi][j].iter = it
                        yield c, args
    # expressions: a node by one of its operands of the same kind, or by a leaf
    for bi in range(n_blocks):
        for j in range(len(_blocks(case.program)[bi])):
            stmt = _blocks(case.program)[bi][j]
            for si, (_, e) in enumerate(_expr_slots(stmt)):
                for path, node in list(_subexprs(e)):
                    options = [k for k in node.kids if k.kind == node.kind]
                    params = case.program.target.params[:3]
                    if node.kind == "num" and node.kids:
                        options += [leaf(p) for p in params]
                        options.append(leaf("0.5"))
                    if node.kind == "cond" and node.kids:
                        options += [
                            Ex(
                                "{0} > {1}",
                                (leaf(p), leaf("0.0")),
                                "_g(@1, {0}, {1}) > {1}",
                                kind="cond",
                            )
                            for p in params
                        ]
                    for new in options:
                        c = copy.deepcopy(case)
                        setter, old = _expr_slots(_blocks(c.program)[bi][j])[si]
                        setter(_replace(old, path, new))
                        yield c, args
    # helpers nobody calls, parameters nobody reads
    text = case.program.source()
    for k, fn in enumerate(case.program.funcs[:-1]):
        if text.count(f"{fn.name}(") == 1:
            c = copy.deepcopy(case)
            del c.program.funcs[k]
            yield c, args
    target = case.program.target
    for k, p in enumerate(target.params):
        body_text = "\n".join(text.split(f"def {target.name}(")[1].splitlines()[1:])
        if len(target.params) > 1 and not _mentions(body_text, p):
            c = copy.deepcopy(case)
            del c.program.target.params[k]
            del c.params[p]
            if c.wrt is not None:
                c.wrt = [w for w in c.wrt if w != p] or None
            yield c, args[:k] + args[k + 1 :]
    # simpler coordinates
    for k, a in enumerate(args):
        if isinstance(a, float):
            for simple in (0.5, -0.5, 1.0, -1.0, 0.75, 0.25, round(a, 1)):
                if simple != a:
                    yield case, args[:k] + [simple] + args[k + 1 :]


def _mentions(text: str, name: str) -> bool:
    return re.search(rf"\b{re.escape(name)}\b", text) is not None


def _still_fails(case: Case, args: list, signature: str) -> bool:
    try:
        source = case.program.source()
        _run_py(source)[case.program.target.name](*args)
        if not point_is_clear(case.program, args):
            return False
        outcome = evaluate(case, args)
    except Exception:  # noqa: BLE001 - the variant is not a valid program
        return False
    return outcome.status == "fail" and outcome.signature == signature


def shrink(
    case: Case, args: list, signature: str, budget: int = 1500, seconds: float = 90.0
):
    """Greedy reduction of a failing ``case`` (delta debugging over the tree):
    candidates in a fixed order, resuming after each success where it happened,
    until a whole pass changes nothing, ``budget`` variants were tried or
    ``seconds`` passed (a slow generator makes each try slow)."""
    tries, start, fresh_pass = 0, 0, True
    deadline = time.perf_counter() + seconds
    while tries < budget and time.perf_counter() < deadline:
        candidates = list(_candidates(case, args))
        for index in range(start, len(candidates)):
            tries += 1
            if tries >= budget or time.perf_counter() > deadline:
                break
            if _still_fails(*candidates[index], signature):
                case, args = candidates[index]
                start, fresh_pass = index, False
                break
        else:
            if fresh_pass:
                break
            start, fresh_pass = 0, True
    return case, args


# ---------------------------------------------------------------------------------
# NumPy programs: shapes tracked, elementwise forms on safe domains, reductions,
# products; the reference runs the same text on object arrays of mpmath numbers

NP_UNARY = [
    _f("np.sin({0})", tag="np.sin"),
    _f("np.cos({0})", tag="np.cos"),
    _f("np.tanh({0})", tag="np.tanh"),
    _f("np.arctan({0})", tag="np.arctan"),
    _f("np.exp(np.tanh({0}))", tag="np.exp"),
    _f("np.log(1.5 + {0} * {0})", tag="np.log"),
    _f("np.sqrt(1.0 + {0} * {0})", tag="np.sqrt"),
    _f("np.log1p({0} * {0})", tag="np.log1p"),
    _f("np.square({0})", tag="np.square"),
    _f("np.arcsinh({0})", tag="np.arcsinh"),
    _f("np.expm1(np.sin({0}))", tag="np.expm1"),
    _f("np.exp2(np.tanh({0}))", tag="np.exp2"),
    _f("np.log2(1.25 + {0} * {0})", tag="np.log2"),
    _f("np.log10(1.25 + {0} * {0})", tag="np.log10"),
    _f("np.tan(0.7 * np.tanh({0}))", tag="np.tan"),
    _f("np.arcsin(0.9 * np.tanh({0}))", tag="np.arcsin"),
    _f("np.arccos(0.9 * np.tanh({0}))", tag="np.arccos"),
    _f("np.arctanh(0.9 * np.tanh({0}))", tag="np.arctanh"),
    _f("np.sinh({0})", tag="np.sinh"),
    _f("np.cosh({0})", tag="np.cosh"),
    _f("np.arccosh(1.5 + {0} * {0})", tag="np.arccosh"),
    _f("np.cbrt({0})", "np.cbrt(_nk(@0, {0}))", "np.cbrt"),
    _f("np.abs({0})", "np.abs(_nk(@0, {0}))", "np.abs"),
    _f("np.fabs({0})", "np.fabs(_nk(@0, {0}))", "np.fabs"),
    _f("np.clip({0}, -0.5, 0.5)", "np.clip(_nclip(@0, {0}), -0.5, 0.5)", "np.clip"),
    _f("({0} ** 2)", tag="np.pow_int"),
    _f("np.power(1.25 + {0} * {0}, 1.5)", tag="np.power"),
    _f("(-{0})", tag="neg"),
]
NP_BINARY = [
    _f("({0} + {1})"),
    _f("({0} - {1})"),
    _f("({0} * {1})"),
    _f("({0} / (1.25 + {1} * {1}))", tag="div"),
    _f("np.maximum({0}, {1})", "np.maximum(_ng(@1, {0}, {1}), {1})", "np.maximum"),
    _f("np.minimum({0}, {1})", "np.minimum(_ng(@1, {0}, {1}), {1})", "np.minimum"),
    _f("np.arctan2({0}, 1.5 + {1} * {1})", tag="np.arctan2"),
    _f("np.hypot({0}, {1})", "np.hypot(_nk(@0, {0}), {1})", "np.hypot"),
    _f(
        "np.where({0} > {1}, {0}, {1} * {1})",
        "np.where(_ng(@1, {0}, {1}) > {1}, {0}, {1} * {1})",
        "np.where",
    ),
    _f("np.power(1.25 + {0} * {0}, np.tanh({1}))", tag="np.power_active"),
]
# (form, instrumented form, input shape -> output shape or None, tag)
NP_REDUCE = [
    ("np.sum({0})", None, lambda s: (), "np.sum"),
    ("np.mean({0})", None, lambda s: (), "np.mean"),
    ("{0}.sum()", None, lambda s: (), "sum_method"),
    ("np.prod(np.tanh({0}))", None, lambda s: (), "np.prod"),
    ("np.max({0})", "np.max(_nmax(@0, {0}))", lambda s: (), "np.max"),
    ("np.min({0})", "np.min(_nmin(@0, {0}))", lambda s: (), "np.min"),
    (
        "np.sum({0}[:, None] * np.tanh({0})[None, :], axis=0)",
        None,
        lambda s: s if len(s) == 1 else None,
        "newaxis",
    ),
    (
        "np.sum({0}, axis=1, keepdims=True)[:, 0]",
        None,
        lambda s: s[:1] if len(s) == 2 else None,
        "drop_axis",
    ),
    (
        "np.max({0}, axis=1, keepdims=True)",
        "np.max(_nmaxa(@0, {0}, 1), axis=1, keepdims=True)",
        lambda s: (s[0], 1) if len(s) == 2 else None,
        "max_axis",
    ),
    (
        "np.min({0}, axis=0)",
        "np.min(_nmina(@0, {0}, 0), axis=0)",
        lambda s: s[1:] if len(s) == 2 else None,
        "min_axis",
    ),
    ("np.sum({0}, axis=0)", None, lambda s: s[1:] if len(s) == 2 else None, "axis"),
    ("np.mean({0}, axis=1)", None, lambda s: s[:1] if len(s) == 2 else None, "axis"),
    (
        "np.sum({0}, axis=1, keepdims=True)",
        None,
        lambda s: (s[0], 1) if len(s) == 2 else None,
        "keepdims",
    ),
]
NP_SHAPES = {"x": (3,), "w": (2,), "A": (2, 3), "s": ()}


def _product(a: tuple, b: tuple) -> tuple | None:
    """Shape of a @ b, or None."""
    if len(a) == 2 and len(b) == 1 and a[1] == b[0]:
        return (a[0],)
    if len(a) == 1 and len(b) == 2 and a[0] == b[0]:
        return (b[1],)
    if len(a) == 1 and len(b) == 1 and a == b:
        return ()
    if len(a) == 2 and len(b) == 2 and a[1] == b[0]:
        return (a[0], b[1])
    return None


@st.composite
def np_expr(draw, names: dict[str, tuple], depth: int = 2) -> tuple[Ex, tuple]:
    """An array (or scalar) expression over ``names`` and its shape."""
    if depth <= 0 or draw(st.integers(0, 3)) == 0:
        name = draw(st.sampled_from(sorted(names)))
        return leaf(name), names[name]
    kind = draw(st.sampled_from(("unary", "binary", "binary", "reduce", "matmul")))
    a, sa = draw(np_expr(names, depth - 1))
    if kind == "unary":
        return apply(draw(st.sampled_from(NP_UNARY)), a), sa
    if kind == "reduce":
        form, inst, shape_of, tag = draw(st.sampled_from(NP_REDUCE))
        out = shape_of(sa)
        if out is None or not sa:
            return a, sa
        if inst and len(sa) == 2 and "np.max" in form:
            pass
        return Ex(form, (a,), inst, tag=tag), out
    b, sb = draw(np_expr(names, depth - 1))
    if kind == "matmul":
        for x, y, sx, sy in ((a, b, sa, sb), (b, a, sb, sa)):
            for tx, stx in ((x, sx), (Ex("{0}.T", (x,), tag="T"), sx[::-1])):
                out = _product(stx, sy)
                if out is not None and sx and sy:
                    form = draw(st.sampled_from(("({0} @ {1})", "np.dot({0}, {1})")))
                    return Ex(form, (tx, y), tag="matmul"), out
        kind = "binary"
    try:
        out = np.broadcast_shapes(sa, sb)
    except ValueError:
        b, sb = Ex("np.sum({0})", (b,), tag="np.sum"), ()
        out = sa
    spec = draw(st.sampled_from(NP_BINARY))
    if spec[0] == "({0} - {1})" and a.render() == b.render():
        spec = NP_BINARY[0]
    if a.render() == b.render() and spec[1] is not None:
        b = Ex("({0} + 0.5)", (b,))
    return apply(spec, a, b), tuple(out)


@st.composite
def numpy_programs(draw, family: str = "numpy") -> Case:
    chosen = draw(st.sets(st.sampled_from(sorted(NP_SHAPES)), min_size=1))
    params = sorted(chosen, key=list(NP_SHAPES).index)
    names = {p: NP_SHAPES[p] for p in params}
    body: list = []
    funcs: list[Func] = []
    calls: list[tuple[Ex, tuple]] = []
    if family == "numpy_helpers":
        # helpers over arrays (reductions, matrix products, broadcasting), each
        # drawn for the shapes of its arguments and called once or twice
        for h in range(draw(st.integers(1, 2))):
            given = draw(st.lists(st.sampled_from(params), min_size=1, max_size=2))
            own = {f"a{j}": names[p] for j, p in enumerate(given)}
            inner, shape = draw(np_expr(own, 2))
            hbody: list = []
            if draw(st.booleans()):
                hbody.append(Assign(["t"], [inner]))
                own = {**own, "t": shape}
                inner, shape = draw(np_expr(own, 1))
            hbody.append(Return([inner]))
            funcs.append(Func(f"g{h}", list(own)[: len(given)], hbody))
            form = f"g{h}({', '.join(given)})"
            calls.append((Ex(form.replace("{", "{{"), tag="array_helper"), shape))
    if draw(st.integers(0, 3)) == 0:
        # an array made from a parameter's size only: copied as written, its
        # shape read from its text where the form allows
        sized = [p for p in params if names[p]]
        if sized:
            p = draw(st.sampled_from(sized))
            form, shape = draw(
                st.sampled_from(
                    [
                        (f"np.ones_like({p}) * 1.5", names[p]),
                        (f"np.full({p}.shape, 0.5)", names[p]),
                        (f"np.zeros(len({p})) + 0.75", names[p][:1]),
                        (f"np.arange(len({p})) * 0.25 + 1.0", names[p][:1]),
                    ]
                )
            )
            body.append(Assign(["c0"], [Ex(form, tag="copied_array")]))
            names["c0"] = shape
    for k in range(draw(st.integers(1, 4))):
        e, shape = draw(np_expr(names, 2))
        if calls and draw(st.integers(0, 2)):
            e, shape = draw(st.sampled_from(calls))
            if shape and draw(st.booleans()):
                e = apply(draw(st.sampled_from(NP_UNARY)), e)
        target = draw(st.sampled_from([f"u{k}", f"u{k}", *sorted(names)]))
        if target in NP_SHAPES and NP_SHAPES.get(target) != shape:
            target = f"u{k}"
        if target in names and names[target] != shape:
            target = f"u{k}"
        body.append(Assign([target], [e]))
        names[target] = shape
    running = False
    if draw(st.integers(0, 3)) == 0:
        # a loop carrying an array: each trip mixes in a term of its shape or less
        t = draw(st.sampled_from(sorted(names)))
        fits = {n: s for n, s in names.items() if s == () or s == names[t]}
        e, shape = draw(np_expr(fits, 1))
        if _fits_into(shape, names[t]):
            step = Ex("{0} * 0.75 + np.tanh({1})", (leaf(t), e), tag="array_loop")
            trip: list = [Assign([t], [step])]
            if draw(st.booleans()):
                # a running cost of the state: the state's own adjoint starts at
                # zero before the reverse loop when nothing after reads it
                body.append(Assign(["s0"], [Ex("0.0")]))
                cost = Ex("{0} + np.sum(np.sin({1}))", (leaf("s0"), leaf(t)))
                trip.append(Assign(["s0"], [cost]))
                running = True
            body.append(For("k", "range(2)", trip))
    recent = [
        t
        for s in body[-2:]
        for t in (s.targets if isinstance(s, Assign) else [])
        if t in names
    ] or params
    e, shape = draw(np_expr({n: names[n] for n in recent}, 1))
    if shape:
        e = Ex(draw(st.sampled_from(("np.sum({0})", "np.mean({0})"))), (e,))
    if running:
        e = Ex("{0} + 0.5 * {1}", (e, leaf("s0")))
    body.append(Return([e]))
    kinds = {
        p: "array:" + "x".join(map(str, NP_SHAPES[p])) if NP_SHAPES[p] else "float"
        for p in params
    }
    wrt = None
    if draw(st.integers(0, 3)) == 0:
        wrt = [p for p in params if draw(st.booleans())] or params[:1]
    shapes = None
    if family == "npshapes" or (family == "numpy_helpers" and draw(st.booleans())):
        # some parameters' shapes declared (helpers then learn theirs from the
        # calls), each size a number or a name (one
        # name per size, so that equal sizes are provably equal)
        named = {size: draw(st.sampled_from([size, f"n{size}"])) for size in (2, 3)}
        shapes = {
            p: tuple(named[d] for d in NP_SHAPES[p])
            for p in params
            if draw(st.integers(0, 3)) > 0
        }
    return Case(
        Program([*funcs, Func("f", params, body)], numpy=True),
        kinds,
        wrt,
        draw(st.integers(0, 2**32 - 1)),
        family,
        shapes,
    )


def _fits_into(shape: tuple, into: tuple) -> bool:
    """An array of ``shape`` broadcasts to ``into`` without growing it."""
    try:
        return np.broadcast_shapes(into, shape) == into
    except ValueError:
        return False


def _np_namespace(rec: _Recorder) -> dict:
    """The instrumented NumPy program's helpers (see :class:`_Recorder`)."""
    gaps, mags = rec.gaps, rec.mags

    def low(v) -> float:
        return float(np.min(np.abs(v))) if np.size(v) else math.inf

    def nk(i, v):
        gaps.append((i, low(v)))
        return v

    def ng(i, a, b):
        gaps.append((i, low(np.subtract(a, b))))
        return a

    def nclip(i, v):
        gaps.append((i, min(low(np.add(v, 0.5)), low(np.subtract(v, 0.5)))))
        return v

    def top_gap(v) -> float:
        flat = np.sort(np.ravel(v))
        return float(flat[1] - flat[0]) if flat.size > 1 else math.inf

    def nmax(i, v):
        gaps.append((i, top_gap(-np.asarray(v))))
        return v

    def nmin(i, v):
        gaps.append((i, top_gap(v)))
        return v

    def line_gap(v, axis: int) -> float:
        # the closest any line along the axis comes to a tie for its extreme
        ordered = np.sort(np.asarray(v), axis=axis)
        if ordered.shape[axis] < 2:
            return math.inf
        top = np.take(ordered, [0, 1], axis=axis)
        return float(np.min(np.diff(top, axis=axis))) if top.size else math.inf

    def nmax_axis(i, v, axis):
        gaps.append((i, line_gap(-np.asarray(v), axis)))
        return v

    def nmin_axis(i, v, axis):
        gaps.append((i, line_gap(v, axis)))
        return v

    def m(v):
        if np.size(v):
            mags.append(float(np.max(np.abs(v))))
        return v

    return {
        "__builtins__": builtins,
        "_nk": nk,
        "_ng": ng,
        "_nclip": nclip,
        "_nmax": nmax,
        "_nmin": nmin,
        "_nmaxa": nmax_axis,
        "_nmina": nmin_axis,
        "_m": m,
    }


def _mp_ufunc(fn: Callable, nin: int = 1) -> Callable:
    return np.frompyfunc(fn, nin, 1)


def _mp_clip(a, lo, hi):
    return _mp_ufunc(lambda v: lo if v < lo else hi if v > hi else v)(a)


MP_NUMPY = types.SimpleNamespace(
    sin=_mp_ufunc(mpmath.sin),
    cos=_mp_ufunc(mpmath.cos),
    tan=_mp_ufunc(mpmath.tan),
    tanh=_mp_ufunc(mpmath.tanh),
    sinh=_mp_ufunc(mpmath.sinh),
    cosh=_mp_ufunc(mpmath.cosh),
    arctan=_mp_ufunc(mpmath.atan),
    arcsin=_mp_ufunc(mpmath.asin),
    arccos=_mp_ufunc(mpmath.acos),
    arcsinh=_mp_ufunc(mpmath.asinh),
    arccosh=_mp_ufunc(mpmath.acosh),
    arctanh=_mp_ufunc(mpmath.atanh),
    exp=_mp_ufunc(mpmath.exp),
    expm1=_mp_ufunc(mpmath.expm1),
    exp2=_mp_ufunc(lambda v: mpmath.power(2, v)),
    log=_mp_ufunc(mpmath.log),
    log1p=_mp_ufunc(mpmath.log1p),
    log2=_mp_ufunc(lambda v: mpmath.log(v, 2)),
    log10=_mp_ufunc(mpmath.log10),
    sqrt=_mp_ufunc(mpmath.sqrt),
    cbrt=_mp_ufunc(lambda v: mpmath.sign(v) * mpmath.cbrt(abs(v))),
    square=lambda v: v * v,
    abs=_mp_ufunc(abs),
    fabs=_mp_ufunc(abs),
    clip=_mp_clip,
    maximum=_mp_ufunc(lambda a, b: b if b > a else a, 2),
    minimum=_mp_ufunc(lambda a, b: b if b < a else a, 2),
    arctan2=_mp_ufunc(mpmath.atan2, 2),
    hypot=_mp_ufunc(lambda a, b: mpmath.sqrt(a * a + b * b), 2),
    power=_mp_ufunc(mpmath.power, 2),
    where=lambda c, a, b: np.where(np.asarray(c, dtype=bool), a, b),
    sum=np.sum,
    mean=np.mean,
    prod=np.prod,
    max=np.max,
    min=np.min,
    dot=np.dot,
    # constructors the programs copy as written: exact in floats already
    ones_like=lambda a: np.ones(np.shape(a)),
    full=np.full,
    zeros=np.zeros,
    arange=np.arange,
)


def _np_args(params: dict[str, str], rnd: random.Random, shrinkage: float) -> list:
    args: list = []
    for kind in params.values():
        shape = () if kind == "float" else tuple(map(int, kind[6:].split("x")))
        size = int(np.prod(shape)) if shape else 1
        coords = [
            rnd.choice((1.0, -1.0)) * rnd.uniform(0.25, 0.25 + 1.25 * shrinkage)
            for _ in range(size)
        ]
        args.append(coords[0] if not shape else np.array(coords).reshape(shape))
    return args


def clear_switches_numpy(program: Program, args: list) -> tuple[bool, set]:
    rec = _Recorder()
    ns = _np_namespace(rec)
    switches: list = []
    try:
        with np.errstate(all="raise"):
            exec(compile(program.source("inst", switches), "<inst>", "exec"), ns)
            result = ns[program.target.name](*args)
    except (ArithmeticError, ValueError, FloatingPointError):
        return False, set()
    rec.mags.append(abs(float(result)))
    close = {switches[i] for i, gap in rec.gaps if gap < MARGIN}
    big = not all(math.isfinite(m) and m <= MAGNITUDE for m in rec.mags)
    return not close and not big, close


def evaluate_numpy(case: Case, args: list) -> Outcome:
    """As :func:`evaluate`, for a NumPy program: the reference runs the same text
    on object arrays of mpmath numbers (MP_NUMPY), 60 digits."""
    program, params = case.program, list(case.params)
    source = program.source()
    chosen = case.wrt if case.wrt is not None else params
    primal = _run_py(source)["f"](*args)
    ns = _generate(case, "f", lambda: not any(_numpy_references(case, args)[1]))
    if isinstance(ns, Outcome):
        return ns
    try:
        value, grads = ns["f_grad"](*args)
        copied = ns["f"](*args)
    except Exception as error:  # noqa: BLE001
        return _fail(f"run {type(error).__name__}", f"{type(error).__name__}: {error}")
    if type(value) is not type(primal) or not same_bits(float(value), float(primal)):
        return _fail("value differs from primal", f"value {value!r}, primal {primal!r}")
    if not same_bits(float(copied), float(primal)):
        return _fail("copied primal differs", f"{copied!r} vs {primal!r}")
    slots, refs = _numpy_references(case, args)
    flat: list = []
    for name, g in zip(chosen, grads, strict=True):
        want = np.shape(args[params.index(name)])
        if want and (not isinstance(g, np.ndarray) or g.shape != want):
            return _fail("entry shape", f"{name}_bar = {g!r}, shape {want}")
        if not want and not isinstance(g, float):
            return _fail("entry not a float", f"{name}_bar = {g!r}")
        flat += list(np.ravel(g)) if want else [g]
    # the inputs' sizes too: terms of their size that cancel (sum(a - a), a
    # value and a gradient exactly 0) leave rounding of that size, not of 0
    sizes = [abs(mpmath.mpf(float(x))) for a in args for x in np.ravel(a)]
    scale = max([abs(mpmath.mpf(float(value)))] + [abs(r) for r in refs] + sizes)
    return compare(flat, refs, scale, "")


def _numpy_references(case: Case, args: list) -> tuple[list, list]:
    """(slots, mpmath central differences) of a NumPy program in every wrt
    coordinate; a slot is (parameter index, flat index or None)."""
    params = list(case.params)
    chosen = case.wrt if case.wrt is not None else params
    f_mp = mp_numpy_model(case.program.source("mp"))
    slots = []
    for name in chosen:
        p = params.index(name)
        shape = np.shape(args[p])
        slots += [(p, k) for k in range(int(np.prod(shape)))] if shape else [(p, None)]

    def flat_model(*coords):
        call = [
            (
                np.array([mpmath.mpf(v) for v in np.ravel(a)], dtype=object).reshape(
                    np.shape(a)
                )
                if np.shape(a)
                else mpmath.mpf(a)
            )
            for a in args
        ]
        for (p, k), c in zip(slots, coords, strict=True):
            if k is None:
                call[p] = c
            else:
                call[p].reshape(-1)[k] = c
        return f_mp(*call)

    point = [args[p] if k is None else float(np.ravel(args[p])[k]) for p, k in slots]
    with mpmath.workdps(60):
        refs = [reference_partial(flat_model, point, j) for j in range(len(point))]
    return slots, refs


def mp_numpy_model(source: str) -> Callable:
    ns: dict = {"__builtins__": builtins, "np": MP_NUMPY}
    exec(compile(source, "<numpy model in mpmath>", "exec"), ns)
    return ns["f"]
