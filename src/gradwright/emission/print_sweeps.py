"""Printing the laid-out sweeps: indented lines under comments quoting the source.

``lay_out`` is the entry point: it builds the :class:`~gradwright.layout.Layout` of
a function and prints its forward sweep (the stored values, with what each loop
saves for its reverse) and its reverse sweep (restores, recomputations and adjoint
statements), and gives the expressions the function returns.
"""

from __future__ import annotations

from collections.abc import Iterator

from gradwright.emission.formatting import format_statement
from gradwright.emission.layout import Layout
from gradwright.emission.naming import Namer
from gradwright.emission.printer import Printer
from gradwright.ir import (
    AdjointAssign,
    Apply,
    Atom,
    Bar,
    Branch,
    Const,
    ElementAdjoint,
    Expr,
    Let,
    Loop,
    Origin,
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
        for stmt in statements:
            if isinstance(stmt, Let):
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
        if target not in layout.live and not (
            target.shape == "list" and self._list_live(target)
        ):
            return
        args = tuple(self.value(a) for a in let.args)
        if target not in layout.stored and target.shape == "scalar":
            self.folded[target] = Apply(let.op, args)
            return
        name = self.namer.name(target)
        if let.op == "setitem":
            text = f"{name}[{self.print(args[1])}] = {self.print(args[2])}"
        elif let.op.startswith("call:") and target in layout.partials_needed:
            callee = let.op.removeprefix("call:")
            call = self.print(Apply(let.op, args)).replace(
                f"{callee}(", f"{callee}_grad(", 1
            )
            text = f"{name}, {self.namer.partials_name(target)} = {call}"
        else:
            text = f"{name} = {self.print(Apply(let.op, args))}"
        out.statement(let.origin, text, depth)
        if loop is not None and target in layout.tapes.get(loop, []):
            out.code(
                f"{layout.tape_name(loop, target)}[{layout.slot(loop)}] = {name}", depth
            )
        if target in layout.partials_needed and loop is not None:
            partials = layout.partials_of(target)
            if partials in layout.tapes.get(loop, []):
                slot = layout.slot(loop)
                saved = layout.tape_name(loop, partials)
                out.code(f"{saved}[{slot}] = {self.namer.name(partials)}", depth)

    def _list_live(self, var: Var) -> bool:
        root = self.layout.roots.get(var, var)
        return any(v in self.layout.live for v in self.layout.versions[root])

    def copy(self, target: Var, source: Atom, depth: int, out: _Lines) -> None:
        if target.shape == "list":
            return
        name = self.namer.name(target)
        value = self.value(source)
        if isinstance(value, Var) and self.namer.name(value) == name:
            return
        out.code(f"{name} = {self.print(value)}", depth)

    def forward_branch(
        self, branch: Branch, depth: int, out: _Lines, loop: Loop | None
    ) -> None:
        layout = self.layout
        live_merges = [p for p in branch.merges if p.target in layout.live]
        sides = []
        for block, pick in ((branch.then, 0), (branch.orelse, 1)):
            side = _Lines()
            side.last_origin = dict(out.last_origin)
            side.header = dict(out.header)
            side.open_block(depth, branch.origin)
            self.forward_block(block, depth + 1, side, loop)
            for phi in live_merges:
                self.copy(
                    phi.target,
                    phi.first if pick == 0 else phi.second,
                    depth + 1,
                    side,
                )
            sides.append(side.lines)
        then_lines, else_lines = sides
        if not then_lines and not else_lines:
            return
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
                name = self.namer.name(phi.target)
                saved = layout.tape_name(loop, phi.target)
                out.code(
                    f"{saved}[{layout.slot(loop)}] = {name}",
                    depth,
                )

    def forward_loop(self, loop: Loop, depth: int, out: _Lines) -> None:
        layout = self.layout
        enclosing = layout.parent.get(loop)
        out.comment(loop.origin, depth)
        for phi in loop.carried:
            if phi.target in layout.live:
                self.copy(phi.target, phi.first, depth, out)
        for saved in layout.saved_lists(loop):
            out.code(f"{saved} = {layout.trip_count(loop)}", depth)
            if enclosing is not None:
                slot = layout.slot(enclosing)
                out.code(f"{layout.by_name(enclosing, saved)}[{slot}] = {saved}", depth)
        out.code(
            f"for {self.namer.name(loop.index)} in range({self.range_text(loop)}):",
            depth,
        )
        out.open_block(depth, loop.origin)
        for phi in loop.carried:
            if phi.target in layout.tapes.get(loop, []):
                name = self.namer.name(phi.target)
                saved = layout.tape_name(loop, phi.target)
                out.code(
                    f"{saved}[{layout.slot(loop)}] = {name}",
                    depth + 1,
                )
        size = len(out.lines)
        self.forward_block(loop.body, depth + 1, out, loop)
        for phi in loop.carried:
            if phi.target in layout.live:
                self.copy(phi.target, phi.second, depth + 1, out)
        if len(out.lines) == size and not layout.tapes.get(loop):
            out.code("pass", depth + 1)
        out.last_origin[depth] = None
        if enclosing is not None:
            # values after this loop that the enclosing loop's reverse reads
            for phi in loop.carried:
                if phi.exit in layout.tapes.get(enclosing, []):
                    saved = layout.tape_name(enclosing, phi.exit)
                    slot = layout.slot(enclosing)
                    out.code(f"{saved}[{slot}] = {self.namer.name(phi.exit)}", depth)

    def range_text(self, loop: Loop) -> str:
        return self.layout.range_args(loop, self.folded)

    # -- reverse --------------------------------------------------------------------

    def reverse(self) -> list[str]:
        out = _Lines()
        layout = self.layout
        for root in layout.sweep.list_roots:
            out.code(
                f"{self.namer.bar_name(root)} = [0.0] * len({self.namer.name(root)})", 1
            )
        self.reverse_block(layout.sweep.statements, 1, out)
        for var in layout.sweep.unused_wrt:
            if var.shape == "list":
                continue
            origin = Origin(f"{var.base} does not affect the result", -1)
            out.statement(origin, f"{self.namer.bar_name(var)} = 0.0", 1)
        return out.lines

    def reverse_block(
        self, statements: tuple[ReverseStmt, ...], depth: int, out: _Lines
    ) -> None:
        for stmt in statements:
            if isinstance(stmt, AdjointAssign):
                operator = "+=" if stmt.accumulate else "="
                bar = self.namer.bar_name(stmt.var)
                expr = self.layout.cheap(stmt.expr)
                if stmt.accumulate and self.layout.numpy:
                    # arrays: a new sum, never an in-place add into a shared array
                    operator, expr = "=", Apply("add", (Bar(stmt.var), expr))
                value = self.rprint(expr)
                if operator == "=" and bar == value:
                    continue  # the carried adjoint was updated in place
                out.statement(stmt.origin, f"{bar} {operator} {value}", depth)
            elif isinstance(stmt, ElementAdjoint):
                operator = "+=" if stmt.accumulate else "="
                index = self.print(self.layout.cheap(stmt.index, everywhere=True))
                value = self.rprint(self.layout.cheap(stmt.expr))
                text = f"{self.namer.bar_name(stmt.root)}[{index}] {operator} {value}"
                out.statement(stmt.origin, text, depth)
            elif isinstance(stmt, SpreadAdjoint):
                bar = self.namer.bar_name(stmt.root)
                index = self.namer.fresh(f"{bar}_index")
                out.statement(stmt.origin, f"for {index} in range(len({bar})):", depth)
                value = self.rprint(self.layout.cheap(stmt.expr))
                out.code(f"{bar}[{index}] += {value}", depth + 1)
            elif isinstance(stmt, ReverseBranch):
                sides = []
                for block in (stmt.then, stmt.orelse):
                    side = _Lines()
                    side.last_origin = dict(out.last_origin)
                    side.header = dict(out.header)
                    side.open_block(depth, stmt.origin)
                    self.reverse_block(block, depth + 1, side)
                    sides.append(side.lines)
                then_lines, else_lines = sides
                if not then_lines and not else_lines:
                    continue
                out.comment(stmt.origin, depth)
                condition = self.rprint(self.layout.cheap(stmt.condition, True))
                out.code(f"if {condition}:", depth)
                out.lines.extend(then_lines or ["    " * (depth + 1) + "pass"])
                if else_lines:
                    out.code("else:", depth)
                    out.lines.extend(else_lines)
                out.last_origin[depth] = None
            else:
                self.reverse_loop(stmt, depth, out)

    def reverse_loop(self, stmt: ReverseLoop, depth: int, out: _Lines) -> None:
        layout = self.layout
        loop = stmt.loop
        body = _Lines()
        body.header = dict(out.header)
        body.open_block(depth, stmt.origin)
        restored = set(self.restored)
        self.reverse_block(stmt.body, depth + 1, body)
        if not body.lines:
            self.restored = restored
            return  # every adjoint passes through the loop unchanged
        out.comment(stmt.origin, depth)
        index = self.namer.name(loop.index)
        out.code(
            f"for {index} in reversed(range({layout.range_args(loop)})):",
            depth,
        )
        out.open_block(depth, stmt.origin)
        slot = layout.slot(loop)
        for var in layout.tapes.get(loop, []):
            self.restored.add(self.namer.name(var))
            out.code(
                f"{self.namer.name(var)} = {layout.tape_name(loop, var)}[{slot}]",
                depth + 1,
            )
        for child in layout.children.get(loop, []):
            for saved in layout.saved_lists(child):
                out.code(f"{saved} = {layout.by_name(loop, saved)}[{slot}]", depth + 1)
        for let in layout.recompute.get(loop, []):
            self.restored.add(self.namer.name(let.target))
            args = tuple(layout.cheap(a) for a in let.args)
            out.code(
                f"{self.namer.name(let.target)} = {self.print(Apply(let.op, args))}",
                depth + 1,
            )
        out.lines.extend(body.lines)
        out.last_origin[depth] = None


def _loop_values(loop: Loop) -> Iterator[Var]:
    for phi in loop.carried:
        yield phi.target
        if phi.exit is not None:
            yield phi.exit
    for stmt in loop.body:
        if isinstance(stmt, Let):
            yield stmt.target
        elif isinstance(stmt, Loop):
            yield from _loop_values(stmt)
        else:
            for phi in stmt.merges:
                yield phi.target
            for inner in (stmt.then, stmt.orelse):
                for s in inner:
                    if isinstance(s, Let):
                        yield s.target


def lay_out(
    function: SSAFunction,
    sweep: ReverseSweep,
    namer: Namer,
    printer: Printer,
    active: set[Var],
    reverse_printer: Printer | None = None,
) -> tuple[list[str], list[str], tuple[Expr, ...]]:
    """Forward lines, reverse lines and the result expressions.

    ``reverse_printer`` prints the reverse sweep's own expressions (NumPy spellings
    in an array model); the forward sweep's always print as the source wrote them.
    """
    layout = Layout(function, sweep, namer, printer, active)
    layout.reverse_printer = reverse_printer or printer
    layout.numpy = (
        reverse_printer is not None and reverse_printer.where_call is not None
    )
    emitter = _Emitter(layout)
    forward = emitter.forward()
    result = [emitter.value(a) for a in function.result.values]
    reverse = emitter.reverse()
    # a returned value whose name the reverse sweep reuses is kept aside first
    for k, value in enumerate(result):
        if isinstance(value, Var) and namer.name(value) in emitter.restored:
            keep = namer.claim("value")
            forward.append(f"    # {function.result.origin.text}")
            forward.append(format_statement(f"{keep} = {namer.name(value)}", 1))
            result[k] = Const(keep, None)
    return forward, reverse, tuple(result)
