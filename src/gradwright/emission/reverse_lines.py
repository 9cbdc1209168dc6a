"""The reverse sweep's lines: adjoint statements, with the values each loop
restores from its saved lists or recomputes, in the forward's structure reversed."""

from __future__ import annotations

from collections import Counter
from functools import cached_property

from gradwright.calculus.algebra import negated, simplify
from gradwright.calculus.primitives import OPS
from gradwright.emission.emitting import EmitterBase, Lines, negation
from gradwright.emission.layout_check import mentions
from gradwright.emission.layout_tapes import reverse_bounds
from gradwright.emission.sinking import sunk_values
from gradwright.ir import (
    AdjointAssign,
    Apply,
    Bar,
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
    SpreadAdjoint,
    Stmt,
    Var,
)


class ReverseLines(EmitterBase):
    """Prints the reverse sweep (a part of the emitter)."""

    def reverse(self) -> list[str]:
        out = Lines()
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

    def list_adjoints(self, made: list[Var], depth: int, out: Lines) -> None:
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
                self.zeroed[bar] = (out, len(out.lines) - 1, self.trace.block, root)
            self.trace.write(bar, self.bar_key(root))

    def spread_on_zeros(self, bar: str, value: str, depth: int, out: Lines) -> bool:
        """The same number added to each element of a list of zeros no statement
        has touched since (``xs_bar = [0.0] * len(xs)``, then ``sum(xs)``'s
        adjoint): the list is made holding it. True when printed so."""
        if bar not in self.zeroed:
            return False
        made_in, line, events, root = self.zeroed.pop(bar)
        trace = self.trace
        if made_in is not out or events is not trace.block:
            return False  # another block: it may run any number of times
        written = [
            k
            for k, event in enumerate(events)
            if isinstance(event, tuple) and event[0] == "write" and event[1] == bar
        ]
        if len(written) != 1 or mentions(events[written[0] + 1 :], bar):
            return False
        del events[written[0]]  # the zeros are never made
        del out.lines[line]
        for other, (lines, at, block, var) in self.zeroed.items():
            if lines is out and at > line:
                self.zeroed[other] = (lines, at - 1, block, var)
        name = self.namer.name(root)
        trace.read(name, self.key(root))
        trace.write(bar, self.bar_key(root))
        out.code(f"{bar} = [{value}] * len({name})", depth)
        return True

    def subtracted(self, expr: Expr, text: str) -> tuple[str, str]:
        """``-= m`` for an accumulation of ``-m`` (no ``+= -m``), else ``+= text``."""
        magnitude = negated(expr)
        if magnitude is None:
            return "+=", text
        return "-=", self.rprint(magnitude)

    def _accumulated(self, expr: Expr, bar: str) -> tuple[Expr, bool]:
        """The term added to ``bar`` and True when ``expr`` is ``bar`` plus (or
        minus) a term (floats: no array shares the name), else ``expr`` and False."""
        if isinstance(expr, Apply) and expr.op == "add":
            for k in (0, 1):
                term = expr.args[k]
                if isinstance(term, Bar) and self.namer.bar_name(term.var) == bar:
                    self.reads(term)
                    return expr.args[1 - k], True
        if isinstance(expr, Apply) and expr.op == "sub":
            # x_bar = x_bar - e: x_bar -= e (the same float: x + -e is x - e)
            term = expr.args[0]
            if isinstance(term, Bar) and self.namer.bar_name(term.var) == bar:
                self.reads(term)
                return Apply("neg", (expr.args[1],)), True
        return expr, False

    def reverse_block(
        self, statements: tuple[ReverseStmt, ...], depth: int, out: Lines
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
                    if lender is None or stmt.accumulate:  # (a lender's read is in)
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
                value = self.rprint(value_expr)
                if not stmt.each:
                    out.comment(stmt.origin, depth)
                    if self.spread_on_zeros(bar, value, depth, out):
                        continue
                trace.read(bar, self.bar_key(stmt.root))
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
                    side = Lines()
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
                out.if_lines(
                    self.rprint(condition_expr),
                    self.rprint(negation(condition_expr)),
                    then_lines,
                    else_lines,
                    depth,
                )
                # a kink's branch is part of its statement's lines: what follows
                # from the same statement stays under the one comment
                out.last_origin[depth] = stmt.origin if stmt.branch is None else None
            else:
                self.reverse_loop(stmt, depth, out)

    def call_adjoint(self, stmt: CallAdjoint, depth: int, out: Lines) -> None:
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

    @cached_property
    def element_rows(self) -> set[Var]:
        """Table rows the forward reads only element by element (a loop target's
        row): nothing but a recomputed element can read one in the reverse."""
        rows = {
            var
            for var, let in self.layout.defs.items()
            if let.op == "dataitem" and var.kind == "temp"
        }
        for let in self.layout.defs.values():
            if let.op == "dataitem" and isinstance(let.args[-1], Const):
                continue
            rows.difference_update(a for a in let.args if isinstance(a, Var))
        return rows

    @cached_property
    def recompute_readers(self) -> Counter[Var]:
        """How many of the lets any reverse loop recomputes read each value."""
        layout = self.layout
        lets = [
            let
            for table in (layout.recompute, layout.hoisted)
            for bucket in table.values()
            for let in bucket
        ]
        return Counter(a for let in lets for a in let.args if isinstance(a, Var))

    def recomputed(self, lets: list[Let], depth: int, out: Lines) -> None:
        """The forward values a reverse loop recomputes instead of restoring."""
        # a table row only one recomputed element reads is read in place:
        # `t = LOG[t_index][0]`, not a row name and an element of it
        here = Counter(a for let in lets for a in let.args if isinstance(a, Var))
        rows = {
            let.target: Apply(let.op, let.args)
            for let in lets
            if let.target in self.element_rows
            and here[let.target] == 1
            and self.recompute_readers[let.target] == 1
        }
        unpacked: set[Var] = set()
        self.share_recomputed(lets)
        for position, let in enumerate(lets):
            if let.target in rows or let.target in unpacked:
                continue
            items = self._row_items(lets, position, here)
            if items:
                # every element of a loop target's row, unpacked as the forward
                # sweep writes it: `ocv, r = CELLS[ocv_index]`
                names = [self.namer.name(item.target) for item in items]
                self.restored.update(names)
                row = self.layout.cheap(Apply(let.op, let.args))
                self.reads(row)
                for name, item in zip(names, items, strict=True):
                    self.trace.write(name, self.key(item.target))
                out.code(f"{', '.join(names)} = {self.print(row)}", depth)
                unpacked.update(item.target for item in items)
                continue
            first = self.recomputed_as.get(let.target)
            if first is not None:  # the same value, made by an earlier let
                name = self.namer.name(first)
                self.trace.alias(name, self.key(first), self.key(let.target))
                continue
            name = self.namer.name(let.target)
            self.restored.add(name)
            args = tuple(self.layout.cheap(rows.get(a, a)) for a in let.args)
            for arg in args:
                self.reads(arg)
            self.trace.write(name, self.key(let.target))
            out.code(f"{name} = {self.print(Apply(let.op, args))}", depth)

    def share_recomputed(self, lets: list[Let]) -> None:
        """Each value recomputed once: a let making what an earlier one of
        ``lets`` made (the same operation of the same values; the source's
        ``span / (2.0 * a)`` written three times) is printed under that one's
        name and not made again. Decided before anything reads the names (a
        loop's body is printed before its head); the readable layout only, the
        fallback keeps every value under a name of its own."""
        if not self.layout.share_names:
            return
        made: dict[tuple, Var] = {}
        for let in lets:
            if let.target in self.recomputed_as:
                continue
            key = (
                let.op,
                tuple(self.recomputed_as.get(a, a) for a in let.args),  # type: ignore[call-overload]
            )
            first = made.setdefault(key, let.target)
            if first is not let.target:
                self.recomputed_as[let.target] = first
                self.namer.names[let.target] = self.namer.name(first)

    def _row_items(
        self, lets: list[Let], position: int, here: Counter[Var]
    ) -> list[Let]:
        """The element reads right after the row ``lets[position]``, when they
        are every element the forward sweep reads of it, in order, and nothing
        else reads the row."""
        row = lets[position].target
        size = self.layout.uses.get(row, 0)
        if row not in self.element_rows or size < 2 or here[row] != size:
            return []
        items = lets[position + 1 : position + 1 + size]
        if self.recompute_readers[row] != size or len(items) != size:
            return []
        for k, item in enumerate(items):
            if item.op != "dataitem" or item.args != (row, Const(str(k), k)):
                return []
        return items

    def restore(self, loop: Loop, var: Var, depth: int, out: Lines) -> None:
        """``name = saved[slot]``: the value ``loop``'s forward saved for this
        iteration (a record's values all at once, at the first of them)."""
        layout = self.layout
        saved = layout.tape_name(loop, var)
        members = layout.records.get(loop, [])
        if var in members:
            if var != members[0]:
                return
        else:
            members = [var]
        names = [self.namer.name(member) for member in members]
        self.restored.update(names)
        out.code(f"{', '.join(names)} = {saved}[{layout.slot(loop)}]", depth)
        self.trace.read(saved, self.tape_key(loop, saved))
        self.slot_reads(loop)
        for name, member in zip(names, members, strict=True):
            call = layout.partials_call.get(member)
            key = ("partials", call) if call is not None else self.key(member)
            self.trace.restore(name, saved, member, key)

    def reverse_loop(self, stmt: ReverseLoop, depth: int, out: Lines) -> None:
        layout = self.layout
        loop = stmt.loop
        body = Lines()
        body.header = dict(out.header)
        body.open_block(depth, stmt.origin)
        restored = set(self.restored)
        trace = self.trace
        sunk = sunk_values(layout, stmt)
        for side, (values, lets) in sunk.items():
            self.sunk[side] = (loop, values, lets)
        in_sides = {v for values, _ in sunk.values() for v in values}
        lets_in_sides = [let for _, lets in sunk.values() for let in lets]
        lets = [
            let for let in layout.recompute.get(loop, []) if let not in lets_in_sides
        ]
        self.share_recomputed(layout.hoisted.get(loop, []))
        self.share_recomputed(lets)
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
            f"for {index} in {layout.reverse_range(loop)}:",
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
