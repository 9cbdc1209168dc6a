"""The intermediate forms shared by the stages: plain frozen dataclasses.

SSA form: every value is a :class:`Var` defined once by a :class:`Let` that applies
one primitive to atoms (vars or constants). Expression trees (:class:`Apply` over
atoms and :class:`Bar` adjoint references) are what the reverse sweep and the folded
forward sweep are printed from.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass
from typing import Literal

VarKind = Literal["param", "local", "temp", "index"]
Shape = Literal["scalar", "list"]


@dataclass(frozen=True, order=True)
class Var:
    """One SSA value. ``base`` is the source name it belongs to (used for naming).

    ``index`` values are loop counters (integers, never active). A ``list`` value is a
    Python list of floats: its element writes make new SSA versions of it, while the
    generated code updates one list in place.
    """

    uid: int
    base: str
    kind: VarKind
    shape: Shape = "scalar"

    def __hash__(self) -> int:
        # the uid alone: values are hashed millions of times by the layout
        # check, and the generated hash went through the kind enum each time
        return hash(self.uid)


@dataclass(frozen=True)
class Const:
    """A constant operand: a literal (``value`` known) or a named constant.

    ``text`` is how it prints: ``"2.0"``, ``"math.pi"``, ``"GRAVITY"``.
    """

    text: str
    value: float | int | None = None


@dataclass(frozen=True)
class Bar:
    """The adjoint of a value (printed ``x_bar``)."""

    var: Var


@dataclass(frozen=True)
class Apply:
    """A primitive applied to sub-expressions; ``op`` is a key of ``primitives.OPS``."""

    op: str
    args: tuple[Expr, ...]


Atom = Var | Const
Expr = Var | Const | Bar | Apply


@dataclass(frozen=True)
class Origin:
    """The source statement a group of generated statements comes from."""

    text: str
    index: int


@dataclass(frozen=True)
class Copied:
    """A source statement copied into the forward sweep as text, never analysed
    for derivatives or run by the generator (``lowering/inactive.py``).

    Its :class:`Let` (op ``copied``) takes as arguments the values of the function's
    names it reads, ``reads`` naming each; every name it binds gets a value of its
    own, defined by a ``written`` Let that follows it. The emitter renames the
    names in the text to the output's (``emission/copied.py``).
    """

    text: str
    #: the source name of each argument of its Let, in order
    reads: tuple[str, ...]
    #: each name it binds, and the value that holds it afterwards
    writes: tuple[tuple[str, Var], ...]
    #: an ``assert`` or an ``if ...: raise`` guard: the names bound on the path
    #: that raises are its own (not renamed, not values of the function)
    guard: bool = False
    #: written by the generator (``keys = list(D)``): the values it binds are
    #: never changed in place, so the reverse sweep may read them again
    fixed: bool = False
    #: a part of a larger statement (``array = np.array([1.0, 2.0])`` taken out
    #: of a return), printed under that statement's comment
    part: bool = False


@dataclass(frozen=True)
class Let:
    target: Var
    op: str
    args: tuple[Atom, ...]
    origin: Origin
    #: for op ``copied``: the statement copied as text
    copied: Copied | None = None


@dataclass(frozen=True)
class Phi:
    """Where two definitions of one name meet.

    After a branch: ``target`` is ``first`` (then) or ``second`` (else). For a loop:
    ``target`` is the value at the start of each iteration, ``first`` the value
    before the loop, ``second`` the value at the end of the body, and ``exit`` the
    value after the loop.
    """

    target: Var
    first: Atom
    second: Atom
    exit: Var | None = None


@dataclass(frozen=True)
class Branch:
    condition: Atom
    then: tuple[Stmt, ...]
    orelse: tuple[Stmt, ...]
    merges: tuple[Phi, ...]
    origin: Origin

    def __hash__(self) -> int:
        # not the whole body: branches and loops key the layout's dicts, and a
        # structural hash walked every statement inside at each lookup
        return hash((self.condition, self.origin))


@dataclass(frozen=True)
class Loop:
    """``for index in range(start, stop, step)``; bounds are fixed at loop start.

    A loop whose trip count is known only when it ends (a ``while``, a ``break``,
    a ``return`` inside it) records it in ``trips``, the number of iterations run;
    the reverse sweep runs that many. A ``while`` loop's ``test`` is computed by
    the first ``test_size`` statements of ``body`` (run once more at the check
    that ends the loop; its index counts from 0). ``exit_flag`` is true at the end
    of an iteration that leaves the loop (a break). Tests and flags are piecewise
    constant: no adjoint flows through them. The carried values' ``exit`` is the
    value at the head of the next iteration, whichever way the loop ends.
    """

    index: Var
    start: Atom
    stop: Atom
    step: Atom
    carried: tuple[Phi, ...]
    body: tuple[Stmt, ...]
    origin: Origin
    test: Atom | None = None
    test_size: int = 0
    exit_flag: Atom | None = None
    trips: Var | None = None

    def __hash__(self) -> int:
        # the index alone (a loop's own value): see Branch.__hash__
        return hash(("loop", self.index.uid))

    @property
    def bounds(self) -> tuple[Atom, ...]:
        """The range bounds the forward loop reads before it starts."""
        return () if self.test is not None else (self.start, self.stop, self.step)


Stmt = Let | Branch | Loop


@dataclass(frozen=True)
class Return:
    values: tuple[Atom, ...]
    origin: Origin
    #: ``return u, v`` (vector output) rather than ``return u``
    is_tuple: bool = False


@dataclass(frozen=True)
class SSAFunction:
    name: str
    params: tuple[Var, ...]
    body: tuple[Stmt, ...]
    result: Return
    #: every name the source function binds (reserved when naming temporaries)
    local_names: frozenset[str] = frozenset()
    #: module-level constants it reads, in first-read order
    constants: tuple[str, ...] = ()
    #: other functions of the file it calls, in first-call order
    callees: tuple[str, ...] = ()
    #: the tuples helper calls return, with their sizes (known when generating)
    tuple_sizes: tuple[tuple[Var, int], ...] = ()


#: how a caller's reverse sweep treats a helper: "partials" (number parameters and
#: result: the forward call returns the partials, the reverse multiplies) or
#: "adjoint" (any shape: the reverse calls ``NAME_adjoint`` with the result's adjoint)
HelperForm = Literal["partials", "adjoint"]


@dataclass(frozen=True)
class AdjointAssign:
    """``x_bar = expr`` or, when ``accumulate``, ``x_bar += expr``."""

    var: Var
    expr: Expr
    accumulate: bool
    origin: Origin


@dataclass(frozen=True)
class ElementAdjoint:
    """``root_bar[index] += expr`` on a list adjoint (``=`` unless ``accumulate``)."""

    root: Var
    index: Expr
    expr: Expr
    accumulate: bool
    origin: Origin


@dataclass(frozen=True)
class SpreadAdjoint:
    """``root_bar[k] += expr`` for every element (the adjoint of ``sum``); with
    ``each``, ``expr`` is a list of the same length and ``root_bar[k] += expr[k]``."""

    root: Var
    expr: Expr
    origin: Origin
    each: bool = False


@dataclass(frozen=True)
class CallAdjoint:
    """A helper's reverse, vjp form: ``a_1_bar, b_1_bar = NAME_adjoint(a, b, seed)``.

    ``args`` are the call's arguments (forward values), ``seed`` the adjoint of its
    result (a number, or the adjoint list of a list or tuple result); ``parts[k]``
    is a fresh value whose adjoint receives parameter k's (the statements after
    this one add it into the argument's adjoint)."""

    callee: str
    args: tuple[Expr, ...]
    seed: Expr
    parts: tuple[Var, ...]
    origin: Origin


@dataclass(frozen=True)
class PopAdjoint:
    """``var_bar (+)= root_bar.pop()`` (a bare ``root_bar.pop()`` without ``var``):
    the reverse of an append, so a list's adjoint always has the length the list
    had at that point of the forward sweep."""

    root: Var
    var: Var | None
    accumulate: bool
    origin: Origin


@dataclass(frozen=True)
class ReverseBranch:
    condition: Expr
    then: tuple[ReverseStmt, ...]
    orelse: tuple[ReverseStmt, ...]
    origin: Origin
    #: the forward branch it reverses (it takes the same side)
    branch: Branch | None = None


@dataclass(frozen=True)
class ReverseLoop:
    """The forward ``loop`` run backwards: ``for i in reversed(range(...))``."""

    loop: Loop
    body: tuple[ReverseStmt, ...]
    origin: Origin


ReverseStmt = (
    AdjointAssign
    | ElementAdjoint
    | SpreadAdjoint
    | CallAdjoint
    | PopAdjoint
    | ReverseBranch
    | ReverseLoop
)


@dataclass(frozen=True)
class ReverseSweep:
    statements: tuple[ReverseStmt, ...]
    wrt: tuple[Var, ...]
    #: wrt parameters the result does not depend on: their adjoint is a plain zero.
    unused_wrt: tuple[Var, ...]
    #: list values whose adjoint is a list of zeros before the reverse sweep starts
    list_roots: tuple[Var, ...] = ()
    #: which list root each list version's adjoint lives in
    roots: tuple[tuple[Var, Var], ...] = ()
    #: the seed values of a vector output's vjp, one per output
    seeds: tuple[Var, ...] = ()
    #: (carried adjoint, loop value at iteration start) for each loop-carried value
    carries: tuple[tuple[Var, Var], ...] = ()
    #: array adjoints no other name shares: accumulated in place (``+=``)
    in_place: frozenset[Var] = frozenset()
    #: wrt adjoints returned as they are (a new array of the parameter's shape)
    bare: frozenset[Var] = frozenset()
    #: (adjoint, lender): the adjoint's first write is ``lender_bar op= rest``,
    #: an update of the lender's array, which no statement reads again; its
    #: expression is ``lender_bar op rest`` and both have one name
    updates: tuple[tuple[Var, Var], ...] = ()
    #: adjoints whose first write ``a op b`` prints as ``x_bar = a`` then
    #: ``x_bar op= b`` (sweeps/inplace.py)
    split: frozenset[Var] = frozenset()
    #: list roots whose adjoint list a rebound loop-carried list hands over (not
    #: made of zeros where the list is made)
    moved: tuple[Var, ...] = ()
    #: loop-carried lists their loop rebinds: each a list root of its own, whose
    #: adjoint list is made where its loop's block starts its reverse
    rebound: tuple[Var, ...] = ()


def walk(expr: Expr) -> Iterator[Expr]:
    """An expression and all its sub-expressions, outermost first.

    With a stack, not nested generators: each node of a tree n deep passed up
    through n generators, so walking a long sum's adjoint took time quadratic in
    its length (1,200 terms: minutes)."""
    stack = [expr]
    while stack:
        node = stack.pop()
        yield node
        if isinstance(node, Apply):
            stack.extend(reversed(node.args))


def const(value: float | int) -> Const:
    """A literal constant with the text Python's repr gives (exact round trip)."""
    return Const(repr(value), value)
