"""What each loop saves for its reverse (part of ``layout.Layout``).

The reverse body of a loop reads values of the forward iteration it undoes. Each
is either saved, written to a list with one slot per iteration (``x_saved[i] =
x``; a while loop's lists grow by ``append``, an inner loop's lists are saved by
the outer one, ``x_saved_by_i``), or recomputed in the reverse body when it is
one cheap operation away from values the reverse reads anyway (``hold = disc *
hold_3``); a recomputed value no iteration changes is computed once before the
outermost reverse loop it is invariant in (``hoisted``). Another way of keeping
a loop's values (checkpoints, say) is a sibling of this mixin.
"""

from __future__ import annotations

from collections.abc import Iterable, Iterator

from gradwright.calculus.algebra import constant_call
from gradwright.ir import (
    AdjointAssign,
    Apply,
    Atom,
    Branch,
    CallAdjoint,
    ElementAdjoint,
    Expr,
    Let,
    Loop,
    PopAdjoint,
    ReverseBranch,
    ReverseStmt,
    SpreadAdjoint,
    Var,
    walk,
)
from gradwright.sweeps.reverse import defined_in

#: primitives cheap enough to recompute rather than save (not ``**``: a libm call
#: like exp, computed once and saved like any other)
_CHEAP = frozenset(
    {"add", "sub", "mul", "div", "floordiv", "mod", "neg", "pos", "len", "copy"}
    | {"lt", "le", "gt", "ge", "eq", "ne", "and", "or", "not"}
)

#: cheap primitives that cannot raise, computed before a loop that may run no
#: iteration: not ``/``, ``//``, ``%`` (a zero divisor)
_NEVER_RAISE = frozenset({"add", "sub", "mul", "neg", "pos"})


#: the fewest values saved as one tuple per iteration: with fewer, building and
#: unpacking the tuple cost more than the stores it saves (measured: two values,
#: 4% slower and 49% more bytes per step; the binomial tree's six, 5-10% faster
#: and 25% more bytes per node)
RECORD_MIN = 4


class TapeLayout:
    """The saving part of ``Layout``; its state lives on the layout."""

    def _recomputable(self, var: Var, loop: Loop) -> bool:
        """A cheap value computed at the top of ``loop``'s body from values the
        reverse body has anyway (constants, indices, values from before the loop,
        restored or recomputed values of this iteration)."""
        let = self.defs.get(var)
        if let is None or var not in self.top_level[loop]:
            return False
        if let.op == "getitem":
            container = let.args[0]
            if not (
                isinstance(container, Var)
                and (container.kind == "param" or self._final(container, var))
            ):
                return False
        elif let.op == "dataitem":
            pass  # module-level data: read again, as cheap as reading the save
        elif let.op not in _CHEAP and not constant_call(let.op, let.args):
            return False
        for arg in let.args:
            if not isinstance(arg, Var) or arg.kind == "index":
                continue
            if arg in self.defs and self.defs[arg].op == "written":
                statement = self.defs.get(self.defs[arg].args[0])  # type: ignore[arg-type]
                if statement is None or not statement.copied.fixed:  # type: ignore[union-attr]
                    return False  # a copied statement's value may change in place
            where = self.loop_of.get(arg)
            if where is loop:
                if arg not in self.top_level[loop] and not any(
                    phi.target == arg for phi in loop.carried
                ):
                    return False
            elif not self._encloses(where, loop):
                return False
        return True

    def _final(self, version: Var, reader: Var) -> bool:
        """Whether no element write or append changes the list ``version`` after
        ``reader`` reads it: every write to the list comes before the read and in
        no loop around it (read again in the reverse sweep, not saved: the total
        of u[i] * u[i] after the last write to u)."""
        root = self.roots.get(version, version)
        if root in self.sweep.rebound:
            return False
        for other in self.versions.get(root, [root]):
            let = self.defs.get(other)
            if let is None:
                # a loop's or a branch's merge: the same list object when all it
                # merges is (else xs, ys = ys, xs swaps two buffers, which later
                # writes change)
                inputs = self.merged.get(other, ())
                if inputs and all(
                    isinstance(a, Var) and self.roots.get(a, a) == root for a in inputs
                ):
                    continue
                return False
            if let.op not in ("setitem", "append", "newlist", "listlit"):
                return False  # a copied statement's or a call's list
            if self.position[other] > self.position[reader]:
                return False
            if self._loops_around(other) & self._loops_around(reader):
                return False  # a later iteration writes it again
        return True

    def _loops_around(self, var: Var) -> set[Loop]:
        found: set[Loop] = set()
        loop = self.loop_of.get(var)
        while loop is not None:
            found.add(loop)
            loop = self.parent.get(loop)
        return found

    def _leaves(self, var: Var, loop: Loop) -> set[Var]:
        """The values of this iteration of ``loop`` that recomputing ``var`` needs
        saved (values from outside the loop and indices it has anyway)."""
        found: set[Var] = set()
        for arg in self.defs[var].args:
            if not isinstance(arg, Var) or arg.kind == "index":
                continue
            if self.loop_of.get(arg) is not loop:
                continue
            if arg in self.defs and self._recomputable(arg, loop):
                found |= self._leaves(arg, loop)
            else:
                found.add(arg)
        return found

    def _rebuild_cost(self, var: Var, loop: Loop, direct: set[Var]) -> int:
        """The operations recomputing ``var`` in ``loop``'s reverse body takes
        beyond those the reverse does anyway (values it reads itself are free)."""
        cost = 1
        for arg in self.defs[var].args:
            if (
                isinstance(arg, Var)
                and arg.kind != "index"
                and arg not in direct
                and self.cheap(arg) == arg  # inactive arithmetic printed inline
                and self.loop_of.get(arg) is loop
                and arg in self.defs
                and self.defs[arg].op != "dataitem"  # module data: as cheap as a save
                and self._recomputable(arg, loop)
            ):
                cost += self._rebuild_cost(arg, loop, direct)
        return cost

    def _encloses(self, outer: Loop | None, loop: Loop) -> bool:
        current: Loop | None = self.parent.get(loop)
        while True:
            if current is outer:
                return True
            if current is None:
                return False
            current = self.parent.get(current)

    def _reverse_reads(self) -> set[Var]:
        reads: set[Var] = set()
        #: the values the reverse expressions name (before any is recomputed)
        direct: set[Var] = set()
        first_pass = [True]

        def collect(expr: Expr, loop: Loop | None, everywhere: bool = False) -> None:
            for node in _walk_values(self.cheap(expr, everywhere)):
                if first_pass[0]:
                    if isinstance(node, Var):
                        direct.update(
                            n for n in walk(self.cheap(node)) if isinstance(n, Var)
                        )
                elif isinstance(node, Apply):  # a call's partials: a value of its own
                    note(self.partials_of(node.args[0]), loop)  # type: ignore[arg-type]
                elif isinstance(node, Var) and node not in self.reverse_defined:
                    note(node, loop)

        def note(var: Var, loop: Loop | None) -> None:
            if var in reads or var.kind == "index":
                return
            expanded = self.cheap(var)
            if expanded != var:  # printed as its expression wherever it is used
                for node in walk(expanded):
                    if isinstance(node, Var):
                        note(node, loop)
                return
            where = self.loop_of.get(var)
            if (
                where is not None
                and self._recomputable(var, where)
                # recomputed from values saved anyway; else one save of its own
                # costs less than saving what it is made of (u[i - 1], u[i], ...)
                and self._leaves(var, where) <= direct
                # and in one operation: a value rebuilt through a chain of
                # temporaries is saved instead (the one value the reverse reads)
                and self._rebuild_cost(var, where, direct) <= 1
            ):
                let = self.defs[var]
                bucket = self.recompute.setdefault(where, [])
                if let not in bucket:
                    bucket.append(let)
                for arg in let.args:
                    if isinstance(arg, Var):
                        note(arg, loop)
                return
            reads.add(var)

        def visit(statements: Iterable[ReverseStmt], loop: Loop | None) -> None:
            for stmt in statements:
                if isinstance(stmt, AdjointAssign):
                    collect(stmt.expr, loop)
                elif isinstance(stmt, ElementAdjoint):
                    collect(stmt.index, loop, everywhere=True)
                    collect(stmt.expr, loop)
                elif isinstance(stmt, SpreadAdjoint):
                    collect(stmt.expr, loop)
                elif isinstance(stmt, CallAdjoint):
                    for arg in stmt.args:
                        collect(arg, loop)
                    collect(stmt.seed, loop)
                elif isinstance(stmt, PopAdjoint):
                    pass  # reads only adjoints
                elif isinstance(stmt, ReverseBranch):
                    # a kink's branch tests saved values like its select did
                    collect(stmt.condition, loop, stmt.branch is not None)
                    visit(stmt.then, loop)
                    visit(stmt.orelse, loop)
                else:
                    for bound in reverse_bounds(stmt.loop):
                        collect(bound, loop, everywhere=True)
                    visit(stmt.body, stmt.loop)

        visit(self.sweep.statements, None)
        first_pass[0] = False
        visit(self.sweep.statements, None)
        sized = dict(self.function.tuple_sizes)
        for root in self.sweep.list_roots:
            if root not in sized and root not in self.sweep.moved:
                reads.add(root)  # len(root) sizes its adjoint
        for lets in self.recompute.values():
            lets.sort(key=lambda let: self.position[let.target])
        return reads

    def _hoist(self) -> None:
        """Moves each recomputed temporary that reads no value of its loop's
        iteration out of the loop's reverse body: computed just before the
        outermost reverse loop it is invariant in, in the block that loop is in
        (a branch side of an enclosing loop's body, say)."""
        for loop in list(self.recompute):
            for let in list(self.recompute[loop]):
                if (
                    let.target.kind != "temp"
                    or let.target.shape != "scalar"
                    or not (let.op in _NEVER_RAISE or constant_call(let.op, let.args))
                ):
                    continue  # a loop of no trips never computed it: nor may we
                nodes = [n for a in let.args for n in walk(self.cheap(a))]
                if any(
                    isinstance(n, Apply) and n.op not in _NEVER_RAISE for n in nodes
                ):
                    continue
                reads = {n for n in nodes if isinstance(n, Var)}
                outermost: Loop | None = None
                current: Loop | None = loop
                while current is not None and not reads & iteration_values(current):
                    outermost, current = current, self.parent.get(current)
                if outermost is None:
                    continue
                self.recompute[loop].remove(let)
                self.lifted[let.target] = outermost
                self.hoisted.setdefault(outermost, []).append(let)
        for lets in self.hoisted.values():
            lets.sort(key=lambda let: self.position[let.target])

    def iteration_local(self, loop: Loop) -> set[Var]:
        """The values the reverse of one iteration of ``loop`` holds, forgotten
        when it ends: not those computed once before it (``lifted``)."""
        local = iteration_values(loop)
        for var, outermost in self.lifted.items():
            if var in local and (loop is outermost or self._encloses(outermost, loop)):
                local.discard(var)
        return local

    def _assign_tapes(self) -> None:
        for var in sorted(self.reverse_reads):
            loop = self.loop_of.get(var)
            if loop is not None:
                self.tapes.setdefault(loop, []).append(var)

    def _assign_records(self) -> None:
        """The values an iteration saves at the top level of its loop's body go
        in one tuple per iteration, a record (``j_saved[j] = (hold_1, values_4)``):
        one list and one store per iteration instead of one of each per value,
        and one unpacking in the reverse. Each has a name no other value takes,
        so it still holds its value where the tuple is made, after the last of
        them."""
        sharing: dict[str, int] = {}
        for name in self.namer.names.values():
            sharing[name] = sharing.get(name, 0) + 1
        for loop, tapes in self.tapes.items():
            members = [
                var
                for var in tapes
                if var in self.top_level[loop]
                and var.shape == "scalar"
                and sharing.get(self.namer.name(var)) == 1
            ]
            if len(members) < RECORD_MIN:
                continue
            members.sort(key=lambda var: self.position[var])
            self.records[loop] = members
            # named after the iteration: short, so the tuple keeps to one line
            name = self.namer.claim(f"{self.namer.name(loop.index)}_saved")
            for var in members:
                self.tape_names[(loop, var)] = name

    def saved_lists(self, loop: Loop) -> list[str]:
        """The lists ``loop`` fills, one slot per iteration: its own values, then,
        for each inner loop, a list holding that loop's lists of each iteration."""
        names = [self.tape_name(loop, var) for var in self.tapes.get(loop, [])]
        names = list(dict.fromkeys(names))  # a record's values share its list
        for child in self.children.get(loop, []):
            names += [self.by_name(loop, inner) for inner in self.saved_lists(child)]
        return names

    def growing(self, loop: Loop) -> tuple[set[str], list[str]]:
        """A while loop's saved lists grow by one slot per iteration: (those a
        save at the body's top level appends to, those given a slot first and
        filled inside a branch)."""
        top: set[Var] = {phi.target for phi in loop.carried}
        inner_loops: list[Loop] = []
        for stmt in loop.body:
            if isinstance(stmt, Let):
                top |= {stmt.target, partials_var(stmt.target)}
            elif isinstance(stmt, Branch):
                top |= {phi.target for phi in stmt.merges}
            else:
                inner_loops.append(stmt)
                top |= {phi.exit for phi in stmt.carried if phi.exit is not None}
                if stmt.trips is not None:
                    top.add(stmt.trips)
        appended = {
            self.tape_name(loop, v) for v in self.tapes.get(loop, []) if v in top
        }
        for child in inner_loops:
            appended |= {self.by_name(loop, inner) for inner in self.saved_lists(child)}
        slotted = [name for name in self.saved_lists(loop) if name not in appended]
        return appended, slotted

    def tapes_of(self, loop: Loop, saved: str) -> list[Var]:
        """The values the saved list named ``saved`` (of ``loop`` or a loop inside
        it) holds."""
        found = [
            v for v in self.tapes.get(loop, []) if self.tape_name(loop, v) == saved
        ]
        for child in self.children.get(loop, []):
            found += self.tapes_of(child, saved)
        return found

    def by_name(self, loop: Loop, inner: str) -> str:
        key = (loop, inner)
        known = self.by_names.get(key)
        if known is None:
            known = self.namer.claim(f"{inner}_by_{self.namer.name(loop.index)}")
            self.by_names[key] = known
        return known


def iteration_values(loop: Loop) -> set[Var]:
    """Values that belong to one iteration of ``loop`` (nested loops' included)."""
    return defined_in(loop.body) | {loop.index} | {phi.target for phi in loop.carried}


def partials_var(call: Var) -> Var:
    return Var(-call.uid - 1, f"{call.base}_partials", "temp")


def _walk_values(expr: Expr) -> Iterator[Expr]:
    """Values an expression reads; a partial() node stands for its call's partials
    (with a stack, as ``ir.walk``: a deep tree costs its size, not size x depth)."""
    stack = [expr]
    while stack:
        node = stack.pop()
        if isinstance(node, Apply) and node.op != "partial":
            stack.extend(reversed(node.args))
        else:
            yield node


def reverse_bounds(loop: Loop) -> tuple[Atom, ...]:
    """What the reverse loop's range reads: the iterations the forward ran."""
    if loop.trips is not None:
        return (loop.start, loop.trips, loop.step)
    return (loop.start, loop.stop, loop.step)
