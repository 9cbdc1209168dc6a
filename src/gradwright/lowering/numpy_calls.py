"""Lowering the NumPy subset: array functions, methods, ``@``, indexing, ``.T``.

Mixed into the SSA lowerer when the model's module imports numpy. Every NumPy call
becomes one primitive (``np.exp``, ``np.sum``, ``matmul``, ...) whose keyword
arguments (``axis=``, ``keepdims=``) travel as constant operands, so the forward
sweep prints the call as written and the rule table can read them.
"""

from __future__ import annotations

import libcst as cst

from gradwright.calculus.primitives import NUMPY_FUNCTIONS
from gradwright.diagnostics import fail
from gradwright.ir import Atom, Const, Var
from gradwright.lowering.frontend import ModuleIndex
from gradwright.lowering.frontend import dotted_name as _dotted

#: methods of arrays the subset supports -> the NumPy function they are
_METHODS = {
    "sum": "sum",
    "mean": "mean",
    "max": "max",
    "min": "min",
    "prod": "prod",
    "dot": "dot",
}
_REDUCTIONS = frozenset({"sum", "mean", "prod", "max", "min", "amax", "amin"})
_CONSTANTS = {"pi": 3.141592653589793, "e": 2.718281828459045, "inf": float("inf")}


#: array constructors: inactive values, copied as written where they appear
_CONSTRUCTORS = frozenset(
    {"zeros", "ones", "full", "linspace", "arange", "array"}
    | {"zeros_like", "ones_like", "empty_like", "full_like"}
)


def literal_value_or_none(node: cst.BaseExpression) -> float | int | None:
    """A number written out (a sign allowed), else None."""
    sign = 1
    if isinstance(node, cst.UnaryOperation) and isinstance(node.operator, cst.Minus):
        node, sign = node.expression, -1
    if isinstance(node, cst.Integer):
        return sign * int(node.value)
    if isinstance(node, cst.Float):
        return sign * float(node.value)
    return None


class NumpyLowering:
    """The NumPy part of ``ssa._Lowerer``, which provides the members below."""

    index: ModuleIndex

    def expr(self, node: cst.BaseExpression, base: str, target: Var | None) -> Atom:
        raise NotImplementedError

    def emit(self, op: str, args: tuple[Atom, ...], target: Var) -> Var:
        raise NotImplementedError

    def new_var(self, base: str, kind: str, shape: str = "scalar") -> Var:
        raise NotImplementedError

    def numpy_name(self, node: cst.BaseExpression) -> str | None:
        """``np.linalg.norm`` -> ``linalg.norm`` when ``np`` is bound to numpy."""
        dotted = _dotted(node)
        if dotted is None or "." not in dotted:
            return None
        head, _, rest = dotted.partition(".")
        return rest if head in self.index.numpy_modules else None

    def numpy_attribute(
        self, node: cst.Attribute, base: str, target: Var | None
    ) -> Atom:
        name = self.numpy_name(node)
        if name is not None:
            if name in _CONSTANTS:
                return Const(f"np.{name}", _CONSTANTS[name])
            fail(
                f"np.{name} is not a supported constant",
                self.index.locate(node),
                "use np.pi, np.e, np.inf, or write the number",
            )
        if node.attr.value == "T":
            value = self.expr(node.value, base, None)
            return self.emit("T", (value,), target or self.new_var(base, "temp"))
        fail(
            f"the attribute .{node.attr.value} is not supported",
            self.index.locate(node),
            "supported on arrays: .T, .shape[k], .sum() .mean() .max() .min()"
            " .prod() .dot() .reshape() .copy()",
        )
        raise AssertionError

    def numpy_call(self, node: cst.Call, base: str, target: Var | None) -> Atom | None:
        """Lower a NumPy function or array method call; None if it is neither."""
        func = node.func
        name = self.numpy_name(func)
        receiver: cst.BaseExpression | None = None
        if name is None and isinstance(func, cst.Attribute):
            method = func.attr.value
            if method == "reshape":
                return self.reshape(node, func.value, base, target)
            if method == "copy" and not node.args:
                # x.copy(): an array of its own, which the model may then change
                value = self.expr(func.value, base, None)
                return self.emit(
                    "ndcopy", (value,), target or self.new_var(base, "temp")
                )
            if method in _METHODS and self.numpy_name(func.value) is None:
                name, receiver = _METHODS[method], func.value
        if name is None:
            return None
        if name == "array" and receiver is None:
            listed = self.active_array(node, base, target)
            if listed is not None:
                return listed
        if name == "copy" and len(node.args) == 1 and node.args[0].keyword is None:
            value = self.expr(node.args[0].value, base, None)
            return self.emit("ndcopy", (value,), target or self.new_var(base, "temp"))
        if name in _CONSTRUCTORS:  # inactive: copied (lowering/inactive.py)
            return self.copied_expression(node, name, target=target)
        if name not in NUMPY_FUNCTIONS:
            fail(
                f"np.{name} is not supported",
                self.index.locate(func),
                'see "What a model may contain" in the README',
            )
        positional = [a.value for a in node.args if a.keyword is None and not a.star]
        if receiver is not None:
            positional.insert(0, receiver)
        keywords: list[Const] = []
        for arg in node.args:
            if arg.star:
                fail(
                    "starred arguments are not supported",
                    self.index.locate(arg),
                    "pass each argument by name or position",
                )
            if arg.keyword is not None:
                if arg.keyword.value not in ("axis", "keepdims") or name not in (
                    _REDUCTIONS | {"concatenate", "stack", "linalg.norm"}
                ):
                    fail(
                        f"the keyword {arg.keyword.value}= is not supported here",
                        self.index.locate(arg),
                        "leave the keyword out, or write the operation another way",
                    )
                keywords.append(Const(f"{arg.keyword.value}={self.static(arg.value)}"))
        if name in _REDUCTIONS and len(positional) > 1:
            # np.sum(x, 0): the second positional argument is the axis
            keywords.insert(0, Const(f"axis={self.static(positional.pop(1))}"))
        op = f"np.{name}"
        if name in ("concatenate", "stack", "vstack", "hstack"):
            if len(positional) != 1 or not isinstance(
                positional[0], (cst.List, cst.Tuple)
            ):
                fail(
                    f"np.{name} takes a list of arrays here: np.{name}([a, b], axis=0)",
                    self.index.locate(node),
                    "pass a list: np.concatenate([a, b], axis=0)",
                )
            parts = tuple(
                self.expr(el.value, base, None)
                for el in positional[0].elements  # type: ignore[union-attr]
            )
            return self.emit(
                op, parts + tuple(keywords), target or self.new_var(base, "temp")
            )
        low, high = NUMPY_FUNCTIONS[name]
        count = len(positional)
        if count < low or (high is not None and count + len(keywords) > high):
            fail(
                f"np.{name}() takes {low} array arguments here",
                self.index.locate(node),
                "pass the arrays the function takes by position",
            )
        args = tuple(
            self.table(a, base) if name == "interp" and k else self.expr(a, base, None)
            for k, a in enumerate(positional)
        )
        if name == "interp" and not all(self.never_active(a) for a in args[1:]):
            fail(
                "np.interp is differentiated in x only: its tables must not depend"
                " on the --wrt parameters",
                self.index.locate(node),
                "keep xp and fp constant (module-level data or inactive values)",
            )
        return self.emit(
            op, args + tuple(keywords), target or self.new_var(base, "temp")
        )

    def table(self, node: cst.BaseExpression, base: str) -> Atom:
        """np.interp's tables: module data, or a list of numbers written out, are
        constants as written; anything else is lowered (and must be inactive)."""
        if self.data_root(node) is not None:
            return self.data(node, base)
        if isinstance(node, (cst.List, cst.Tuple)) and all(
            isinstance(literal_value_or_none(el.value), (int, float))
            for el in node.elements
        ):
            return Const(self.index.module.code_for_node(node), None)
        return self.expr(node, base, None)

    def new_axis(self, node: cst.BaseExpression) -> bool:
        """``None`` or ``np.newaxis`` used as an index."""
        if isinstance(node, cst.Name) and node.value == "None":
            return True
        return self.numpy_name(node) == "newaxis"

    def static(self, node: cst.BaseExpression) -> str:
        """A keyword's value: a literal (ints, tuples of ints, True/False, None)."""
        if isinstance(node, cst.Integer):
            return node.value
        if isinstance(node, cst.UnaryOperation) and isinstance(
            node.operator, cst.Minus
        ):
            return "-" + self.static(node.expression)
        if isinstance(node, cst.Name) and node.value in ("True", "False", "None"):
            return node.value
        if isinstance(node, cst.Tuple):
            items = [self.static(el.value) for el in node.elements]
            return "(" + ", ".join(items) + ("," if len(items) == 1 else "") + ")"
        fail(
            "axis= and keepdims= take literal values here",
            self.index.locate(node),
            "write the axis as a number: axis=0, keepdims=True",
        )
        raise AssertionError

    def reshape(
        self,
        node: cst.Call,
        receiver: cst.BaseExpression,
        base: str,
        target: Var | None,
    ) -> Atom:
        value = self.expr(receiver, base, None)
        dims: list[Atom] = []
        for arg in node.args:
            if arg.keyword is not None or arg.star:
                fail(
                    "reshape takes the new shape only",
                    self.index.locate(arg),
                    "write x.reshape(n, m) or x.reshape((n, m))",
                )
            items = (
                [el.value for el in arg.value.elements]
                if isinstance(arg.value, cst.Tuple)
                else [arg.value]
            )
            dims += [self.expr(i, base, None) for i in items]
        return self.emit(
            "reshape", (value, *dims), target or self.new_var(base, "temp")
        )

    def active_array(
        self, node: cst.Call, base: str, target: Var | None
    ) -> Atom | None:
        """``np.array([a, b, ...])`` (lists nested to any depth) reading active
        values: each list becomes an ``np.array`` of its lowered elements. None
        when it reads no active value (copied as written, like np.zeros)."""
        if (
            len(node.args) != 1
            or node.args[0].keyword is not None
            or not isinstance(node.args[0].value, (cst.List, cst.Tuple))
            or self.active_read(node) is None
        ):
            return None
        return self._array_of(node.args[0].value, base, target)

    def _array_of(
        self, node: cst.List | cst.Tuple, base: str, target: Var | None
    ) -> Atom:
        parts = []
        for element in node.elements:
            if isinstance(element, cst.StarredElement):
                fail(
                    "a starred element in np.array([...]) is not supported",
                    self.index.locate(element),
                    "write each element out, or use np.concatenate([a, b])",
                )
            value = element.value
            if isinstance(value, (cst.List, cst.Tuple)):
                parts.append(self._array_of(value, base, None))
            else:
                parts.append(self.expr(value, base, None))
        return self.emit("np.array", tuple(parts), target or self.new_var(base, "temp"))

    def numpy_subscript(
        self, node: cst.Subscript, base: str, target: Var | None
    ) -> Atom:
        """``x[0]``, ``x[:, 1]``, ``x[1:-1]``, ``x.shape[0]``: reads only."""
        if (
            isinstance(node.value, cst.Attribute)
            and node.value.attr.value == "shape"
            and len(node.slice) == 1
            and isinstance(node.slice[0].slice, cst.Index)
        ):
            array = self.expr(node.value.value, base, None)
            axis = self.expr(node.slice[0].slice.value, base, None)
            return self.emit(
                "shape_at", (array, axis), target or self.new_var(base, "temp")
            )
        array = self.expr(node.value, base, None)
        pieces: list[str] = []
        values: list[Atom] = []

        def bound(part: cst.BaseExpression | None) -> str:
            if part is None:
                return ""
            values.append(self.expr(part, base, None))
            return "{}"

        for element in node.slice:
            piece = element.slice
            if isinstance(piece, cst.Index) and self.new_axis(piece.value):
                pieces.append("None")  # a new axis of size 1 (np.newaxis too)
                continue
            if isinstance(piece, cst.Index) and isinstance(piece.value, cst.Ellipsis):
                fail(
                    "indexing with ... (Ellipsis) is not supported",
                    self.index.locate(piece.value),
                    "write one `:` per axis: x[:, :, None]",
                )
            if isinstance(piece, cst.Index):
                pieces.append(bound(piece.value))
            else:
                assert isinstance(piece, cst.Slice)
                text = f"{bound(piece.lower)}:{bound(piece.upper)}"
                if piece.step is not None:
                    text += f":{bound(piece.step)}"
                pieces.append(text)
        pattern = Const(", ".join(pieces), None)
        return self.emit(
            "npindex", (array, pattern, *values), target or self.new_var(base, "temp")
        )
