"""Branching on a kink's condition instead of selecting zero.

A rule for a kink (``max``, ``min``, ``hypot`` at the origin, a power's exponent at
0) selects each contribution with a conditional expression, and usually one side is
0.0: ``values_6_bar = values_bar_1 if values_6 > hold else 0.0``. Everything the
reverse sweep then does with that adjoint is zero on that side, but it is still
evaluated (a binomial tree's exercise side computes two powers at every node where
holding wins). This pass opens one ``if`` on the condition where the first such
select is, and moves into its sides the statements after it that read a selected
adjoint or select on the same condition (or its complement), each specialised to
its side: a contribution that is 0.0 there is dropped, an adjoint that is 0.0 there
is folded into its readers. Statements move only past simple statements they
commute with; a loop, branch or call ends the region.

Exact: each side computes what the unbranched statements computed on that side,
minus additions of zero. ``max(a, b)``'s two selects (``a >= b`` and ``b > a``)
are read as complements, so the ``if`` tests the strict one and its ``else`` is the
other: where a NaN makes both false, the adjoint now goes where the primal's own
choice went (``max`` returns ``a`` unless ``b > a``). Scalar models only: an array
model's selects are elementwise.
"""

from __future__ import annotations

import itertools
from collections import Counter
from collections.abc import Iterable, Iterator
from dataclasses import dataclass, field, replace

from gradwright.calculus.algebra import is_zero, simplify
from gradwright.ir import (
    AdjointAssign,
    Apply,
    Bar,
    CallAdjoint,
    Const,
    ElementAdjoint,
    Expr,
    Origin,
    PopAdjoint,
    ReverseBranch,
    ReverseLoop,
    ReverseStmt,
    ReverseSweep,
    Var,
    walk,
)
from gradwright.sweeps.optimize import all_statements, statement_exprs, substitute

Simple = AdjointAssign | ElementAdjoint

_FLIPPED = {"lt": "gt", "gt": "lt", "le": "ge", "ge": "le"}


def branch_selects(sweep: ReverseSweep) -> ReverseSweep:
    """The sweep with each kink's zero side branched around (module docstring)."""
    keep = set(sweep.wrt) | set(sweep.seeds)
    keep |= {v for pair in sweep.carries for v in pair}
    keep |= {
        s.var
        for s in all_statements(sweep.statements)
        if isinstance(s, PopAdjoint) and s.var is not None
    }
    refs: Counter[Var] = Counter()
    for stmt in all_statements(sweep.statements):
        for var in _touched(stmt):
            refs[var] += 1
    brancher = _Brancher(keep, refs, dict(sweep.roots))
    return replace(sweep, statements=brancher.block(sweep.statements))


def _touched(stmt: ReverseStmt) -> set[Var]:
    """The adjoints a statement (not its nested blocks) reads or writes."""
    found = {
        n.var for e in statement_exprs(stmt) for n in walk(e) if isinstance(n, Bar)
    }
    if isinstance(stmt, AdjointAssign):
        found.add(stmt.var)
    elif isinstance(stmt, CallAdjoint):
        found |= set(stmt.parts)
    elif isinstance(stmt, PopAdjoint) and stmt.var is not None:
        found.add(stmt.var)
    return found


def _exprs(stmt: ReverseStmt) -> tuple[Expr, ...]:
    if isinstance(stmt, AdjointAssign):
        return (stmt.expr,)
    if isinstance(stmt, ElementAdjoint):
        return (stmt.index, stmt.expr)
    return ()


@dataclass
class _Effects:
    """What a simple statement reads (``reads``), adds into (``adds``) and sets."""

    reads: set[Var] = field(default_factory=set)
    adds: set[Var] = field(default_factory=set)
    sets: set[Var] = field(default_factory=set)

    @staticmethod
    def of(stmt: Simple, roots: dict[Var, Var]) -> _Effects:
        # a list adjoint by its root: every version's adjoint lives there
        effects = _Effects()
        effects.reads = {
            roots.get(n.var, n.var)
            for e in _exprs(stmt)
            for n in walk(e)
            if isinstance(n, Bar)
        }
        target = stmt.var if isinstance(stmt, AdjointAssign) else stmt.root
        (effects.adds if stmt.accumulate else effects.sets).add(
            roots.get(target, target)
        )
        return effects

    def commutes(self, other: _Effects) -> bool:
        # two additions into one adjoint (or two list elements) commute; no
        # unions built (``other`` may be the union of a long block's effects)
        return (
            self.sets.isdisjoint(other.reads)
            and self.sets.isdisjoint(other.adds)
            and self.sets.isdisjoint(other.sets)
            and self.adds.isdisjoint(other.reads)
            and self.adds.isdisjoint(other.sets)
            and self.reads.isdisjoint(other.adds)
            and self.reads.isdisjoint(other.sets)
        )


def _selects_on(expr: Expr) -> Iterator[Expr]:
    for node in walk(expr):
        if isinstance(node, Apply) and node.op == "ifexp":
            yield node.args[1]


def _complement(condition: Expr) -> Expr | None:
    """The condition true exactly where ``condition`` is false (NaN aside)."""
    if not isinstance(condition, Apply) or len(condition.args) != 2:
        return None
    a, b = condition.args
    if condition.op in ("eq", "ne"):
        return Apply("ne" if condition.op == "eq" else "eq", (a, b))
    if condition.op in _FLIPPED:
        # not (a >= b) is a < b, written either way round
        strict = {"ge": "lt", "gt": "le", "le": "gt", "lt": "ge"}[condition.op]
        return Apply(strict, (a, b))
    return None


def _same(first: Expr, second: Expr) -> bool:
    """``a < b`` and ``b > a`` are one condition."""
    if first == second:
        return True
    if (
        isinstance(first, Apply)
        and isinstance(second, Apply)
        and first.op in _FLIPPED
        and second.op == _FLIPPED[first.op]
    ):
        return first.args == second.args[::-1]
    return False


def _side_of(condition: Expr, test: Expr) -> bool | None:
    """True where ``condition`` holds whenever ``test`` does, False where it holds
    whenever ``test`` fails, None if unrelated."""
    if _same(condition, test):
        return True
    other = _complement(test)
    if other is not None and _same(condition, other):
        return False
    return None


def _resolve(expr: Expr, test: Expr, side: bool) -> Expr:
    """``expr`` on the side of ``test`` where it is ``side``."""
    if not isinstance(expr, Apply):
        return expr
    args = tuple(_resolve(a, test, side) for a in expr.args)
    if expr.op == "ifexp":
        holds = _side_of(args[1], test)
        if holds is not None:
            return args[0] if holds == side else args[2]
    return Apply(expr.op, args)


def _zero() -> Const:
    return Const("0.0", 0.0)


#: statements a kink's region looks past without taking one before it ends: the
#: statements reading its selected adjoints follow it closely, and a region that
#: scanned the rest of the block for each kink made a long model quadratic
_REACH = 64


class _Brancher:
    def __init__(
        self, keep: set[Var], refs: Counter[Var], roots: dict[Var, Var]
    ) -> None:
        self.keep = keep
        self.refs = refs
        self.roots = roots
        #: per statement (by id; the sweep holds them): its effects and the
        #: conditions of its selects, worked out once for all the kinks it follows
        self._facts: dict[int, tuple[_Effects, list[Expr]]] = {}

    def block(self, statements: tuple[ReverseStmt, ...]) -> tuple[ReverseStmt, ...]:
        statements = tuple(self._nested(s) for s in statements)
        out: list[ReverseStmt] = []
        # statements a region took, by id: skipped where they stood (removing
        # them from the list made each kink cost the length of the block)
        gone: set[int] = set()
        for position, stmt in enumerate(statements):
            if id(stmt) in gone:
                continue
            test = self._opener(stmt)
            if test is None:
                out.append(stmt)
                continue
            after = itertools.islice(statements, position, None)
            region = self._region(test, (s for s in after if id(s) not in gone))
            if region is None:
                out.append(stmt)
                continue
            emitted, taken = region
            out.extend(emitted)
            gone.update(id(t) for t in taken)
        return tuple(out)

    def _nested(self, stmt: ReverseStmt) -> ReverseStmt:
        if isinstance(stmt, ReverseBranch):
            return replace(
                stmt, then=self.block(stmt.then), orelse=self.block(stmt.orelse)
            )
        if isinstance(stmt, ReverseLoop):
            return replace(stmt, body=self.block(stmt.body))
        return stmt

    @staticmethod
    def _opener(stmt: ReverseStmt) -> Expr | None:
        if not isinstance(stmt, (AdjointAssign, ElementAdjoint)):
            return None
        if isinstance(stmt, AdjointAssign) and stmt.var.shape != "scalar":
            return None
        for test in _selects_on(stmt.expr):
            if not any(isinstance(n, Bar) for n in walk(test)):
                return test
        return None

    def _region(
        self, test: Expr, candidates: Iterable[ReverseStmt]
    ) -> tuple[tuple[ReverseStmt, ...], list[ReverseStmt]] | None:
        """What replaces the statements it takes (the branch on ``test``; no
        branch if the sides agree), or None when it would save nothing."""
        taken: list[Simple] = []
        # what the statements left in place do, together: commuting with each
        # is commuting with their union (the test is on set intersections), and
        # one check per statement keeps a long block linear per kink
        skipped = _Effects()
        zero: tuple[set[Var], set[Var]] = (set(), set())
        selects = 0
        idle = 0
        for stmt in candidates:
            if not isinstance(stmt, (AdjointAssign, ElementAdjoint)) or (
                isinstance(stmt, AdjointAssign) and stmt.var.shape != "scalar"
            ):
                break  # a loop, branch, call or whole list: nothing moves past it
            if idle == _REACH:
                break  # a long run takes nothing: the region ends (linear time)
            effects, conditions = self._statement_facts(stmt)
            selecting = any(_side_of(c, test) is not None for c in conditions)
            reads_zero = bool(effects.reads & (zero[0] | zero[1]))
            if (selecting or reads_zero) and effects.commutes(skipped):
                idle = 0
                taken.append(stmt)
                selects += selecting
                for side in (0, 1):
                    self._track(stmt, test, bool(1 - side), zero[side])
            else:
                idle += 1
                skipped.reads |= effects.reads
                skipped.adds |= effects.adds
                skipped.sets |= effects.sets
        if len(taken) - selects < 1 and selects < 2:
            return None
        private = self._private(taken)
        sides = tuple(
            self._side(taken, test, holds, private) for holds in (True, False)
        )
        condition, then, orelse = test, sides[0], sides[1]
        strict = self._strict(test, taken)
        if strict is not None:
            condition, then, orelse = strict, orelse, then
        if then == orelse:  # all of them add zero, or do the same either way
            return then, list(taken)
        if not then:
            condition, then, orelse = _negated(condition), orelse, then
        origin: Origin = taken[0].origin
        # the sides are not branched again: each statement is copied into two
        # sides at most once, so the sweep at most doubles (a chain of kinks
        # branched inside each other would grow as 2**k)
        return (ReverseBranch(condition, then, orelse, origin),), list(taken)

    def _statement_facts(self, stmt: Simple) -> tuple[_Effects, list[Expr]]:
        known = self._facts.get(id(stmt))
        if known is None:
            conditions = [c for e in _exprs(stmt) for c in _selects_on(e)]
            known = (_Effects.of(stmt, self.roots), conditions)
            self._facts[id(stmt)] = known
        return known

    @staticmethod
    def _track(stmt: Simple, test: Expr, side: bool, zero: set[Var]) -> None:
        """Update the adjoints known to be 0.0 on one side after ``stmt``."""
        if not isinstance(stmt, AdjointAssign):
            return
        resolved = _resolve(stmt.expr, test, side)
        # only the adjoints it reads: the set grows with the block
        read = {n.var for n in walk(resolved) if isinstance(n, Bar)}
        expr = simplify(substitute(resolved, {v: _zero() for v in read & zero}))
        if not stmt.accumulate and is_zero(expr):
            zero.add(stmt.var)
        elif not is_zero(expr):
            zero.discard(stmt.var)

    def _private(self, taken: list[Simple]) -> set[Var]:
        """Adjoints no statement outside the region reads or writes."""
        inside: Counter[Var] = Counter()
        for stmt in taken:
            for var in _touched(stmt):
                inside[var] += 1
        return {
            v
            for v, n in inside.items()
            if n == self.refs[v] and v not in self.keep and v.shape == "scalar"
        }

    @staticmethod
    def _strict(test: Expr, taken: list[Simple]) -> Expr | None:
        """For ``max``'s pair (``a >= b`` and ``b > a``): the strict one."""
        if not isinstance(test, Apply) or test.op not in ("ge", "le"):
            return None
        for stmt in taken:
            for e in _exprs(stmt):
                for c in _selects_on(e):
                    if _side_of(c, test) is False:
                        return c
        return None

    def _side(
        self, taken: list[Simple], test: Expr, holds: bool, private: set[Var]
    ) -> tuple[ReverseStmt, ...]:
        values: dict[Var, Expr] = {}
        out: list[ReverseStmt] = []
        for at, stmt in enumerate(taken):
            expr = simplify(substitute(_resolve(stmt.expr, test, holds), values))
            if isinstance(stmt, ElementAdjoint):
                index = substitute(stmt.index, values)
                if not (stmt.accumulate and is_zero(expr)):
                    out.append(replace(stmt, index=index, expr=expr))
                continue
            var = stmt.var
            if stmt.accumulate:
                if is_zero(expr):
                    continue
                if var in values:
                    # an adjoint folded away so far gets its value here
                    expr = simplify(Apply("add", (values.pop(var), expr)))
                    stmt = replace(stmt, accumulate=False)
                out.append(replace(stmt, expr=expr))
                continue
            values.pop(var, None)
            if var in private and self._foldable(expr, taken[at + 1 :]):
                values[var] = expr
                continue
            if is_zero(expr):
                expr = _zero()  # -0.0 (a zero's negation) reads as noise
                values[var] = expr
            out.append(replace(stmt, expr=expr))
        return tuple(out)

    @staticmethod
    def _foldable(expr: Expr, later: list[Simple]) -> bool:
        """A zero or an atom no later statement changes can replace its name."""
        if is_zero(expr) or isinstance(expr, (Var, Const)):
            return True
        if isinstance(expr, Bar) and expr.var.shape == "scalar":
            return not any(
                isinstance(s, AdjointAssign) and s.var == expr.var for s in later
            )
        return False


def _negated(condition: Expr) -> Expr:
    if isinstance(condition, Apply) and condition.op in ("eq", "ne"):
        return Apply("ne" if condition.op == "eq" else "eq", condition.args)
    return Apply("not", (condition,))
