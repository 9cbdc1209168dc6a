"""Statements that read no active value, copied into the forward sweep as text.

Only the active data flow (what depends on the --wrt parameters) has to be
differentiable. A statement the lowering cannot turn into primitives but that reads
no active name (string formatting, a lookup in a local dict, a ``while`` loop
computing a constant) is copied as written: one ``copied`` Let whose arguments are
the values of the function's names it reads, then one ``written`` Let per name it
binds, so the SSA knows what it binds and the reverse sweep can read (or save, in a
loop) what it needs. A guard (``assert``, ``if bad: raise ...``) is copied even when
it reads active values: it only reads, so it has no derivative.

Activity is decided from the names read, conservatively: a statement reading any
value that may be active is not copied. Nothing here is run; the names come from
libcst's scope analysis of the statement, and the emitter renames them in the text
by the same analysis (``emission/copied.py``), never by matching text.
"""

from __future__ import annotations

import builtins
from collections.abc import Callable
from dataclasses import dataclass

import libcst as cst
from libcst.metadata import GlobalScope, Scope, ScopeProvider

from gradwright.calculus.rules import RULES
from gradwright.diagnostics import GradwrightError, fail
from gradwright.ir import Atom, Branch, Const, Copied, Let, Var
from gradwright.lowering.base import _Tuple, _Unbound

#: methods that only read the object they are called on (strings, dicts, lists)
_READING_METHODS = frozenset(
    {
        "get",
        "keys",
        "values",
        "items",
        "index",
        "count",
        "copy",
        "format",
        "upper",
        "lower",
        "strip",
        "split",
        "join",
        "startswith",
        "endswith",
        "replace",
        # NumPy arrays' methods that return a new array (not a view, which a
        # later copied `flat *= 2.0` would change through; an ``out=`` argument
        # is looked at on its own)
        "all",
        "any",
        "argmax",
        "argmin",
        "argsort",
        "astype",
        "cumprod",
        "cumsum",
        "dot",
        "flatten",
        "item",
        "max",
        "mean",
        "min",
        "nonzero",
        "prod",
        "repeat",
        "round",
        "searchsorted",
        "std",
        "sum",
        "take",
        "tolist",
        "trace",
        "var",
    }
)

#: statements copied when the lowering rejects them and they read no active value
_COPYABLE = (cst.Assign, cst.AnnAssign, cst.AugAssign, cst.While, cst.For, cst.If)
#: statements that may leave a name they assign unassigned (no trip, no branch)
_MAY_NOT_BIND = (cst.While, cst.For, cst.If)

_BUILTINS = frozenset(dir(builtins))

#: primitives on lists that adjoints flow through (as sweeps.reverse._LIST_FLOW)
_LIST_FLOW = frozenset({"getitem", "setitem", "newlist", "listlit", "sum"})


def _differentiable(op: str) -> bool:
    # mirrors sweeps.reverse.differentiable (the lowering does not import it)
    return op in RULES or op in _LIST_FLOW or op.startswith("call:")


@dataclass(frozen=True)
class StatementNames:
    """The function-scope names a statement reads and binds, as Name nodes in
    source order (names local to a comprehension or lambda in it excluded)."""

    reads: tuple[cst.Name, ...]
    writes: tuple[cst.Name, ...]


def as_module(stmt: cst.CSTNode) -> cst.Module:
    """A module holding just ``stmt`` (the node itself, not a copy)."""
    if isinstance(stmt, cst.BaseSmallStatement):
        stmt = cst.SimpleStatementLine(
            body=[stmt.with_changes(semicolon=cst.MaybeSentinel.DEFAULT)]
        )
    return cst.Module(body=[stmt.with_changes(leading_lines=())])  # type: ignore[list-item, union-attr]


def statement_text(stmt: cst.CSTNode) -> str:
    """The statement as written (its own lines, comments inside it kept)."""
    return as_module(stmt).code.rstrip()


def statement_names(module: cst.Module) -> StatementNames:
    """The names of ``module``'s top scope, read and bound (by libcst's scope
    analysis, so ``k`` in ``[k * n for k in KEYS]`` is neither)."""
    wrapper = cst.MetadataWrapper(module, unsafe_skip_copy=True)
    scopes = wrapper.resolve(ScopeProvider)
    read_ids: set[int] = set()
    write_ids: set[int] = set()
    for scope in {s for s in scopes.values() if s is not None}:
        for access in scope.accesses:
            node = access.node
            if isinstance(node, cst.Name) and not _bound_inside(scope, node.value):
                read_ids.add(id(node))
        if isinstance(scope, GlobalScope):
            for assignment in scope.assignments:
                node = getattr(assignment, "node", None)
                if isinstance(node, cst.Name):
                    write_ids.add(id(node))
    # ``y **= 2`` reads y too; the scope analysis records only the binding
    read_ids.update(id(n) for n in _augmented_names(module) if id(n) in write_ids)
    reads: list[cst.Name] = []
    writes: list[cst.Name] = []

    class Collect(cst.CSTVisitor):
        def visit_Name(self, node: cst.Name) -> None:
            if id(node) in read_ids:
                reads.append(node)
            if id(node) in write_ids:
                writes.append(node)

    module.visit(Collect())
    return StatementNames(tuple(reads), tuple(writes))


def _bound_inside(scope: Scope, name: str) -> bool:
    """Whether ``name`` is bound by a comprehension or lambda around the access."""
    while not isinstance(scope, GlobalScope):
        if scope.assignments[name]:
            return True
        scope = scope.parent
    return False


def _problem(module: cst.Module) -> tuple[cst.CSTNode, str, str] | None:
    """A construct a copied statement cannot hold: (node, message, hint)."""
    found: list[tuple[cst.CSTNode, str, str]] = []
    loops = [0]

    class Check(cst.CSTVisitor):
        def visit_For(self, node: cst.For) -> None:
            loops[0] += 1

        def leave_For(self, node: cst.For) -> None:
            loops[0] -= 1

        def visit_While(self, node: cst.While) -> None:
            loops[0] += 1

        def leave_While(self, node: cst.While) -> None:
            loops[0] -= 1

        def visit_Return(self, node: cst.Return) -> None:
            found.append(
                (
                    node,
                    "a return inside a statement copied as written",
                    "keep the result in a variable and return it after the statement",
                )
            )

        def visit_Break(self, node: cst.Break) -> None:
            self._jump(node, "break")

        def visit_Continue(self, node: cst.Continue) -> None:
            self._jump(node, "continue")

        def _jump(self, node: cst.CSTNode, word: str) -> None:
            if not loops[0]:
                found.append(
                    (
                        node,
                        f"a {word} in a statement copied as written leaves a loop"
                        " the generator differentiates",
                        "guard the rest of the loop body with an if instead",
                    )
                )

        def visit_NamedExpr(self, node: cst.NamedExpr) -> None:
            found.append(
                (
                    node,
                    "an assignment expression (:=) is not supported",
                    "assign the value in a statement of its own first",
                )
            )

        def visit_Yield(self, node: cst.Yield) -> None:
            found.append((node, "yield is not supported in a model", ""))

        def visit_Await(self, node: cst.Await) -> None:
            found.append((node, "await is not supported in a model", ""))

        def visit_FunctionDef(self, node: cst.FunctionDef) -> None:
            found.append((node, "nested function definitions are not supported", ""))

        def visit_ClassDef(self, node: cst.ClassDef) -> None:
            found.append((node, "class definitions are not supported here", ""))

        def visit_Import(self, node: cst.Import) -> None:
            found.append((node, "imports inside the model are not supported", ""))

        def visit_ImportFrom(self, node: cst.ImportFrom) -> None:
            found.append((node, "imports inside the model are not supported", ""))

        def visit_Global(self, node: cst.Global) -> None:
            found.append((node, "global statements are not supported", ""))

        def visit_Nonlocal(self, node: cst.Nonlocal) -> None:
            found.append((node, "nonlocal statements are not supported", ""))

        def visit_Del(self, node: cst.Del) -> None:
            found.append((node, "del statements are not supported", ""))

    module.visit(Check())
    return found[0] if found else None


def _changed_in_place(module: cst.Module, names: set[str]) -> cst.CSTNode | None:
    """An element or attribute assignment to one of ``names``, or a call of one
    of their methods that may change it (``xs.append(...)``)."""
    found: list[cst.CSTNode] = []

    def root(node: cst.BaseExpression) -> str | None:
        while isinstance(node, (cst.Subscript, cst.Attribute)):
            node = node.value
        return node.value if isinstance(node, cst.Name) else None

    def target(node: cst.BaseExpression) -> None:
        if isinstance(node, (cst.Subscript, cst.Attribute)) and root(node) in names:
            found.append(node)
        elif isinstance(node, (cst.Tuple, cst.List)):
            for element in node.elements:
                target(element.value)

    class Check(cst.CSTVisitor):
        def visit_AssignTarget(self, node: cst.AssignTarget) -> None:
            target(node.target)

        def visit_AugAssign(self, node: cst.AugAssign) -> None:
            target(node.target)

        def visit_AnnAssign(self, node: cst.AnnAssign) -> None:
            target(node.target)

        def visit_Call(self, node: cst.Call) -> None:
            func = node.func
            if (
                isinstance(func, cst.Attribute)
                and root(func.value) in names
                and func.attr.value not in _READING_METHODS
            ):
                found.append(node)
            for arg in node.args:  # np.add(a, b, out=c), x.sum(out=c): c changes
                if arg.keyword is not None and arg.keyword.value == "out":
                    outs = arg.value
                    parts = (
                        [el.value for el in outs.elements]
                        if isinstance(outs, cst.Tuple)
                        else [outs]
                    )
                    found.extend(p for p in parts if root(p) in names)
            # np.multiply(a, b, c): a ufunc's positional arguments past its
            # inputs are its outputs
            positional = [arg.value for arg in node.args if arg.keyword is None]
            inputs = _ufunc_inputs(func)
            if inputs is not None:
                found.extend(p for p in positional[inputs:] if root(p) in names)

    module.visit(Check())
    return found[0] if found else None


def _ufunc_inputs(func: cst.BaseExpression) -> int | None:
    """How many inputs ``np.name`` takes when it is a NumPy ufunc, else None
    (NumPy's own table, read only for a call with positional outputs)."""
    if not (
        isinstance(func, cst.Attribute)
        and isinstance(func.value, cst.Name)
        and func.value.value in ("np", "numpy")
    ):
        return None
    import numpy  # a runtime dependency; imported here, for NumPy models only

    ufunc = getattr(numpy, func.attr.value, None)
    return ufunc.nin if isinstance(ufunc, numpy.ufunc) else None


def _augmented_names(module: cst.Module) -> list[cst.Name]:
    found: list[cst.Name] = []

    class Check(cst.CSTVisitor):
        def visit_AugAssign(self, node: cst.AugAssign) -> None:
            if isinstance(node.target, cst.Name):
                found.append(node.target)

    module.visit(Check())
    return found


#: NumPy's constructors of an array shaped like their first argument
_LIKE_CONSTRUCTORS = frozenset({"zeros_like", "ones_like", "empty_like", "full_like"})


def _size_reads(module: cst.Module) -> set[int]:
    """Names read only for their size (``len(x)``, ``x.shape``, ``x.size``,
    ``x.ndim``, the array ``np.zeros_like(x)`` and the other ``*_like`` copy the
    shape and type of): the size of an array has no derivative."""
    found: set[int] = set()

    class Check(cst.CSTVisitor):
        def visit_Call(self, node: cst.Call) -> None:
            func = node.func
            sized = (isinstance(func, cst.Name) and func.value == "len") or (
                isinstance(func, cst.Attribute)
                and func.attr.value in _LIKE_CONSTRUCTORS
            )
            if (
                sized
                and node.args
                and node.args[0].keyword is None
                and isinstance(node.args[0].value, cst.Name)
                and (len(node.args) == 1 or not isinstance(func, cst.Name))
            ):
                found.add(id(node.args[0].value))

        def visit_Attribute(self, node: cst.Attribute) -> None:
            if isinstance(node.value, cst.Name) and node.attr.value in (
                "shape",
                "size",
                "ndim",
            ):
                found.add(id(node.value))

    module.visit(Check())
    return found


def is_guard(stmt: cst.CSTNode) -> bool:
    """``assert ...``, an ``if`` without else whose body ends in a raise, or a
    ``print(...)`` line: statements that bind nothing the result depends on,
    copied as written even when they read active values."""
    if isinstance(stmt, cst.Assert):
        return True
    if (
        isinstance(stmt, cst.Expr)
        and isinstance(stmt.value, cst.Call)
        and isinstance(stmt.value.func, cst.Name)
        and stmt.value.func.value == "print"
    ):
        return True
    if not isinstance(stmt, cst.If) or stmt.orelse is not None:
        return False
    body = stmt.body
    last = body.body[-1] if body.body else None
    if isinstance(last, cst.SimpleStatementLine):
        last = last.body[-1]
    return isinstance(last, cst.Raise)


class InactiveLowering:
    """Part of the lowering (see ``ssa._Lowerer``); state lives on the lowerer."""

    def lowered_or_copied(
        self, stmt: cst.CSTNode, lower: Callable[..., object], *args: object
    ) -> object:
        """``lower(stmt, *args)``; if the lowering rejects a statement that reads
        no active value, the statement is copied as written instead."""
        env, blocks = dict(self.env), self.mark_blocks()
        depth, origin, errors = self.loop_depth, self.origin, len(self.errors)
        if isinstance(stmt, cst.While):
            # a while loop reading no active value is copied, not lowered: its
            # trip count need not be recorded, and it reads as the source does
            try:
                if self.copy_statement(stmt, guard=False, quiet=True) is None:
                    return False
            except GradwrightError:
                pass
            self.env, self.origin = dict(env), origin
            self.rewind_blocks(blocks)
        try:
            return lower(stmt, *args)
        except GradwrightError as error:
            if not isinstance(stmt, _COPYABLE):
                raise
            self.env = env
            self.rewind_blocks(blocks)
            self.loop_depth, self.origin = depth, origin
            del self.errors[errors:]
            try:
                active = self.copy_statement(stmt, guard=False, quiet=True)
            except GradwrightError:
                if isinstance(stmt, cst.AugAssign):
                    raise error from None  # the lowering's own words on x += ...
                raise  # it reads no active value: why it cannot be copied
            if active is None:
                return False
            # say why it was not copied either, and keep what the lowering said
            why = (
                "a statement that reads no value depending on the --wrt parameters"
                f" is copied as written, but this one reads '{active.value}'"
            )
            hint = error.diagnostic.hint or ""
            where = error.diagnostic.location
            span = self.index.positions[stmt]
            if (
                "is copied as written" in hint
                or f"'{active.value}'" in error.diagnostic.message
                or where is None
                or not span.start.line <= where.line <= span.end.line
            ):
                # said once already, the error names the value itself, or it is
                # about another statement (in a helper this one calls)
                why = ""
            fail(
                error.diagnostic.message,
                error.diagnostic.location,
                f"{hint} ({why})" if hint and why else hint or why or None,
            )

    def copy_statement(
        self, stmt: cst.CSTNode, guard: bool, quiet: bool = False
    ) -> cst.Name | None:
        """Copy ``stmt`` as text. With ``quiet``, a statement that reads an active
        value is not copied: the name read is returned (None when copied)."""
        self.set_origin(" ".join(statement_text(stmt).split()))
        module = as_module(stmt)
        names = statement_names(module)
        bound_before = {n.value for n in names.reads if n.value in self.env}
        written_here = {n.value for n in names.writes}
        local_here = written_here - bound_before if guard else set()
        reads: dict[str, Atom] = {}
        module_names: list[str] = []
        dict_read: cst.Name | None = None
        for node in names.reads:
            name = node.value
            if name in reads or name in local_here:
                continue
            if name in self.env:
                bound = self.env[name]
                if isinstance(bound, _Unbound):
                    self.read_name(node)  # raises, located
                if isinstance(bound, _Tuple):
                    return self._unreadable(
                        node,
                        quiet,
                        f"'{name}' is a tuple of {bound.size} numbers: a statement"
                        " copied as written cannot read it whole",
                        f"unpack it first (a, b = {name}) and read the elements",
                    )
                atom = bound
                assert isinstance(atom, (Var, Const))
                if isinstance(atom, Var) and self.root_of(atom) in self.dict_keys:
                    # the dict of numbers is a list in the output: the text
                    # copied as written would index it with a key
                    dict_read = dict_read or node
                if not guard and not self.never_active(atom):
                    if quiet:
                        return node
                    fail(
                        f"this statement is copied as written, but it reads '{name}',"
                        " which depends on the --wrt parameters",
                        self.index.locate(node),
                        "only statements that read no active value are copied;"
                        " compute the active part with numbers, lists and math",
                    )
                reads[name] = atom
            elif name in written_here:
                continue  # bound by the statement itself before it reads it
            elif name in self.local_names:
                self.read_name(node)  # used before it is assigned: raises
            elif name in self.index.module_names:
                module_names.append(name)  # the module slice copies it
            elif name not in _BUILTINS:
                fail(
                    f"name '{name}' is not defined",
                    self.index.locate(node),
                    "a model reads its parameters, its own variables and"
                    " module-level names",
                )
        problem = _problem(module)
        if problem is not None:
            node, message, hint = problem
            fail(message, self.index.locate(node), hint or None)
        changed = _changed_in_place(module, set(self.env) | set(self.index.data_names))
        if changed is not None:
            fail(
                "a statement copied as written must not change a value in place"
                " (the reverse sweep reads the values as they were)",
                self.index.locate(changed),
                "build a new value and bind it to a name instead",
            )
        if dict_read is not None:
            return self._unreadable(
                dict_read,
                quiet,
                f"'{dict_read.value}' is a dict of numbers, which a statement"
                " copied as written cannot read",
                f"read it in a statement of its own: `value = {dict_read.value}[key]`",
            )
        for node in _augmented_names(module):
            bound = self.env.get(node.value)
            if (
                isinstance(bound, Var)
                and (bound not in self.opaque or bound not in self.copied_fresh)
                and (self.numpy or bound.shape == "list")
            ):
                fail(
                    f"`{node.value} op= ...` in a statement copied as written may"
                    " change an array or list in place (the reverse sweep reads the"
                    " value it had)",
                    self.index.locate(node),
                    f"write `{node.value} = {node.value} op ...` to make a new one",
                )
        writes: list[tuple[str, Var]] = []
        firsts = {n.value: n for n in reversed(names.writes)}
        for name in dict.fromkeys(n.value for n in names.writes):
            if name in local_here:
                continue
            if name in self.env and name not in reads:
                # its value before: the copy starts from it on paths that do not
                # bind it (a while loop that does not run)
                bound = self.env[name]
                if isinstance(bound, (Var, Const)):
                    if (
                        not guard
                        and isinstance(stmt, _MAY_NOT_BIND)
                        and not self.never_active(bound)
                    ):
                        # where it does not bind it, the active value goes on
                        if quiet:
                            return firsts[name]
                        fail(
                            f"this statement is copied as written, but where it"
                            f" does not assign '{name}' it keeps its value, which"
                            " depends on the --wrt parameters",
                            self.index.locate(firsts[name]),
                            f"assign '{name}' with numbers and math the gradient"
                            " can follow, or give the copied value its own name",
                        )
                    reads[name] = bound
            writes.append((name, self.new_var(name, "local")))
        self.constants_read.update(dict.fromkeys(module_names))
        copied = Copied(statement_text(stmt), tuple(reads), tuple(writes), guard)
        statement = self.new_var("copied", "temp")
        self.blocks[-1].append(
            Let(statement, "copied", tuple(reads.values()), self.origin, copied)
        )
        self.inert_values.add(statement)
        sequence = _sequence_literal_target(stmt)
        fresh = _fresh_array_target(stmt)
        for name, var in writes:
            if name == fresh:
                # an array of its own: a later copied `name op= ...` changes
                # nothing else (a view, `flat = np.ravel(X)`, would change X)
                self.copied_fresh.add(var)
            self.emit("written", (statement,), var)
            self.opaque.add(var)
            if name == sequence:
                self.opaque_sequences.add(var)  # a loop runs over its elements
            self.fresh.discard(var)  # it may name an array it did not make
            self.env[name] = var
        return None

    def _unreadable(
        self, node: cst.Name, quiet: bool, message: str, hint: str
    ) -> cst.Name:
        """A name a copied statement cannot read: with ``quiet`` it is returned
        (the statement is not copied; the lowering's own error stands)."""
        if not quiet:
            fail(message, self.index.locate(node), hint)
        return node

    def lowered_or_copied_test(
        self, test: cst.BaseExpression, lower: Callable[[], Atom]
    ) -> Atom:
        """A condition as the lowering makes it; if it rejects one that reads no
        active value (``name == "b"`` on strings), ``cond = <test>`` is copied
        as written and the branch tests ``cond``."""
        env, blocks = dict(self.env), self.mark_blocks()
        origin, errors = self.origin, len(self.errors)
        try:
            return lower()
        except GradwrightError as error:
            self.env, self.origin = env, origin
            self.rewind_blocks(blocks)
            del self.errors[errors:]
            copied = self.copied_expression(test, "cond", quiet=True)
            if copied is None:
                raise error from None
            return copied

    def copied_expression(
        self,
        node: cst.BaseExpression,
        base: str,
        quiet: bool = False,
        target: Var | None = None,
    ) -> Var | None:
        """``base = <node>`` copied as written: an expression that reads no active
        value (an array constructor, a test on strings). With ``quiet``, None
        when it cannot be copied; else a located error."""
        module = as_module(cst.Expr(node))
        reads: dict[str, Atom] = {}
        active = self.active_read(node)
        if active is not None:
            if quiet:
                return None
            fail(
                f"this expression reads '{active.value}', which may depend on the"
                " --wrt parameters, but it has no derivative here",
                self.index.locate(active),
                "build the array from constants (np.zeros(n), np.linspace(a, b,"
                " n)) and combine it with active values by arithmetic",
            )
        for name in statement_names(module).reads:
            bound = self.env.get(name.value)
            if isinstance(bound, (Var, Const)):
                reads[name.value] = bound
            elif name.value in self.index.module_names:
                self.constants_read[name.value] = None
        problem = _problem(module)
        if problem is not None:
            if quiet:
                return None
            fail(problem[1], self.index.locate(problem[0]), problem[2] or None)
        # the statement's own target when it is one (`z = np.zeros(3)`), else a
        # name of its own (`array = np.array([1.0, 2.0])` out of a return)
        var = target if target is not None else self.new_var(base, "local")
        text = f"{var.base} = " + module.code.strip()
        statement = self.new_var("copied", "temp")
        part = target is None
        copied = Copied(text, tuple(reads), ((var.base, var),), part=part)
        self.blocks[-1].append(
            Let(statement, "copied", tuple(reads.values()), self.origin, copied)
        )
        self.inert_values.add(statement)
        self.emit("written", (statement,), var)
        self.opaque.add(var)
        self.fresh.discard(var)
        if _fresh_value(node):
            self.copied_fresh.add(var)
        return var

    def active_read(self, node: cst.BaseExpression) -> cst.Name | None:
        """The first name ``node`` reads that may hold an active value (or one
        that cannot be copied: a tuple, a name unbound on some path), else None;
        reading an array only for its size does not count."""
        module = as_module(cst.Expr(node))
        sizes = _size_reads(module)
        for name in statement_names(module).reads:
            bound = self.env.get(name.value)
            if isinstance(bound, (_Unbound, _Tuple)) or (
                isinstance(bound, (Var, Const))
                and id(name) not in sizes
                and not self.never_active(bound)
            ):
                return name
        return None

    def never_active(self, atom: Atom) -> bool:
        """``is_inert``, or else no path of the statements lowered so far leads
        from a --wrt parameter to ``atom`` through a differentiable primitive
        (a forward fixed point over branches and loops, so a while loop's
        counter is inactive). A value of a loop still being lowered (a carried
        value whose update is not known yet) counts as active."""
        if self.is_inert(atom):
            return True
        assert isinstance(atom, Var)
        defined: set[Var] = set()
        active: set[Var] = set()

        def is_active(arg: object) -> bool:
            if isinstance(arg, Var) and arg.kind == "param":
                return arg.base in self.function.wrt
            # a value no statement lowered so far defines is a carried value of
            # a loop still being lowered: it may be active (a while loop in a
            # for loop's body updating x read x * 0.9 as inactive: a zero
            # gradient)
            if isinstance(arg, Var) and arg.kind != "index" and arg not in known:
                return True
            return arg in active

        known: set[Var] = set()

        def collect(statements: list | tuple) -> None:
            for stmt in statements:
                if isinstance(stmt, Let):
                    known.add(stmt.target)
                    continue
                phis = stmt.merges if isinstance(stmt, Branch) else stmt.carried
                if isinstance(stmt, Branch):
                    collect(stmt.then)
                    collect(stmt.orelse)
                else:
                    known.add(stmt.index)
                    collect(stmt.body)
                    if stmt.trips is not None:
                        known.add(stmt.trips)
                for phi in phis:
                    known.update({phi.target} | ({phi.exit} if phi.exit else set()))

        for block in self.blocks:
            collect(block)

        def visit(statements: list | tuple) -> bool:
            changed = False
            for stmt in statements:
                if isinstance(stmt, Let):
                    defined.add(stmt.target)
                    if (
                        stmt.target not in active
                        and _differentiable(stmt.op)
                        and any(is_active(a) for a in stmt.args)
                    ):
                        active.add(stmt.target)
                        changed = True
                    continue
                phis = stmt.merges if isinstance(stmt, Branch) else stmt.carried
                if isinstance(stmt, Branch):
                    changed = visit(stmt.then) | visit(stmt.orelse) | changed
                else:
                    defined.add(stmt.index)
                    changed = visit(stmt.body) | changed
                for phi in phis:
                    outs = {phi.target} | ({phi.exit} if phi.exit else set())
                    defined.update(outs)
                    if not outs <= active and (
                        is_active(phi.first) or is_active(phi.second)
                    ):
                        active.update(outs)
                        changed = True
            return changed

        while any([visit(block) for block in self.blocks]):
            pass
        return atom in defined and atom not in active

    def opaque_item(self, node: cst.Subscript, base: str) -> Atom | None:
        """``table[key]`` on a value a copied statement bound (a local dict of
        constants, say) or on an element of module data (``row[0]`` of ``for row
        in TABLE``): a ``dataitem``, never active (None for anything else)."""
        head = node.value
        bound = self.env.get(head.value) if isinstance(head, cst.Name) else None
        if not (
            isinstance(bound, Var)
            and (bound in self.opaque or bound in self.data_items)
        ):
            return None
        if len(node.slice) != 1 or not isinstance(node.slice[0].slice, cst.Index):
            if self.numpy:  # an array a copied statement made: c0[:, None], c0[1:]
                return None
            fail(
                "only single-key lookups are supported here",
                self.index.locate(node),
                f"write {head.value}[key]",  # type: ignore[union-attr]
            )
        key = node.slice[0].slice.value  # type: ignore[union-attr]
        if isinstance(key, cst.SimpleString):
            index: Atom = Const(key.value, None)
        else:
            index = self.scalar(self.expr(key, base, None), key)
        item = self.emit("dataitem", (bound, index), self.new_var(base, "temp"))
        self.fresh.discard(item)
        return item


#: NumPy functions whose result may share memory with an argument
_NUMPY_VIEWS = frozenset(
    "asarray asanyarray ascontiguousarray asfortranarray atleast_1d atleast_2d"
    " atleast_3d broadcast_to diagonal expand_dims flip fliplr flipud moveaxis"
    " ravel real imag require reshape rot90 squeeze swapaxes transpose split"
    " array_split hsplit vsplit dsplit frombuffer".split()
)


def _fresh_array_target(stmt: cst.CSTNode) -> str | None:
    """The name ``stmt`` binds to a value surely of its own (arithmetic, a NumPy
    function that makes a new array, a method that returns one), else None."""
    assign = _single_assign(stmt)
    if assign is None:
        return None
    target = assign.targets[0].target
    if isinstance(target, cst.Name) and _fresh_value(assign.value):
        return target.value
    return None


def _single_assign(stmt: cst.CSTNode) -> cst.Assign | None:
    """``name = value`` (one target), alone on its line, else None."""
    if isinstance(stmt, cst.SimpleStatementLine) and len(stmt.body) == 1:
        stmt = stmt.body[0]
    if isinstance(stmt, cst.Assign) and len(stmt.targets) == 1:
        return stmt
    return None


def _fresh_value(value: cst.BaseExpression) -> bool:
    """Whether ``value`` surely makes a value of its own (arithmetic, a NumPy
    function that makes a new array, a method that returns one), not a copy of
    a name, an element, a slice or a view."""
    if isinstance(value, (cst.BinaryOperation, cst.UnaryOperation)):
        return True
    if isinstance(value, cst.Call) and isinstance(value.func, cst.Attribute):
        func = value.func
        if isinstance(func.value, cst.Name) and func.value.value in ("np", "numpy"):
            return func.attr.value not in _NUMPY_VIEWS
        return func.attr.value in _READING_METHODS and func.attr.value != "get"
    return False


def _sequence_literal_target(stmt: cst.CSTNode) -> str | None:
    """The name ``rays = [(1.0, 0.0), ...]`` binds to a list or tuple literal (a
    copied table a loop may run over, row by row), else None."""
    assign = _single_assign(stmt)
    if assign is None:
        return None
    target = assign.targets[0].target
    if isinstance(target, cst.Name) and isinstance(assign.value, (cst.List, cst.Tuple)):
        return target.value
    return None
