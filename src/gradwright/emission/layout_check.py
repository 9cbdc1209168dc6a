"""The layout check: every name the printed sweeps read holds the value it stands for.

The layout lets values share output names (a re-bound variable keeps its name, a
carried adjoint is updated in place, loops restore saved values into the names the
forward sweep used). Those decisions are where wrong gradients come from, so after
printing, the emitter's record of what each printed statement reads and writes is
checked here, on every path: both sides of each branch, loops of zero and of many
trips, every iteration of a reverse loop.

The check is a must-analysis over facts "name N holds value K" (K: a forward value,
the adjoint of one, the partials of a helper call, a saved list). A write replaces
the facts of its name; a copy the printer left out because both names agree adds a
fact; branches keep the facts true on both sides; a loop head keeps those true on
entry and at the end of every iteration (a greatest fixed point). After a loop, the
values of its iterations are forgotten, so a reverse loop must restore or recompute
each one it reads. A read of a name that does not hold the value on some path is a
violation, and no module is written.
"""

from __future__ import annotations

from collections import ChainMap
from collections.abc import Iterable, Iterator, MutableMapping
from contextlib import contextmanager
from dataclasses import dataclass, field
from functools import lru_cache

from gradwright.ir import Var

#: ("value", var) | ("bar", var) | ("partials", var) | ("list", scope, name)
Key = tuple


@dataclass
class _Loop:
    body: list
    #: values that belong to one iteration (forgotten when the loop ends)
    local: frozenset[Var]
    #: (start-of-iteration value, value after the loop) pairs of a forward loop
    exits: tuple[tuple[Var, Var], ...] = ()
    #: the branches inside the body (their sides differ from one iteration to the next)
    branches: frozenset = frozenset()
    #: a while loop's test, run at the head of every iteration and at the exit
    test: list = field(default_factory=list)
    #: whether an iteration may also leave the loop at its end (a break)
    breaks: bool = False
    #: the saved lists that grow by one slot per iteration (a while loop's)
    grown: frozenset = frozenset()


@dataclass
class _If:
    then: list
    orelse: list
    #: the forward branch; its reverse takes the same side (same condition)
    branch: object


@dataclass(frozen=True)
class Violation:
    name: str
    expected: Key
    found: frozenset
    where: str

    def describe(self) -> str:
        found = ", ".join(sorted(_show(k) for k in self.found)) or "nothing"
        return (
            f"`{self.name}` should hold {_show(self.expected)} but may hold {found}"
            f" ({self.where})"
        )


def _show(key: Key) -> str:
    kind = key[0]
    if kind == "list":
        return f"the saved list {key[2]}"
    var = key[1]
    label = f"{var.base}#{var.uid}"
    return {"value": label, "bar": f"adjoint of {label}"}.get(
        kind, f"{kind} of {label}"
    )


@dataclass
class Trace:
    """What the printed statements read and write, in execution order."""

    events: list = field(default_factory=list)
    where: str = ""
    _stack: list[list] = field(default_factory=list)

    def _add(self, event: object) -> None:
        (self._stack[-1] if self._stack else self.events).append(event)

    def at(self, where: str) -> None:
        self.where = where

    def read(self, name: str, key: Key) -> None:
        self._add(("read", name, key, self.where))

    def write(self, name: str, key: Key) -> None:
        self._add(("write", name, key, self.where))

    def alias(self, name: str, source: Key, target: Key) -> None:
        """A copy ``target = source`` left out because both print as ``name``."""
        self.read(name, source)
        self._add(("alias", name, target, source))

    def grow(self, saved: str, key: Key) -> None:
        """``saved.append(...)``: the list gains this iteration's slot."""
        self._add(("grow", saved, key, self.where))

    def fill(self, saved: str, var: Var) -> None:
        """``saved[slot] = ...``: the saved list holds ``var`` of each iteration."""
        self._add(("fill", saved, ("filled", var), self.where))

    def restore(self, name: str, saved: str, var: Var, key: Key) -> None:
        """``name = saved[slot]``: the value saved for this iteration (the name
        holds it where the slot was filled; an unfilled slot gives it nothing)."""
        self._add(("restore", name, key, (saved, ("filled", var))))

    @contextmanager
    def capture(self) -> Iterator[list]:
        """Collect the events of a nested block instead of adding them."""
        block: list = []
        self._stack.append(block)
        try:
            yield block
        finally:
            self._stack.pop()

    def branch(self, branch: object, then: list, orelse: list) -> None:
        self._add(_If(then, orelse, branch))

    def loop(
        self,
        body: list,
        local: Iterable[Var],
        exits: tuple[tuple[Var, Var], ...] = (),
        test: list | None = None,
        breaks: bool = False,
        grown: Iterable[str] = (),
    ) -> None:
        test = test or []
        branches = frozenset(_branches(test + body))
        grown = frozenset(grown)
        self._add(_Loop(body, frozenset(local), exits, branches, test, breaks, grown))

    def extend(self, events: list) -> None:
        for event in events:
            self._add(event)

    @property
    def block(self) -> list:
        """The event list of the block being recorded now."""
        return self._stack[-1] if self._stack else self.events


def mentions(events: list, name: str) -> bool:
    """Whether any event, nested blocks included, reads or writes ``name``."""
    for event in events:
        if isinstance(event, _If):
            if mentions(event.then, name) or mentions(event.orelse, name):
                return True
        elif isinstance(event, _Loop):
            if mentions(event.test, name) or mentions(event.body, name):
                return True
        elif event[1] == name or (event[0] == "restore" and event[3][0] == name):
            return True
    return False


def _branches(events: list) -> Iterator[object]:
    for event in events:
        if isinstance(event, _If):
            yield event.branch
            yield from _branches(event.then)
            yield from _branches(event.orelse)
        elif isinstance(event, _Loop):
            yield from event.branches


#: name -> facts (key, guard): the name holds key on paths where every
#: (branch, side) of the guard was taken
State = MutableMapping[str, frozenset]


#: "whatever the name held when the loop iteration began" (summaries only)
_SAME = ("same", None)


def _meet(a: State, b: State) -> State:
    """Facts true at a join of two paths (a fact on both, under both guards)."""
    out: State = {}
    for name, facts in a.items():
        other = b.get(name)
        if not other:
            continue
        common = set()
        for key, guard in facts:
            for other_key, other_guard in other:
                both = guard | other_guard
                if _on_no_path(both):
                    continue  # one branch's two sides: a branch takes one
                if key == other_key or other_key == _SAME:
                    common.add((key, both))
                elif key == _SAME:
                    common.add((other_key, both))
                elif _kept(other_key) == key or _kept(key) == other_key:
                    common.add((key if _kept(other_key) == key else other_key, both))
        if common:
            out[name] = _resolve(frozenset(common))
    return out


#: consensus steps one ``_resolve`` may take: a safety net, since the prime facts
#: of a name can be exponentially many in principle (branch joins resolve at
#: once, which keeps real and random programs to a few hundred steps); beyond
#: it, ``_absorbed``: facts are lost, so the check may refuse the shared layout
#: and fall back to names of their own. Each step scans the facts found so far:
#: at 200,000 a random program of eleven branches took 8 s to generate, 1.8 s
#: at 50,000, with the same output; a value held on all paths but one through
#: nine branches needs between 20,000 and 30,000
_CONSENSUS_BUDGET = 50_000


@lru_cache(maxsize=1 << 14)  # the same fact sets recur for many names and rounds
def _resolve(facts: frozenset) -> frozenset:
    """The prime facts of ``facts``: every fact that follows by consensus, none
    implied by another, so a set has one form whatever order it was built in.

    Consensus on a branch: (k, g1 + {(b, 0)}) and (k, g2 + {(b, 1)}) give
    (k, g1 | g2), whichever side was taken. Unchanged on one side (``_SAME``) and
    k on the other give ("kept", k): k wherever it held k. A fact is implied by
    one of the same or a stronger key under fewer conditions (k or ``_SAME``
    imply ("kept", k)). Keeping only the weakest guards without consensus lost
    facts (a guard absorbed before it met its complement); with consensus the
    result is complete, and small where the guards overlap (a fact true on all
    but one of 2^9 paths is 9 facts, not 511)."""
    if not any(guard for _, guard in facts):
        return facts  # nothing to resolve (most names, most of the time)
    found: set = set()
    #: (branch, side) -> the facts whose guard holds it
    index: dict[tuple, set] = {}

    def add(fact: tuple) -> bool:
        key, guard = fact
        if any(g <= guard and _implies(k, key) for k, g in found):
            return False
        for other in [f for f in found if guard <= f[1] and _implies(key, f[0])]:
            found.discard(other)
            for literal in other[1]:
                index[literal].discard(other)
        found.add(fact)
        for literal in guard:
            index.setdefault(literal, set()).add(fact)
        return True

    pending = sorted(
        (f for f in facts if not _on_no_path(f[1])), key=lambda f: len(f[1])
    )
    for fact in pending:
        add(fact)
    queue = [f for f in pending if f in found]
    budget = _CONSENSUS_BUDGET
    while queue:
        if budget < 0:
            return _absorbed(pending)
        fact = queue.pop()
        if fact not in found:
            continue  # absorbed since
        key, guard = fact
        for branch, side in guard:
            for other in list(index.get((branch, 1 - side), ())):
                if other not in found or fact not in found:
                    continue
                combined = _combined(key, other[0])
                if combined is None:
                    continue
                both = (guard - {(branch, side)}) | (other[1] - {(branch, 1 - side)})
                if _on_no_path(both):
                    continue
                new = (combined, frozenset(both))
                budget -= 1
                if add(new):
                    queue.append(new)
    return frozenset(found)


def _absorbed(facts: list) -> frozenset:
    """The facts no other one implies: what ``_resolve`` gives when consensus
    would take too long. Every fact holds, so a read they miss is reported,
    never a wrong one let through; and the set is the same whatever order the
    facts came in (the output stays the same from run to run)."""
    return frozenset(
        fact
        for fact in facts
        if not any(
            other != fact and other[1] <= fact[1] and _implies(other[0], fact[0])
            for other in facts
        )
    )


def _on_no_path(guard: frozenset) -> bool:
    """Whether ``guard`` holds both sides of one branch (a branch outside a loop
    takes the same side at its entry and after each iteration)."""
    return any((branch, 1 - side) in guard for branch, side in guard)


def _implies(stronger: Key, weaker: Key) -> bool:
    """Whether holding ``stronger`` means holding ``weaker`` too."""
    if stronger == weaker:
        return True
    held = _kept(weaker)
    return held is not None and stronger in (held, _SAME)


def _combined(a: Key, b: Key) -> Key | None:
    """What a name holds whichever side was taken: ``a`` on one, ``b`` on the
    other (None: nothing known)."""
    if a == b:
        return a
    if b == _SAME or (_kept(b) is not None and _kept(a) is None and a != _SAME):
        a, b = b, a
    # now a is _SAME or ("kept", k), b the other
    if a == _SAME:
        value = _kept(b) or b
        return ("kept", value) if value != _SAME else None
    held = _kept(a)
    if held is not None and (b == held or _kept(b) == held):
        return a
    return None


def _kept(key: Key) -> Key | None:
    """``k`` for the fact "the name still holds k if it held k when the loop
    iteration began" (a name written on one side of a branch only)."""
    return key[1] if key[0] == "kept" else None


def _join_branch(
    branch: object,
    then: State,
    orelse: State,
    names: frozenset[str] | None = None,
    into: State | None = None,
) -> State:
    """After a branch: a fact of one side only holds where that side was taken.
    ``names``: the only names either side can have changed (None: any); ``into``:
    where the joined names go (by default a copy of ``then``, whose other names
    hold what they held before on both sides)."""
    if names is None:
        out: State = {}
        names = frozenset(then.keys() | orelse.keys())
    else:
        out = dict(then) if into is None else into
    for name in names:
        a, b = then.get(name, frozenset()), orelse.get(name, frozenset())
        if a is b:  # untouched by the branch: both sides hold the state's set
            out[name] = a
            continue
        facts = set(a & b)
        facts |= {(k, g | {(branch, 0)}) for k, g in a - b}
        facts |= {(k, g | {(branch, 1)}) for k, g in b - a}
        # resolved at once: a value kept on both sides under other guards is one
        # fact again, before the next branch doubles them (2^n paths otherwise)
        out[name] = _resolve(frozenset(facts))
    return out


def _layer_on(side: State, state: State) -> bool:
    """Whether ``side`` is still the layer its branch side started on ``state``
    (every name it changed is in its own first map)."""
    return isinstance(side, ChainMap) and len(side.maps) == 2 and side.maps[1] is state


def _join_layers(
    branch: object, state: State, then: ChainMap, orelse: ChainMap
) -> State:
    """``_join_branch`` of two layers on ``state``, written into it: only the names
    either side changed are looked at."""
    changed = then.maps[0].keys() | orelse.maps[0].keys()
    joined = _join_branch(branch, then, orelse, frozenset(changed), into={})
    state.update(joined)
    return state


def _forget(state: State, local: frozenset[Var], branches: frozenset) -> State:
    out: State = {}
    for name, facts in state.items():
        facts = _resolve(facts)
        kept = frozenset(
            (k, g)
            for k, g in facts
            if k[0] == "filled"  # a slot per iteration: true of every iteration
            or (k[1] not in local and not any(b in branches for b, _ in g))
        )
        if kept:
            out[name] = kept
    return out


def check(trace: Trace) -> list[Violation]:
    """Every read in ``trace`` that does not see its value on some path."""
    checker = _Checker()
    checker.run(trace.events, {}, frozenset(), True)
    return list(checker.found.values())


class _Checker:
    def __init__(self) -> None:
        self.found: dict[tuple, Violation] = {}
        #: per loop: the facts its body establishes whatever it starts from
        self.summaries: dict[int, State] = {}
        #: per branch: the names its sides write (None when a loop is inside)
        self.writes: dict[int, frozenset[str] | None] = {}

    def _written(self, event: _If) -> frozenset[str] | None:
        """The names either side of a branch changes; None when a side holds a
        loop (leaving a loop forgets facts of any name)."""
        if id(event) not in self.writes:
            names: set[str] = set()
            pending = [*event.then, *event.orelse]
            while pending:
                inner = pending.pop()
                if isinstance(inner, _Loop):
                    self.writes[id(event)] = None
                    return None
                if isinstance(inner, _If):
                    pending += [*inner.then, *inner.orelse]
                elif inner[0] not in ("read", "grow"):
                    names.add(inner[1])
            self.writes[id(event)] = frozenset(names)
        return self.writes[id(event)]

    def run(self, events: list, state: State, taken: frozenset, report: bool) -> State:
        """The state after ``events``; ``taken``: the branch sides this path took.

        Without ``report`` (working out a loop's head) inner loops are summarised
        (see ``summary``), which keeps the analysis linear in the nesting depth.
        """
        for event in events:
            if isinstance(event, _If):
                # each side over a layer of its own on the state, not a copy of
                # it: copying every name at each branch made the check quadratic
                sides = [
                    self.run(
                        block,
                        ChainMap({}, state),
                        taken | {(event.branch, side)},
                        report,
                    )
                    for side, block in ((0, event.then), (1, event.orelse))
                ]
                if all(_layer_on(side, state) for side in sides):
                    state = _join_layers(event.branch, state, *sides)
                else:  # a loop inside made a state of its own
                    state = _join_branch(event.branch, *sides, self._written(event))
            elif isinstance(event, _Loop):
                if report:
                    state = self.loop(event, state, taken)
                else:
                    state = self.summary(event, state)
            else:
                kind, name, key, where = event
                held = state.get(name, frozenset())
                if kind in ("read", "grow"):
                    if report and not any(k == key and g <= taken for k, g in held):
                        self.found.setdefault(
                            (name, key),
                            Violation(name, key, frozenset(k for k, _ in held), where),
                        )
                elif kind == "write":
                    state[name] = frozenset({(key, frozenset())})
                elif kind == "fill":
                    state[name] = held | {(key, frozenset())}
                elif kind == "restore":
                    saved, filled = event[3]
                    state[name] = frozenset(
                        (key, g) for k, g in state.get(saved, ()) if k == filled
                    )
                else:  # alias: the name holds the copied value too, where it held it
                    assert kind == "alias"
                    source = event[3]
                    guards = {g for k, g in held if k == source} or {frozenset()}
                    state[name] = held | {(key, g) for g in guards}
        return state

    def growth(self, loop: _Loop) -> None:
        """A list that grows by one slot per iteration must be appended to once
        on every path through the iteration: at the body's top level, never under
        a branch or in an inner loop (its slots would stop matching the
        iterations the reverse sweep restores)."""
        counts = {name: 0 for name in loop.grown}
        places = {name: "the loop" for name in loop.grown}
        for name, nested, where in _grows(loop.test + loop.body):
            if name in counts:
                counts[name] += 2 if nested else 1  # nested: on some paths only
                places[name] = where
        for name, count in sorted(counts.items()):
            if count != 1:
                key = ("list", None, name)
                where = f"{places[name]}: not one append per iteration"
                self.found.setdefault(
                    (name, "grows"), Violation(name, key, frozenset(), where)
                )

    def summary(self, loop: _Loop, entry: State) -> State:
        """The state after ``loop`` without analysing it again: a name it writes
        holds what it held before (no trip) and what every iteration leaves in it,
        worked out once for any start (``_SAME``: what the name held before)."""
        written = set(_written(loop.test + loop.body))
        ends = self.summaries.get(id(loop))
        if ends is None:
            start = {name: frozenset({(_SAME, frozenset())}) for name in written}
            ends = self.run(loop.test + loop.body, dict(start), frozenset(), False)
            if loop.test:  # it may also end after its test
                ends = _meet(ends, self.run(loop.test, start, frozenset(), False))
            self.summaries[id(loop)] = ends
        state = {n: f for n, f in entry.items() if n not in written}
        state |= _meet({n: f for n, f in entry.items() if n in written}, ends)
        return _forget(_with_fills(state, ends), loop.local, loop.branches)

    def loop(self, loop: _Loop, entry: State, taken: frozenset) -> State:
        self.growth(loop)
        head = dict(entry)
        iteration = loop.test + loop.body
        for _ in range(64):  # facts only shrink: this settles in a few rounds
            after = self.run(iteration, dict(head), taken, False)
            after = _forget(after, frozenset(), loop.branches)
            new_head = _meet(entry, after)
            if new_head == head:
                break
            head = new_head
        else:
            head = {}  # assume nothing (never seen; safe)
        # the loop ends at its head (after a while loop's test) or, with a break,
        # at the end of an iteration
        at_test = self.run(loop.test, dict(head), taken, True)
        end = self.run(loop.body, dict(at_test), taken, True)
        state = dict(at_test)
        if loop.breaks:
            state = _meet(state, _forget(dict(end), frozenset(), loop.branches))
        state = _with_fills(state, end)
        for target, exit_value in loop.exits:
            for name, facts in list(state.items()):
                extra = {
                    (("value", exit_value), g)
                    for k, g in facts
                    if k == ("value", target)
                }
                state[name] = facts | extra
        return _forget(state, loop.local, loop.branches)


def _grows(events: list, nested: bool = False) -> Iterator[tuple[str, bool, str]]:
    """(list, whether under a branch or an inner loop, where) for each append."""
    for event in events:
        if isinstance(event, _If):
            yield from _grows(event.then, True)
            yield from _grows(event.orelse, True)
        elif isinstance(event, _Loop):
            yield from _grows(event.test + event.body, True)
        elif event[0] == "grow":
            yield event[1], nested, event[3]


def _written(events: list) -> Iterator[str]:
    for event in events:
        if isinstance(event, _If):
            yield from _written(event.then)
            yield from _written(event.orelse)
        elif isinstance(event, _Loop):
            yield from _written(event.body)
        elif event[0] not in ("read", "fill"):
            yield event[1]


def _with_fills(state: State, end: State) -> State:
    """``state`` with the saved-list slots a loop body fills (in every iteration)."""
    for name, facts in end.items():
        fills = {(k, g) for k, g in facts if k[0] == "filled"}
        if fills and name in state:
            state[name] = state[name] | fills
    return state
