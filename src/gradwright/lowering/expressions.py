"""Lowering expressions: operators, comparisons, and/or, conditionals, names."""

from __future__ import annotations

import libcst as cst

from gradwright.calculus.primitives import BINARY_OPERATORS, MATH_CONSTANTS
from gradwright.calculus.rules import RULES
from gradwright.diagnostics import fail
from gradwright.ir import (
    Atom,
    Branch,
    Const,
    Let,
    Phi,
    Var,
)
from gradwright.lowering.base import (
    _TRUTH_OPS,
    _Reported,
    _Tuple,
    _Unbound,
)
from gradwright.lowering.frontend import (
    literal_value,
)
from gradwright.lowering.syntax import (
    _BINARY_SYMBOLS,
    _COMPARE_OPS,
    _EXPRESSION_REJECTIONS,
    _normalize_number,
)

#: list primitives adjoints flow through (as sweeps.reverse._LIST_FLOW)
_LIST_FLOW = frozenset(
    {"getitem", "setitem", "append", "newlist", "listlit", "sum", "fsum"}
)


class ExpressionLowering:
    """Part of the lowering (see ``ssa._Lowerer``); state lives on the lowerer."""

    # -- expressions --------------------------------------------------------------

    def expr(self, node: cst.BaseExpression, base: str, target: Var | None) -> Atom:
        """Lower ``node``; its outermost primitive defines ``target`` when given."""
        if isinstance(node, (cst.Integer, cst.Float)):
            return Const(_normalize_number(node.value), literal_value(node))
        if self.data_root(node) is not None:
            kind = (
                self.index.data_kinds.get(node.value)
                if isinstance(node, cst.Name)
                else None
            )
            if kind is not None:
                fail(
                    f"'{node.value}' is {kind}, not a number",
                    self.index.locate(node),
                    (
                        f"index it: {node.value}[i]"
                        if kind != "a string"
                        else "models compute with numbers: bind the module-level"
                        " name to one, such as `GRAVITY = 9.80665`"
                    ),
                )
            value = self.data(node, base)
            if self.numpy and isinstance(value, Const):
                # a Var, so an active operand broadcast against it is summed back
                return self.emit("copy", (value,), target or self.new_var(base, "temp"))
            return value
        if isinstance(node, cst.Name):
            return self.read_name(node)
        if isinstance(node, cst.Attribute):
            if self.numpy and not (
                isinstance(node.value, cst.Name)
                and node.value.value in self.index.math_modules
            ):
                return self.numpy_attribute(node, base, target)
            return self.attribute(node)
        if isinstance(node, cst.UnaryOperation):
            return self.unary(node, base, target)
        if isinstance(node, cst.BinaryOperation):
            return self.binary(node, base, target)
        if isinstance(node, cst.Call):
            return self.call(node, base, target)
        if isinstance(node, cst.Comparison):
            return self.comparison(node, base, target)
        if isinstance(node, cst.BooleanOperation):
            return self.boolean(node, base, target)
        if isinstance(node, (cst.ListComp, cst.GeneratorExp)):
            if isinstance(node, cst.ListComp):
                return self.comprehension(node, base, target)  # a new list
            if target is None or target.shape != "list":
                fail(
                    "a comprehension is a list here: assign it to a name, or sum it",
                    self.index.locate(node),
                    "write `terms = [... for x in xs]` or `sum(... for x in xs)`",
                )
            return self.comprehension(node, base, target)  # type: ignore[arg-type]
        if isinstance(node, cst.Dict):
            return self.dict_literal(node, target, base)
        if isinstance(node, cst.IfExp):
            return self.conditional(node, base, target)
        if isinstance(node, cst.Subscript) and self.tuple_of(node.value) is not None:
            return self.tuple_element(node)
        item = self.opaque_item(node, base) if isinstance(node, cst.Subscript) else None
        if item is not None:  # a lookup in a value a copied statement bound
            return item
        if isinstance(node, cst.Subscript) and self.numpy:
            return self.numpy_subscript(node, base, target)
        if isinstance(node, cst.Subscript) and isinstance(
            node.slice[0].slice, cst.Slice
        ):
            return self.copied(node, base, target)  # xs[1:], v[:]: a new list
        if isinstance(node, cst.Subscript):
            container = self.expr(node.value, base, None)
            self.as_list(container)
            if not (isinstance(container, Var) and container.shape == "list"):
                fail(
                    "only lists can be indexed",
                    self.index.locate(node.value),
                    "index a list or a tuple; a number has no elements",
                )
            index = self.dict_position(container, node)  # a dict of numbers
            index = self.subscript_index(node) if index is None else index
            return self.emit(
                "getitem", (container, index), target or self.new_var(base, "temp")
            )
        if isinstance(node, cst.List) or (
            isinstance(node, cst.Tuple)
            and target is not None
            and target.shape == "list"
        ):
            if target is None or target.shape != "list":
                fail(
                    "a list literal can only be assigned to a name",
                    self.index.locate(node),
                    "bind it to a name first: ys = [a, b], then use ys",
                )
            elements = tuple(
                self.scalar(self.expr(el.value, base, None), el.value)
                for el in node.elements
            )
            return self.emit("listlit", elements, target)  # type: ignore[arg-type]
        message, hint = _EXPRESSION_REJECTIONS.get(
            type(node), (f"{type(node).__name__} expressions are not supported", None)
        )
        fail(message, self.index.locate(node), hint)
        raise AssertionError  # unreachable

    def binary(self, node: cst.BinaryOperation, base: str, target: Var | None) -> Atom:
        symbol = _BINARY_SYMBOLS[type(node.operator)]
        op = BINARY_OPERATORS.get(symbol)
        if symbol == "@" and self.numpy:
            op = "matmul"
        if op is None:
            fail(
                f"the {symbol} operator is not supported on numbers here",
                self.index.locate(node.operator),
                "supported: + - * / // % **",
            )
        assert op is not None
        if op == "mul" and (
            isinstance(node.left, cst.List) or isinstance(node.right, cst.List)
        ):
            # [fill] * n: a new list of n copies of one number
            literal, count = (
                (node.left, node.right)
                if isinstance(node.left, cst.List)
                else (node.right, node.left)
            )
            if len(literal.elements) != 1 or target is None:  # type: ignore[union-attr]
                fail(
                    "only `[value] * n`, assigned to a name, builds a list",
                    self.index.locate(node),
                    "write ys = [0.0] * n, or ys = [a, b, c]",
                )
            fill_node = literal.elements[0].value  # type: ignore[union-attr]
            fill = self.scalar(self.expr(fill_node, base, None), literal)
            size = self.scalar(self.expr(count, base, None), count)
            return self.emit("newlist", (fill, size), target)  # type: ignore[arg-type]
        left = self.scalar(self.expr(node.left, base, None), node.left)
        right = self.scalar(self.expr(node.right, base, None), node.right)
        return self.emit(op, (left, right), target or self.new_var(base, "temp"))

    def comparison(self, node: cst.Comparison, base: str, target: Var | None) -> Atom:
        left = self.scalar(self.expr(node.left, base, None), node.left)
        results: list[Atom] = []
        for position, part in enumerate(node.comparisons):
            op = _COMPARE_OPS.get(type(part.operator))
            if op is None:
                fail(
                    "only < <= > >= == != comparisons are supported",
                    self.index.locate(part.operator),
                    "compare numbers with < <= > >= == != (not is or in)",
                )
            assert op is not None
            right = self.scalar(self.expr(part.comparator, base, None), part.comparator)
            last = position == len(node.comparisons) - 1 and len(node.comparisons) == 1
            results.append(
                self.emit(
                    op,
                    (left, right),
                    (target if last and target else self.new_var(base, "temp")),
                )
            )
            left = right
        combined = results[0]
        for i, item in enumerate(results[1:], start=2):
            last = i == len(results)
            combined = self.emit(
                "and",
                (combined, item),
                target if last and target else self.new_var(base, "temp"),
            )
        return combined

    def boolean(
        self, node: cst.BooleanOperation, base: str, target: Var | None
    ) -> Atom:
        """``a and b`` / ``a or b``.

        Between truth values (comparisons, not, and, or) it is a logic primitive
        with no derivative. Otherwise it selects one operand, and the right one is
        evaluated only when needed: ``b if a else a`` (and), ``a if a else b`` (or),
        a branch like a conditional expression, so adjoints flow to the operand
        it picked.
        """
        is_and = isinstance(node.operator, cst.And)
        left = self.scalar(self.expr(node.left, base, None), node.left)
        self.blocks.append([])
        right = self.scalar(self.expr(node.right, base, None), node.right)
        right_block = self.blocks.pop()
        if (
            self.is_truth(left)
            and self.is_truth(right)
            and all(isinstance(s, Let) and s.op in _TRUTH_OPS for s in right_block)
        ):
            # comparisons cannot raise, so evaluating the right side always is safe
            self.blocks[-1].extend(right_block)
            op = "and" if is_and else "or"
            return self.emit(op, (left, right), target or self.new_var(base, "temp"))
        result = target or self.new_var(base, "temp")
        merge = Phi(result, right, left) if is_and else Phi(result, left, right)
        then_block, else_block = (right_block, []) if is_and else ([], right_block)
        self.blocks[-1].append(
            Branch(left, tuple(then_block), tuple(else_block), (merge,), self.origin)
        )
        return result

    def is_truth(self, atom: Atom) -> bool:
        """Whether a value is a truth value made by a comparison or logic."""
        return isinstance(atom, Var) and atom in self.truth_values

    def conditional(self, node: cst.IfExp, base: str, target: Var | None) -> Atom:
        """``a if c else b`` evaluates only the side it picks: a branch."""
        condition = self.condition(node.test)
        self.blocks.append([])
        then_value = self.scalar(self.expr(node.body, base, None), node.body)
        then_block = self.blocks.pop()
        self.blocks.append([])
        else_value = self.scalar(self.expr(node.orelse, base, None), node.orelse)
        else_block = self.blocks.pop()
        result = target or self.new_var(base, "temp")
        self.blocks[-1].append(
            Branch(
                condition,
                tuple(then_block),
                tuple(else_block),
                (Phi(result, then_value, else_value),),
                self.origin,
            )
        )
        return result

    # -- module-level data ------------------------------------------------------------

    def data_root(self, node: cst.BaseExpression) -> str | None:
        """The module-level data name ``node`` reads (``TABLE``, ``TABLE[i][j]``,
        ``D["k"]``, ``CFG.field``), unless a parameter or local hides it."""
        while isinstance(node, (cst.Attribute, cst.Subscript)):
            node = node.value
        if (
            isinstance(node, cst.Name)
            and node.value in self.index.data_names
            and node.value not in self.env
            and node.value not in self.local_names
        ):
            return node.value
        return None

    def data(self, node: cst.BaseExpression, base: str) -> Atom:
        """Module-level data is an inactive constant: no adjoint ever reaches it.

        Reads with constant keys stay constants (printed as written); an index
        computed in the function makes a ``dataitem``, a primitive with no rule,
        so its value is never active (the reverse sweep has no adjoint for the
        module's values)."""
        if isinstance(node, cst.Name):
            self.constants_read[node.value] = None
            return Const(node.value, None)
        if isinstance(node, cst.Attribute):
            head = self.data(node.value, base)
            if not isinstance(head, Const):
                fail(
                    "an attribute of an element picked by a computed index is not"
                    " supported",
                    self.index.locate(node),
                    "keep the field in a module-level table of its own and index"
                    " that",
                )
            return Const(f"{head.text}.{node.attr.value}", None)
        assert isinstance(node, cst.Subscript)
        head = self.data(node.value, base)
        if (
            self.index.numpy_modules
            and isinstance(head, Const)
            and all(map(_literal_index, node.slice))
        ):
            # a module array's constant slice, LEGS[:, 1]: printed as written,
            # its shape read from the text (sweeps/shapes.py)
            parts = [self.index.module.code_for_node(e.slice) for e in node.slice]
            return Const(f"{head.text}[{', '.join(parts)}]", None)
        if len(node.slice) != 1 or not isinstance(node.slice[0].slice, cst.Index):
            fail(
                "only one index at a time reads module-level data",
                self.index.locate(node),
                "index one level at a time: TABLE[i][j]",
            )
        key = node.slice[0].slice.value  # type: ignore[union-attr]
        if isinstance(key, cst.SimpleString):
            index: Atom = Const(key.value, None)
        else:
            index = self.scalar(self.expr(key, base, None), key)
        if isinstance(head, Const) and isinstance(index, Const):
            return Const(f"{head.text}[{index.text}]", None)
        # "dataitem" has no rule: never active, whatever the index depends on (an
        # index is an integer, piecewise constant in any input)
        item = self.emit("dataitem", (head, index), self.new_var(base, "temp"))
        self.fresh.discard(item)  # a row of a module array is not the model's own
        return item

    def is_inert(self, atom: Atom) -> bool:
        """Whether a value can never be active: a constant, a loop counter, a
        parameter left out of --wrt, or a result of primitives on inert values or
        of a primitive with no derivative (a conservative, purely local check)."""
        if isinstance(atom, Const):
            return True
        if atom.kind == "index":
            return True
        if atom.kind == "param":
            return atom.base not in self.function.wrt
        return atom in self.inert_values

    def note_inert(self, op: str, args: tuple[Atom, ...], target: Var) -> None:
        # mirrors reverse.differentiable: RULES, list flow and helper calls
        passes = op in RULES or op in _LIST_FLOW or op.startswith("call:")
        if not passes or all(self.is_inert(a) for a in args):
            self.inert_values.add(target)

    def read_name(self, node: cst.Name) -> Atom:
        name = node.value
        if name in self.env:
            bound = self.env[name]
            if isinstance(bound, _Unbound):
                if bound.silent:
                    raise _Reported
                fail(bound.message, self.index.locate(node), bound.hint)
            if isinstance(bound, _Tuple):
                fail(
                    f"'{name}' is a tuple of {bound.size} numbers, not a number",
                    self.index.locate(node),
                    f"unpack it (a, b = {name}) or take one element ({name}[0])",
                )
            return bound  # type: ignore[return-value]
        if name in self.local_names and name in self.index.data_names:
            fail(
                f"'{name}' is module-level data: a model may read it, not change it",
                self.index.locate(node),
                f"copy what you need into a local list first (t = [0.0] *"
                f" len({name}), then t[i] = ...), or use a new name",
            )
        if name in self.local_names:
            fail(
                f"'{name}' is used before it is assigned",
                self.index.locate(node),
                "assign it earlier in the function",
            )
        if name in self.index.constants:
            self.constants_read[name] = None
            return Const(name, None)
        imported = self.index.math_names.get(name)
        if imported in MATH_CONSTANTS:
            return Const(f"math.{imported}", MATH_CONSTANTS[imported])
        if name in ("True", "False", "None"):
            fail(
                f"{name} is not a number",
                self.index.locate(node),
                "write 1.0 or 0.0, or test a condition in an if: `while not done:`"
                " becomes a loop on a number or a `break`",
            )
        if name in self.index.functions or imported is not None:
            fail(
                f"'{name}' is a function: call it",
                self.index.locate(node),
                "call it with its arguments: name(...)",
            )
        if name in self.index.module_names:
            fail(
                f"'{name}' is not a numeric module-level constant",
                self.index.locate(node),
                "models may read module-level names bound once to a number, such as"
                " `GRAVITY = 9.80665`",
            )
        fail(
            f"name '{name}' is not defined",
            self.index.locate(node),
            "a model reads its parameters, its own variables, math, and module-level"
            " constants and data (numbers, tables, dicts, arrays)",
        )
        raise AssertionError  # unreachable

    def attribute(self, node: cst.Attribute) -> Atom:
        if (
            isinstance(node.value, cst.Name)
            and node.value.value in self.index.math_modules
        ):
            if node.attr.value in MATH_CONSTANTS:
                return Const(f"math.{node.attr.value}", MATH_CONSTANTS[node.attr.value])
            fail(
                f"math.{node.attr.value} is not a supported constant",
                self.index.locate(node),
                "supported: " + ", ".join(f"math.{c}" for c in MATH_CONSTANTS),
            )
        fail(
            "attribute access is not supported",
            self.index.locate(node),
            "models read plain names; math functions and constants are the exception",
        )
        raise AssertionError  # unreachable

    def unary(self, node: cst.UnaryOperation, base: str, target: Var | None) -> Atom:
        operator = node.operator
        if isinstance(operator, (cst.Minus, cst.Plus)):
            if isinstance(node.expression, (cst.Integer, cst.Float)) and not (
                node.expression.lpar
            ):
                # a negative literal is one constant, not an operation
                sign = "-" if isinstance(operator, cst.Minus) else ""
                value = literal_value(node.expression)
                return Const(
                    sign + _normalize_number(node.expression.value),
                    -value if sign else value,
                )
            operand = self.expr(node.expression, base, None)
            operand = self.scalar(operand, node.expression)
            op = "neg" if isinstance(operator, cst.Minus) else "pos"
            return self.emit(op, (operand,), target or self.new_var(base, "temp"))
        if isinstance(operator, cst.Not):
            operand = self.scalar(
                self.expr(node.expression, base, None), node.expression
            )
            return self.emit("not", (operand,), target or self.new_var(base, "temp"))
        fail(
            "this unary operator is not supported on numbers",
            self.index.locate(node),
            "use - or + on numbers; ~ and not are for integers and truth values",
        )
        raise AssertionError  # unreachable


def _literal_index(element: cst.SubscriptElement) -> bool:
    """An int literal (or its negation), ``None``, or a slice of such bounds:
    what a constant slice of a module array may hold."""

    def literal(node: cst.BaseExpression | None) -> bool:
        if node is None or isinstance(node, cst.Integer):
            return True
        return (
            isinstance(node, cst.UnaryOperation)
            and isinstance(node.operator, cst.Minus)
            and isinstance(node.expression, cst.Integer)
        )

    piece = element.slice
    if isinstance(piece, cst.Slice):
        return literal(piece.lower) and literal(piece.upper) and literal(piece.step)
    value = piece.value  # type: ignore[attr-defined]
    return literal(value) or (isinstance(value, cst.Name) and value.value == "None")
