"""Printing the laid-out sweeps: indented lines under comments quoting the source.

``lay_out`` is the entry point: it builds the :class:`~gradwright.layout.Layout` of
a function and prints its forward sweep (the stored values, with what each loop
saves for its reverse) and its reverse sweep (restores, recomputations and adjoint
statements), and gives the expressions the function returns.
"""

from __future__ import annotations

from collections.abc import Iterator

from gradwright.calculus.algebra import negated, simplify
from gradwright.calculus.primitives import OPS
from gradwright.emission.copied import copied_lines
from gradwright.emission.formatting import format_statement
from gradwright.emission.layout import Layout, iteration_values, reverse_bounds
from gradwright.emission.layout_check import Key, Trace, Violation, check
from gradwright.emission.naming import Namer
from gradwright.emission.printer import Printer
from gradwright.emission.sinking import Side, sunk_values
from gradwright.ir import (
    AdjointAssign,
    Apply,
    Atom,
    Bar,
    Branch,
    CallAdjoint,
    Const,
    ElementAdjoint,
    Expr,
    Let,
    Loop,
    Origin,
    PopAdjoint,
    ReverseBranch,
    ReverseLoop,
    ReverseStmt,
    ReverseSweep,
    SpreadAdjoint,
    SSAFunction,
    Stmt,
    Var,
)


class _Lines:
    """Indented output lines; a comment quoting the source opens each group."""

    def __init__(self) -> None:
        self.lines: list[str] = []
        self.last_origin: dict[int, Origin | None] = {}
        #: the statement each open block's header line quotes, by depth
        self.header: dict[int, Origin | None] = {}

    def comment(self, origin: Origin, depth: int) -> None:
        if self.header.get(depth) == origin:
            return  # the block's own header already quotes it
        if self.last_origin.get(depth) != origin:
            self.lines.append("    " * depth + f"# {origin.text}")
            self.last_origin[depth] = origin
            for deeper in [d for d in self.last_origin if d > depth]:
                self.last_origin[deeper] = None

    def code(self, text: str, depth: int) -> None:
        self.lines.append(format_statement(text, depth))

    def statement(self, origin: Origin, text: str, depth: int) -> None:
        self.comment(origin, depth)
        self.code(text, depth)

    def open_block(self, depth: int, origin: Origin | None = None) -> None:
        self.last_origin[depth + 1] = None
        self.header[depth + 1] = origin


class _Emitter:
    """Prints the sweeps of a :class:`Layout`."""

    def __init__(self, layout: Layout) -> None:
        self.layout = layout
        self.namer = layout.namer
        self.print = layout.printer
        self.rprint = layout.reverse_printer
        self.folded: dict[Var, Expr] = {}
        #: names the reverse sweep writes forward values back into
        self.restored: set[str] = set()
        #: what each printed statement reads and writes, for the layout check
        self.trace = Trace()
        #: the saved lists a while loop's top-level saves append to
        self.appending: dict[Loop, set[str]] = {}
        #: adjoints whose first write updates another's array in place
        self.lenders = dict(layout.sweep.updates)
        #: per branch side: (its loop, values restored there, values recomputed)
        self.sunk: dict[Side, tuple[Loop, list[Var], list[Let]]] = {}

    # -- the record the layout check reads ----------------------------------------

    def key(self, var: Var) -> Key:
        # every version of a list is one list object, changed in place
        return ("value", self.layout.roots.get(var, var))

    def bar_key(self, var: Var) -> Key:
        return ("bar", self.layout.roots.get(var, var))

    def reads(self, expr: Expr) -> None:
        """Record the names printing ``expr`` reads."""
        stack = [expr]
        while stack:
            node = stack.pop()
            if isinstance(node, Var):
                self.trace.read(self.namer.name(node), self.key(node))
            elif isinstance(node, Bar):
                self.trace.read(self.namer.bar_name(node.var), self.bar_key(node.var))
            elif isinstance(node, Apply):
                if node.op == "partial":
                    call = node.args[0]
                    assert isinstance(call, Var)
                    partials = self.namer.partials_name(call)
                    self.trace.read(partials, ("partials", call))
                    stack.append(node.args[1])
                else:
                    stack.extend(node.args)

    def tape_key(self, loop: Loop | None, name: str) -> Key:
        """A saved list, filled by ``loop``: one per iteration of the loops
        around ``loop``, so it belongs to the enclosing loop's iterations."""
        enclosing = self.layout.parent.get(loop) if loop is not None else None
        scope = enclosing.index if enclosing is not None else None
        return ("list", scope, name)

    def slot_reads(self, loop: Loop, forward: bool = False) -> None:
        if forward and loop.test is not None:  # a while loop counts its iterations
            assert loop.trips is not None
            self.trace.read(self.namer.name(loop.trips), self.key(loop.trips))
            return
        self.trace.read(self.namer.name(loop.index), self.key(loop.index))
        for bound in (loop.start, loop.step):
            self.reads(self.layout.cheap(bound, everywhere=True))

    def fill(self, loop: Loop, saved: str, text: str, depth: int, out: _Lines) -> None:
        """``saved[slot] = text`` in the forward ``loop``, or ``saved.append(text)``
        where a while loop's list grows by this statement."""
        if saved in self.appending.get(loop, ()):
            out.code(f"{saved}.append({text})", depth)
            self.trace.grow(saved, self.tape_key(loop, saved))
            return
        out.code(f"{saved}[{self.layout.slot(loop, forward=True)}] = {text}", depth)
        self.trace.read(saved, self.tape_key(loop, saved))
        self.slot_reads(loop, forward=True)

    # -- forward --------------------------------------------------------------------

    def forward(self) -> list[str]:
        out = _Lines()
        self.forward_block(self.layout.function.body, 1, out, None)
        return out.lines

    def value(self, atom: Atom) -> Expr:
        if isinstance(atom, Var) and atom in self.folded:
            return self.folded[atom]
        return atom

    def forward_block(
        self, statements: tuple[Stmt, ...], depth: int, out: _Lines, loop: Loop | None
    ) -> None:
        layout = self.layout
        skip = 0
        for position, stmt in enumerate(statements):
            if skip:
                skip -= 1
                continue
            if isinstance(stmt, Let):
                items = self.unpacked(statements, position)
                if items:
                    self.forward_unpack(stmt, items, depth, out, loop)
                    skip = len(items)
                    continue
                self.forward_let(stmt, depth, out, loop)
            elif isinstance(stmt, Branch):
                self.forward_branch(stmt, depth, out, loop)
            else:
                if (
                    any(v in layout.live for v in _loop_values(stmt))
                    or stmt.index in layout.live
                ):
                    self.forward_loop(stmt, depth, out)

    def forward_let(self, let: Let, depth: int, out: _Lines, loop: Loop | None) -> None:
        layout = self.layout
        target = let.target
        if let.op in ("copied", "written"):
            self.forward_copied(let, depth, out, loop)
            return
        if target not in layout.live and not (
            target.shape == "list" and self._list_live(target)
        ):
            return
        args = tuple(self.value(a) for a in let.args)
        if target not in layout.stored and target.shape == "scalar":
            self.folded[target] = Apply(let.op, args)
            return
        name = self.namer.name(target)
        trace = self.trace
        trace.at(let.origin.text)
        for arg in args:
            self.reads(arg)
        if let.op == "setitem":
            text = f"{name}[{self.print(args[1])}] = {self.print(args[2])}"
            trace.read(name, self.key(target))
        elif let.op == "append":
            text = f"{name}.append({self.print(args[1])})"
            trace.read(name, self.key(target))
        elif let.op.startswith("call:") and target in layout.partials_needed:
            callee = let.op.removeprefix("call:")
            call = self.print(Apply(let.op, args)).replace(
                f"{callee}(", f"{callee}_grad(", 1
            )
            partials_name = self.namer.partials_name(target)
            text = f"{name}, {partials_name} = {call}"
            trace.write(name, self.key(target))
            trace.write(partials_name, ("partials", target))
        else:
            text = f"{name} = {self.print(Apply(let.op, args))}"
            trace.write(name, self.key(target))
        out.statement(let.origin, text, depth)
        if loop is not None and target in layout.tapes.get(loop, []):
            self.save(loop, target, depth, out)
        if target in layout.partials_needed and loop is not None:
            partials = layout.partials_of(target)
            if partials in layout.tapes.get(loop, []):
                saved = layout.tape_name(loop, partials)
                partials_name = self.namer.name(partials)
                trace.read(partials_name, ("partials", target))
                self.fill(loop, saved, partials_name, depth, out)
                trace.fill(saved, partials)

    def unpacked(self, statements: tuple[Stmt, ...], position: int) -> list[Let]:
        """``x, y = h(...)``: the element reads right after a helper call that
        returns a tuple, when they are its only use and each is stored (the
        tuple then needs no name of its own)."""
        layout = self.layout
        call = statements[position]
        assert isinstance(call, Let)
        size = dict(layout.function.tuple_sizes).get(call.target)
        if size is None or layout.uses.get(call.target, 0) != size:
            return []
        if call.target in layout.reverse_reads:
            return []
        items = list(statements[position + 1 : position + 1 + size])
        for k, item in enumerate(items):
            if not (
                isinstance(item, Let)
                and item.op == "getitem"
                and item.args == (call.target, Const(str(k), k))
                and item.origin == call.origin
                and item.target in layout.stored
            ):
                return []
        return items  # type: ignore[return-value]

    def forward_unpack(
        self, call: Let, items: list[Let], depth: int, out: _Lines, loop: Loop | None
    ) -> None:
        trace = self.trace
        trace.at(call.origin.text)
        args = tuple(self.value(a) for a in call.args)
        for arg in args:
            self.reads(arg)
        names = [self.namer.name(item.target) for item in items]
        for name, item in zip(names, items, strict=True):
            trace.write(name, self.key(item.target))
        text = f"{', '.join(names)} = {self.print(Apply(call.op, args))}"
        out.statement(call.origin, text, depth)
        for item in items:
            if loop is not None and item.target in self.layout.tapes.get(loop, []):
                self.save(loop, item.target, depth, out)

    def forward_copied(
        self, let: Let, depth: int, out: _Lines, loop: Loop | None
    ) -> None:
        """A statement copied as written, renamed to the output's names; each value
        it binds is saved for the reverse like any other (``written``)."""
        copied = let.copied
        if copied is None:  # `written`: the statement before it bound the name
            if loop is not None and let.target in self.layout.tapes.get(loop, []):
                self.save(loop, let.target, depth, out)
            return
        trace = self.trace
        trace.at(let.origin.text)
        copies, text = copied_lines(
            copied,
            let.args,
            lambda atom: self.print(self.value(atom)),
            self.namer.name,
            self.namer.claim,
        )
        for name, old, var in copies:
            self.reads(self.value(old))
            trace.write(name, self.key(var))
            out.code(f"{name} = {self.print(self.value(old))}", depth)
        for arg in let.args:
            self.reads(self.value(arg))
        for _, var in copied.writes:
            trace.write(self.namer.name(var), self.key(var))
        if copied.part:  # `array = np.array([1.0, 2.0])` out of a larger statement
            out.comment(let.origin, depth)
        else:
            out.last_origin[depth] = let.origin  # the statement quotes itself
        out.code(text, depth)

    def save(self, loop: Loop, var: Var, depth: int, out: _Lines) -> None:
        """``var_saved[slot] = var``: this iteration's value, for the reverse."""
        name = self.namer.name(var)
        saved = self.layout.tape_name(loop, var)
        self.trace.read(name, self.key(var))
        self.fill(loop, saved, name, depth, out)
        self.trace.fill(saved, var)

    def _list_live(self, var: Var) -> bool:
        root = self.layout.roots.get(var, var)
        return any(v in self.layout.live for v in self.layout.versions[root])

    def copy(self, target: Var, source: Atom, depth: int, out: _Lines) -> None:
        if target.shape == "list" and target in self.layout.sweep.rebound:
            self.rebind([(target, source)], depth, out)  # type: ignore[list-item]
            return
        if target.shape == "list":
            # no copy is printed: the target's name must hold the source's list
            self.trace.read(self.namer.name(target), self.key(source))  # type: ignore[arg-type]
            return
        name = self.namer.name(target)
        value = self.value(source)
        if isinstance(value, Var) and self.namer.name(value) == name:
            self.trace.alias(name, self.key(value), self.key(target))
            return
        self.reads(value)
        self.trace.write(name, self.key(target))
        out.code(f"{name} = {self.print(value)}", depth)

    def rebind(self, pairs: list[tuple[Var, Var]], depth: int, out: _Lines) -> None:
        """Names of rebound lists take their new lists all at once (``u, u_new =
        u_new, u``); a name that holds its list already prints nothing."""
        names = [(self.namer.name(t), self.namer.name(s), t, s) for t, s in pairs]
        for target_name, source_name, target, source in names:
            if target_name == source_name:
                self.trace.alias(target_name, self.key(source), self.key(target))
        moved = [n for n in names if n[0] != n[1]]
        if not moved:
            return
        for _, source_name, _, source in moved:
            self.trace.read(source_name, self.key(source))
        for target_name, _, target, _ in moved:
            self.trace.write(target_name, self.key(target))
        left = ", ".join(n[0] for n in moved)
        right = ", ".join(n[1] for n in moved)
        out.code(f"{left} = {right}", depth)

    def forward_branch(
        self, branch: Branch, depth: int, out: _Lines, loop: Loop | None
    ) -> None:
        layout = self.layout
        live_merges = [p for p in branch.merges if p.target in layout.live]
        sides = []
        events = []
        for block, pick in ((branch.then, 0), (branch.orelse, 1)):
            side = _Lines()
            side.last_origin = dict(out.last_origin)
            side.header = dict(out.header)
            side.open_block(depth, branch.origin)
            with self.trace.capture() as side_events:
                self.forward_block(block, depth + 1, side, loop)
                for phi in live_merges:
                    self.copy(
                        phi.target,
                        phi.first if pick == 0 else phi.second,
                        depth + 1,
                        side,
                    )
            sides.append(side.lines)
            events.append(side_events)
        then_lines, else_lines = sides
        if not then_lines and not else_lines:
            # nothing printed, but copies left out still hold on both paths
            self.trace.branch(id(branch), *events)
            for phi in live_merges:
                if loop is not None and phi.target in layout.tapes.get(loop, []):
                    self.save(loop, phi.target, depth, out)
            return
        self.trace.at(branch.origin.text)
        self.reads(self.value(branch.condition))
        self.trace.branch(id(branch), *events)
        condition = self.print(self.value(branch.condition))
        out.comment(branch.origin, depth)
        out.code(f"if {condition}:", depth)
        out.lines.extend(then_lines or ["    " * (depth + 1) + "pass"])
        if else_lines:
            out.code("else:", depth)
            out.lines.extend(else_lines)
        out.open_block(depth - 1)
        out.last_origin[depth] = None
        for phi in live_merges:
            if loop is not None and phi.target in layout.tapes.get(loop, []):
                self.save(loop, phi.target, depth, out)

    def forward_loop(self, loop: Loop, depth: int, out: _Lines) -> None:
        layout = self.layout
        enclosing = layout.parent.get(loop)
        trace = self.trace
        out.comment(loop.origin, depth)
        trace.at(loop.origin.text)
        for phi in loop.carried:
            if phi.target in layout.live or (
                phi.target in layout.sweep.rebound and self._list_live(phi.target)
            ):
                self.copy(phi.target, phi.first, depth, out)
        for bound in loop.bounds:
            self.reads(layout.atom_expr(bound, self.folded))
        for saved in layout.saved_lists(loop):
            trip, read = layout.trip_count(loop, self.folded)
            out.code(f"{saved} = {trip}", depth)
            if loop.test is None:
                self.reads(read)
            trace.write(saved, self.tape_key(loop, saved))
            if enclosing is not None:
                by = layout.by_name(enclosing, saved)
                self.fill(enclosing, by, saved, depth, out)
        trips = self.namer.name(loop.trips) if loop.trips is not None else None
        if trips is not None:
            # the iterations run, for the reverse sweep to run as many
            out.code(f"{trips} = 0", depth)
            trace.write(trips, self.key(loop.trips))  # type: ignore[arg-type]
        slotted: list[str] = []
        if loop.test is not None:
            appended, slotted = layout.growing(loop)
            self.appending[loop] = appended
        with trace.capture() as test:
            test_lines = _Lines()
            test_lines.header = dict(out.header)
            test_lines.open_block(depth, loop.origin)
            self.forward_block(loop.body[: loop.test_size], depth + 1, test_lines, loop)
            if loop.test is not None:
                condition = self.value(loop.test)
                self.reads(condition)
        if loop.test is None:
            header = (
                f"for {self.namer.name(loop.index)} in range({self.range_text(loop)}):"
            )
        elif test_lines.lines:  # the test needs statements: they run first
            header = "while True:"
        else:
            header = f"while {self.print(condition)}:"
        out.code(header, depth)
        out.open_block(depth, loop.origin)
        if test_lines.lines:
            out.lines.extend(test_lines.lines)
            out.code(f"if {self.print(Apply('not', (condition,)))}:", depth + 1)
            out.code("break", depth + 2)
        with trace.capture() as body:
            if loop.test is None:
                trace.write(self.namer.name(loop.index), self.key(loop.index))
            for saved in slotted:  # a slot for this iteration, filled in a branch
                out.code(f"{saved}.append(0.0)", depth + 1)
                trace.grow(saved, self.tape_key(loop, saved))
            for phi in loop.carried:
                if phi.target in layout.tapes.get(loop, []):
                    self.save(loop, phi.target, depth + 1, out)
            size = len(out.lines)
            self.forward_block(loop.body[loop.test_size :], depth + 1, out, loop)
            rebound = layout.sweep.rebound
            for phi in loop.carried:
                if phi.target in layout.live and phi.target not in rebound:
                    self.copy(phi.target, phi.second, depth + 1, out)
            self.rebind(
                [
                    (phi.target, phi.second)  # type: ignore[misc]
                    for phi in loop.carried
                    if phi.target in rebound and self._list_live(phi.target)
                ],
                depth + 1,
                out,
            )
            if trips is not None:
                out.code(f"{trips} += 1", depth + 1)
                trace.read(trips, self.key(loop.trips))  # type: ignore[arg-type]
                trace.write(trips, self.key(loop.trips))  # type: ignore[arg-type]
            if loop.exit_flag is not None:
                flag = self.value(loop.exit_flag)
                self.reads(flag)
                out.code(f"if {self.print(flag)}:", depth + 1)
                out.code("break", depth + 2)
        exits = tuple(
            (phi.target, phi.exit) for phi in loop.carried if phi.exit is not None
        )
        trace.loop(
            body,
            iteration_values(loop),
            exits,
            test=test,
            breaks=loop.exit_flag is not None,
            grown=layout.saved_lists(loop) if loop.test is not None else (),
        )
        if len(out.lines) == size and not layout.tapes.get(loop):
            out.code("pass", depth + 1)
        out.last_origin[depth] = None
        if enclosing is not None:
            # values after this loop that the enclosing loop's reverse reads
            for phi in loop.carried:
                if phi.exit in layout.tapes.get(enclosing, []):
                    self.save(enclosing, phi.exit, depth, out)
            if loop.trips in layout.tapes.get(enclosing, []):
                self.save(enclosing, loop.trips, depth, out)  # type: ignore[arg-type]

    def range_text(self, loop: Loop) -> str:
        return self.layout.range_args(loop, self.folded)

    # -- reverse --------------------------------------------------------------------

    def reverse(self) -> list[str]:
        out = _Lines()
        layout = self.layout
        self.trace.at("the start of the reverse sweep")
        params = [p for p in layout.function.params if p.shape == "list"]
        self.list_adjoints(params + self.made_here(layout.function.body), 1, out)
        self.reverse_block(layout.sweep.statements, 1, out)
        for var in layout.sweep.unused_wrt:
            if var.shape == "list":
                continue
            origin = Origin(f"{var.base} does not affect the result", -1)
            zero = "0.0"
            if self.layout.uses.get(var, 0) == 0 and not layout.numpy:
                # never read, so it may be a list: its entry has its shape
                name = self.namer.name(var)
                zero = (
                    f"[0.0] * len({name}) if isinstance({name}, (list, tuple)) else 0.0"
                )
            out.statement(origin, f"{self.namer.bar_name(var)} = {zero}", 1)
            self.trace.write(self.namer.bar_name(var), self.bar_key(var))
        return out.lines

    def made_here(self, statements: tuple[Stmt, ...]) -> list[Var]:
        """The lists a block makes, and the rebound lists of its loops (their
        adjoint lists start where the block's reverse starts)."""
        rebound = [
            self.layout.roots.get(phi.target, phi.target)
            for stmt in statements
            if isinstance(stmt, Loop)
            for phi in stmt.carried
            if phi.target in self.layout.sweep.rebound
        ]
        return _lists_made(statements) + rebound

    def list_adjoints(self, made: list[Var], depth: int, out: _Lines) -> None:
        """Zeroed adjoint lists for the active lists a block makes, at the start of
        its reverse (a list made in a branch or a loop body exists only there)."""
        for root in made:
            if root not in self.layout.sweep.list_roots:
                continue
            if root in self.layout.sweep.moved:
                continue  # its adjoint list is handed over by a rebound list
            bar, name = self.namer.bar_name(root), self.namer.name(root)
            size = dict(self.layout.function.tuple_sizes).get(root)
            if size is not None:  # a helper's tuple: its size is known
                out.code(f"{bar} = [0.0] * {size}", depth)
            else:
                out.code(f"{bar} = [0.0] * len({name})", depth)
                self.trace.read(name, self.key(root))
            self.trace.write(bar, self.bar_key(root))

    def subtracted(self, expr: Expr, text: str) -> tuple[str, str]:
        """``-= m`` for an accumulation of ``-m`` (no ``+= -m``), else ``+= text``."""
        magnitude = negated(expr)
        if magnitude is None:
            return "+=", text
        return "-=", self.rprint(magnitude)

    def _accumulated(self, expr: Expr, bar: str) -> tuple[Expr, bool]:
        """The term added to ``bar`` and True when ``expr`` is ``bar`` plus a
        term (floats: no array shares the name), else ``expr`` and False."""
        if isinstance(expr, Apply) and expr.op == "add":
            for k in (0, 1):
                term = expr.args[k]
                if isinstance(term, Bar) and self.namer.bar_name(term.var) == bar:
                    self.reads(term)
                    return expr.args[1 - k], True
        return expr, False

    def reverse_block(
        self, statements: tuple[ReverseStmt, ...], depth: int, out: _Lines
    ) -> None:
        trace = self.trace
        for stmt in statements:
            trace.at(stmt.origin.text)
            if isinstance(stmt, AdjointAssign):
                operator = "+=" if stmt.accumulate else "="
                bar = self.namer.bar_name(stmt.var)
                expr = self.layout.cheap(stmt.expr)
                lender = self.lenders.get(stmt.var)
                if stmt.var in self.layout.sweep.split and not stmt.accumulate:
                    # a new array from the first operand, the second multiplied
                    # (or added) into it in place (sweeps/inplace.py)
                    assert isinstance(expr, Apply)
                    first, expr = expr.args[0], expr.args[1]
                    self.reads(first)
                    trace.write(bar, self.bar_key(stmt.var))
                    out.statement(stmt.origin, f"{bar} = {self.rprint(first)}", depth)
                    operator = OPS[stmt.expr.op].symbol + "="  # type: ignore[union-attr]
                    trace.read(bar, self.bar_key(stmt.var))
                elif lender is not None and not stmt.accumulate:
                    # the lender's array updated in place (sweeps/inplace.py):
                    # the one name both adjoints have
                    assert isinstance(expr, Apply) and expr.args[0] == Bar(lender)
                    operator, expr = OPS[expr.op].symbol + "=", expr.args[1]
                    trace.read(bar, self.bar_key(lender))
                elif (
                    stmt.accumulate
                    and self.layout.numpy
                    and stmt.var not in self.layout.sweep.in_place
                ):
                    # arrays: a new sum, never an in-place add into a shared array
                    operator = "="
                    expr = simplify(Apply("add", (Bar(stmt.var), expr)))
                added = False
                if operator == "=" and not self.layout.numpy:
                    # x_bar = x_bar + e with one name for both adjoints: x_bar += e
                    expr, added = self._accumulated(expr, bar)
                value = self.rprint(expr)
                if operator == "=" and bar == value:
                    # the carried adjoint was updated in place
                    assert isinstance(expr, Bar)
                    trace.alias(bar, self.bar_key(expr.var), self.bar_key(stmt.var))
                    continue
                self.reads(expr)
                if operator == "+=":
                    trace.read(bar, self.bar_key(stmt.var))
                    operator, value = self.subtracted(expr, value)
                if added:
                    operator, value = self.subtracted(expr, value)
                trace.write(bar, self.bar_key(stmt.var))
                out.statement(stmt.origin, f"{bar} {operator} {value}", depth)
            elif isinstance(stmt, ElementAdjoint):
                operator = "+=" if stmt.accumulate else "="
                index_expr = self.layout.cheap(stmt.index, everywhere=True)
                index = self.print(index_expr)
                value_expr = self.layout.cheap(stmt.expr)
                value = self.rprint(value_expr)
                bar = self.namer.bar_name(stmt.root)
                self.reads(index_expr)
                self.reads(value_expr)
                trace.read(bar, self.bar_key(stmt.root))
                if operator == "+=":
                    operator, value = self.subtracted(value_expr, value)
                out.statement(stmt.origin, f"{bar}[{index}] {operator} {value}", depth)
            elif isinstance(stmt, SpreadAdjoint):
                bar = self.namer.bar_name(stmt.root)
                value_expr = self.layout.cheap(stmt.expr)
                self.reads(value_expr)
                trace.read(bar, self.bar_key(stmt.root))
                value = self.rprint(value_expr)
                if not stmt.each and isinstance(value_expr, Apply):
                    # the same number for every element: computed once
                    each = self.namer.claim(f"{bar}_each")
                    out.statement(stmt.origin, f"{each} = {value}", depth)
                    value = each
                index = self.namer.claim(f"{bar}_index")
                out.statement(stmt.origin, f"for {index} in range(len({bar})):", depth)
                if stmt.each:
                    value = f"{value}[{index}]"
                out.code(f"{bar}[{index}] += {value}", depth + 1)
            elif isinstance(stmt, CallAdjoint):
                self.call_adjoint(stmt, depth, out)
            elif isinstance(stmt, PopAdjoint):
                bar = self.namer.bar_name(stmt.root)
                trace.read(bar, self.bar_key(stmt.root))
                text = f"{bar}.pop()"
                if stmt.var is not None:
                    var_bar = self.namer.bar_name(stmt.var)
                    if stmt.accumulate:
                        trace.read(var_bar, self.bar_key(stmt.var))
                    trace.write(var_bar, self.bar_key(stmt.var))
                    operator = "+=" if stmt.accumulate else "="
                    text = f"{var_bar} {operator} {text}"
                out.statement(stmt.origin, text, depth)
            elif isinstance(stmt, ReverseBranch):
                sides = []
                events = []
                forward = stmt.branch
                made = (
                    (self.made_here(forward.then), self.made_here(forward.orelse))
                    if forward is not None
                    else ([], [])
                )
                blocks = zip((stmt.then, stmt.orelse), made, strict=True)
                for number, (block, lists) in enumerate(blocks):
                    side = _Lines()
                    side.last_origin = dict(out.last_origin)
                    side.header = dict(out.header)
                    side.open_block(depth, stmt.origin)
                    with trace.capture() as side_events:
                        sunk = self.sunk.pop((id(stmt), number), None)
                        if sunk is not None:
                            loop, values, lets = sunk
                            for var in values:
                                self.restore(loop, var, depth + 1, side)
                            self.recomputed(lets, depth + 1, side)
                        if block:
                            self.list_adjoints(lists, depth + 1, side)
                        self.reverse_block(block, depth + 1, side)
                    sides.append(side.lines)
                    events.append(side_events)
                then_lines, else_lines = sides
                # a branch on a kink's condition (sweeps/selects.py) has no
                # forward branch: its sides go with no other branch's
                key = id(stmt.branch) if stmt.branch is not None else id(stmt)
                if not then_lines and not else_lines:
                    trace.branch(key, *events)
                    continue
                out.comment(stmt.origin, depth)
                condition_expr = self.layout.cheap(
                    stmt.condition, stmt.branch is not None
                )
                trace.at(stmt.origin.text)
                self.reads(condition_expr)
                trace.branch(key, *events)
                condition = self.rprint(condition_expr)
                out.code(f"if {condition}:", depth)
                out.lines.extend(then_lines or ["    " * (depth + 1) + "pass"])
                if else_lines:
                    out.code("else:", depth)
                    out.lines.extend(else_lines)
                # a kink's branch is part of its statement's lines: what follows
                # from the same statement stays under the one comment
                out.last_origin[depth] = stmt.origin if stmt.branch is None else None
            else:
                self.reverse_loop(stmt, depth, out)

    def call_adjoint(self, stmt: CallAdjoint, depth: int, out: _Lines) -> None:
        """``a_1_bar, b_1_bar = NAME_adjoint(a, b, seed)``."""
        args = [self.layout.cheap(a) for a in stmt.args]
        seed = self.layout.cheap(stmt.seed)
        for expr in (*args, seed):
            self.reads(expr)
        # by keyword: after parameters with defaults the seed is keyword-only
        texts = [self.rprint(a) for a in args] + [f"seed={self.rprint(seed)}"]
        call = f"{stmt.callee}_adjoint({', '.join(texts)})"
        names = [self.namer.bar_name(part) for part in stmt.parts]
        for name, part in zip(names, stmt.parts, strict=True):
            self.trace.write(name, self.bar_key(part))
        if len(names) == 1:
            text = f"{names[0]} = {call}[0]"
        else:
            text = f"{', '.join(names)} = {call}"
        out.statement(stmt.origin, text, depth)

    def recomputed(self, lets: list[Let], depth: int, out: _Lines) -> None:
        """The forward values a reverse loop recomputes instead of restoring."""
        for let in lets:
            name = self.namer.name(let.target)
            self.restored.add(name)
            args = tuple(self.layout.cheap(a) for a in let.args)
            for arg in args:
                self.reads(arg)
            self.trace.write(name, self.key(let.target))
            out.code(f"{name} = {self.print(Apply(let.op, args))}", depth)

    def restore(self, loop: Loop, var: Var, depth: int, out: _Lines) -> None:
        """``name = saved[slot]``: the value ``loop``'s forward saved for this
        iteration."""
        layout = self.layout
        name, saved = self.namer.name(var), layout.tape_name(loop, var)
        self.restored.add(name)
        out.code(f"{name} = {saved}[{layout.slot(loop)}]", depth)
        self.trace.read(saved, self.tape_key(loop, saved))
        self.slot_reads(loop)
        call = layout.partials_call.get(var)
        key = ("partials", call) if call is not None else self.key(var)
        self.trace.restore(name, saved, var, key)

    def reverse_loop(self, stmt: ReverseLoop, depth: int, out: _Lines) -> None:
        layout = self.layout
        loop = stmt.loop
        body = _Lines()
        body.header = dict(out.header)
        body.open_block(depth, stmt.origin)
        restored = set(self.restored)
        trace = self.trace
        sunk = sunk_values(layout, stmt)
        for side, (values, lets) in sunk.items():
            self.sunk[side] = (loop, values, lets)
        in_sides = {v for values, _ in sunk.values() for v in values}
        lets_in_sides = [let for _, lets in sunk.values() for let in lets]
        with trace.capture() as body_events:
            self.reverse_block(stmt.body, depth + 1, body)
        if not body.lines:
            self.restored = restored
            # nothing printed; copies left out of an adjoint still hold
            trace.extend([e for e in body_events if not isinstance(e, tuple)])
            return  # every adjoint passes through the loop unchanged
        out.comment(stmt.origin, depth)
        index = self.namer.name(loop.index)
        trace.at(stmt.origin.text)
        self.recomputed(layout.hoisted.get(loop, []), depth, out)
        for bound in reverse_bounds(loop):
            self.reads(layout.cheap(bound, everywhere=True))
        out.code(
            f"for {index} in reversed(range({layout.range_args(loop)})):",
            depth,
        )
        out.open_block(depth, stmt.origin)
        slot = layout.slot(loop)
        with trace.capture() as head:
            trace.write(index, self.key(loop.index))
            for var in layout.tapes.get(loop, []):
                if var not in in_sides:
                    self.restore(loop, var, depth + 1, out)
            self.list_adjoints(self.made_here(loop.body), depth + 1, out)
            for child in layout.children.get(loop, []):
                for saved in layout.saved_lists(child):
                    by = layout.by_name(loop, saved)
                    out.code(f"{saved} = {by}[{slot}]", depth + 1)
                    trace.read(by, self.tape_key(loop, by))
                    self.slot_reads(loop)
                    trace.write(saved, self.tape_key(child, saved))
                    # the inner loop's slots, as that iteration of this loop filled
                    # them (the by-list keeps each list it made: trusted here)
                    for var in layout.tapes_of(child, saved):
                        trace.fill(saved, var)
            recomputed = layout.recompute.get(loop, [])
            lets = [let for let in recomputed if let not in lets_in_sides]
            self.recomputed(lets, depth + 1, out)
        trace.loop(head + body_events, layout.iteration_local(loop))
        out.lines.extend(body.lines)
        out.last_origin[depth] = None


def _lists_made(statements: tuple[Stmt, ...]) -> list[Var]:
    """The lists a block makes itself (not in blocks nested in it)."""
    return [
        s.target
        for s in statements
        if isinstance(s, Let)
        and (
            s.op in ("newlist", "listlit")
            or (s.op.startswith("call:") and s.target.shape == "list")
        )
    ]


def _loop_values(loop: Loop) -> Iterator[Var]:
    for phi in loop.carried:
        yield phi.target
        if phi.exit is not None:
            yield phi.exit
    yield from _block_values(loop.body)


def _block_values(statements: tuple[Stmt, ...]) -> Iterator[Var]:
    for stmt in statements:
        if isinstance(stmt, Let):
            yield stmt.target
        elif isinstance(stmt, Loop):
            yield from _loop_values(stmt)
        else:
            for phi in stmt.merges:
                yield phi.target
            # a guard deep in branches is live though no value leaves them
            yield from _block_values(stmt.then)
            yield from _block_values(stmt.orelse)


def lay_out(
    function: SSAFunction,
    sweep: ReverseSweep,
    namer: Namer,
    printer: Printer,
    active: set[Var],
    reverse_printer: Printer | None = None,
    share_names: bool = True,
) -> tuple[list[str], list[str], tuple[Expr, ...]]:
    """Forward lines, reverse lines and the result expressions.

    ``reverse_printer`` prints the reverse sweep's own expressions (NumPy spellings
    in an array model); the forward sweep's always print as the source wrote them.
    """
    # an array model returns its parameters' adjoints through _gw_shaped
    shaped = reverse_printer is not None
    layout = Layout(function, sweep, namer, printer, active, share_names, shaped)
    layout.reverse_printer = reverse_printer or printer
    layout.numpy = (
        reverse_printer is not None and reverse_printer.where_call is not None
    )
    emitter = _Emitter(layout)
    trace = emitter.trace
    for param in function.params:
        trace.write(namer.name(param), emitter.key(param))
    for seed in sweep.seeds:
        trace.write(namer.name(seed), emitter.key(seed))
    forward = emitter.forward()
    result = [emitter.value(a) for a in function.result.values]
    with trace.capture() as reverse_events:
        reverse = emitter.reverse()
    # a returned value whose name the reverse sweep reuses is kept aside first
    trace.at(function.result.origin.text)
    for k, value in enumerate(result):
        if isinstance(value, Var) and namer.name(value) in emitter.restored:
            keep = namer.claim("value")
            forward.append(f"    # {function.result.origin.text}")
            forward.append(format_statement(f"{keep} = {namer.name(value)}", 1))
            trace.read(namer.name(value), emitter.key(value))
            trace.write(keep, emitter.key(value))
            result[k] = Const(keep, None)
            reverse_events.append(("read", keep, emitter.key(value), "the result"))
        else:
            with trace.capture() as reads:
                emitter.reads(value)
            reverse_events.extend(reads)
    trace.extend(reverse_events)
    trace.at("the gradient returned")
    for var in sweep.wrt:
        trace.read(namer.bar_name(var), emitter.bar_key(var))
    violations = check(trace)
    if violations:
        raise LayoutError(function.name, violations)
    return forward, reverse, tuple(result)


class LayoutError(Exception):
    """The printed sweeps would read a name that does not hold its value."""

    def __init__(self, function: str, violations: list[Violation]) -> None:
        self.function = function
        self.violations = violations
        details = "; ".join(v.describe() for v in violations[:3])
        super().__init__(f"layout check failed in '{function}': {details}")
