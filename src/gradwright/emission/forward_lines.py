"""The forward sweep's lines: the model's statements with the values the reverse
sweep needs stored, saved per loop iteration (``x_saved[i] = x``) or counted."""

from __future__ import annotations

import itertools
from collections.abc import Iterator
from functools import cached_property

from gradwright.calculus.primitives import OPS
from gradwright.emission.copied import copied_lines
from gradwright.emission.emitting import EmitterBase, Lines, negation
from gradwright.emission.layout_tapes import iteration_values
from gradwright.ir import (
    Apply,
    Atom,
    Branch,
    Const,
    Expr,
    Let,
    Loop,
    Stmt,
    Var,
)

#: operators a model may write as augmented assignments that print back so
_AUGMENT = frozenset({"add", "sub", "mul", "div"})


class ForwardLines(EmitterBase):
    """Prints the forward sweep (a part of the emitter)."""

    def fill(self, loop: Loop, saved: str, text: str, depth: int, out: Lines) -> None:
        """``saved[slot] = text`` in the forward ``loop``, or ``saved.append(text)``
        where a while loop's list grows by this statement."""
        if saved in self.appending.get(loop, ()):
            out.code(f"{saved}.append({text})", depth)
            self.trace.grow(saved, self.tape_key(loop, saved))
            return
        out.code(f"{saved}[{self.layout.slot(loop, forward=True)}] = {text}", depth)
        self.trace.read(saved, self.tape_key(loop, saved))
        self.slot_reads(loop, forward=True)

    def forward(self) -> list[str]:
        out = Lines()
        self.forward_block(self.layout.function.body, 1, out, None)
        return out.lines

    def value(self, atom: Atom) -> Expr:
        if isinstance(atom, Var) and atom in self.folded:
            return self.folded[atom]
        return atom

    def forward_block(
        self, statements: tuple[Stmt, ...], depth: int, out: Lines, loop: Loop | None
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

    def forward_let(self, let: Let, depth: int, out: Lines, loop: Loop | None) -> None:
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
            augmented = self.augmented(let, name, args)
            text = augmented or f"{name} = {self.print(Apply(let.op, args))}"
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

    def augmented(self, let: Let, name: str, args: tuple[Expr, ...]) -> str | None:
        """``cost += e`` where the model wrote it so and the value keeps its name;
        numbers only (an array's ``+=`` would change the array wherever it is
        held)."""
        if self.layout.numpy or let.target.shape != "scalar" or let.op not in _AUGMENT:
            return None
        first, rest = args
        symbol = OPS[let.op].symbol
        text, base = let.origin.text, let.target.base
        written = text.startswith(base) and text[len(base) :].lstrip().startswith(
            f"{symbol}= "
        )
        if not (written and isinstance(first, Var) and self.namer.name(first) == name):
            return None
        return f"{name} {symbol}= {self.print(rest)}"

    def unpacked(self, statements: tuple[Stmt, ...], position: int) -> list[Let]:
        """``x, y = h(...)``: the element reads right after a helper call that
        returns a tuple, when they are its only use and each is stored (the
        tuple then needs no name of its own); likewise a table's row a loop
        target unpacks (``for t, amps, volts in LOG``), all its reads following it."""
        layout = self.layout
        whole = statements[position]
        assert isinstance(whole, Let)
        size = dict(layout.function.tuple_sizes).get(whole.target)
        after = statements[position + 1] if position + 1 < len(statements) else None
        row = (whole.op == "dataitem" and whole.target.kind == "temp") or (
            # a row of a list the model was given, read by a loop target
            whole.op == "getitem"
            and isinstance(after, Let)
            and after.op == "dataitem"
            and after.args == (whole.target, Const("0", 0))
        )
        if size is None and not row:
            return []
        op = "dataitem" if row else "getitem"
        items: list[Let] = []
        for item in itertools.islice(statements, position + 1, None):
            k = len(items)
            if not (
                isinstance(item, Let)
                and item.op == op
                and item.args == (whole.target, Const(str(k), k))
                and item.origin == whole.origin
            ):
                break
            items.append(item)
        if row:
            size = len(items) or None  # the row's reads are all there is of it
        if size is None or len(items) < size or layout.uses.get(whole.target) != size:
            return []
        if whole.target in layout.reverse_reads:
            return []
        items = items[:size]
        read = [item for item in items if item.target in layout.live]
        if not read or not all(item.target in layout.stored for item in read):
            return []
        return items

    def unread_name(self, var: Var) -> str:
        """The name an element nothing reads is unpacked into: the user's own
        (``v, decay = ...``) or ``_`` when no value the output prints may have
        that name, else a new one."""
        for name in (var.base, "_"):
            if self.name_free(name):
                self.namer.taken.add(name)
                return name
        return self.namer.fresh("unused" if var.base == "_" else var.base)

    def name_free(self, name: str) -> bool:
        """Whether no value of the function that the output prints can have
        ``name``: no parameter, no module-level name the function reads (a
        gettext ``_``), no loop index, no value the layout keeps of that name."""
        function = self.layout.function
        return not (
            name in function.constants
            or name in function.callees
            or name in self.kept_bases
            or name in self.namer.names.values()
        )

    @cached_property
    def kept_bases(self) -> set[str]:
        """The source names of the parameters, loop indices and kept values."""
        layout = self.layout
        names = layout.namer.names
        bases = {param.base for param in layout.function.params}
        bases |= {names.get(loop.index, loop.index.base) for loop in layout.parent}
        bases |= {
            value.base
            for value in _block_values(layout.function.body)
            if value in layout.live
        }
        return bases

    def forward_unpack(
        self, call: Let, items: list[Let], depth: int, out: Lines, loop: Loop | None
    ) -> None:
        trace = self.trace
        trace.at(call.origin.text)
        args = tuple(self.value(a) for a in call.args)
        for arg in args:
            self.reads(arg)
        names = [
            (
                self.namer.name(item.target)
                if item.target in self.layout.live
                else self.unread_name(item.target)
            )
            for item in items
        ]
        for name, item in zip(names, items, strict=True):
            # an unread element's name is written too: the check then sees a
            # value the name held before being overwritten
            trace.write(name, self.key(item.target))
        text = f"{', '.join(names)} = {self.print(Apply(call.op, args))}"
        out.statement(call.origin, text, depth)
        for item in items:
            if loop is not None and item.target in self.layout.tapes.get(loop, []):
                self.save(loop, item.target, depth, out)

    def forward_copied(
        self, let: Let, depth: int, out: Lines, loop: Loop | None
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

    def save(self, loop: Loop, var: Var, depth: int, out: Lines) -> None:
        """``var_saved[slot] = var``: this iteration's value, for the reverse;
        a record's values once the last of them is computed, as one tuple."""
        saved = self.layout.tape_name(loop, var)
        members = self.layout.records.get(loop, [])
        if var in members:
            self.recorded.add(var)
            if not self.recorded.issuperset(members):
                return
        else:
            members = [var]
        names = [self.namer.name(member) for member in members]
        for name, member in zip(names, members, strict=True):
            self.trace.read(name, self.key(member))
        text = names[0] if len(names) == 1 else f"({', '.join(names)})"
        self.fill(loop, saved, text, depth, out)
        for member in members:
            self.trace.fill(saved, member)

    def _list_live(self, var: Var) -> bool:
        root = self.layout.roots.get(var, var)
        return any(v in self.layout.live for v in self.layout.versions[root])

    def copy(self, target: Var, source: Atom, depth: int, out: Lines) -> None:
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

    def rebind(self, pairs: list[tuple[Var, Var]], depth: int, out: Lines) -> None:
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
        self, branch: Branch, depth: int, out: Lines, loop: Loop | None
    ) -> None:
        layout = self.layout
        live_merges = [p for p in branch.merges if p.target in layout.live]
        sides = []
        events = []
        for block, pick in ((branch.then, 0), (branch.orelse, 1)):
            side = Lines()
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
        condition = self.value(branch.condition)
        out.comment(branch.origin, depth)
        out.if_lines(
            self.print(condition),
            self.print(negation(condition)),
            then_lines,
            else_lines,
            depth,
        )
        out.open_block(depth - 1)
        out.last_origin[depth] = None
        for phi in live_merges:
            if loop is not None and phi.target in layout.tapes.get(loop, []):
                self.save(loop, phi.target, depth, out)

    def forward_loop(self, loop: Loop, depth: int, out: Lines) -> None:
        start, last_origin = len(out.lines), dict(out.last_origin)
        with self.trace.capture() as events:
            self._print_loop(loop, depth, out)
        code = [line for line in out.lines[start:] if not line.lstrip().startswith("#")]
        if loop.test is None and len(code) == 2 and code[1].strip() == "pass":
            # nothing the loop computes is read (the reverse reads only its
            # index, which its own loop makes): it is not printed at all
            del out.lines[start:]
            out.last_origin = last_origin
            return
        self.trace.extend(events)

    def _print_loop(self, loop: Loop, depth: int, out: Lines) -> None:
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
            test_lines = Lines()
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
            out.code(f"if {self.print(negation(condition))}:", depth + 1)
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
                if isinstance(flag, Const) and flag.text == "True":
                    out.code("break", depth + 1)  # every iteration returns
                elif not (
                    loop.exit_flag not in layout.reverse_reads
                    and _break_at_test(out.lines, self.print(flag), trips, depth + 1)
                ):
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


def _break_at_test(lines: list[str], flag: str, trips: str | None, depth: int) -> bool:
    """``if c: stop = True / else: stop = False`` closing the body (then the
    trip count's ``+= 1``) becomes ``if c: break`` after the count, the flag
    read nowhere else. True when the lines were changed so."""
    pad = "    " * depth
    count = [f"{pad}{trips} += 1"] if trips is not None else []
    end = len(lines) - len(count)
    if end < 4 or lines[end:] != count:
        return False
    test, then, other, orelse = lines[end - 4 : end]
    if not (
        test.startswith(f"{pad}if ")
        and test.endswith(":")
        and then == f"{pad}    {flag} = True"
        and other == f"{pad}else:"
        and orelse == f"{pad}    {flag} = False"
    ):
        return False
    start = end - 4
    if start > 0 and lines[start - 1].startswith(f"{pad}# "):
        start -= 1  # the comment quoting the test stays above it
    if any(flag in line for line in lines[:start]):
        return False
    lines[start:] = [*count, *lines[start : end - 3], f"{pad}    break"]
    return True


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
