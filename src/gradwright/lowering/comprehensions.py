"""Lowering comprehensions and generator expressions: the terms go into a local
list filled by a loop (see ``LoopLowering.run_loop``)."""

from __future__ import annotations

import libcst as cst

from gradwright.diagnostics import fail
from gradwright.ir import Atom, Const, Var
from gradwright.lowering.loops import _target_names
from gradwright.lowering.syntax import _statement_text


class ComprehensionLowering:
    """``[e for x in xs if c]``, ``sum(e for x, y in zip(xs, ys))``: the terms go
    into a local list, filled by a loop (the reverse sweep is a loop too), so
    ``sum(terms)`` gives the primal's value to the bit in every Python version."""

    def comprehension(
        self,
        node: cst.GeneratorExp | cst.ListComp,
        base: str,
        target: Var | None = None,
        summed: bool = False,
    ) -> Var:
        """The list of the terms; ``summed``: only its sum is used, so a term an
        ``if`` filters out can be a zero (an int 0, as `sum` adds nothing then:
        the sum of none is the int 0 the primal gives)."""
        clause = node.for_in
        if clause.ifs and not summed:
            fail(
                "a list comprehension with an `if` filter is not supported as a list"
                " (its length depends on the data)",
                self.index.locate(clause.ifs[0]),
                "sum it directly (`sum(e for x in xs if c)`), or keep every term:"
                " `[e if c else 0.0 for x in xs]`",
            )
        if clause.inner_for_in is not None or clause.asynchronous is not None:
            fail(
                "a comprehension with several `for` clauses is not supported",
                self.index.locate(
                    clause.inner_for_in.iter if clause.inner_for_in else clause
                ),
                "write the outer loop as a for statement around it",
            )
        names = _target_names(clause.target)
        if names is None:
            fail(
                "the comprehension's target must be a name or a tuple of names",
                self.index.locate(clause.target),
            )
        assert names is not None
        outer_origin = self.origin
        self.set_origin(
            f"for {_statement_text(self.index, clause.target)} in"
            f" {_statement_text(self.index, clause.iter)}:"
        )
        origin = self.origin
        plan = self.iteration(clause.iter, clause.target)
        start, stop, step, index_base, bind = plan
        if not (isinstance(step, Const) and step.value == 1):
            fail(
                "a comprehension over a range with a step is not supported",
                self.index.locate(clause.iter),
                "write it as a for statement",
            )
        length = stop
        if not (isinstance(start, Const) and start.value == 0):
            span = self.emit("sub", (stop, start), self.new_var("n", "temp"))
            length = self.emit("max", (span, Const("0", 0)), self.new_var("n", "temp"))
        terms = target or self.new_var(f"{base}_terms", "local", "list")
        zero = Const("0", 0) if clause.ifs else Const("0.0", 0.0)
        self.emit("newlist", (zero, length), terms)
        list_name = self._free_name(terms.base, names)
        position_name = self._free_name(f"{names[0]}_index", names + [list_name])
        saved = {n: self.env.get(n) for n in [*names, list_name, position_name]}
        self.env[list_name] = terms

        def bind_with_position(index: Var) -> None:
            bind(index)
            position: Atom = index
            if not (isinstance(start, Const) and start.value == 0):
                position = self.emit("sub", (index, start), self.new_var("k", "temp"))
            self.env[position_name] = position

        # the body, as the for statement a person would write
        element = cst.Subscript(
            cst.Name(list_name),
            [cst.SubscriptElement(cst.Index(cst.Name(position_name)))],
        )
        body: cst.CSTNode = cst.Assign([cst.AssignTarget(element)], node.elt)
        for test in reversed(clause.ifs):
            line = body if isinstance(body, cst.If) else cst.SimpleStatementLine([body])
            body = cst.If(test.test, cst.IndentedBlock([line]))
        plan = (start, stop, step, index_base, bind_with_position)
        self.run_loop(plan, names + [position_name], [body], node, origin)
        result = self.env[list_name]
        for name, value in saved.items():  # the comprehension's names are its own
            if value is None:
                self.env.pop(name, None)
            else:
                self.env[name] = value
        self.origin = outer_origin
        return result  # type: ignore[return-value]

    def _free_name(self, wanted: str, taken: list[str]) -> str:
        """A name no binding of the function (nor ``taken``) uses."""
        name, k = wanted, 1
        while name in self.env or name in self.local_names or name in taken:
            name, k = f"{wanted}_{k}", k + 1
        return name

    def comprehension_call(
        self, node: cst.Call, name: str, base: str, target: Var | None
    ) -> Atom | None:
        """``sum(<comprehension>[, start])`` and ``list(<comprehension>)``; None
        for any other call."""
        if name not in ("sum", "list") or not node.args:
            return None
        first = node.args[0].value
        if not isinstance(first, (cst.GeneratorExp, cst.ListComp)):
            return None
        if any(a.keyword or a.star for a in node.args) or len(node.args) > (
            2 if name == "sum" else 1
        ):
            fail(f"{name}() takes a comprehension here", self.index.locate(node))
        if name == "list":
            return self.comprehension(first, base, target)
        terms = self.comprehension(first, base, summed=True)
        if len(node.args) == 2:
            start = node.args[1].value
            if not (
                isinstance(start, (cst.Integer, cst.Float))
                and float(start.value) == 0.0
            ):
                fail(
                    "sum(<comprehension>, start) with a start other than 0 is not"
                    " supported",
                    self.index.locate(start),
                    "add the start after the sum: `start + sum(...)` (the last bits"
                    " may differ from the original order)",
                )
        return self.emit("sum", (terms,), target or self.new_var(base, "temp"))
