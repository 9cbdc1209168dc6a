"""Laying out the generated function body: the forward and the reverse sweep.

Decides, for the structured SSA and its reverse sweep:

- which forward values are stored under a name and which fold back into the
  expression that uses them (so the forward sweep reads like the source);
- which names the stored values take (``layout_names``): a re-bound source
  variable keeps its one name while the old value is no longer needed, so loops and
  branches look like the source's; a value the reverse sweep reads later keeps a
  name of its own;
- what each loop saves for its reverse (``layout_tapes``): values the reverse body
  reads are written to a list with one slot per iteration (``x_saved``); a cheap
  value one operation away from values the reverse reads anyway is recomputed
  instead; the lists of an inner loop are saved by the outer one.

``print_sweeps`` prints both sweeps from these decisions."""

from __future__ import annotations

from collections import Counter
from collections.abc import Iterable

from gradwright.emission import indexing
from gradwright.emission.layout_names import NamingLayout, _NoteHeld, _reverse_exprs
from gradwright.emission.layout_tapes import (
    _CHEAP,
    TapeLayout,
    partials_var,
)
from gradwright.emission.naming import Namer
from gradwright.emission.printer import Printer
from gradwright.ir import (
    Apply,
    Atom,
    Branch,
    Const,
    Expr,
    Let,
    Loop,
    ReverseBranch,
    ReverseLoop,
    ReverseStmt,
    ReverseSweep,
    SSAFunction,
    Stmt,
    Var,
    const,
    walk,
)

#: the statements copied as written and the values they bind (always printed)
_COPIED = frozenset({"copied", "written"})


class Layout(NamingLayout, TapeLayout):
    def __init__(
        self,
        function: SSAFunction,
        sweep: ReverseSweep,
        namer: Namer,
        printer: Printer,
        active: set[Var],
        share_names: bool = True,
        shaped: bool = False,
        records: bool = True,
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
        #: a merge's value -> the values it is one of (a branch's two sides, a
        #: loop's entry and end-of-iteration values, the value after a loop)
        self.merged: dict[Var, tuple[Atom, ...]] = {}
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
        #: per loop: the values saved together, one tuple per iteration
        self.records: dict[Loop, list[Var]] = {}
        if records:  # else one list per saved value (Target.records)
            self._assign_records()

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
                    self.merged[phi.target] = (phi.first, phi.second)
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
                    self.merged[phi.target] = (phi.first, phi.second)
                    self.merged[phi.exit] = (phi.target,)
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
        pseudo = partials_var(call)
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
            and partials_var(let.target) in self.reverse_reads
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

    def reverse_range(self, loop: Loop) -> str:
        """The iterations of ``loop``'s reverse: ``reversed(range(...))``, or for a
        step of -1 the same numbers ascending (``range(steps)`` for the reverse of
        ``range(steps - 1, -1, -1)``)."""
        if loop.trips is None and _is_const(loop.step, -1):
            start = self.cheap(loop.start, everywhere=True)
            stop = self.cheap(loop.stop, everywhere=True)
            # range(a, b, -1) runs a, a - 1, ..., b + 1: reversed, b + 1 to a
            low = indexing.affine(Apply("add", (stop, const(1))))
            high = indexing.affine(Apply("add", (start, const(1))))
            if _is_const(low, 0):
                return f"range({self.expr(high)})"
            return f"range({self.expr(low)}, {self.expr(high)})"
        return f"reversed(range({self.range_args(loop)}))"

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


def _bounds(loop: Loop) -> tuple[Atom, Atom, Atom]:
    return (loop.start, loop.stop, loop.step)


def _is_const(atom: Expr, value: int) -> bool:
    return (
        isinstance(atom, Const) and atom.value == value and isinstance(atom.value, int)
    )
