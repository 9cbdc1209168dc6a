"""Reading the model file: parse with libcst, index the module, check the target.

Nothing here imports or executes the user's file. The module index records what a
target function may refer to: ``math`` imports in their various spellings, numeric
module-level constants and the other functions of the file.
"""

from __future__ import annotations

import ast
import re
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from functools import cached_property

import libcst as cst
from libcst.metadata import CodeRange, MetadataWrapper, PositionProvider

from gradwright.calculus.primitives import MATH_CONSTANTS, MATH_FUNCTIONS
from gradwright.diagnostics import Location, fail, file_location


@dataclass(frozen=True)
class ConstantDef:
    """A module-level ``NAME = <numeric constant expression>``."""

    name: str
    text: str
    depends_on: tuple[str, ...]


@dataclass(frozen=True)
class ModuleStatement:
    """One top-level statement: its text (with the comment lines right above it)
    and the names it binds and reads, found without running it."""

    text: str
    binds: frozenset[str]
    reads: frozenset[str]
    #: "def" or "class" (copied only when a name they bind is needed), "import",
    #: "generated" (math and numpy imports, which the output writes itself),
    #: "main" (the ``if __name__ == "__main__":`` block, never copied) or "other"
    kind: str
    #: whether running it may change a value it reads (a call, an element or
    #: attribute assignment, a block), so a needed value's statements include it
    mutates: bool


@dataclass(frozen=True)
class ModuleIndex:
    path: str
    source: str
    module: cst.Module
    lines: tuple[str, ...]
    #: names bound to the math module itself (``import math``, ``import math as m``)
    math_modules: frozenset[str]
    #: names bound to numpy (``import numpy as np``), and those import statements
    numpy_modules: frozenset[str]
    numpy_imports: tuple[str, ...]
    #: names imported from math: local name -> name in math
    math_names: Mapping[str, str]
    #: the math import statements, as written, in source order
    math_imports: tuple[str, ...]
    constants: Mapping[str, ConstantDef]
    functions: Mapping[str, cst.FunctionDef]
    #: every name bound at module level (for name-clash checks)
    module_names: frozenset[str] = field(default_factory=frozenset)
    #: every top-level statement, for copying the ones the models depend on
    statements: tuple[ModuleStatement, ...] = ()
    #: module-level names bound to something other than a number, a function or
    #: the math and numpy modules: inactive data the models may read
    data_names: frozenset[str] = field(default_factory=frozenset)
    #: data bound once to a literal that is not a number: name -> "a string", ...
    data_kinds: Mapping[str, str] = field(default_factory=dict)

    @cached_property
    def positions(self) -> Mapping[cst.CSTNode, CodeRange]:
        # resolved on the first diagnostic only: it costs as much as the parse
        wrapper = MetadataWrapper(self.module, unsafe_skip_copy=True)
        return wrapper.resolve(PositionProvider)

    def locate(self, node: cst.CSTNode) -> Location:
        span = self.positions[node]
        line = span.start.line
        end = span.end.column if span.end.line == line else len(self.lines[line - 1])
        return Location(self.path, line, span.start.column, end, self.lines[line - 1])

    @cached_property
    def _quoted(self) -> dict[int, str]:
        return _statement_spans(self.module, self.source)

    def quote(self, node: cst.CSTNode, text: str) -> None:
        """Quote ``node``, a statement the lowering made, as ``text``."""
        self._quoted[id(node)] = text

    def code(self, node: cst.CSTNode) -> str:
        """The node's text as written: sliced from the source for statements, ``if``
        tests and ``for`` iterables (what the comments quote), else re-printed
        (re-printing every statement cost more than the rest of the lowering).
        A slice keeps the file's indentation on continuation lines, where libcst's
        printing drops the enclosing block's; the quoting comments join lines."""
        text = self._quoted.get(id(node))
        return text if text is not None else self.module.code_for_node(node)


_SEMICOLON = re.compile(r"[ \t]*;")
_BLANK = " \t\n\\"


def _statement_spans(module: cst.Module, source: str) -> dict[int, str]:
    """id(node) -> its source text, for the statements of every block and the tests
    and iterables of ``if`` and ``for``, from CPython's parse (a fraction of the
    cost of printing them again). Positions come from walking libcst's tree and
    ``ast``'s side by side; a block where they disagree is left out, and so is
    everything when ``ast`` cannot parse what libcst did."""
    try:
        tree = ast.parse(source)
    except (SyntaxError, ValueError):
        return {}
    lines = source.splitlines(keepends=True)
    starts = [0]
    for line in lines:
        starts.append(starts[-1] + len(line))

    def offset(line: int, column: int) -> int:
        text = lines[line - 1]
        if not text.isascii():  # ast's columns count UTF-8 bytes
            column = len(text.encode("utf-8")[:column].decode("utf-8", "replace"))
        return starts[line - 1] + column

    def span(node: ast.AST) -> tuple[int, int]:
        start = offset(node.lineno, node.col_offset)  # type: ignore[attr-defined]
        end = offset(node.end_lineno, node.end_col_offset)  # type: ignore[attr-defined]
        return start, end

    spans: dict[int, str] = {}

    def expression(node: cst.BaseExpression, twin: ast.expr) -> None:
        start, end = span(twin)
        # ast leaves out the parentheses around an expression; libcst keeps them
        for _ in node.lpar:
            while start > 0 and source[start - 1] in _BLANK:
                start -= 1
            while end < len(source) and source[end] in _BLANK:
                end += 1
            if source[start - 1 : start] != "(" or source[end : end + 1] != ")":
                return  # a comment in the way: printed instead
            start, end = start - 1, end + 1
        spans[id(node)] = source[start:end]

    def block(body: Sequence[cst.CSTNode], twins: list[ast.stmt]) -> None:
        small: list[cst.CSTNode] = []
        for stmt in body:
            if isinstance(stmt, cst.SimpleStatementLine):
                small.extend(stmt.body)
            else:
                small.append(stmt)
        if len(small) != len(twins):
            return
        for node, twin in zip(small, twins, strict=True):
            if isinstance(node, cst.BaseSmallStatement):
                start, end = span(twin)
                semicolon = _SEMICOLON.match(source, end)  # libcst's node owns it
                spans[id(node)] = source[start : semicolon.end() if semicolon else end]
            elif isinstance(node, cst.If) and isinstance(twin, ast.If):
                expression(node.test, twin.test)
                block(node.body.body, twin.body)
                orelse = node.orelse
                if isinstance(orelse, cst.If):
                    block([orelse], twin.orelse)
                elif orelse is not None:
                    block(orelse.body.body, twin.orelse)
            elif isinstance(node, cst.For) and isinstance(twin, ast.For):
                expression(node.iter, twin.iter)
                block(node.body.body, twin.body)
            elif isinstance(node, cst.While) and isinstance(twin, ast.While):
                expression(node.test, twin.test)
                block(node.body.body, twin.body)
            elif isinstance(node, (cst.FunctionDef, cst.ClassDef)) and isinstance(
                twin, (ast.FunctionDef, ast.AsyncFunctionDef, ast.ClassDef)
            ):
                block(node.body.body, twin.body)

    block(module.body, tree.body)
    return spans


def _syntax_error(path: str, source: str, error: cst.ParserSyntaxError) -> None:
    # CPython's own parser locates syntax errors better than libcst's error
    # recovery does; compile() only parses here, it runs nothing.
    lines = source.splitlines() or [""]
    line_no, column, message = error.raw_line, error.raw_column, error.message
    try:
        compile(source, path, "exec", dont_inherit=True)
    except SyntaxError as cpython:
        if cpython.lineno:
            line_no = cpython.lineno
            column = max((cpython.offset or 1) - 1, 0)
            message = cpython.msg
    except ValueError:  # null bytes: keep libcst's position
        pass
    line_no = min(max(line_no, 1), len(lines))
    text = lines[line_no - 1]
    column = min(column, len(text))
    loc = Location(path, line_no, column, column + 1, text)
    text_message = message if "syntax" in message else f"invalid syntax: {message}"
    fail(text_message, loc, "the model file must be valid Python 3.10")


def parse_module(source: str, path: str) -> ModuleIndex:
    try:
        parsed = cst.parse_module(source)
    except cst.ParserSyntaxError as error:
        _syntax_error(path, source, error)
        raise  # unreachable: _syntax_error raises
    return _index(path, source, parsed)


def dotted_name(node: cst.BaseExpression) -> str | None:
    """``a.b.c`` for a chain of attribute accesses on a name, else None."""
    return _dotted(node)


def _dotted(node: cst.BaseExpression) -> str | None:
    if isinstance(node, cst.Name):
        return node.value
    if isinstance(node, cst.Attribute):
        head = _dotted(node.value)
        return None if head is None else f"{head}.{node.attr.value}"
    return None


def _constant_dependencies(
    node: cst.BaseExpression,
    constants: Mapping[str, ConstantDef],
    math_modules: frozenset[str],
    math_names: Mapping[str, str],
) -> tuple[str, ...] | None:
    """Module constants a numeric constant expression reads, or None if not one."""
    if isinstance(node, (cst.Integer, cst.Float)):
        return ()
    if isinstance(node, cst.UnaryOperation) and isinstance(
        node.operator, (cst.Minus, cst.Plus)
    ):
        return _constant_dependencies(
            node.expression, constants, math_modules, math_names
        )
    if isinstance(node, cst.BinaryOperation) and isinstance(
        node.operator,
        (cst.Add, cst.Subtract, cst.Multiply, cst.Divide, cst.Power, cst.Modulo),
    ):
        left = _constant_dependencies(node.left, constants, math_modules, math_names)
        right = _constant_dependencies(node.right, constants, math_modules, math_names)
        if left is None or right is None:
            return None
        return left + tuple(n for n in right if n not in left)
    if isinstance(node, cst.Name):
        if node.value in constants:
            return (node.value,)
        if math_names.get(node.value) in MATH_CONSTANTS:
            return ()
        return None
    if isinstance(node, cst.Attribute) and isinstance(node.value, cst.Name):
        if node.value.value in math_modules and node.attr.value in MATH_CONSTANTS:
            return ()
    return None


def _index(
    path: str,
    source: str,
    module: cst.Module,
) -> ModuleIndex:
    math_modules: set[str] = set()
    numpy_modules: set[str] = set()
    numpy_imports: list[str] = []
    math_names: dict[str, str] = {}
    math_imports: list[str] = []
    functions: dict[str, cst.FunctionDef] = {}
    candidates: list[tuple[str, cst.BaseExpression, str]] = []
    bound_count: dict[str, int] = {}
    literal_kinds: dict[str, str] = {}

    def bind(name: str) -> None:
        bound_count[name] = bound_count.get(name, 0) + 1

    for stmt in module.body:
        if isinstance(stmt, cst.FunctionDef):
            functions[stmt.name.value] = stmt
            bind(stmt.name.value)
            continue
        if isinstance(stmt, cst.ClassDef):
            bind(stmt.name.value)
            continue
        if not isinstance(stmt, cst.SimpleStatementLine):
            continue
        for small in stmt.body:
            if isinstance(small, cst.Import):
                for alias in small.names:
                    dotted = _dotted(alias.name) or ""
                    local = (
                        alias.asname.name.value
                        if alias.asname and isinstance(alias.asname.name, cst.Name)
                        else dotted.split(".")[0]
                    )
                    bind(local)
                    if dotted == "numpy":
                        numpy_modules.add(local)
                        numpy_imports.append(
                            "import numpy"
                            if local == "numpy"
                            else f"import numpy as {local}"
                        )
                    if dotted == "math":
                        math_modules.add(local)
                        math_imports.append(
                            "import math"
                            if local == "math"
                            else f"import math as {local}"
                        )
            elif isinstance(small, cst.ImportFrom):
                from_math = (
                    not small.relative
                    and small.module is not None
                    and _dotted(small.module) == "math"
                )
                if not from_math:
                    if not isinstance(small.names, cst.ImportStar):
                        for alias in small.names:
                            bind(_alias_local(alias))
                    continue
                if isinstance(small.names, cst.ImportStar):
                    continue
                parts = []
                for alias in small.names:
                    imported = _dotted(alias.name) or ""
                    local = _alias_local(alias)
                    bind(local)
                    math_names[local] = imported
                    parts.append(
                        imported if local == imported else f"{imported} as {local}"
                    )
                math_imports.append(f"from math import {', '.join(parts)}")
            elif isinstance(small, (cst.Assign, cst.AnnAssign)):
                targets = (
                    [t.target for t in small.targets]
                    if isinstance(small, cst.Assign)
                    else [small.target]
                )
                for target in targets:
                    for name_node in _names_in_target(target):
                        bind(name_node)
                if (
                    len(targets) == 1
                    and isinstance(targets[0], cst.Name)
                    and small.value is not None
                ):
                    # the whole line, so a trailing comment (units, say) comes along
                    line = stmt.with_changes(leading_lines=())
                    text = (
                        module.code_for_node(line).rstrip("\n")
                        if len(stmt.body) == 1
                        else module.code_for_node(small)
                    )
                    candidates.append((targets[0].value, small.value, text))
                    kind = _LITERAL_KINDS.get(type(small.value))
                    if kind is not None:
                        literal_kinds[targets[0].value] = kind
            elif isinstance(small, cst.AugAssign) and isinstance(
                small.target, cst.Name
            ):
                bind(small.target.value)

    statements = _module_statements(source)
    for statement in statements:
        if statement.kind != "main":
            for name in statement.binds:
                bound_count.setdefault(name, 1)
    constants: dict[str, ConstantDef] = {}
    frozen_modules = frozenset(math_modules)
    for name, value, text in candidates:
        if bound_count.get(name, 0) != 1:
            continue  # re-bound at module level: not a constant
        deps = _constant_dependencies(value, constants, frozen_modules, math_names)
        if deps is not None:
            constants[name] = ConstantDef(name, text, deps)

    return ModuleIndex(
        path=path,
        source=source,
        module=module,
        lines=tuple(source.splitlines()) or ("",),
        math_modules=frozen_modules,
        numpy_modules=frozenset(numpy_modules),
        numpy_imports=tuple(dict.fromkeys(numpy_imports)),
        math_names=dict(sorted(math_names.items())),
        math_imports=tuple(dict.fromkeys(math_imports)),
        constants=constants,
        functions=functions,
        module_names=frozenset(bound_count),
        statements=statements,
        data_kinds={
            name: kind
            for name, kind in sorted(literal_kinds.items())
            if bound_count.get(name) == 1
        },
        data_names=frozenset(bound_count)
        - set(constants)
        - set(functions)
        - math_modules
        - numpy_modules
        - set(math_names),
    )


_SCOPES = (ast.FunctionDef, ast.AsyncFunctionDef, ast.ClassDef, ast.Lambda)
_COMPREHENSIONS = (ast.ListComp, ast.SetComp, ast.DictComp, ast.GeneratorExp)


def _bound_names(node: ast.AST) -> set[str]:
    """Names a top-level statement binds in the module (not in nested scopes)."""
    found: set[str] = set()

    def visit(item: ast.AST) -> None:
        if isinstance(item, (ast.FunctionDef, ast.AsyncFunctionDef, ast.ClassDef)):
            found.add(item.name)
            return
        if isinstance(item, (ast.Lambda, *_COMPREHENSIONS)):
            return
        if isinstance(item, ast.Name) and isinstance(item.ctx, (ast.Store, ast.Del)):
            found.add(item.id)
        elif isinstance(item, (ast.Import, ast.ImportFrom)):
            for alias in item.names:
                found.add(alias.asname or alias.name.split(".")[0])
        for child in ast.iter_child_nodes(item):
            visit(child)

    visit(node)
    found.discard("*")
    return found


def _is_main_guard(node: ast.stmt) -> bool:
    test = node.test if isinstance(node, ast.If) else None
    return (
        isinstance(test, ast.Compare)
        and isinstance(test.left, ast.Name)
        and test.left.id == "__name__"
    )


def _statement_kind(node: ast.stmt) -> str:
    if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef)):
        return "def"
    if isinstance(node, ast.ClassDef):
        return "class"
    if isinstance(node, ast.Import):
        plain = all(a.name in ("math", "numpy") for a in node.names)
        return "generated" if plain else "import"
    if isinstance(node, ast.ImportFrom):
        return "generated" if node.module == "math" and not node.level else "import"
    if _is_main_guard(node):
        return "main"
    return "other"


def _may_mutate(node: ast.stmt) -> bool:
    if (
        isinstance(node, ast.Expr)
        and isinstance(node.value, ast.Call)
        and isinstance(node.value.func, ast.Name)
        and node.value.func.id == "print"
    ):
        return False  # a report, not a change: left out of the output
    if isinstance(node, (ast.Assign, ast.AnnAssign)):
        targets = node.targets if isinstance(node, ast.Assign) else [node.target]
        return not all(isinstance(t, (ast.Name, ast.Tuple)) for t in targets)
    return not isinstance(node, (ast.Pass, ast.Import, ast.ImportFrom))


def _module_statements(source: str) -> tuple[ModuleStatement, ...]:
    """The top-level statements as text (whole lines, so trailing comments come
    along, and the comment lines right above), with the names each binds and
    reads. ``ast`` only parses; nothing is run."""
    try:
        tree = ast.parse(source)
    except (SyntaxError, ValueError):
        return ()
    lines = source.splitlines()
    out: list[ModuleStatement] = []
    for node in tree.body:
        first = node.lineno
        if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef, ast.ClassDef)):
            first = min([first, *(d.lineno for d in node.decorator_list)])
        last = node.end_lineno or node.lineno
        while first > 1 and lines[first - 2].lstrip().startswith("#"):
            first -= 1
        reads = {
            n.id
            for n in ast.walk(node)
            if isinstance(n, ast.Name) and isinstance(n.ctx, ast.Load)
        }
        out.append(
            ModuleStatement(
                text="\n".join(lines[first - 1 : last]),
                binds=frozenset(_bound_names(node)),
                reads=frozenset(reads),
                kind=_statement_kind(node),
                mutates=_may_mutate(node),
            )
        )
    return tuple(out)


_LITERAL_KINDS: dict[type, str] = {
    cst.SimpleString: "a string",
    cst.ConcatenatedString: "a string",
    cst.FormattedString: "a string",
    cst.List: "a list",
    cst.Tuple: "a tuple",
    cst.Dict: "a dict",
    cst.Set: "a set",
}


def _alias_local(alias: cst.ImportAlias) -> str:
    if alias.asname and isinstance(alias.asname.name, cst.Name):
        return alias.asname.name.value
    return (_dotted(alias.name) or "").split(".")[0]


def _names_in_target(target: cst.BaseExpression) -> list[str]:
    if isinstance(target, cst.Name):
        return [target.value]
    if isinstance(target, (cst.Tuple, cst.List)):
        return [n for el in target.elements for n in _names_in_target(el.value)]
    if isinstance(target, cst.StarredElement):
        return _names_in_target(target.value)
    return []


# ---------------------------------------------------------------------------------
# the target function


@dataclass(frozen=True)
class CheckedFunction:
    """A target function whose signature passed the checks, with its wrt list."""

    name: str
    node: cst.FunctionDef
    params: tuple[str, ...]
    wrt: tuple[str, ...]


def check_function(
    index: ModuleIndex, name: str, wrt: tuple[str, ...] | None
) -> CheckedFunction:
    node = index.functions.get(name)
    if node is None:
        available = ", ".join(sorted(index.functions)) or "none"
        fail(
            f"no function named '{name}' at the top level of {index.path}",
            file_location(index.path),
            f"functions defined there: {available}",
        )
        raise AssertionError  # unreachable
    if node.asynchronous is not None:
        fail(
            "async functions cannot be differentiated",
            index.locate(node.name),
            "move the arithmetic into a plain `def` and call it from the async code",
        )
    if node.decorators:
        fail(
            "decorated functions are not supported (the decorator could change what"
            " the function computes)",
            index.locate(node.decorators[0]),
            "differentiate the undecorated function",
        )
    params = node.params
    if not isinstance(params.star_arg, cst.MaybeSentinel) and isinstance(
        params.star_arg, cst.Param
    ):
        fail(
            "*args parameters are not supported",
            index.locate(params.star_arg),
            "name each input as its own parameter",
        )
    if params.star_kwarg is not None:
        fail(
            "**kwargs parameters are not supported",
            index.locate(params.star_kwarg),
            "name each input as its own parameter",
        )
    all_params = [*params.posonly_params, *params.params, *params.kwonly_params]
    names = tuple(p.name.value for p in all_params)
    for param in all_params:
        if (
            param.default is not None
            and _constant_dependencies(
                param.default, index.constants, index.math_modules, index.math_names
            )
            is None
            and not _is_data_read(param.default, index.data_names)
        ):
            fail(
                "a parameter default must be a numeric constant or module-level data",
                index.locate(param.default),
                "write the value as a module-level constant (SPAN = 2.5) and name"
                " it: def f(a, span=SPAN)",
            )
    if not names:
        fail(
            f"'{name}' has no parameters to differentiate with respect to",
            index.locate(node.name),
            "pass the quantities the result depends on as parameters",
        )
    if wrt is None:
        chosen = names
    else:
        for w in wrt:
            if w not in names:
                fail(
                    f"--wrt name '{w}' is not a parameter of '{name}'",
                    (
                        index.locate(node.params)
                        if all_params
                        else index.locate(node.name)
                    ),
                    f"parameters: {', '.join(names)}",
                )
        if len(set(wrt)) != len(wrt):
            fail(
                f"--wrt lists a parameter twice: {', '.join(wrt)}",
                hint="name each parameter once",
            )
        chosen = tuple(wrt)
    for param in all_params:
        if param.name.value in chosen and param.annotation is not None:
            annotation = _dotted(param.annotation.annotation)
            if annotation in ("int", "bool"):
                fail(
                    f"parameter '{param.name.value}' is annotated {annotation}: an"
                    " integer input has no derivative",
                    index.locate(param.annotation.annotation),
                    "leave it out of --wrt, or annotate it float",
                )
    return CheckedFunction(name, node, names, chosen)


def _is_data_read(node: cst.BaseExpression, data_names: frozenset[str]) -> bool:
    """``NAME``, ``NAME.field`` or ``NAME[k]`` with NAME module-level data and k a
    literal: a default that the generated signature can keep as written."""
    if isinstance(node, cst.Name):
        return node.value in data_names
    if isinstance(node, cst.Attribute):
        return _is_data_read(node.value, data_names)
    if isinstance(node, cst.Subscript):
        keys = [s.slice for s in node.slice]
        return all(
            isinstance(k, cst.Index)
            and isinstance(k.value, (cst.Integer, cst.SimpleString))
            for k in keys
        ) and _is_data_read(node.value, data_names)
    return False


def literal_value(node: cst.Integer | cst.Float) -> int | float:
    return ast.literal_eval(node.value)


def math_function_op(index: ModuleIndex, func: cst.BaseExpression) -> str | None:
    """The op key for a call's callee when it names a supported math function."""
    if isinstance(func, cst.Attribute) and isinstance(func.value, cst.Name):
        if func.value.value in index.math_modules:
            return MATH_FUNCTIONS.get(func.attr.value)
    if isinstance(func, cst.Name) and func.value in index.math_names:
        return MATH_FUNCTIONS.get(index.math_names[func.value])
    return None
