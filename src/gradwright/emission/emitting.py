"""What the printers of both sweeps share: indented lines under comments quoting
the source, the state of printing one function, and the record of what each printed
line reads and writes, which the layout check reads."""

from __future__ import annotations

from gradwright.emission.formatting import format_statement
from gradwright.emission.layout import Layout
from gradwright.emission.layout_check import Key, Trace
from gradwright.emission.sinking import Side
from gradwright.ir import (
    Apply,
    Bar,
    Expr,
    Let,
    Loop,
    Origin,
    Var,
)


class Lines:
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

    def if_lines(
        self,
        condition: str,
        negated: str,
        then: list[str],
        orelse: list[str],
        depth: int,
    ) -> None:
        """``if condition:`` with its sides; an empty first side is printed as
        ``if negated:`` and the other side alone (no ``pass`` and ``else``)."""
        if not then:
            self.code(f"if {negated}:", depth)
            self.lines.extend(orelse)
            return
        self.code(f"if {condition}:", depth)
        self.lines.extend(then)
        chain = _elif_chain(orelse, depth)
        if chain is not None:
            self.lines.extend(chain)
        elif orelse:
            self.code("else:", depth)
            self.lines.extend(orelse)

    def open_block(self, depth: int, origin: Origin | None = None) -> None:
        self.last_origin[depth + 1] = None
        self.header[depth + 1] = origin


def _elif_chain(orelse: list[str], depth: int) -> list[str] | None:
    """An ``else:`` side that is one ``if`` statement, as ``elif`` lines at
    ``depth`` (the comment quoting the ``if`` goes: the header quotes it); None
    for any other side."""
    inner = "    " * (depth + 1)
    heads = [
        (k, line[len(inner) :])
        for k, line in enumerate(orelse)
        if line.startswith(inner) and line[len(inner) : len(inner) + 1] not in ("", " ")
    ]
    quoted = 1 if heads and heads[0][1].startswith(("# if ", "# elif ")) else 0
    if len(heads) <= quoted or not heads[quoted][1].startswith("if "):
        return None
    if any(not head.startswith(("elif ", "else:")) for _, head in heads[quoted + 1 :]):
        return None  # a statement after the if: the side is not the if alone
    lines = [line[4:] for line in orelse[heads[quoted][0] :]]
    lines[0] = lines[0].replace("if ", "elif ", 1)
    return lines


def negation(condition: Expr) -> Expr:
    """``not condition`` for an ``if`` (``not not c`` tests as ``c``)."""
    if isinstance(condition, Apply) and condition.op == "not":
        return condition.args[0]
    return Apply("not", (condition,))


class EmitterBase:
    """The state of printing one function's sweeps, and the record of what the
    printed lines read and write."""

    def __init__(self, layout: Layout) -> None:
        self.layout = layout
        self.namer = layout.namer
        self.print = layout.printer
        self.rprint = layout.reverse_printer
        self.folded: dict[Var, Expr] = {}
        #: names the reverse sweep writes forward values back into
        self.restored: set[str] = set()
        #: adjoint lists made as zeros: (their lines, line index, events, root)
        self.zeroed: dict[str, tuple[Lines, int, list, Var]] = {}
        #: what each printed statement reads and writes, for the layout check
        self.trace = Trace()
        #: the saved lists a while loop's top-level saves append to
        self.appending: dict[Loop, set[str]] = {}
        #: adjoints whose first write updates another's array in place
        self.lenders = dict(layout.sweep.updates)
        #: the values of a record (``Layout.records``) saved so far
        self.recorded: set[Var] = set()
        #: per branch side: (its loop, values restored there, values recomputed)
        self.sunk: dict[Side, tuple[Loop, list[Var], list[Let]]] = {}
        #: recomputed values printed under an earlier recomputed equal one's name
        self.recomputed_as: dict[Var, Var] = {}

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
