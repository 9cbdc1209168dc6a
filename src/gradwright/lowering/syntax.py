"""Reading libcst statements for the lowering: blocks, bound names, list uses,
operator symbols, and the messages for constructs the subset rejects."""

from __future__ import annotations

import re

import libcst as cst

from gradwright.lowering.frontend import ModuleIndex

_BINARY_SYMBOLS: dict[type, str] = {
    cst.Add: "+",
    cst.Subtract: "-",
    cst.Multiply: "*",
    cst.Divide: "/",
    cst.FloorDivide: "//",
    cst.Modulo: "%",
    cst.Power: "**",
    cst.MatrixMultiply: "@",
    cst.LeftShift: "<<",
    cst.RightShift: ">>",
    cst.BitAnd: "&",
    cst.BitOr: "|",
    cst.BitXor: "^",
}

_AUGMENTED_SYMBOLS: dict[type, str] = {
    cst.AddAssign: "+",
    cst.SubtractAssign: "-",
    cst.MultiplyAssign: "*",
    cst.DivideAssign: "/",
    cst.FloorDivideAssign: "//",
    cst.ModuloAssign: "%",
    cst.PowerAssign: "**",
}

# Statement kinds we reject, with the message and the hint a user needs.
_STATEMENT_REJECTIONS: dict[type, tuple[str, str | None]] = {
    cst.Try: (
        "try statements are not supported",
        "check inputs before calling the model; the gradient code cannot follow"
        " an exception",
    ),
    cst.With: ("with statements are not supported", None),
    cst.FunctionDef: (
        "nested function definitions are not supported",
        "define the helper at module level",
    ),
    cst.ClassDef: ("class definitions inside the model are not supported", None),
    cst.Global: (
        "global statements are not supported (the model must not change module"
        " state)",
        "pass the value in as a parameter and return it",
    ),
    cst.Nonlocal: ("nonlocal statements are not supported", None),
    cst.Del: ("del statements are not supported", None),
    cst.Raise: ("raise statements are not supported", None),
    cst.Assert: (
        "assert statements are not supported",
        "check inputs before calling the model",
    ),
    cst.Import: (
        "imports inside the model are not supported",
        "import at module level",
    ),
    cst.ImportFrom: (
        "imports inside the model are not supported",
        "import at module level",
    ),
    cst.Break: ("break outside a loop", None),
    cst.Continue: ("continue outside a loop", None),
}

_EXPRESSION_REJECTIONS: dict[type, tuple[str, str | None]] = {
    cst.Lambda: (
        "lambda expressions are not supported",
        "define a module-level function",
    ),
    cst.ListComp: ("list comprehensions are not supported", None),
    cst.SetComp: ("set comprehensions are not supported", None),
    cst.DictComp: ("dict comprehensions are not supported", None),
    cst.GeneratorExp: ("generator expressions are not supported", None),
    cst.SimpleString: (
        "strings are not numbers: string operations are not supported",
        None,
    ),
    cst.ConcatenatedString: ("string operations are not supported", None),
    cst.FormattedString: ("f-strings are not supported", None),
    cst.Imaginary: ("complex numbers are not supported", None),
    cst.Tuple: ("a tuple is not a number", None),
    cst.Dict: ("dicts are not supported", None),
    cst.Set: ("sets are not supported", None),
    cst.Await: ("await is not supported", None),
    cst.Yield: ("yield is not supported (generators cannot be differentiated)", None),
    cst.NamedExpr: (
        "assignment expressions (:=) are not supported",
        "assign on its own line",
    ),
    cst.StarredElement: ("starred expressions are not supported", None),
    cst.Ellipsis: ("... is not a number", None),
}

_WHITESPACE = re.compile(r"\s*\n\s*")


def _statement_text(index: ModuleIndex, node: cst.CSTNode) -> str:
    """The statement as written, on one line (for the quoting comments)."""
    return _WHITESPACE.sub(" ", index.code(node).strip())


def _target_names(target: cst.BaseExpression) -> list[str]:
    if isinstance(target, cst.Name):
        return [target.value]
    if isinstance(target, (cst.Tuple, cst.List)):
        return [n for el in target.elements for n in _target_names(el.value)]
    return []


_COMPARE_OPS: dict[type, str] = {
    cst.LessThan: "lt",
    cst.LessThanEqual: "le",
    cst.GreaterThan: "gt",
    cst.GreaterThanEqual: "ge",
    cst.Equal: "eq",
    cst.NotEqual: "ne",
}


def _block_statements(block: cst.BaseSuite) -> list[cst.CSTNode]:
    """The statements of a block, with ``a = 1; b = 2`` lines split."""
    if not isinstance(block, cst.IndentedBlock):
        return list(block.body)  # `if c: x = 1` on one line
    statements: list[cst.CSTNode] = []
    for stmt in block.body:
        if isinstance(stmt, cst.SimpleStatementLine):
            statements.extend(stmt.body)
        else:
            statements.append(stmt)
    return statements


def _else_statements(node: cst.If) -> list[cst.CSTNode]:
    orelse = node.orelse
    if orelse is None:
        return []
    if isinstance(orelse, cst.If):
        return [orelse]  # elif
    return _block_statements(orelse.body)


def _always_leaves(statements: list[cst.CSTNode]) -> bool:
    """Whether every path through the statements returns, breaks or continues."""
    if not statements:
        return False
    last = statements[-1]
    if isinstance(last, (cst.Return, cst.Break, cst.Continue)):
        return True
    if isinstance(last, cst.If):
        return _always_leaves(_block_statements(last.body)) and _always_leaves(
            _else_statements(last)
        )
    return False


def _may_leave(statements: list[cst.CSTNode]) -> bool:
    """Whether some path through the statements returns, or breaks or continues
    the loop they are in (not one nested in them)."""
    return _finds(statements, (cst.Return, cst.Break, cst.Continue))


def _contains_return(statements: list[cst.CSTNode]) -> bool:
    """Whether a return appears anywhere in the statements, loops included."""
    return _finds(statements, (cst.Return,))


def _may_break(statements: list[cst.CSTNode]) -> bool:
    """Whether a break in the statements ends the loop they are the body of."""
    return _finds(statements, (cst.Break,), nested=())


def _finds(
    statements: list[cst.CSTNode],
    jumps: tuple[type, ...],
    nested: tuple[type, ...] = (cst.Return,),
) -> bool:
    """Whether one of ``jumps`` is in the statements or their ifs; in loops
    nested in them, one of ``nested`` (a return: a break there is the inner
    loop's)."""
    for stmt in statements:
        if isinstance(stmt, jumps):
            return True
        if isinstance(stmt, cst.If) and (
            _finds(_block_statements(stmt.body), jumps, nested)
            or _finds(_else_statements(stmt), jumps, nested)
        ):
            return True
        if (
            nested
            and isinstance(stmt, (cst.For, cst.While))
            and _finds(_block_statements(stmt.body), nested, nested)
        ):
            return True
    return False


def _return_arity(statements: list[cst.CSTNode]) -> int:
    """How many values the first return in the statements gives (loops included)."""
    for stmt in statements:
        if isinstance(stmt, cst.Return):
            value = stmt.value
            return len(value.elements) if isinstance(value, cst.Tuple) else 1
        inner: list[cst.CSTNode] = []
        if isinstance(stmt, cst.If):
            inner = _block_statements(stmt.body) + _else_statements(stmt)
        elif isinstance(stmt, (cst.For, cst.While)):
            inner = _block_statements(stmt.body)
        if _contains_return(inner):
            return _return_arity(inner)
    return 1


def _assigned_names(statements: list[cst.CSTNode]) -> dict[str, None]:
    """Every name a run of statements binds, nested blocks included, in order.

    Python makes these local throughout the function. Element writes (``y[i] = v``)
    count as binding ``y``: they make a new version of the list.
    """
    names: dict[str, None] = {}
    for stmt in statements:
        targets: list[cst.BaseExpression] = []
        if isinstance(stmt, cst.Assign):
            targets = [t.target for t in stmt.targets]
        elif isinstance(stmt, (cst.AugAssign, cst.AnnAssign)):
            targets = [stmt.target]
        elif isinstance(stmt, cst.If):
            names.update(_assigned_names(_block_statements(stmt.body)))
            names.update(_assigned_names(_else_statements(stmt)))
        elif isinstance(stmt, cst.For):
            targets = [stmt.target]
            names.update(_assigned_names(_block_statements(stmt.body)))
        elif isinstance(stmt, cst.While):
            names.update(_assigned_names(_block_statements(stmt.body)))
        elif isinstance(stmt, cst.Expr) and _grown_list(stmt.value) is not None:
            names[_grown_list(stmt.value)] = None  # type: ignore[index]
        for target in targets:
            if isinstance(target, cst.Subscript) and isinstance(target.value, cst.Name):
                names[target.value.value] = None
            for name in _target_names(target):
                names[name] = None
    return names


#: the list methods a model may call (as statements): they grow the list in place
LIST_METHODS = ("append", "extend")


def _grown_list(node: cst.BaseExpression) -> str | None:
    """``NAME`` when ``node`` is ``NAME.append(...)`` or ``NAME.extend(...)``."""
    if (
        isinstance(node, cst.Call)
        and isinstance(node.func, cst.Attribute)
        and isinstance(node.func.value, cst.Name)
        and node.func.attr.value in LIST_METHODS
    ):
        return node.func.value.value
    return None


def _list_uses(node: cst.CSTNode) -> set[str]:
    """Names used as lists: indexed, iterated, or passed to len() or sum()."""
    found: set[str] = set()

    class Finder(cst.CSTVisitor):
        def visit_Subscript(self, n: cst.Subscript) -> None:
            if isinstance(n.value, cst.Name):
                found.add(n.value.value)

        def visit_For(self, n: cst.For) -> None:
            if isinstance(n.iter, cst.Name):
                found.add(n.iter.value)

        def visit_Call(self, n: cst.Call) -> None:
            if (
                isinstance(n.func, cst.Name)
                and n.func.value in ("len", "sum")
                and len(n.args) == 1
                and isinstance(n.args[0].value, cst.Name)
            ):
                found.add(n.args[0].value.value)

    node.visit(Finder())
    return found


def _returns_tuple(function: cst.FunctionDef) -> bool:
    found = False

    class Finder(cst.CSTVisitor):
        def visit_Return(self, node: cst.Return) -> None:
            nonlocal found
            found = found or isinstance(node.value, cst.Tuple)

        def visit_FunctionDef(self, node: cst.FunctionDef) -> bool:
            return node is function  # not into nested definitions

    function.visit(Finder())
    return found


def _is_docstring(stmt: cst.CSTNode) -> bool:
    return isinstance(stmt, cst.Expr) and isinstance(
        stmt.value, (cst.SimpleString, cst.ConcatenatedString)
    )


def _keyword_span(stmt: cst.CSTNode) -> cst.CSTNode:
    """The part of a statement a caret should point at (the keyword and its test)."""
    for attr in ("test", "target", "name", "names"):
        child = getattr(stmt, attr, None)
        if isinstance(child, cst.CSTNode):
            return child
    return stmt


def _normalize_number(text: str) -> str:
    """A numeric literal as black prints it (lower-case prefix and exponent)."""
    lowered = text.lower()
    if lowered.startswith("0x"):
        return "0x" + text[2:].upper()
    return lowered


def _callee_list_uses(callee: cst.FunctionDef) -> set[str]:
    return _list_uses(callee.body)
