"""Lowering comprehensions, generator expressions and the reductions over them.

A comprehension is the loop a person would write: an empty local list, one ``for``
statement per clause, an ``if`` per filter, and an append (see
``AssignmentLowering.extend_list``), so any number of clauses and filters give the
primal's terms in the primal's order and ``sum(terms)`` is the primal's sum to the
bit. ``min``/``max`` of a sequence fold the two-argument rule over it (the first
extreme element gets the adjoint); ``math.prod`` folds ``*`` from 1, as CPython
multiplies; ``math.fsum`` keeps its exactly rounded value with the derivative of
the sum."""

from __future__ import annotations

from collections.abc import Callable

import libcst as cst

from gradwright.diagnostics import fail
from gradwright.ir import Atom, Const, Var
from gradwright.lowering.base import RESULT
from gradwright.lowering.loops import _DataRow, _target_names
from gradwright.lowering.syntax import _statement_text


class ComprehensionLowering:
    """Part of the lowering (see ``ssa._Lowerer``); state lives on the lowerer."""

    def comprehension(
        self,
        node: cst.GeneratorExp | cst.ListComp,
        base: str,
        target: Var | None = None,
    ) -> Var:
        """A new local list of the comprehension's terms (``terms`` in a return,
        not ``value_terms``)."""
        named = "terms" if base == RESULT else f"{base}_terms"
        return self.new_list(named, target, lambda name: self.fill(node, name))

    def new_list(
        self, base: str, target: Var | None, fill: Callable[[str], None]
    ) -> Var:
        """An empty local list (``target`` when it is a list), filled by
        ``fill(name)`` under a name bound to it meanwhile."""
        if target is not None and target.shape != "list":
            target = None
        made = target or self.new_var(base, "local", "list")
        name = made.base if target is not None else self._free_name(made.base, [])
        self.emit("listlit", (), made)
        saved = {name: self.env.get(name)}
        self.env[name] = made
        fill(name)
        result = self.env[name]
        self._restore(saved)
        return result  # type: ignore[return-value]

    def fill(self, node: cst.GeneratorExp | cst.ListComp, name: str) -> None:
        """Append the comprehension's terms to the local list ``name``."""
        clauses: list[cst.CompFor] = []
        clause: cst.CompFor | None = node.for_in
        while clause is not None:
            if clause.asynchronous is not None:
                fail(
                    "async comprehensions are not supported",
                    self.index.locate(node),
                    "use a plain comprehension or a for loop",
                )
            if _target_names(clause.target) is None:
                fail(
                    "the comprehension's target must be a name or a tuple of names",
                    self.index.locate(clause.target),
                    "write for x in xs or for a, b in pairs",
                )
            clauses.append(clause)
            clause = clause.inner_for_in
        own = [n for c in clauses for n in _target_names(c.target) or []]
        saved = {n: self.env.get(n) for n in own}
        append = cst.Call(
            cst.Attribute(cst.Name(name), cst.Name("append")), [cst.Arg(node.elt)]
        )
        body: cst.CSTNode = cst.Expr(append)
        shown = display_name(self.env[name])
        self.index.quote(
            body, f"{shown}.append({_statement_text(self.index, node.elt)})"
        )
        for position in reversed(range(len(clauses))):
            clause = clauses[position]
            for test in reversed(clause.ifs):
                body = cst.If(test.test, cst.IndentedBlock([_line(body)]))
            if position > 0:
                block = cst.IndentedBlock([_line(body)])
                body = cst.For(clause.target, clause.iter, block)
        outer_origin = self.origin
        first = clauses[0]
        self.set_origin(
            f"for {_statement_text(self.index, first.target)} in"
            f" {_statement_text(self.index, first.iter)}:"
        )
        plan = self.iteration(first.iter, first.target)
        names = _target_names(first.target) or []
        self.run_loop(plan, names, [body], node, self.origin)
        self._restore(saved)  # the comprehension's names are its own
        self.origin = outer_origin

    def _restore(self, saved: dict[str, object]) -> None:
        for name, value in saved.items():
            if value is None:
                self.env.pop(name, None)
            else:
                self.env[name] = value  # type: ignore[assignment]

    def append_each(self, name: str, values: cst.BaseExpression) -> None:
        """``name.extend(values)`` for a list value: a loop of appends."""
        item = self._free_name("item", [name])
        saved = {item: self.env.get(item)}
        target = cst.Name(item)
        append = cst.Call(
            cst.Attribute(cst.Name(name), cst.Name("append")), [cst.Arg(target)]
        )
        outer_origin = self.origin
        self.set_origin(f"for {item} in {_statement_text(self.index, values)}:")
        plan = self.iteration(values, target)
        body = cst.Expr(append)
        self.index.quote(body, f"{name}.append({item})")
        self.run_loop(plan, [item], [body], values, self.origin)
        self._restore(saved)
        self.origin = outer_origin

    def _free_name(self, wanted: str, taken: list[str]) -> str:
        """A name no binding of the function (nor ``taken``) uses."""
        name, k = wanted, 1
        while name in self.env or name in self.local_names or name in taken:
            name, k = f"{wanted}_{k}", k + 1
        return name

    # -- copies and slices ------------------------------------------------------------

    def copied(self, values: cst.BaseExpression, base: str, target: Var | None) -> Var:
        """A new local list of the elements of ``values`` (``list(v)``,
        ``v.copy()``, ``v[:]``, ``xs[1:]``): an empty list and a loop of appends."""
        return self.new_list(
            f"{base}_copy", target, lambda name: self.append_each(name, values)
        )

    def slice_reader(
        self, node: cst.BaseExpression
    ) -> tuple[Atom, Callable[[Var], object], str] | None:
        """Reading ``xs[a:b]`` (a list or module-level data, bounds whole numbers
        written out or left out) in place: its length, and element i as
        ``xs[i + start]``; None when ``node`` is no slice."""
        if not (
            isinstance(node, cst.Subscript)
            and len(node.slice) == 1
            and isinstance(node.slice[0].slice, cst.Slice)
        ):
            return None
        part = node.slice[0].slice
        bounds = [_whole_number(b) for b in (part.lower, part.upper)]
        if part.step is not None or any(
            b is None and e is not None
            for b, e in zip(bounds, (part.lower, part.upper), strict=True)
        ):
            fail(
                "a slice here takes whole numbers written out, without a step",
                self.index.locate(node),
                "write xs[1:], xs[:-1] or xs[2:5], or index xs[i] in a loop",
            )
        if self.data_root(node.value) is not None:
            table: Atom = self.data(node.value, "table")
            is_data = True
        else:
            table = self.sequence_value(node.value, "xs")
            is_data = False
        count = self.emit("len", (table,), self.new_var("n", "temp"))
        lower, upper = bounds
        start = self._slice_end(lower, count, Const("0", 0))
        stop = self._slice_end(upper, count, count)
        length = stop
        if not (isinstance(start, Const) and start.value == 0):
            span = self.emit("sub", (stop, start), self.new_var("n", "temp"))
            length = self.emit("max", (span, Const("0", 0)), self.new_var("n", "temp"))

        def read(index: Var) -> object:
            position: Atom = index
            if not (isinstance(start, Const) and start.value == 0):
                position = self.emit("add", (index, start), self.new_var("k", "temp"))
            if is_data:
                return _DataRow(self, table, position)  # type: ignore[arg-type]
            return self.element(table, position)  # type: ignore[arg-type]

        base = "row_index" if is_data else f"{getattr(table, 'base', 'xs')}_index"
        return length, read, base

    def _slice_end(self, bound: int | None, count: Atom, missing: Atom) -> Atom:
        """One end of a slice as Python clamps it to ``[0, count]``."""
        if bound is None:
            return missing
        if bound >= 0:
            if missing is count:  # the stop: min(bound, count)
                value = Const(str(bound), bound)
                return self.emit("min", (value, count), self.new_var("n", "temp"))
            return Const(str(bound), bound)  # a start past the end gives length 0
        shifted = self.emit(
            "sub", (count, Const(str(-bound), -bound)), self.new_var("n", "temp")
        )
        return self.emit("max", (shifted, Const("0", 0)), self.new_var("n", "temp"))

    # -- reductions -----------------------------------------------------------------

    def sequence_value(self, node: cst.BaseExpression, base: str) -> Var:
        """A list to reduce: a comprehension's new list, or a list value."""
        if isinstance(node, (cst.GeneratorExp, cst.ListComp)):
            return self.comprehension(node, base)
        literal = isinstance(node, (cst.List, cst.Tuple))
        made = self.new_var(f"{base}_values", "local", "list") if literal else None
        value = self.expr(node, base, made)
        self.as_list(value)
        if not (isinstance(value, Var) and value.shape == "list"):
            fail(
                "this needs a sequence: a list, a comprehension or a generator",
                self.index.locate(node),
                "pass a list, or write a generator: (f(x) for x in xs)",
            )
        return value  # type: ignore[return-value]

    def comprehension_call(
        self, node: cst.Call, name: str, base: str, target: Var | None
    ) -> Atom | None:
        """``sum``, ``min``, ``max``, ``fsum``, ``prod`` of a sequence (``name``
        without ``math.``); ``list``/``tuple`` of a comprehension; None for any
        other call."""
        if any(a.star for a in node.args):
            return None
        args = [a.value for a in node.args if a.keyword is None]
        keywords = [a for a in node.args if a.keyword is not None]
        if keywords:
            # `start=` as sum and math.prod take it
            if len(keywords) > 1 or keywords[0].keyword.value != "start":  # type: ignore[union-attr]
                return None
            if name not in ("sum", "prod") or len(args) != 1:
                return None
            args.append(keywords[0].value)
        if not args:
            return None
        first = args[0]
        is_comprehension = isinstance(first, (cst.GeneratorExp, cst.ListComp))
        if self.data_root(first) is not None:
            return None  # module-level data is inactive (see calls.py)
        if name in ("list", "tuple") and is_comprehension and len(args) == 1:
            return self.comprehension(first, base, target)  # type: ignore[arg-type]
        if name in ("list", "tuple") and len(args) == 1 and not self.numpy:
            return self.copied(first, base, target)
        if name in ("min", "max") and len(args) == 1:
            return self.extreme(name, first, base, target)
        if name == "prod" and len(args) <= 2:
            return self.product(args, base, target)
        if name == "fsum" and len(args) == 1:
            terms = self.sequence_value(first, base)
            return self.emit("fsum", (terms,), target or self.new_var(base, "temp"))
        if name == "sum" and (is_comprehension or len(args) == 2):
            if len(args) > 2:
                fail(
                    "sum() takes a sequence and a start",
                    self.index.locate(node),
                    "write sum(xs) or sum(xs, start)",
                )
            operands: tuple[Atom, ...] = (self.sequence_value(first, base),)
            if len(args) == 2:
                start = args[1]
                operands += (self.scalar(self.expr(start, base, None), start),)
            return self.emit("sum", operands, target or self.new_var(base, "temp"))
        return None

    def extreme(
        self, op: str, node: cst.BaseExpression, base: str, target: Var | None
    ) -> Atom:
        """``min(xs)``: ``m = xs[0]``, then ``m = min(m, x)`` for the rest, which
        picks the element Python's ``min`` picks (the first extreme one)."""
        values = self.sequence_value(node, base)
        acc = self.accumulator(op, target)
        zero = Const("0", 0)
        first = self.emit("getitem", (values, zero), self.new_var(acc, "local"))
        count = self.emit("len", (values,), self.new_var("n", "temp"))
        return self.fold(op, values, first, Const("1", 1), count, acc)

    def accumulator(self, op: str, target: Var | None) -> str:
        """The name a fold's running value takes: the name its result is bound
        to, else what it holds (``a * max(errs)``: ``largest``), never the
        statement's (``value`` in a return)."""
        if target is not None and target.base != RESULT:
            return target.base
        return self._free_name(_FOLDED[op], [])

    def product(
        self, args: list[cst.BaseExpression], base: str, target: Var | None
    ) -> Atom:
        """``math.prod(xs, start=1)``: ``p = start``, then ``p = p * x``."""
        values = self.sequence_value(args[0], base)
        start: Atom = Const("1", 1)
        if len(args) == 2:
            start = self.scalar(self.expr(args[1], base, None), args[1])
        count = self.emit("len", (values,), self.new_var("n", "temp"))
        acc = self.accumulator("mul", target)
        return self.fold("mul", values, start, Const("0", 0), count, acc)

    def fold(
        self,
        op: str,
        values: Var,
        initial: Atom,
        start: Atom,
        stop: Atom,
        acc: str,
    ) -> Atom:
        """``acc = op(acc, values[k])`` for k in range(start, stop): a loop."""
        index = self._free_name(f"{acc}_index", [acc])
        seq = self._free_name(f"{acc}_values", [acc, index])
        saved = {n: self.env.get(n) for n in (acc, index, seq)}
        self.env[acc], self.env[seq] = initial, values
        element = cst.Subscript(
            cst.Name(seq), [cst.SubscriptElement(cst.Index(cst.Name(index)))]
        )
        value: cst.BaseExpression = (
            cst.BinaryOperation(cst.Name(acc), cst.Multiply(), element)
            if op == "mul"
            else cst.Call(cst.Name(op), [cst.Arg(cst.Name(acc)), cst.Arg(element)])
        )
        body = cst.Assign([cst.AssignTarget(cst.Name(acc))], value)
        self.index.quote(body, self.origin.text)

        def bind(i: Var) -> None:
            self.bind_name(index, i)

        plan = (start, stop, Const("1", 1), index, bind)
        self.run_loop(plan, [index], [body], None, self.origin)  # type: ignore[arg-type]
        result = self.env[acc]
        self._restore(saved)
        return result  # type: ignore[return-value]


#: what a fold's running value holds, its name when the result has none
_FOLDED = {"max": "largest", "min": "smallest", "mul": "product"}


def _whole_number(node: cst.BaseExpression | None) -> int | None:
    """The value of ``3`` or ``-1`` written out (None otherwise)."""
    sign = 1
    if isinstance(node, cst.UnaryOperation) and isinstance(node.operator, cst.Minus):
        node, sign = node.expression, -1
    if isinstance(node, cst.Integer):
        return sign * int(node.value, 0)
    return None


def display_name(value: object) -> str:
    """The name a list value prints under (its base)."""
    return value.base if isinstance(value, Var) else "terms"


def _line(node: cst.CSTNode) -> cst.CSTNode:
    """A compound statement as it is, a small one in its statement line."""
    if isinstance(node, (cst.If, cst.For)):
        return node
    return cst.SimpleStatementLine([node])  # type: ignore[list-item]
