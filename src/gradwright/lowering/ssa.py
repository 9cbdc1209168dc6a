"""Lowering a checked function to straight-line SSA.

One primitive per :class:`~gradwright.ir.Let`, every value named once. Re-binding a
source name makes a new value; tuple assignment evaluates every right-hand side
before binding (``a, b = b, a * b`` reads the old ``a``). Unsupported constructs are
rejected here, where they are met, with a located diagnostic.
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass

import libcst as cst

from gradwright.calculus.primitives import BINARY_OPERATORS, MATH_CONSTANTS, OPS
from gradwright.diagnostics import fail
from gradwright.ir import (
    Atom,
    Branch,
    Const,
    Let,
    Loop,
    Origin,
    Phi,
    Return,
    SSAFunction,
    Stmt,
    Var,
)
from gradwright.lowering.frontend import (
    CheckedFunction,
    ModuleIndex,
    literal_value,
    math_function_op,
)
from gradwright.lowering.numpy_calls import NumpyLowering
from gradwright.lowering.syntax import (
    _AUGMENTED_SYMBOLS,
    _BINARY_SYMBOLS,
    _COMPARE_OPS,
    _EXPRESSION_REJECTIONS,
    _STATEMENT_REJECTIONS,
    _always_returns,
    _assigned_names,
    _block_statements,
    _callee_list_uses,
    _else_statements,
    _is_docstring,
    _keyword_span,
    _may_return,
    _normalize_number,
    _returns_tuple,
    _statement_text,
)

#: env key under which the function's result values are kept (not an identifier)
_RESULT = "\0result"

#: primitives whose result may share memory with an operand (NumPy views)
_VIEWS = frozenset({"copy", "npindex", "T", "reshape", "np.transpose"})

#: primitives whose value is True or False
_TRUTH_OPS = frozenset({"lt", "le", "gt", "ge", "eq", "ne", "and", "or", "not"})

#: primitives that take or make lists; every other primitive takes numbers
LIST_OPS = frozenset({"getitem", "setitem", "newlist", "listlit", "len", "sum"})


@dataclass(frozen=True)
class _Unbound:
    """A name bound on some paths only: reading it is an error."""

    message: str
    hint: str


class _Lowerer(NumpyLowering):
    def __init__(
        self,
        index: ModuleIndex,
        function: CheckedFunction,
        call_stack: tuple[str, ...],
        list_params: frozenset[str] = frozenset(),
    ) -> None:
        self.index = index
        #: parameters used as lists (found while lowering, see _ListParameter)
        self.list_params = list_params
        self.function = function
        self.call_stack = call_stack + (function.name,)
        self.uids = itertools.count()
        self.blocks: list[list[Stmt]] = [[]]
        self.env: dict[str, Atom | _Unbound] = {}
        self.local_names: frozenset[str] = frozenset()
        self.constants_read: dict[str, None] = {}
        self.callees: dict[str, None] = {}
        self.origin = Origin("", 0)
        self.statement_count = itertools.count()
        self.loop_depth = 0
        self.numpy = bool(index.numpy_modules)
        #: values known to be arrays of their own (see is_fresh)
        self.fresh: set[Var] = set()
        #: values that are truth values (results of comparisons and logic)
        self.truth_values: set[Var] = set()
        #: the list object each list value is a version of
        self.list_root: dict[Var, Var] = {}
        #: `y = x` copies, to find the parameter behind a name used as a list
        self.copy_of: dict[Var, Atom] = {}
        self.result_arity: int | None = None
        self.return_origins: list[Origin] = []

    # -- values -------------------------------------------------------------------

    def new_var(self, base: str, kind: str, shape: str = "scalar") -> Var:
        return Var(next(self.uids), base, kind, shape)  # type: ignore[arg-type]

    def emit(self, op: str, args: tuple[Atom, ...], target: Var) -> Var:
        self.blocks[-1].append(Let(target, op, args, self.origin))
        if op in _TRUTH_OPS:
            self.truth_values.add(target)
        if target.shape == "list":
            # every version of a list made by element writes is one list object
            self.list_root[target] = (
                self.root_of(args[0]) if op == "setitem" else target  # type: ignore[arg-type]
            )
        if op not in _VIEWS:
            self.fresh.add(target)
        if op == "copy":
            self.copy_of[target] = args[0]
        return target

    def root_of(self, var: Var) -> Var:
        return self.list_root.get(var, var)

    def is_fresh(self, atom: Atom) -> bool:
        """Whether a value is an array of its own (not a parameter, another name's
        array, a slice or a view), so that ``x += ...`` changes nothing else."""
        return isinstance(atom, Const) or atom in self.fresh

    def bind_value(self, node: cst.BaseExpression, base: str) -> Var:
        """Evaluate ``node`` into a fresh local value named after ``base``."""
        target = self.new_var(base, "local", self.shape_of_expression(node))
        atom = self.expr(node, base, target)
        if atom is not target:
            if isinstance(atom, Var) and atom.shape == "list":
                fail(
                    "a second name for a list is not supported (both would change"
                    " together)",
                    self.index.locate(node),
                    "index the original list",
                )
            self.emit("copy", (atom,), target)
        return target

    def shape_of_expression(self, node: cst.BaseExpression) -> str:
        if isinstance(node, cst.List):
            return "list"
        if isinstance(node, cst.BinaryOperation) and isinstance(
            node.operator, cst.Multiply
        ):
            if isinstance(node.left, cst.List) or isinstance(node.right, cst.List):
                return "list"
        return "scalar"

    def as_list(self, atom: Atom) -> None:
        """A parameter first seen as a number turns out to be used as a list."""
        while isinstance(atom, Var) and atom in self.copy_of:
            atom = self.copy_of[atom]  # `y = x` then `y[0]`: x is the list
        if isinstance(atom, Var) and atom.kind == "param" and atom.shape == "scalar":
            if not self.numpy:
                raise _ListParameter(atom.base)

    def scalar(self, atom: Atom, node: cst.CSTNode) -> Atom:
        if isinstance(atom, Var) and atom.shape == "list":
            fail(
                f"'{atom.base}' is a list, not a number",
                self.index.locate(node),
                f"index it: {atom.base}[i]",
            )
        return atom

    def set_origin(self, text: str) -> None:
        self.origin = Origin(text, next(self.statement_count))

    # -- the function ---------------------------------------------------------------

    def lower(self) -> SSAFunction:
        node = self.function.node
        lists = self.list_params
        params = tuple(
            self.new_var(name, "param", "list" if name in lists else "scalar")
            for name in self.function.params
        )
        for param in params:
            self.env[param.base] = param
        statements = _block_statements(node.body)
        if statements and _is_docstring(statements[0]):
            statements = statements[1:]
        self.local_names = frozenset(_assigned_names(statements))
        returned = self.sequence(statements)
        if not returned:
            if self.result_arity is None:
                fail(
                    f"'{self.function.name}' has no return statement: there is no"
                    " result to differentiate",
                    self.index.locate(node.name),
                    "end the function with `return <expression>`",
                )
            fail(
                f"'{self.function.name}' can reach its end without returning",
                self.index.locate(node.name),
                "end the function with a return statement",
            )
        assert self.result_arity is not None
        values = tuple(self.env[f"{_RESULT}{i}"] for i in range(abs(self.result_arity)))
        origin = (
            self.return_origins[0]
            if len(self.return_origins) == 1
            else Origin("the result", next(self.statement_count))
        )
        result = Return(values, origin, self.result_arity < 0)  # type: ignore[arg-type]
        return SSAFunction(
            self.function.name,
            params,
            tuple(self.blocks[0]),
            result,
            frozenset(self.local_names),
            tuple(self.constants_read),
            tuple(self.callees),
        )

    # -- statements ---------------------------------------------------------------

    def sequence(
        self,
        statements: list[cst.CSTNode],
        after: tuple[list[cst.CSTNode], ...] = (),
    ) -> bool:
        """Lower statements in order; True when every path through them returned.

        ``after`` is what runs next on paths that fall through (the statements
        after enclosing ``if``s that have a return in them), innermost first: an
        ``if`` that may return takes the rest into each of its branches, so that
        it runs only on the paths that did not return.
        """
        for position, stmt in enumerate(statements):
            if isinstance(stmt, cst.If):
                if not _may_return([stmt]):
                    self.if_statement(stmt, (), "if")
                    continue
                if _always_returns([stmt]) and position + 1 < len(statements):
                    self.unreachable(statements[position + 1])
                local = list(statements[position + 1 :])
                return self.if_statement(
                    stmt, ((local,) if local else ()) + after, "if"
                )
            if isinstance(stmt, cst.For):
                self.for_statement(stmt)
                continue
            self.set_origin(_statement_text(self.index, stmt))
            if self.statement(stmt):
                if position + 1 < len(statements):
                    self.unreachable(statements[position + 1])
                return True
        return self.sequence(after[0], after[1:]) if after else False

    def unreachable(self, stmt: cst.CSTNode) -> None:
        fail(
            "code after the return statement is never run",
            self.index.locate(stmt),
            "remove it, or move the return to the end",
        )

    def statement(self, stmt: cst.CSTNode) -> bool:
        """Lower one simple statement; True for a return."""
        if isinstance(stmt, cst.Pass):
            return False
        if isinstance(stmt, cst.Return):
            self.return_statement(stmt)
            return True
        if isinstance(stmt, cst.Assign):
            self.bind_targets([t.target for t in stmt.targets], stmt.value)
            return False
        if isinstance(stmt, cst.AnnAssign):
            if stmt.value is None:
                fail(
                    "an annotation without a value binds nothing",
                    self.index.locate(stmt),
                )
            assert stmt.value is not None
            self.bind_targets([stmt.target], stmt.value)
            return False
        if isinstance(stmt, cst.AugAssign):
            self.augmented(stmt)
            return False
        if isinstance(stmt, cst.Expr):
            fail(
                "an expression statement has no effect on the result",
                self.index.locate(stmt),
                "assign the value to a name, or remove the statement",
            )
        if isinstance(stmt, (cst.Break, cst.Continue)) and self.loop_depth:
            word = "break" if isinstance(stmt, cst.Break) else "continue"
            fail(
                f"{word} is not supported (the reverse sweep needs every loop to run"
                " its full trip count)",
                self.index.locate(stmt),
                "guard the rest of the body with an if instead",
            )
        message, hint = _STATEMENT_REJECTIONS.get(
            type(stmt), (f"{type(stmt).__name__} statements are not supported", None)
        )
        fail(message, self.index.locate(_keyword_span(stmt)), hint)
        return False

    def return_statement(self, stmt: cst.Return) -> None:
        value = stmt.value
        if value is None:
            fail("return without a value: there is no result", self.index.locate(stmt))
        assert value is not None
        if self.loop_depth:
            fail(
                "return inside a loop is not supported (the loop must run its full"
                " trip count)",
                self.index.locate(stmt),
                "keep the result in a variable and return it after the loop",
            )
        elements = (
            [el.value for el in value.elements]
            if isinstance(value, cst.Tuple)
            else [value]
        )
        arity = -len(elements) if isinstance(value, cst.Tuple) else 1
        if self.result_arity is not None and arity != self.result_arity:
            fail(
                "every return must give the same number of values",
                self.index.locate(value),
            )
        self.result_arity = arity
        self.return_origins.append(self.origin)
        atoms = []
        for element in elements:
            target = self.new_var("value", "local")
            atoms.append(self.scalar(self.expr(element, "value", target), element))
        for i, atom in enumerate(atoms):
            self.env[f"{_RESULT}{i}"] = atom

    # -- branches -----------------------------------------------------------------

    def condition(self, test: cst.BaseExpression) -> Atom:
        return self.scalar(self.expr(test, "cond", None), test)

    def if_statement(
        self, node: cst.If, rest: tuple[list[cst.CSTNode], ...], keyword: str
    ) -> bool:
        """Lower an if, with ``rest`` lowered into each branch that falls through;
        True when every path returned."""
        self.set_origin(f"{keyword} {_statement_text(self.index, node.test)}:")
        origin = self.origin
        condition = self.condition(node.test)
        before = dict(self.env)
        self.blocks.append([])
        returned_then = self.sequence(_block_statements(node.body), rest)
        then_block, then_env = self.blocks.pop(), self.env
        self.env = dict(before)
        self.blocks.append([])
        if isinstance(node.orelse, cst.If):
            returned_else = self.if_statement(node.orelse, rest, "elif")
        else:
            returned_else = self.sequence(_else_statements(node), rest)
        else_block, else_env = self.blocks.pop(), self.env
        self.env = dict(before)
        merges = self.merge(before, then_env, else_env, returned_then, returned_else)
        self.origin = origin
        self.blocks[-1].append(
            Branch(condition, tuple(then_block), tuple(else_block), merges, origin)
        )
        return returned_then and returned_else

    def merge(
        self,
        before: dict[str, Atom | _Unbound],
        then_env: dict[str, Atom | _Unbound],
        else_env: dict[str, Atom | _Unbound],
        then_returned: bool,
        else_returned: bool,
    ) -> tuple[Phi, ...]:
        names = list(dict.fromkeys([*before, *then_env, *else_env]))
        merges: list[Phi] = []
        for name in names:
            is_result = name.startswith(_RESULT)
            if (then_returned or else_returned) and not is_result:
                continue  # only the result leaves a path that returned
            a, b = then_env.get(name), else_env.get(name)
            if a is b and a is not None:
                self.env[name] = a
                continue
            if (
                a is None
                or b is None
                or isinstance(a, _Unbound)
                or isinstance(b, _Unbound)
            ):
                self.env[name] = _Unbound(
                    f"'{name}' is assigned in only one branch of an if and not before"
                    " it",
                    "assign it before the if, or in every branch",
                )
                continue
            shape = a.shape if isinstance(a, Var) else "scalar"
            if shape == "list" and self.root_of(a) != self.root_of(b):  # type: ignore[arg-type]
                self.env[name] = _Unbound(
                    f"'{name}' names a different list on each path of an if",
                    "make the list once before the if and assign its elements"
                    f" ({name}[i] = ...) in each branch",
                )
                continue
            target = self.new_var("value" if is_result else name, "local", shape)
            merges.append(Phi(target, a, b))
            if shape == "list":
                self.list_root[target] = self.root_of(a)  # type: ignore[arg-type]
            if self.is_fresh(a) and self.is_fresh(b):
                self.fresh.add(target)
            self.env[name] = target
        return tuple(merges)

    # -- loops --------------------------------------------------------------------

    def for_statement(self, node: cst.For) -> None:
        if node.orelse is not None:
            fail("for-else is not supported", self.index.locate(node.orelse))
        if node.asynchronous is not None:
            fail("async for is not supported", self.index.locate(node))
        if not isinstance(node.target, cst.Name):
            fail(
                "the loop variable must be a single name",
                self.index.locate(node.target),
            )
        assert isinstance(node.target, cst.Name)
        name = node.target.value
        self.set_origin(f"for {name} in {_statement_text(self.index, node.iter)}:")
        origin = self.origin
        over_list: Var | None = None
        if (
            isinstance(node.iter, cst.Call)
            and isinstance(node.iter.func, cst.Name)
            and node.iter.func.value == "range"
            and "range" not in self.index.module_names
        ):
            args = node.iter.args
            if not 1 <= len(args) <= 3 or any(a.keyword or a.star for a in args):
                fail(
                    "range() takes one to three positional arguments",
                    self.index.locate(node.iter),
                )
            bounds = [
                self.scalar(self.expr(a.value, name, None), a.value) for a in args
            ]
            if len(bounds) == 1:
                start, stop, step = Const("0", 0), bounds[0], Const("1", 1)
            elif len(bounds) == 2:
                start, stop, step = bounds[0], bounds[1], Const("1", 1)
            else:
                start, stop, step = bounds
        else:
            if isinstance(node.iter, (cst.Tuple, cst.List)):
                fail(
                    "for-loops run over range(...) or a list parameter",
                    self.index.locate(node.iter),
                    "name the values in a list parameter, or write one statement"
                    " per value",
                )
            iterable = self.expr(node.iter, name, None)
            self.as_list(iterable)
            if not (isinstance(iterable, Var) and iterable.shape == "list"):
                fail(
                    "for-loops run over range(...) or a list",
                    self.index.locate(node.iter),
                    "write `for i in range(n):`",
                )
            assert isinstance(iterable, Var)
            over_list = iterable
            start, step = Const("0", 0), Const("1", 1)
            stop = self.emit("len", (iterable,), self.new_var(name, "temp"))

        assigned = _assigned_names(_block_statements(node.body))
        assigned[name] = None
        before = dict(self.env)
        carried = [
            n
            for n in before
            if n in assigned and n != name and not isinstance(before[n], _Unbound)
        ]
        headers: dict[str, Var] = {}
        for n in carried:
            init = before[n]
            shape = init.shape if isinstance(init, Var) else "scalar"
            headers[n] = self.new_var(n, "local", shape)
            if shape == "list":
                self.list_root[headers[n]] = self.root_of(init)  # type: ignore[arg-type]
            if self.is_fresh(init):  # type: ignore[arg-type]
                self.fresh.add(headers[n])
            self.env[n] = headers[n]
        index_var = self.new_var(
            name if over_list is None else f"{name}_index", "index"
        )
        self.blocks.append([])
        self.loop_depth += 1
        if over_list is None:
            self.env[name] = index_var
        else:
            self.env[name] = self.emit(
                "getitem", (over_list, index_var), self.new_var(name, "local")
            )
        self.sequence(_block_statements(node.body))
        self.loop_depth -= 1
        body = self.blocks.pop()
        body_env = self.env
        self.env = dict(before)
        phis = []
        for n in carried:
            if headers[n].shape == "list" and self.root_of(
                before[n]  # type: ignore[arg-type]
            ) != self.root_of(
                body_env[n]
            ):  # type: ignore[arg-type]
                fail(
                    f"'{n}' is bound to a new list inside the loop (the reverse"
                    " sweep needs each list to stay one object)",
                    self.index.locate(node),
                    f"update the elements of {n} in place ({n}[i] = ...), with a"
                    " second list made before the loop for the new values",
                )
            exit_var = self.new_var(n, "local", headers[n].shape)
            phis.append(Phi(headers[n], before[n], body_env[n], exit_var))  # type: ignore[arg-type]
            if exit_var.shape == "list":
                self.list_root[exit_var] = self.root_of(headers[n])
            self.env[n] = exit_var
        for n in assigned:
            if n not in carried:
                self.env[n] = _Unbound(
                    f"'{n}' is assigned only inside the loop (which may run zero"
                    " times)",
                    "assign it before the loop",
                )
        self.origin = origin
        self.blocks[-1].append(
            Loop(index_var, start, stop, step, tuple(phis), tuple(body), origin)
        )

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
                )
            self.set_element(first, lambda base: self.expr(value, base, None))
            return
        if isinstance(first, (cst.Tuple, cst.List)):
            names = [el.value for el in first.elements]
            if not isinstance(value, (cst.Tuple, cst.List)):
                fail(
                    "tuple unpacking needs a tuple of expressions on the right",
                    self.index.locate(value),
                    "write `a, b = expr_a, expr_b`",
                )
            assert isinstance(value, (cst.Tuple, cst.List))
            if len(value.elements) != len(names):
                fail(
                    f"cannot unpack {len(value.elements)} values into {len(names)}"
                    " names",
                    self.index.locate(value),
                )
            if len(targets) > 1:
                fail(
                    "chained tuple assignment is not supported",
                    self.index.locate(first),
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
        var = self.bind_value(value, first.value)
        self.env[first.value] = var
        for other in targets[1:]:
            if not isinstance(other, cst.Name):
                fail(
                    "chained tuple assignment is not supported",
                    self.index.locate(other),
                )
            assert isinstance(other, cst.Name)
            if var.shape == "list":
                fail(
                    "a second name for a list is not supported",
                    self.index.locate(other),
                )
            self.env[other.value] = self.emit(
                "copy", (var,), self.new_var(other.value, "local")
            )

    def check_target(self, target: cst.BaseExpression) -> None:
        if isinstance(target, cst.Name):
            return
        if isinstance(target, (cst.Tuple, cst.List)):
            for el in target.elements:
                if not isinstance(el.value, cst.Name):
                    fail("only names can be unpacked into", self.index.locate(el.value))
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
        fail("unsupported assignment target", self.index.locate(target))

    def element_target(self, target: cst.Subscript) -> tuple[Var, Atom, str]:
        if not isinstance(target.value, cst.Name):
            fail(
                "only a local list's elements can be assigned",
                self.index.locate(target),
            )
        assert isinstance(target.value, cst.Name)
        name = target.value.value
        current = self.read_name(target.value)
        self.as_list(current)
        if self.numpy:
            what = (
                "a parameter" if getattr(current, "kind", "") == "param" else "an array"
            )
            fail(
                f"'{name}' is {what}: changing an array in place is not supported (the"
                " reverse sweep needs the values it had)",
                self.index.locate(target),
                "build a new array instead, with np.where or np.concatenate",
            )
        if not (isinstance(current, Var) and current.shape == "list"):
            fail(f"'{name}' is not a list", self.index.locate(target.value))
        assert isinstance(current, Var)
        if current.kind == "param":
            fail(
                f"'{name}' is a parameter: changing it in place is not supported",
                self.index.locate(target),
                f"build a local list first: `{name}_local = [0.0] * len({name})`",
            )
        index = self.subscript_index(target)
        return current, index, name

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
            fail("unsupported assignment target", self.index.locate(target))
        assert isinstance(target, cst.Name)
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

    # -- expressions --------------------------------------------------------------

    def expr(self, node: cst.BaseExpression, base: str, target: Var | None) -> Atom:
        """Lower ``node``; its outermost primitive defines ``target`` when given."""
        if isinstance(node, (cst.Integer, cst.Float)):
            return Const(_normalize_number(node.value), literal_value(node))
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
        if isinstance(node, cst.IfExp):
            return self.conditional(node, base, target)
        if isinstance(node, cst.Subscript) and self.numpy:
            return self.numpy_subscript(node, base, target)
        if isinstance(node, cst.Subscript):
            container = self.expr(node.value, base, None)
            self.as_list(container)
            if not (isinstance(container, Var) and container.shape == "list"):
                fail("only lists can be indexed", self.index.locate(node.value))
            index = self.subscript_index(node)
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

    def read_name(self, node: cst.Name) -> Atom:
        name = node.value
        if name in self.env:
            bound = self.env[name]
            if isinstance(bound, _Unbound):
                fail(bound.message, self.index.locate(node), bound.hint)
            return bound  # type: ignore[return-value]
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
            fail(f"{name} is not a number", self.index.locate(node))
        if name in self.index.functions or imported is not None:
            fail(
                f"'{name}' is a function: call it",
                self.index.locate(node),
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
            " numeric constants",
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
        )
        raise AssertionError  # unreachable

    def call(self, node: cst.Call, base: str, target: Var | None) -> Atom:
        func = node.func
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
            if func.value in ("len", "sum"):
                return self.list_builtin(node, func.value, base, target)
        if isinstance(func, cst.Name) and func.value in self.index.functions:
            return self.user_call(node, func.value, base, target)
        op = math_function_op(self.index, func)
        if (
            op is None
            and isinstance(func, cst.Name)
            and func.value in ("abs", "min", "max")
        ):
            if func.value not in self.index.module_names:
                op = func.value
        if op is None:
            self.reject_call(func)
        assert op is not None
        for arg in node.args:
            if arg.keyword is not None or arg.star:
                fail(
                    "keyword and starred arguments are not supported in this call",
                    self.index.locate(arg),
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

    def list_builtin(
        self, node: cst.Call, name: str, base: str, target: Var | None
    ) -> Atom:
        if len(node.args) != 1 or node.args[0].keyword or node.args[0].star:
            fail(f"{name}() takes one list here", self.index.locate(node))
        argument = self.expr(node.args[0].value, base, None)
        self.as_list(argument)
        if not (isinstance(argument, Var) and argument.shape == "list"):
            fail(f"{name}() needs a list", self.index.locate(node.args[0].value))
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
        if _returns_tuple(callee):
            fail(
                f"'{name}' returns a tuple: helpers called by the model must return"
                " one number",
                self.index.locate(node.func),
                "call a helper for each output, or differentiate it on its own",
            )
        params = callee.params
        if (
            params.star_arg not in (None, cst.MaybeSentinel.DEFAULT)
            or params.star_kwarg
        ):
            fail(f"'{name}' takes *args or **kwargs", self.index.locate(node.func))
        declared = [*params.posonly_params, *params.params, *params.kwonly_params]
        positional_limit = len(params.posonly_params) + len(params.params)
        slots: dict[str, cst.BaseExpression] = {}
        for position, arg in enumerate(node.args):
            if arg.star:
                fail("starred arguments are not supported", self.index.locate(arg))
            if arg.keyword is None:
                if position >= positional_limit:
                    fail(f"too many arguments for '{name}'", self.index.locate(arg))
                slots[declared[position].name.value] = arg.value
            else:
                key = arg.keyword.value
                if key in slots:
                    fail(
                        f"'{key}' is given twice in the call to '{name}'",
                        self.index.locate(arg),
                    )
                if key not in {p.name.value for p in declared}:
                    fail(
                        f"'{name}' has no parameter '{key}'",
                        self.index.locate(arg),
                        f"parameters: {', '.join(p.name.value for p in declared)}",
                    )
                slots[key] = arg.value
        list_params = _callee_list_uses(callee)
        args: list[Atom] = []
        for param in declared:
            given = slots.get(param.name.value)
            if given is None:
                given = param.default
            if given is None:
                fail(
                    f"missing argument '{param.name.value}' in the call to '{name}'",
                    self.index.locate(node),
                )
            assert given is not None
            if param.name.value in list_params:
                fail(
                    f"'{name}' takes a list ('{param.name.value}'): passing lists to"
                    " helper functions is not supported",
                    self.index.locate(given),
                    "index the list in the caller and pass the numbers",
                )
            args.append(self.scalar(self.expr(given, base, None), given))
        self.callees[name] = None
        return self.emit(
            f"call:{name}", tuple(args), target or self.new_var(base, "temp")
        )

    def reject_call(self, func: cst.BaseExpression) -> None:
        loc = self.index.locate(func)
        if isinstance(func, cst.Attribute) and isinstance(func.value, cst.Name):
            if func.value.value in self.index.math_modules:
                fail(
                    f"math.{func.attr.value} is not supported",
                    loc,
                    "see the supported-subset table in the README",
                )
        if isinstance(func, cst.Name):
            name = func.value
            if name == "range":
                fail(
                    "range() is supported only as the iterable of a for-loop",
                    loc,
                )
            if name in self.index.math_names:
                fail(f"math.{self.index.math_names[name]} is not supported", loc)
        fail(
            "unsupported call",
            loc,
            "models call math functions, abs, min, max, len, sum and functions"
            " defined in the same file",
        )


def lower(
    index: ModuleIndex, function: CheckedFunction, call_stack: tuple[str, ...] = ()
) -> SSAFunction:
    """``call_stack``: the callers being lowered, to reject recursion where it is."""
    lists: frozenset[str] = frozenset()
    while True:
        try:
            return _Lowerer(index, function, call_stack, lists).lower()
        except _ListParameter as found:
            # lowered again with that parameter a list (once per list parameter)
            lists |= {found.name}


class _ListParameter(Exception):
    def __init__(self, name: str) -> None:
        super().__init__(name)
        self.name = name
