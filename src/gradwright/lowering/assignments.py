"""Lowering assignments: names, tuples, list elements and augmented assignment."""

from __future__ import annotations

import libcst as cst

from gradwright.calculus.primitives import BINARY_OPERATORS
from gradwright.diagnostics import fail
from gradwright.ir import (
    Atom,
    Const,
    Var,
)
from gradwright.lowering.base import (
    UNPACKED,
    _Reported,
    _Tuple,
    _Unbound,
    element_key,
)
from gradwright.lowering.syntax import (
    _AUGMENTED_SYMBOLS,
    LIST_METHODS,
)


class AssignmentLowering:
    """Part of the lowering (see ``ssa._Lowerer``); state lives on the lowerer."""

    # -- assignments ----------------------------------------------------------------

    def bind_targets(
        self, targets: list[cst.BaseAssignTargetExpression], value: cst.BaseExpression
    ) -> None:
        first = targets[0]
        for target in targets:
            self.check_target(target)
        if isinstance(first, cst.Subscript):
            if len(targets) > 1:
                fail(
                    "chained element assignment is not supported",
                    self.index.locate(first),
                    "assign once, then copy: ys[i] = v; zs[i] = ys[i]",
                )
            self.set_element(first, lambda base: self.expr(value, base, None))
            return
        if isinstance(first, (cst.Tuple, cst.List)):
            names = [el.value for el in first.elements]
            if not isinstance(value, (cst.Tuple, cst.List)):
                if len(targets) == 1 and self.tuple_of(value) is not None:
                    self.unpack_tuple(first, names, value)
                    return
                if len(targets) == 1 and self.data_root(value) is not None:
                    self.unpack_data(names, value)
                    return
                self.unpack_list(first, names, value)
                return
            assert isinstance(value, (cst.Tuple, cst.List))
            if len(value.elements) != len(names):
                fail(
                    f"cannot unpack {len(value.elements)} values into {len(names)}"
                    " names",
                    self.index.locate(value),
                    "give as many names as the value has elements",
                )
            if len(targets) > 1:
                fail(
                    "chained tuple assignment is not supported",
                    self.index.locate(first),
                    "write one assignment per target",
                )
            # every right-hand side is evaluated before any name is bound
            computed = [
                self.bind_value(el.value, name.value)  # type: ignore[union-attr]
                for el, name in zip(value.elements, names, strict=True)
            ]
            for name, var in zip(names, computed, strict=True):
                self.env[name.value] = var  # type: ignore[union-attr]
            return
        assert isinstance(first, cst.Name)
        if len(targets) == 1 and isinstance(value, cst.Tuple):
            # a tuple of numbers as a value: one name per element
            atoms = [
                self.bind_value(el.value, f"{first.value}_{k}")
                for k, el in enumerate(value.elements)
            ]
            self.bind_tuple(first.value, atoms)
            return
        if len(targets) == 1 and self.tuple_of(value) is not None:
            self.bind_tuple(first.value, self.tuple_of(value))  # type: ignore[arg-type]
            return
        if len(targets) == 1 and self.tuple_size(value) is not None:
            self.bind_tuple(first.value, self.tuple_elements(value, first.value))
            return
        if (
            len(targets) == 1
            and isinstance(value, cst.BinaryOperation)
            and isinstance(value.operator, cst.Add)
            and isinstance(value.left, cst.Name)
            and value.left.value == first.value
            and self.names_list(first)
        ):
            # `ys = ys + [v]`: the old list has no other name (checked), so
            # growing it in place is the same
            self.extend_list(first, value.right, value)
            return
        var = self.bind_value(value, first.value)
        self.env[first.value] = var
        for other in targets[1:]:
            if not isinstance(other, cst.Name):
                fail(
                    "chained tuple assignment is not supported",
                    self.index.locate(other),
                    "write one assignment per target",
                )
            assert isinstance(other, cst.Name)
            if var.shape == "list":
                fail(
                    "a second name for a list is not supported",
                    self.index.locate(other),
                    "copy it: zs = list(ys)",
                )
            self.env[other.value] = self.emit(
                "copy", (var,), self.new_var(other.value, "local")
            )

    def tuple_of(self, value: cst.BaseExpression) -> list[Atom] | None:
        """The elements of a name bound to a tuple of numbers (None otherwise)."""
        if not isinstance(value, cst.Name):
            return None
        bound = self.env.get(value.value)
        if not isinstance(bound, _Tuple):
            return None
        atoms = [self.env.get(element_key(value.value, k)) for k in range(bound.size)]
        if any(isinstance(a, _Unbound) and a.silent for a in atoms):
            raise _Reported
        if any(not isinstance(a, (Var, Const)) for a in atoms):
            fail(
                f"'{value.value}' is not the same tuple on every path here",
                self.index.locate(value),
                "bind it to a tuple of the same length on every path",
            )
        return atoms  # type: ignore[return-value]

    def tuple_element(self, node: cst.Subscript) -> Atom:
        """``state[k]`` with a constant ``k`` (negative counts from the end)."""
        atoms = self.tuple_of(node.value)
        assert atoms is not None
        index = node.slice[0].slice if len(node.slice) == 1 else None
        key = getattr(index, "value", None)
        sign = 1
        if isinstance(key, cst.UnaryOperation) and isinstance(key.operator, cst.Minus):
            key, sign = key.expression, -1
        if not isinstance(key, cst.Integer):
            fail(
                "a tuple is indexed with a whole number written out here",
                self.index.locate(node),
                "unpack it instead: a, b = state",
            )
        assert isinstance(key, cst.Integer)
        k = sign * int(key.value)
        if not -len(atoms) <= k < len(atoms):
            fail(
                "tuple index out of range",
                self.index.locate(node),
                "index with 0 to len - 1, or -1 for the last element",
            )
        return atoms[k]

    def bind_tuple(self, name: str, atoms: list[Atom]) -> None:
        self.env[name] = _Tuple(len(atoms))
        for k, atom in enumerate(atoms):
            self.env[element_key(name, k)] = atom

    def unpack_tuple(
        self,
        first: cst.BaseExpression,
        names: list[cst.BaseExpression],
        value: cst.BaseExpression,
    ) -> None:
        atoms = self.tuple_of(value)
        assert atoms is not None
        if len(atoms) != len(names):
            fail(
                f"cannot unpack {len(atoms)} values into {len(names)} names",
                self.index.locate(first),
                "give as many names as the value has elements",
            )
        for name, atom in zip(self.plain_names(names), atoms, strict=True):
            self.env[name] = atom

    def unpack_data(
        self, names: list[cst.BaseExpression], value: cst.BaseExpression
    ) -> None:
        """``l1, l2 = LINKS``, ``t, c = SAMPLES[i]``: module-level data, element by
        element (inactive constants; a length that does not match fails at run time
        as it does in the model)."""
        head = self.data(value, "row")
        for k, name in enumerate(self.plain_names(names)):
            if isinstance(head, Const):
                self.env[name] = Const(f"{head.text}[{k}]", None)
            else:
                item = self.emit(
                    "dataitem", (head, Const(str(k), k)), self.new_var(name, "temp")
                )
                self.fresh.discard(item)
                self.env[name] = item

    def unpack_list(
        self,
        first: cst.BaseExpression,
        names: list[cst.BaseExpression],
        value: cst.BaseExpression,
    ) -> None:
        """``x, v = state`` where ``state`` holds a tuple (or list) of numbers
        written out in the function: its elements by position."""
        container = self.expr(value, UNPACKED, None)
        size = self.literal_size(container)
        if size is None and isinstance(container, Var) and container.kind == "param":
            # a state tuple handed to a step helper: not a parameter kind here
            elements = [n.value for n in names if isinstance(n, cst.Name)]
            params = [
                ", ".join(elements) if p == container.base else p
                for p in self.function.params
            ]
            fail(
                f"'{container.base}' is a parameter: parameters are numbers or lists,"
                " so it cannot be unpacked",
                self.index.locate(value),
                f"take its elements as parameters, def {self.function.name}"
                f"({', '.join(params)}), and pass them at each call (unpack the"
                " tuple there first)",
            )
        if size is None:
            fail(
                "tuple unpacking needs a tuple of expressions, or a name bound to"
                " one in this function",
                self.index.locate(value),
                "write `a, b = expr_a, expr_b`, or `state = (a, b)` first",
            )
        if size != len(names):
            fail(
                f"cannot unpack {size} values into {len(names)} names",
                self.index.locate(first),
                "give as many names as the value has elements",
            )
        assert isinstance(container, Var)
        for k, name in enumerate(self.plain_names(names)):
            self.env[name] = self.emit(
                "getitem", (container, Const(str(k), k)), self.new_var(name, "local")
            )

    def plain_names(self, names: list[cst.BaseExpression]) -> list[str]:
        """The names an unpacking binds; each target must be a plain name."""
        for name in names:
            if not isinstance(name, cst.Name):
                fail(
                    "unpack into plain names",
                    self.index.locate(name),
                    "unpack into names, then build what you need from them",
                )
        return [name.value for name in names]  # type: ignore[attr-defined]

    def literal_size(self, atom: Atom) -> int | None:
        """How many elements a local list made by a literal has (None otherwise)."""
        if not (isinstance(atom, Var) and atom.shape == "list"):
            return None
        return self.literal_sizes.get(self.root_of(atom))

    def check_target(self, target: cst.BaseExpression) -> None:
        if isinstance(target, cst.Name):
            return
        if isinstance(target, (cst.Tuple, cst.List)):
            for el in target.elements:
                if not isinstance(el.value, cst.Name):
                    fail(
                        "only names can be unpacked into",
                        self.index.locate(el.value),
                        "unpack into names: a, b = pair",
                    )
            return
        if isinstance(target, cst.Attribute):
            fail(
                "assigning to an attribute is not supported (the model must not"
                " change objects)",
                self.index.locate(target),
                "assign to a local name",
            )
        if isinstance(target, cst.Subscript):
            return
        fail(
            "unsupported assignment target",
            self.index.locate(target),
            "assign to a name, names (a, b) or a list element y[i]",
        )

    def element_target(self, target: cst.Subscript) -> tuple[Var, Atom, str]:
        if not isinstance(target.value, cst.Name):
            fail(
                "only a local list's elements can be assigned",
                self.index.locate(target),
                "make a local list first: ys = list(xs), then ys[i] = ...",
            )
        assert isinstance(target.value, cst.Name)
        current = self.list_to_change(target.value, target)
        index = self.subscript_index(target)
        return current, index, target.value.value

    def list_to_change(self, node: cst.Name, where: cst.CSTNode) -> Var:
        """The local list ``node`` names, about to be changed in place at
        ``where``: never a parameter's or an array, never one with a second name."""
        name = node.value
        current = self.read_name(node)
        self.as_list(current)
        if self.numpy:
            what = (
                "a parameter" if getattr(current, "kind", "") == "param" else "an array"
            )
            fail(
                f"'{name}' is {what}: changing an array in place is not supported (the"
                " reverse sweep needs the values it had)",
                self.index.locate(where),
                "build a new array instead, with np.where or np.concatenate",
            )
        if not (isinstance(current, Var) and current.shape == "list"):
            fail(
                f"'{name}' is not a list",
                self.index.locate(node),
                "index a list made in the function or passed as a parameter",
            )
        assert isinstance(current, Var)
        if current.kind == "param":
            fail(
                f"'{name}' is a parameter: changing it in place is not supported",
                self.index.locate(where),
                f"copy it first (`{name}_local = list({name})`) and change the copy",
            )
        self.check_one_name(name, current, where)
        return current

    def check_one_name(self, name: str, current: Var, where: cst.CSTNode) -> None:
        """Lists are changed in place, so a list with two names (``w = u``) cannot
        be changed through either while the other may still be read: the reverse
        sweep would give the change to one of them only."""
        root = self.root_of(current)
        for other, bound in self.env.items():
            if (
                other != name
                and "\0" not in other
                and isinstance(bound, Var)
                and bound.shape == "list"
                and self.root_of(bound) == root
            ):
                fail(
                    f"'{name}' and '{other}' name the same list here: changing it"
                    f" through '{name}' would change '{other}' too",
                    self.index.locate(where),
                    f"make '{other}' a list of its own ({other} = list({name})) if it"
                    " should keep its values, or use one name for the list",
                )

    def set_element(self, target: cst.Subscript, value) -> None:  # noqa: ANN001
        current, index, name = self.element_target(target)
        element = self.scalar(value(name), target)
        new = self.new_var(name, "local", "list")
        self.emit("setitem", (current, index, element), new)
        self.env[name] = new

    def subscript_index(self, node: cst.Subscript) -> Atom:
        if len(node.slice) != 1 or not isinstance(node.slice[0].slice, cst.Index):
            fail(
                "only single-number indexing is supported on lists",
                self.index.locate(node),
                f"write {self.index.code(node.value)}[i]",
            )
        index_node = node.slice[0].slice.value  # type: ignore[union-attr]
        return self.scalar(self.expr(index_node, "index", None), index_node)

    def augmented(self, stmt: cst.AugAssign) -> None:
        target = stmt.target
        self.check_target(target)
        symbol = _AUGMENTED_SYMBOLS.get(type(stmt.operator))
        if symbol is None:
            fail(
                "this augmented assignment is not supported",
                self.index.locate(stmt.operator),
                "supported: += -= *= /= //= %= **=",
            )
        assert symbol is not None
        op = BINARY_OPERATORS[symbol]
        if isinstance(target, cst.Subscript):
            current, index, name = self.element_target(target)

            def updated(base: str) -> Atom:
                old = self.emit("getitem", (current, index), self.new_var(name, "temp"))
                operand = self.scalar(self.expr(stmt.value, base, None), stmt.value)
                return self.emit(op, (old, operand), self.new_var(name, "temp"))

            self.set_element(target, updated)
            return
        if not isinstance(target, cst.Name):
            fail(
                "unsupported assignment target",
                self.index.locate(target),
                "assign to a name, names (a, b) or a list element y[i]",
            )
        assert isinstance(target, cst.Name)
        if symbol == "+" and self.names_list(target):
            self.extend_list(target, stmt.value, stmt)  # `ys += [v]`: in place
            return
        current = self.scalar(self.read_name(target), target)
        if self.numpy and not self.is_fresh(current):
            what = (
                "is a parameter"
                if isinstance(current, Var) and current.kind == "param"
                else "may share its array with another name (a copy, a slice or a"
                " view)"
            )
            fail(
                f"'{target.value}' {what}: `{target.value} {symbol}= ...` would"
                " change that array in place",
                self.index.locate(stmt),
                f"write `{target.value} = {target.value} {symbol} ...` to make a new"
                " one",
            )
        operand = self.scalar(self.expr(stmt.value, target.value, None), stmt.value)
        var = self.new_var(target.value, "local")
        self.emit(op, (current, operand), var)
        self.env[target.value] = var

    # -- lists that grow ------------------------------------------------------------

    def names_list(self, node: cst.Name) -> bool:
        """Whether ``node`` names a list made in this function."""
        bound = self.env.get(node.value)
        return (
            isinstance(bound, Var) and bound.shape == "list" and bound.kind != "param"
        )

    def expression_statement(self, stmt: cst.Expr) -> None:
        """``ys.append(v)`` and ``ys.extend(values)``; any other expression
        statement changes nothing the result depends on."""
        call = stmt.value
        if not (
            isinstance(call, cst.Call)
            and isinstance(call.func, cst.Attribute)
            and isinstance(call.func.value, cst.Name)
            and not self.numpy
            and isinstance(self.env.get(call.func.value.value), Var)
            and self.env[call.func.value.value].shape == "list"  # type: ignore[union-attr]
        ):
            fail(
                "an expression statement has no effect on the result",
                self.index.locate(stmt),
                "assign the value to a name, or remove the statement",
            )
        assert isinstance(call, cst.Call) and isinstance(call.func, cst.Attribute)
        name_node = call.func.value
        assert isinstance(name_node, cst.Name)
        method = call.func.attr.value
        if method not in LIST_METHODS:
            fail(
                f"list.{method}() is not supported",
                self.index.locate(call.func.attr),
                "a model's lists grow with append() and extend(); build a new list"
                " for other changes",
            )
        if len(call.args) != 1 or call.args[0].keyword or call.args[0].star:
            fail(
                f"{method}() takes one argument here",
                self.index.locate(call),
                "pass one sequence: ys.extend(other)",
            )
        argument = call.args[0].value
        if method == "append":
            current = self.list_to_change(name_node, call)
            element = self.scalar(self.expr(argument, name_node.value, None), argument)
            self.grow(name_node.value, current, element)
        else:
            self.extend_list(name_node, argument, call)

    def grow(self, name: str, current: Var, element: Atom) -> None:
        new = self.new_var(name, "local", "list")
        self.emit("append", (current, element), new)
        self.env[name] = new

    def extend_list(
        self, node: cst.Name, values: cst.BaseExpression, where: cst.CSTNode
    ) -> None:
        """``ys.extend(values)``, ``ys += values``: one append per element, the
        elements of a literal all evaluated first (as Python builds it first)."""
        name = node.value
        self.list_to_change(node, where)
        if isinstance(values, (cst.List, cst.Tuple)):
            if any(isinstance(el, cst.StarredElement) for el in values.elements):
                fail(
                    "starred elements are not supported",
                    self.index.locate(values),
                    "write the elements out: [a, b, c]",
                )
            elements = [
                self.scalar(self.expr(el.value, name, None), el.value)
                for el in values.elements
            ]
            for element in elements:
                self.grow(name, self.env[name], element)  # type: ignore[arg-type]
            return
        if isinstance(values, (cst.GeneratorExp, cst.ListComp)):
            self.fill(values, name)
            return
        self.append_each(name, values)

    def check_rebound(
        self,
        carried: list[str],
        before: dict[str, object],
        body_env: dict[str, object],
        node: cst.CSTNode,
    ) -> list[str]:
        """The loop-carried list names the body binds to another list. The
        reverse loop hands their adjoint lists on as the names were bound, which is
        exact when each list has one name: at the loop's start and end no two of
        them hold one list, and no other name holds the list one starts from."""
        lists = [
            n
            for n in carried
            if isinstance(before[n], Var) and before[n].shape == "list"  # type: ignore[union-attr]
        ]
        rebound = [
            n
            for n in lists
            if self.root_of(before[n]) != self.root_of(body_env[n])  # type: ignore[arg-type]
        ]
        if not rebound:
            return []
        where = self.index.locate(node) if node is not None else None
        hint = "make the list the loop starts from a list of its own: u = list(u0)"
        for env, when in ((before, "starts"), (body_env, "ends")):
            holders: dict[Var, str] = {}
            for n in lists:
                root = self.root_of(env[n])  # type: ignore[arg-type]
                if root in holders:
                    fail(
                        f"'{holders[root]}' and '{n}' hold the same list when the loop"
                        f" {when}, and the loop binds '{rebound[0]}' to another list",
                        where,  # type: ignore[arg-type]
                        hint,
                    )
                holders[root] = n
        starts = {self.root_of(before[n]): n for n in rebound}  # type: ignore[arg-type]
        for root in list(starts):
            if root.kind == "param":
                del starts[root]  # the reverse adds into a parameter's adjoint list
        for other, bound in before.items():
            if (
                other not in lists
                and "\0" not in other
                and isinstance(bound, Var)
                and bound.shape == "list"
                and self.root_of(bound) in starts
            ):
                name = starts[self.root_of(bound)]
                fail(
                    f"'{other}' holds the list '{name}' starts the loop with, and the"
                    f" loop binds '{name}' to another list",
                    where,  # type: ignore[arg-type]
                    f"make '{name}' a list of its own before the loop: {name} ="
                    f" list({other})",
                )
        return rebound
