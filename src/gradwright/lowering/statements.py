"""Lowering statements: sequences, simple statements, returns, and ifs
(the statements after an if that may return go into each path that falls through)."""

from __future__ import annotations

import libcst as cst

from gradwright.diagnostics import GradwrightError, fail
from gradwright.ir import (
    Atom,
    Branch,
    Phi,
    Var,
)
from gradwright.lowering.base import (
    _RESULT,
    _RETURNED,
    _STOP,
    RESULT,
    TRUE,
    _Reported,
    _Tuple,
    _Unbound,
    flow_base,
)
from gradwright.lowering.inactive import is_guard
from gradwright.lowering.syntax import (
    _STATEMENT_REJECTIONS,
    _always_leaves,
    _block_statements,
    _else_statements,
    _keyword_span,
    _may_leave,
    _statement_text,
)


class StatementLowering:
    """Part of the lowering (see ``ssa._Lowerer``); state lives on the lowerer."""

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
            if is_guard(stmt):  # copied as written (lowering/inactive.py)
                self.recovering(self.copy_statement, stmt, True)
                continue
            is_loop = isinstance(stmt, (cst.For, cst.While))
            if (isinstance(stmt, cst.If) or is_loop) and _may_leave([stmt]):
                if (
                    not is_loop
                    and _always_leaves([stmt])
                    and position + 1 < len(statements)
                ):
                    word = _jump_word(stmt)
                    self.recovering(self.unreachable, statements[position + 1], word)
                local = list(statements[position + 1 :])
                rest = ((local,) if local else ()) + after
                if is_loop:  # a loop with a return in it: the rest runs if it did not
                    returned = self.recovering(self.loop_statement, stmt, rest)
                else:
                    returned = self.recovering(self.if_statement, stmt, rest, "if")
                return bool(returned) or returned is None
            if isinstance(stmt, cst.If):
                self.recovering(
                    self.lowered_or_copied, stmt, self.if_statement, (), "if"
                )
                continue
            if is_loop:
                self.recovering(self.lowered_or_copied, stmt, self.loop_statement, ())
                continue
            self.set_origin(_statement_text(self.index, stmt))
            ended = self.recovering(self.lowered_or_copied, stmt, self.statement)
            if ended:
                if position + 1 < len(statements):
                    word = _jump_word(stmt)
                    self.recovering(self.unreachable, statements[position + 1], word)
                # a jump (break, continue, return in a loop) ends this iteration's
                # path: what follows in the body does not run on it
                return ended is True
        return self.sequence(after[0], after[1:]) if after else False

    def recovering(self, lower, stmt: cst.CSTNode, *args):  # noqa: ANN001, ANN201
        """``lower(stmt, *args)``; a rejected statement is recorded and the lowering
        goes on with the next one, so one run reports every error (the names the
        statement binds read as already reported). None after an error."""
        env, blocks = dict(self.env), self.mark_blocks()
        depth, origin = self.loop_depth, self.origin
        try:
            return lower(stmt, *args)
        except (GradwrightError, _Reported) as error:
            if isinstance(error, GradwrightError):
                self.errors.append(error)
            self.env = env
            self.rewind_blocks(blocks)
            self.loop_depth, self.origin = depth, origin
            silent = _Unbound("", "", silent=True)
            for name in _bound_anywhere(stmt):
                self.env[name] = silent
            return None

    def unreachable(self, stmt: cst.CSTNode, word: str) -> None:
        fail(
            f"code after the {word} statement is never run",
            self.index.locate(stmt),
            f"remove it, or move the {word} to the end",
        )

    def statement(self, stmt: cst.CSTNode) -> bool | str:
        """Lower one simple statement; True for a return from the function,
        ``"jump"`` for one that ends the loop iteration's path (break,
        continue, return inside a loop)."""
        if isinstance(stmt, cst.Pass):
            return False
        if isinstance(stmt, cst.Return):
            self.return_statement(stmt)
            if self.loop_depth:
                # the loop stops and says so; the code after it picks the result
                self.env[_STOP] = TRUE
                self.env[_RETURNED] = TRUE
                return "jump"
            return True
        if isinstance(stmt, cst.Assign):
            self.bind_targets([t.target for t in stmt.targets], stmt.value)
            return False
        if isinstance(stmt, cst.AnnAssign):
            if stmt.value is None:
                fail(
                    "an annotation without a value binds nothing",
                    self.index.locate(stmt),
                    "give it a value: x: float = 0.0",
                )
            assert stmt.value is not None
            self.bind_targets([stmt.target], stmt.value)
            return False
        if isinstance(stmt, cst.AugAssign):
            self.augmented(stmt)
            return False
        if isinstance(stmt, cst.Expr):
            self.expression_statement(stmt)  # `ys.append(v)` (assignments.py)
            return False
        if isinstance(stmt, (cst.Break, cst.Continue)) and self.loop_depth:
            if isinstance(stmt, cst.Break):
                self.env[_STOP] = TRUE  # the loop ends after this iteration
            return "jump"
        message, hint = _STATEMENT_REJECTIONS.get(
            type(stmt), (f"{type(stmt).__name__} statements are not supported", None)
        )
        fail(message, self.index.locate(_keyword_span(stmt)), hint)
        return False

    def return_statement(self, stmt: cst.Return) -> None:
        value = stmt.value
        if value is None:
            fail(
                "return without a value: there is no result",
                self.index.locate(stmt),
                "return the model's result: return value",
            )
        assert value is not None
        elements = (
            [el.value for el in value.elements]
            if isinstance(value, cst.Tuple)
            else [value]
        )
        arity = -len(elements) if isinstance(value, cst.Tuple) else 1
        named = self.tuple_of(value)
        if named is None and self.tuple_size(value) is not None:
            # `return advance(x, v)`: another helper's tuple, element by element
            named = self.tuple_elements(value, RESULT)
        if named is not None:  # `return state`, a name bound to a tuple
            arity = -len(named)
            if self.loop_depth:
                fail(
                    "inside a loop, return the values themselves",
                    self.index.locate(value),
                    "write `return a, b` with the tuple's elements",
                )
        if self.result_arity is not None and arity != self.result_arity:
            fail(
                "every return must give the same number of values",
                self.index.locate(value),
                "return the same number of values on every path",
            )
        self.result_arity = arity
        self.return_origins.append(self.origin)
        atoms = []
        for element in elements if named is None else []:
            # a helper may return a list it writes out (return [a, b])
            shape = self.shape_of_expression(element) if arity == 1 else "scalar"
            target = self.new_var(RESULT, "local", shape)
            atom = self.expr(element, RESULT, target)
            if not self.returns_list_result(atom, arity):
                atom = self.scalar(atom, element)
            atoms.append(atom)
        atoms = atoms if named is None else list(named)
        for i, atom in enumerate(atoms):
            self.env[f"{_RESULT}{i}"] = atom

    def returns_list_result(self, atom: Atom, arity: int) -> bool:
        """A helper (a function called by another) may return one list; what
        the model itself returns are numbers."""
        return (
            arity == 1
            and len(self.call_stack) > 1
            and isinstance(atom, Var)
            and atom.shape == "list"
        )

    # -- branches -----------------------------------------------------------------

    def condition(self, test: cst.BaseExpression) -> Atom:
        # a test reading no active value may be copied (lowering/inactive.py)
        return self.lowered_or_copied_test(
            test, lambda: self.scalar(self.expr(test, "cond", None), test)
        )

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
            if isinstance(a, _Tuple) and a == b:
                self.env[name] = a  # its elements merge as names of their own
                continue
            if a is b and a is not None:
                self.env[name] = a
                continue
            if any(isinstance(x, _Unbound) and x.silent for x in (a, b)):
                self.env[name] = _Unbound("", "", silent=True)  # reported already
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
            target = self.new_var(flow_base(name), "local", shape)
            merges.append(Phi(target, a, b))
            if shape == "list":
                self.list_root[target] = self.root_of(a)  # type: ignore[arg-type]
            if self.is_fresh(a) and self.is_fresh(b):
                self.fresh.add(target)
            self.env[name] = target
        return tuple(merges)


def _jump_word(stmt: cst.CSTNode) -> str:
    """``return``, ``break`` or ``continue``: the statement ``stmt`` is."""
    while isinstance(stmt, cst.If):
        stmt = _block_statements(stmt.body)[-1]
    if isinstance(stmt, cst.SimpleStatementLine) and stmt.body:
        stmt = stmt.body[-1]
    names = {cst.Return: "return", cst.Break: "break", cst.Continue: "continue"}
    return names.get(type(stmt), "return")


def _bound_anywhere(stmt: cst.CSTNode) -> set[str]:
    """Every name a statement may bind, in any construct (a rejected ``try``,
    ``with`` or ``import`` included), so that reads of them add no error."""
    found: set[str] = set()

    def names(node: cst.CSTNode | None) -> None:
        if node is None:
            return
        if isinstance(node, cst.Name):
            found.add(node.value)
        elif isinstance(node, (cst.Tuple, cst.List)):
            for element in node.elements:
                names(element.value)
        elif isinstance(node, cst.StarredElement):
            names(node.value)
        elif isinstance(node, (cst.Subscript, cst.Attribute)):
            names(node.value)

    class Binders(cst.CSTVisitor):
        def visit_AssignTarget(self, node: cst.AssignTarget) -> None:
            names(node.target)

        def visit_AugAssign(self, node: cst.AugAssign) -> None:
            names(node.target)

        def visit_AnnAssign(self, node: cst.AnnAssign) -> None:
            names(node.target)

        def visit_For(self, node: cst.For) -> None:
            names(node.target)

        def visit_AsName(self, node: cst.AsName) -> None:
            names(node.name)

        def visit_ImportAlias(self, node: cst.ImportAlias) -> None:
            if node.asname is None:
                head = node.name
                while isinstance(head, cst.Attribute):
                    head = head.value
                names(head)

        def visit_NamedExpr(self, node: cst.NamedExpr) -> None:
            names(node.target)

        def visit_FunctionDef(self, node: cst.FunctionDef) -> None:
            found.add(node.name.value)

        def visit_ClassDef(self, node: cst.ClassDef) -> None:
            found.add(node.name.value)

    stmt.visit(Binders())
    return found
