"""Laying out the generated function body: the forward and the reverse sweep.

Decides, for the structured SSA and its reverse sweep:

- which forward values are stored under a name and which fold back into the
  expression that uses them (so the forward sweep reads like the source);
- which names the stored values take: a re-bound source variable keeps its one name
  while the old value is no longer needed, so loops and branches look like the
  source's; a value the reverse sweep reads later keeps a name of its own;
- what each loop saves for its reverse: values the reverse body reads are written to
  a list preallocated when the loop starts (``x_saved``), one slot per iteration;
  a cheap value one operation away from values the reverse reads anyway (the loop
  index, values from before the loop, restored values, elements of a list nothing
  writes after) is recomputed instead, and one rebuilt through a chain of
  temporaries is saved; the lists of an inner loop are saved by the outer one;
- and prints both sweeps as indented lines with the quoting comments.
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Iterable, Iterator

from gradwright.calculus.algebra import constant_call
from gradwright.emission import indexing
from gradwright.emission.layout_names import NamingLayout, _NoteHeld, _reverse_exprs
from gradwright.emission.naming import Namer
from gradwright.emission.printer import Printer
from gradwright.ir import (
    AdjointAssign,
    Apply,
    Atom,
    Branch,
    CallAdjoint,
    Const,
    ElementAdjoint,
    Expr,
    Let,
    Loop,
    PopAdjoint,
    ReverseBranch,
    ReverseLoop,
    ReverseStmt,
    ReverseSweep,
    SpreadAdjoint,
    SSAFunction,
    Stmt,
    Var,
    const,
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

#: the statements copied as written and the values they bind (always printed)
_COPIED = frozenset({"copied", "written"})


class Layout(NamingLayout):
    def __init__(
        self,
        function: SSAFunction,
        sweep: ReverseSweep,
        namer: Namer,
        printer: Printer,
        active: set[Var],
        share_names: bool = True,
        shaped: bool = False,
    ) -> None:
        #: let versions of a variable share its name (readable); off, every stored
        #: value has a name of its own (the fallback when the check fails)
        self.share_names = share_names
        self.bases_used = {p.base for p in function.params}
        self.function = function
        self.sweep = sweep
        #: partials values met before naming, and whether naming is done
        self.pending_partials: dict[Var, Var] = {}
        #: each partials value's helper call
        self.partials_call: dict[Var, Var] = {}
        self.named = False
        self.namer = namer
        self.printer = printer
        self.reverse_printer = printer
        self.numpy = False
        self.active = active
        self.defs: dict[Var, Let] = {}
        self.loop_of: dict[Var, Loop | None] = {}
        self.parent: dict[Loop, Loop | None] = {}
        self.top_level: dict[Loop, set[Var]] = {}
        self.children: dict[Loop, list[Loop]] = {}
        self.position: dict[Var, int] = {}
        self._index_defs(function.body, None)
        for param in function.params:
            self.loop_of[param] = None
        self.roots = dict(sweep.roots)
        self.versions: dict[Var, list[Var]] = {}
        for version, root in self.roots.items():
            self.versions.setdefault(root, []).append(version)
        self.reverse_defined = self._reverse_defined(sweep.statements)
        self.recompute: dict[Loop, list[Let]] = {}
        self.reverse_reads = self._reverse_reads()
        #: recomputed values that no iteration of a loop changes, computed once
        #: before its reverse (``hold_4 = 1.0 - p``, not once per node)
        self.hoisted: dict[Loop, list[Let]] = {}
        #: each of those values, and the outermost loop it is computed before
        self.lifted: dict[Var, Loop] = {}
        self._hoist()
        self.tapes: dict[Loop, list[Var]] = {}
        self.by_names: dict[tuple[Loop, str], str] = {}
        self._assign_tapes()
        self.uses = self._forward_uses()
        self.live = self._liveness()
        self.replayed = {v for vs in self.tapes.values() for v in vs}
        self.replayed |= {
            let.target
            for lets in (*self.recompute.values(), *self.hoisted.values())
            for let in lets
        }
        self.pinned = {v for v in self.reverse_reads if self.loop_of.get(v) is None}
        self.pinned |= self._stale_reads()
        # the returned values are read at the very end
        self.pinned |= {a for a in function.result.values if isinstance(a, Var)}
        if shaped:  # _gw_shaped(x_bar, x) reads the parameter at the very end
            self.pinned |= {v for v in sweep.wrt if v not in sweep.bare}
        self.stored = self._stored()
        self.partials_needed = {
            node.args[0]
            for stmt in _reverse_exprs(sweep.statements)
            for node in walk(stmt)
            if isinstance(node, Apply) and node.op == "partial"
        }
        self.tape_names: dict[tuple[Loop, Var], str] = {}
        #: the names of pinned values named so far, kept up to date as names are
        #: given (rebuilding it for each value made naming quadratic)
        self.held: set[str] = set()
        self.namer.names = _NoteHeld(self.namer.names, self.pinned, self.held)
        self._name_all()
        if share_names:
            self._name_carries(sweep.statements)
        # a call's partials are named after the call (naming one first would
        # give the call its base name before the layout chose one)
        for pseudo, call in self.pending_partials.items():
            self.namer.names[pseudo] = self.namer.partials_name(call)
        self.named = True

    # -- analysis -----------------------------------------------------------------

    def _index_defs(self, statements: tuple[Stmt, ...], loop: Loop | None) -> None:
        for stmt in statements:
            if isinstance(stmt, Let):
                self.defs[stmt.target] = stmt
                self.loop_of[stmt.target] = loop
                self.position[stmt.target] = len(self.position)
            elif isinstance(stmt, Branch):
                self._index_defs(stmt.then, loop)
                self._index_defs(stmt.orelse, loop)
                for phi in stmt.merges:
                    self.loop_of[phi.target] = loop
            else:
                self.parent[stmt] = loop
                self.children.setdefault(stmt, [])
                if loop is not None:
                    self.children.setdefault(loop, []).append(stmt)
                self.top_level[stmt] = {
                    s.target for s in stmt.body if isinstance(s, Let)
                }
                self.loop_of[stmt.index] = stmt
                for phi in stmt.carried:
                    self.loop_of[phi.target] = stmt
                    assert phi.exit is not None
                    self.loop_of[phi.exit] = loop
                if stmt.trips is not None:
                    self.loop_of[stmt.trips] = loop
                self._index_defs(stmt.body, stmt)

    def _reverse_defined(self, statements: Iterable[ReverseStmt]) -> set[Var]:
        found: set[Var] = set()
        for stmt in statements:
            if isinstance(stmt, ReverseBranch):
                found |= self._reverse_defined(stmt.then)
                found |= self._reverse_defined(stmt.orelse)
            elif isinstance(stmt, ReverseLoop):
                found |= self._reverse_defined(stmt.body)
        return found

    def partials_of(self, call: Var) -> Var:
        """The tuple of partial derivatives a helper call returns, as a value."""
        pseudo = _partials_var(call)
        if pseudo not in self.loop_of:
            self.loop_of[pseudo] = self.loop_of.get(call)
            self.partials_call[pseudo] = call
            if self.named:
                self.namer.names[pseudo] = self.namer.partials_name(call)
            else:  # named with its call, once the call has its own name
                self.pending_partials[pseudo] = call
        return pseudo

    def cheap(self, atom: Expr, everywhere: bool = False) -> Expr:
        """``atom`` rebuilt through inactive cheap temporaries.

        Conditions, loop bounds and indices (``everywhere``), which both sweeps
        print, are rebuilt wholly; elsewhere only temporaries made inside a loop
        are, as recomputing them costs less than saving them per iteration, while
        one made outside loops is stored once and read.
        """
        if isinstance(atom, Apply):
            return Apply(atom.op, tuple(self.cheap(a, everywhere) for a in atom.args))
        if (
            isinstance(atom, Var)
            and atom.kind == "temp"
            and (everywhere or atom not in self.active)
            and atom in self.defs
            and self.defs[atom].op in _CHEAP
            and (everywhere or self.loop_of.get(atom) is not None)
        ):
            let = self.defs[atom]
            return Apply(let.op, tuple(self.cheap(a, everywhere) for a in let.args))
        return atom

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
                # a loop's or a branch's merge: it may hold another list object
                # (xs, ys = ys, xs swaps two buffers), which later writes change
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

    def saved_lists(self, loop: Loop) -> list[str]:
        """The lists ``loop`` fills, one slot per iteration: its own values, then,
        for each inner loop, a list holding that loop's lists of each iteration."""
        names = [self.tape_name(loop, var) for var in self.tapes.get(loop, [])]
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
                top |= {stmt.target, _partials_var(stmt.target)}
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

    def _forward_uses(self) -> Counter[Var]:
        uses: Counter[Var] = Counter()

        def add(atom: Atom) -> None:
            if isinstance(atom, Var):
                uses[atom] += 1

        def visit(statements: tuple[Stmt, ...]) -> None:
            for stmt in statements:
                if isinstance(stmt, Let):
                    for arg in stmt.args:
                        add(arg)
                elif isinstance(stmt, Branch):
                    add(stmt.condition)
                    visit(stmt.then)
                    visit(stmt.orelse)
                    for phi in stmt.merges:
                        add(phi.first)
                        add(phi.second)
                else:
                    for bound in stmt.bounds:
                        add(bound)
                    for flag in (stmt.test, stmt.exit_flag):
                        if flag is not None:
                            add(flag)
                    for phi in stmt.carried:
                        add(phi.first)
                        add(phi.second)
                    visit(stmt.body)

        visit(self.function.body)
        for atom in self.function.result.values:
            add(atom)
        return uses

    def _liveness(self) -> set[Var]:
        live: set[Var] = {a for a in self.function.result.values if isinstance(a, Var)}
        live |= self.reverse_reads
        # a helper call whose partials the reverse reads is made even when its
        # value is not used (the forward sweep would otherwise drop it)
        live |= {
            let.target
            for let in self.defs.values()
            if let.op.startswith("call:")
            and _partials_var(let.target) in self.reverse_reads
        }
        for lets in self.recompute.values():
            for let in lets:
                live |= {a for a in let.args if isinstance(a, Var)}
        # a statement copied as written runs whatever reads it (a guard raises)
        live |= {v for v, let in self.defs.items() if let.op in _COPIED}
        while True:
            size = len(live)
            self._live_block(self.function.body, live)
            if len(live) == size:
                return live

    def _live_block(self, statements: tuple[Stmt, ...], live: set[Var]) -> bool:
        """Marks what ``statements`` need; True if any of them is needed."""
        needed = False
        for stmt in reversed(statements):
            if isinstance(stmt, Let):
                target = stmt.target
                is_live = target in live or (
                    target.shape == "list" and self.roots.get(target, target) in live
                )
                if target.shape == "list" and stmt.op in ("setitem", "append"):
                    # an element write is needed when any later version is
                    root = self.roots.get(target, target)
                    is_live = is_live or any(v in live for v in self.versions[root])
                if is_live:
                    needed = True
                    live.add(target)
                    live |= {a for a in stmt.args if isinstance(a, Var)}
            elif isinstance(stmt, Branch):
                merges_live = [p for p in stmt.merges if p.target in live]
                for phi in merges_live:
                    live |= {a for a in (phi.first, phi.second) if isinstance(a, Var)}
                inner = self._live_block(stmt.then, live)
                inner = self._live_block(stmt.orelse, live) or inner
                if inner or merges_live:
                    needed = True
                    if isinstance(stmt.condition, Var):
                        live.add(stmt.condition)
            else:
                carried_live = [
                    p for p in stmt.carried if p.exit in live or p.target in live
                ]
                for phi in carried_live:
                    live.add(phi.target)
                    live |= {a for a in (phi.first, phi.second) if isinstance(a, Var)}
                inner = self._live_block(stmt.body, live)
                # a loop whose trip count the reverse sweep reads runs, even when
                # none of its values is needed forward (its reverse replays it)
                counted = stmt.trips is not None and stmt.trips in live
                if inner or carried_live or counted:
                    needed = True
                    live |= {
                        a
                        for a in (*stmt.bounds, stmt.test, stmt.exit_flag)
                        if isinstance(a, Var)
                    }
        return needed

    def _stale_reads(self) -> set[Var]:
        """Values read after a newer version of their name exists (tuple swaps)."""
        stale: set[Var] = set()

        def read(atom: Atom, current: dict[str, Var]) -> None:
            if isinstance(atom, Var) and atom.kind in ("local", "param"):
                latest = current.get(atom.base)
                if latest is not None and latest != atom:
                    stale.add(atom)

        def visit(statements: tuple[Stmt, ...], current: dict[str, Var]) -> None:
            for stmt in statements:
                if isinstance(stmt, Let):
                    for arg in stmt.args:
                        read(arg, current)
                    if stmt.target.kind == "local":
                        current[stmt.target.base] = stmt.target
                elif isinstance(stmt, Branch):
                    read(stmt.condition, current)
                    for side, block in ((0, stmt.then), (1, stmt.orelse)):
                        inner = dict(current)
                        visit(block, inner)
                        for phi in stmt.merges:
                            read(phi.first if side == 0 else phi.second, inner)
                    for phi in stmt.merges:
                        current[phi.target.base] = phi.target
                else:
                    for bound in stmt.bounds:
                        read(bound, current)
                    for phi in stmt.carried:
                        read(phi.first, current)
                        current[phi.target.base] = phi.target
                    inner = dict(current)
                    visit(stmt.body, inner)
                    for flag in (stmt.test, stmt.exit_flag):
                        if flag is not None:
                            read(flag, inner)
                    for phi in stmt.carried:
                        read(phi.second, inner)
                        assert phi.exit is not None
                        current[phi.exit.base] = phi.exit

        params = {p.base: p for p in self.function.params}
        visit(self.function.body, dict(params))
        return stale

    def _stored(self) -> set[Var]:
        stored: set[Var] = set()
        for var, let in self.defs.items():
            if var not in self.live:
                continue
            folded = (
                var.kind == "temp"
                and var not in self.reverse_reads
                and self.uses[var] == 1
                and not let.op.startswith("call:")
                and var.shape == "scalar"
            )
            if not folded and let.op != "copied":  # the statement names nothing
                stored.add(var)
        return stored

    # -- names --------------------------------------------------------------------

    def expr(self, expr: Expr) -> str:
        return self.printer(expr)

    def atom_expr(self, atom: Atom, folded: dict[Var, Expr]) -> Expr:
        if isinstance(atom, Var) and atom in folded:
            return folded[atom]
        return atom

    def range_args(self, loop: Loop, folded: dict[Var, Expr] | None = None) -> str:
        """The forward loop's range (``folded``: as the forward sweep has its
        bounds), or, without ``folded``, the reverse loop's: the iterations run."""

        def show(atom: Expr) -> str:
            if folded is not None:
                return self.expr(self.atom_expr(atom, folded))  # type: ignore[arg-type]
            return self.expr(self.cheap(atom, everywhere=True))

        start, stop, step = loop.start, loop.stop, loop.step
        if folded is None and loop.trips is not None:
            stop = loop.trips
            if not (_is_const(start, 0) and _is_const(step, 1)):
                stop = Apply("add", (start, Apply("mul", (loop.trips, step))))  # type: ignore[assignment]
        if _is_const(step, 1):
            if _is_const(start, 0):
                return show(stop)
            return f"{show(start)}, {show(stop)}"
        return f"{show(start)}, {show(stop)}, {show(step)}"

    def slot(self, loop: Loop, forward: bool = False) -> str:
        """The saved-list index of the current iteration (a while loop's
        forward sweep counts its iterations in its trip count)."""
        if forward and loop.test is not None:
            assert loop.trips is not None
            return self.namer.name(loop.trips)
        start = self.cheap(loop.start, everywhere=True)
        step = self.cheap(loop.step, everywhere=True)
        return self.expr(indexing.slot(loop.index, start, step))

    def trip_count(self, loop: Loop, folded: dict[Var, Expr]) -> tuple[str, Expr]:
        """A saved list's allocation before the forward ``loop``, and the
        expression it reads (the bounds as the forward sweep has them); a while
        loop's lists grow by one slot per iteration."""
        if loop.test is not None:
            return "[]", Const("[]")
        start, stop, step = (self.atom_expr(b, folded) for b in _bounds(loop))
        length = indexing.count(start, stop, step)
        if length is not None:
            zeros = Apply("listlit", (const(0.0),))
            return self.expr(Apply("mul", (zeros, length))), length
        bounds = Apply("listlit", (start, stop, step))
        return f"[0.0] * len(range({self.range_args(loop, folded)}))", bounds


def iteration_values(loop: Loop) -> set[Var]:
    """Values that belong to one iteration of ``loop`` (nested loops' included)."""
    return defined_in(loop.body) | {loop.index} | {phi.target for phi in loop.carried}


def _partials_var(call: Var) -> Var:
    return Var(-call.uid - 1, f"{call.base}_partials", "temp")


def _walk_values(expr: Expr) -> Iterator[Expr]:
    """Values an expression reads; a partial() node stands for its call's partials."""
    if isinstance(expr, Apply):
        if expr.op == "partial":
            yield expr
            return
        for arg in expr.args:
            yield from _walk_values(arg)
    else:
        yield expr


def _bounds(loop: Loop) -> tuple[Atom, Atom, Atom]:
    return (loop.start, loop.stop, loop.step)


def reverse_bounds(loop: Loop) -> tuple[Atom, ...]:
    """What the reverse loop's range reads: the iterations the forward ran."""
    if loop.trips is not None:
        return (loop.start, loop.trips, loop.step)
    return (loop.start, loop.stop, loop.step)


def _is_const(atom: Expr, value: int) -> bool:
    return (
        isinstance(atom, Const) and atom.value == value and isinstance(atom.value, int)
    )
