"""Lowering calls: math functions, builtins, and calls to the file's own functions."""

from __future__ import annotations

import libcst as cst

from gradwright.calculus.primitives import OPS
from gradwright.diagnostics import fail
from gradwright.ir import (
    Atom,
    Const,
    SSAFunction,
    Var,
)
from gradwright.lowering.base import UNPACKED, _Reported, _Unbound
from gradwright.lowering.frontend import (
    ModuleIndex,
    check_function,
    math_function_op,
)

#: builtins lowered to primitives: name -> op (pow is the ** operator: Python's
#: pow(x, y) and x ** y are one operation)
_BUILTINS = {
    "abs": "abs",
    "min": "min",
    "max": "max",
    "pow": "pow",
    "float": "float",
    "int": "int",
    "round": "round",
}


def _math_name(index: ModuleIndex, func: cst.BaseExpression) -> str | None:
    """The math function a callee names (``math.dist``, ``m.dist``, ``dist``)."""
    if isinstance(func, cst.Attribute) and isinstance(func.value, cst.Name):
        if func.value.value in index.math_modules:
            return func.attr.value
    if isinstance(func, cst.Name):
        return index.math_names.get(func.value)
    return None


class CallLowering:
    """Part of the lowering (see ``ssa._Lowerer``); state lives on the lowerer."""

    def call(self, node: cst.Call, base: str, target: Var | None) -> Atom:
        func = node.func
        head = func
        while isinstance(head, cst.Attribute):
            head = head.value
        bound = self.env.get(head.value) if isinstance(head, cst.Name) else None
        if isinstance(bound, _Unbound) and bound.silent:
            raise _Reported  # bound by a statement already reported
        if (
            isinstance(func, cst.Name)
            and func.value in ("len", "sum", "min", "max")
            and func.value not in self.index.module_names
            and len(node.args) in (1, 2)
            and not any(arg.keyword or arg.star for arg in node.args)
            and self.data_root(node.args[0].value) is not None
            and (len(node.args) == 1 or func.value == "sum")
        ):
            # a measure of module-level data: inactive, computed once where it is
            table = self.data(node.args[0].value, base)
            args: tuple[Atom, ...] = (table,)
            if len(node.args) == 2:
                start = node.args[1].value
                args += (self.scalar(self.expr(start, base, None), start),)
                if not self.is_inert(args[1]):
                    fail(
                        "the start of a sum of module-level data may depend on a"
                        " --wrt parameter",
                        self.index.locate(start),
                        "add it after summing: start + sum(TABLE)",
                    )
            return self.emit(func.value, args, target or self.new_var(base, "temp"))
        if self.numpy:
            lowered = self.numpy_call(node, base, target)
            if lowered is not None:
                return lowered
            if isinstance(func, cst.Name) and func.value == "len":
                if len(node.args) == 1:
                    array = self.expr(node.args[0].value, base, None)
                    return self.emit(
                        "len", (array,), target or self.new_var(base, "temp")
                    )
        if isinstance(func, cst.Name) and func.value not in self.index.module_names:
            folded = self.comprehension_call(node, func.value, base, target)
            if folded is not None:
                return folded
            if func.value in ("len", "sum"):
                return self.list_builtin(node, func.value, base, target)
        if isinstance(func, cst.Name) and func.value in self.index.functions:
            return self.user_call(node, func.value, base, target)
        if (
            isinstance(func, cst.Attribute)
            and func.attr.value == "copy"
            and not node.args
            and not self.numpy
            and isinstance(func.value, cst.Name)
            and isinstance(self.env.get(func.value.value), Var)
        ):
            return self.copied(func.value, base, target)  # v.copy(): a new list
        if _math_name(self.index, func) in ("fsum", "prod"):
            reduced = self.comprehension_call(
                node, _math_name(self.index, func), base, target  # type: ignore[arg-type]
            )
            if reduced is not None:
                return reduced
        if _math_name(self.index, func) == "dist":
            return self.distance(node, base, target)
        op = math_function_op(self.index, func)
        if (
            op is None
            and isinstance(func, cst.Name)
            and func.value in _BUILTINS
            and func.value not in self.index.module_names
        ):
            special = self.special_builtin(node, func.value)
            if special is not None:
                return special
            op = _BUILTINS[func.value]
        if op is None:
            self.reject_call(func)
        assert op is not None
        for arg in node.args:
            if arg.keyword is not None or arg.star:
                fail(
                    "keyword and starred arguments are not supported in this call",
                    self.index.locate(arg),
                    "pass the arguments by position",
                )
        spec = OPS[op]
        count = len(node.args)
        if op in ("min", "max"):
            if count < 2:
                fail(
                    f"{op}() needs two or more numbers here",
                    self.index.locate(node),
                    f"write {op}(a, b, ...)",
                )
        elif count < spec.min_args or (
            spec.max_args is not None and count > spec.max_args
        ):
            expected = (
                str(spec.min_args)
                if spec.max_args == spec.min_args
                else (
                    f"{spec.min_args} or more"
                    if spec.max_args is None
                    else f"{spec.min_args} to {spec.max_args}"
                )
            )
            fail(
                f"{spec.symbol}() takes {expected} arguments, not {count}",
                self.index.locate(node),
                "pass the number of arguments the function takes",
            )
        args = tuple(
            self.scalar(self.expr(a.value, base, None), a.value) for a in node.args
        )
        if op in ("min", "max"):
            # min(a, b, c) == min(min(a, b), c), selecting the same element
            acc = args[0]
            for i, arg in enumerate(args[1:], start=2):
                last = i == count
                acc = self.emit(
                    op,
                    (acc, arg),
                    (target if last and target else self.new_var(base, "temp")),
                )
            return acc
        return self.emit(op, args, target or self.new_var(base, "temp"))

    def special_builtin(self, node: cst.Call, name: str) -> Atom | None:
        """``float("inf")`` is a constant; ``pow`` takes two arguments here."""
        args = node.args
        if name == "float" and len(args) == 1:
            text = args[0].value
            if isinstance(text, cst.SimpleString):
                word = text.evaluated_value
                try:
                    value = float(word)  # a string, never code: nothing runs
                except (TypeError, ValueError):
                    value = None
                if value is None or value == value and abs(value) != float("inf"):
                    fail(
                        "float() of a string is supported only for infinities and"
                        " nan",
                        self.index.locate(text),
                        'write the number itself, or float("inf")',
                    )
                return Const(f"float({text.value})", value)
        if name == "pow" and len(args) != 2:
            fail(
                "pow() takes two arguments here",
                self.index.locate(node),
                "write pow(x, y) or x ** y; for pow(x, y, m) compute (x ** y) % m",
            )
        return None

    def distance(self, node: cst.Call, base: str, target: Var | None) -> Atom:
        """``math.dist((a, b), (c, d))`` is ``math.hypot(a - c, b - d)`` bit for
        bit (CPython scales the same absolute differences the same way), so it
        takes hypot's rule."""
        points = [arg.value for arg in node.args]
        if (
            len(points) != 2
            or any(arg.keyword or arg.star for arg in node.args)
            or not all(isinstance(p, (cst.Tuple, cst.List)) for p in points)
            or len(points[0].elements) != len(points[1].elements)  # type: ignore[attr-defined]
            or not points[0].elements  # type: ignore[attr-defined]
        ):
            fail(
                "math.dist() takes two points written out, of the same length",
                self.index.locate(node),
                "write math.dist((x1, y1), (x2, y2)), or math.hypot(x1 - x2, y1 - y2)",
            )
        pairs = zip(points[0].elements, points[1].elements, strict=True)  # type: ignore[attr-defined]
        diffs = tuple(
            self.emit(
                "sub",
                (
                    self.scalar(self.expr(p.value, base, None), p.value),
                    self.scalar(self.expr(q.value, base, None), q.value),
                ),
                self.new_var(base, "temp"),
            )
            for p, q in pairs
        )
        return self.emit("hypot", diffs, target or self.new_var(base, "temp"))

    def list_builtin(
        self, node: cst.Call, name: str, base: str, target: Var | None
    ) -> Atom:
        if len(node.args) != 1 or node.args[0].keyword or node.args[0].star:
            fail(
                f"{name}() takes one list here",
                self.index.locate(node),
                (
                    "add the start after summing: start + sum(xs)"
                    if name == "sum"
                    else f"write {name}(xs)"
                ),
            )
        argument = self.expr(node.args[0].value, base, None)
        self.as_list(argument)
        if not (isinstance(argument, Var) and argument.shape == "list"):
            fail(
                f"{name}() needs a list",
                self.index.locate(node.args[0].value),
                "pass a list parameter, a local list or module-level data",
            )
        return self.emit(name, (argument,), target or self.new_var(base, "temp"))

    def user_call(
        self, node: cst.Call, name: str, base: str, target: Var | None
    ) -> Atom:
        """A call to another function of the file; its gradient code is shared."""
        if name in self.call_stack:
            fail(
                f"'{name}' is called recursively ({' -> '.join(self.call_stack)} ->"
                f" {name}): recursion is not supported",
                self.index.locate(node.func),
                "rewrite the recursion as a loop",
            )
        callee = self.index.functions[name]
        params = callee.params
        if (
            params.star_arg not in (None, cst.MaybeSentinel.DEFAULT)
            or params.star_kwarg
        ):
            fail(
                f"'{name}' takes *args or **kwargs",
                self.index.locate(node.func),
                "give the helper named parameters: def h(a, b, scale=1.0)",
            )
        lowered = self.callee_ssa(name)
        declared = [*params.posonly_params, *params.params, *params.kwonly_params]
        positional_limit = len(params.posonly_params) + len(params.params)
        slots: dict[str, cst.BaseExpression] = {}
        for position, arg in enumerate(node.args):
            if arg.star:
                fail(
                    "starred arguments are not supported",
                    self.index.locate(arg),
                    "pass each argument by name or position",
                )
            if arg.keyword is None:
                if position >= positional_limit:
                    fail(
                        f"too many arguments for '{name}'",
                        self.index.locate(arg),
                        "pass only the parameters the function declares",
                    )
                slots[declared[position].name.value] = arg.value
            else:
                key = arg.keyword.value
                if key in slots:
                    fail(
                        f"'{key}' is given twice in the call to '{name}'",
                        self.index.locate(arg),
                        "give each argument once",
                    )
                if key not in {p.name.value for p in declared}:
                    fail(
                        f"'{name}' has no parameter '{key}'",
                        self.index.locate(arg),
                        f"parameters: {', '.join(p.name.value for p in declared)}",
                    )
                slots[key] = arg.value
        shapes = {p.base: p.shape for p in lowered.params}
        args: list[Atom] = []
        for param in declared:
            given = slots.get(param.name.value)
            if given is None:
                given = param.default
            if given is None:
                fail(
                    f"missing argument '{param.name.value}' in the call to '{name}'",
                    self.index.locate(node),
                    "pass every parameter that has no default",
                )
            assert given is not None
            if shapes.get(param.name.value) == "list":
                args.append(self.list_argument(given, name, param.name.value))
            else:
                # unpacked into several names, the call has no one name to go
                # by: an argument is named for the parameter it is (polar_r)
                named = f"{name}_{param.name.value}" if base == UNPACKED else base
                args.append(self.scalar(self.expr(given, named, None), given))
        self.callees[name] = None
        result = lowered.result
        if result.is_tuple or result.values[0].shape == "list":
            # a tuple or a list comes back as one list value: unpacking and
            # indexing it read its elements, and its adjoint is a list too
            if target is None or target.shape != "list":
                target = self.new_var(name, "temp", "list")
            made = self.emit(f"call:{name}", tuple(args), target)
            self.helper_results.add(made)
            if result.is_tuple:
                self.literal_sizes[made] = len(result.values)
            return made
        return self.emit(
            f"call:{name}", tuple(args), target or self.new_var(base, "temp")
        )

    def callee_ssa(self, name: str) -> SSAFunction:
        """The helper lowered on its own (its parameters' and result's shapes)."""
        from gradwright.lowering.ssa import lower  # ssa imports this module

        known = self.callee_ssas.get(name)
        if known is None:
            checked = check_function(self.index, name, None)
            known = lower(self.index, checked, self.call_stack)
            self.callee_ssas[name] = known
        return known

    def returns_list(self, node: cst.BaseExpression) -> bool:
        """Whether ``node`` calls a helper of the file that returns a list or a
        tuple (bound as one list value)."""
        if not (
            isinstance(node, cst.Call)
            and isinstance(node.func, cst.Name)
            and node.func.value in self.index.functions
            and node.func.value not in self.call_stack
        ):
            return False
        result = self.callee_ssa(node.func.value).result
        return result.is_tuple or result.values[0].shape == "list"

    def tuple_size(self, node: cst.BaseExpression) -> int | None:
        """How many numbers ``node`` gives, when it calls a helper that returns
        a tuple (None otherwise)."""
        if not self.returns_list(node):
            return None
        result = self.callee_ssa(node.func.value).result  # type: ignore[attr-defined]
        return len(result.values) if result.is_tuple else None

    def tuple_elements(self, node: cst.BaseExpression, base: str) -> list[Atom]:
        """A helper's tuple result read element by element (``p = h(...)`` binds
        ``p`` like ``p = (a, b)``: each element is a name of its own)."""
        made = self.expr(node, base, None)
        size = self.literal_sizes[made]  # type: ignore[index]
        return [
            self.emit(
                "getitem",
                (made, Const(str(k), k)),
                # named like temporaries (p_1, p_2): no source name to clash with
                self.new_var(base, "temp"),
            )
            for k in range(size)
        ]

    def list_argument(self, given: cst.BaseExpression, name: str, param: str) -> Atom:
        argument = self.expr(given, param, None)
        self.as_list(argument)
        if not (isinstance(argument, Var) and argument.shape == "list"):
            fail(
                f"'{name}' takes a list ('{param}') here",
                self.index.locate(given),
                "pass a list parameter or a local list",
            )
        return argument

    def reject_call(self, func: cst.BaseExpression) -> None:
        loc = self.index.locate(func)
        if isinstance(func, cst.Attribute) and isinstance(func.value, cst.Name):
            if func.value.value in self.index.math_modules:
                fail(
                    f"math.{func.attr.value} is not supported",
                    loc,
                    'see "What a model may contain" in the README',
                )
        if isinstance(func, cst.Name):
            name = func.value
            if name == "range":
                fail(
                    "range() is supported only as the iterable of a for-loop",
                    loc,
                    "loop over it (for i in range(n)) or use its length n directly",
                )
            if name in self.index.math_names:
                fail(
                    f"math.{self.index.math_names[name]} is not supported",
                    loc,
                    "write it with the math functions the README lists",
                )
        fail(
            "unsupported call",
            loc,
            "models call math functions, abs, min, max, pow, float, int, round, len,"
            " sum and functions defined in the same file",
        )
