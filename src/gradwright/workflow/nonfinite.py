"""Finding the statement where a gradient first became inf or nan (used by ``verify``).

A reverse sweep can fail silently: the value is finite, yet an adjoint overflows
(``1.0 / t`` for a ``t`` that underflowed to a subnormal, say) and the inf or nan
flows into a gradient entry. To say where, ``verify`` runs the ``_grad`` function
once more, instrumented: the generated module's text is parsed with ``ast`` and a
probe is inserted after every assignment, recording the first target that is not
finite. Each generated statement is mapped back to the source statement it comes
from through the comment that precedes its group (``# <source statement>``), and
``# reverse sweep`` splits forward values from adjoints. The generator is untouched:
this runs only inside ``verify``, on code the user asked it to run.
"""

from __future__ import annotations

import ast
import bisect
import math
import sys
import types
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from types import TracebackType
from typing import Any

PROBE = "__gradwright_probe__"
FILENAME = "<gradwright verify>"
REVERSE_MARK = "# reverse sweep"


@dataclass(frozen=True)
class Statement:
    """One generated assignment in the ``_grad`` function."""

    line: int  # in the generated module
    end_line: int
    phase: str  # "forward" or "reverse"
    source: str | None  # the quoted source statement of its group
    targets: tuple[str, ...]
    reads: tuple[str, ...]


@dataclass(frozen=True)
class Finding:
    statement: Statement
    name: str  # the target, or "" for an exception
    value: Any
    reads: tuple[tuple[str, Any], ...]  # the values it read
    error: str | None = None  # the exception raised there, if any


@dataclass(frozen=True)
class Trace:
    forward: Finding | None  # first forward value that is not finite
    reverse: Finding | None  # first adjoint that is not finite
    error: Finding | None  # where an exception was raised


def is_finite(value: Any) -> bool:
    """Floats and numbers by value; lists and arrays element by element."""
    if isinstance(value, bool) or value is None:
        return True
    if isinstance(value, (int, float)):
        return math.isfinite(value)
    if isinstance(value, complex):
        return math.isfinite(value.real) and math.isfinite(value.imag)
    if isinstance(value, (list, tuple)):
        return all(is_finite(v) for v in value)
    try:
        import numpy as np  # only when the model returned an array

        if isinstance(value, np.ndarray):
            return bool(np.all(np.isfinite(value)))
    except ImportError:  # pragma: no cover - numpy is a dependency
        pass
    return True


def _comments(lines: list[str], start: int, end: int) -> list[tuple[int, str]]:
    """(line, comment text) for the comment lines of lines start..end (1-based)."""
    found = []
    for number in range(start, end + 1):
        text = lines[number - 1].strip()
        if text.startswith("#"):
            found.append((number, text))
    return found


def _names(node: ast.AST, context: type) -> tuple[str, ...]:
    seen: dict[str, None] = {}
    for sub in ast.walk(node):
        if isinstance(sub, ast.Name) and isinstance(sub.ctx, context):
            seen.setdefault(sub.id, None)
    return tuple(seen)


def _stored(target: ast.AST) -> tuple[str, ...]:
    """Names an assignment target binds or changes (``xs_bar[i] += ...`` changes
    ``xs_bar``)."""
    if isinstance(target, (ast.Subscript, ast.Attribute)):
        root = target.value
        while isinstance(root, (ast.Subscript, ast.Attribute)):
            root = root.value
        return (root.id,) if isinstance(root, ast.Name) else ()
    return _names(target, ast.Store)


class _Instrument(ast.NodeTransformer):
    def __init__(self, lines: list[str], function: ast.FunctionDef) -> None:
        marks = _comments(lines, function.lineno, function.end_lineno or len(lines))
        self.comment_lines = [line for line, _ in marks]
        self.comment_texts = [text for _, text in marks]
        reverse = [line for line, text in marks if text == REVERSE_MARK]
        self.reverse_from = reverse[0] if reverse else None
        self.statements: list[Statement] = []

    def describe(self, stmt: ast.stmt, targets: tuple[str, ...]) -> Statement:
        at = bisect.bisect_left(self.comment_lines, stmt.lineno) - 1
        source = None
        if at >= 0 and self.comment_texts[at] != REVERSE_MARK:
            source = self.comment_texts[at][1:].strip()
        phase = (
            "reverse"
            if self.reverse_from is not None and stmt.lineno > self.reverse_from
            else "forward"
        )
        value = getattr(stmt, "value", None)
        reads = _names(value, ast.Load) if value is not None else ()
        if isinstance(stmt, ast.AugAssign):
            reads = tuple(dict.fromkeys((*targets, *reads)))
        return Statement(
            stmt.lineno, stmt.end_lineno or stmt.lineno, phase, source, targets, reads
        )

    def instrument(self, body: list[ast.stmt]) -> list[ast.stmt]:
        result: list[ast.stmt] = []
        for stmt in body:
            for field in ("body", "orelse", "finalbody"):
                inner = getattr(stmt, field, None)
                if isinstance(inner, list) and inner:
                    setattr(stmt, field, self.instrument(inner))
            result.append(stmt)
            if isinstance(stmt, (ast.Assign, ast.AugAssign, ast.AnnAssign)):
                targets = (
                    stmt.targets if isinstance(stmt, ast.Assign) else [stmt.target]
                )
                names = tuple(n for t in targets for n in _stored(t))
                if not names:
                    continue
                self.statements.append(self.describe(stmt, names))
                probe = ast.Expr(
                    ast.Call(
                        ast.Name(PROBE, ast.Load()),
                        [
                            ast.Constant(len(self.statements) - 1),
                            ast.Call(ast.Name("locals", ast.Load()), [], []),
                        ],
                        [],
                    )
                )
                result.append(ast.copy_location(probe, stmt))
        return result

    def statement_at(self, line: int) -> Statement | None:
        for statement in self.statements:
            if statement.line <= line <= statement.end_line:
                return statement
        return None


class _Recorder:
    def __init__(self, statements: list[Statement]) -> None:
        self.statements = statements
        self.forward: Finding | None = None
        self.reverse: Finding | None = None

    def __call__(self, index: int, scope: Mapping[str, Any]) -> None:
        statement = self.statements[index]
        first = self.reverse if statement.phase == "reverse" else self.forward
        if first is not None:
            return
        for name in statement.targets:
            value = scope.get(name)
            if not is_finite(value):
                finding = Finding(statement, name, value, _reads(statement, scope))
                if statement.phase == "reverse":
                    self.reverse = finding
                else:
                    self.forward = finding
                return


def _reads(
    statement: Statement, scope: Mapping[str, Any]
) -> tuple[tuple[str, Any], ...]:
    return tuple((n, scope[n]) for n in statement.reads if n in scope)


def _parse_function(
    module_text: str, name: str
) -> tuple[ast.Module, list[str], ast.FunctionDef]:
    tree = ast.parse(module_text)
    function = next(
        node
        for node in tree.body
        if isinstance(node, ast.FunctionDef) and node.name == name
    )
    return tree, module_text.splitlines(), function


def trace(
    module_text: str,
    grad_name: str,
    call: Callable[[Callable[..., Any]], Any],
) -> Trace:
    """Run ``grad_name`` instrumented (``call`` applies it to the point)."""
    tree, lines, function = _parse_function(module_text, grad_name)
    instrument = _Instrument(lines, function)
    function.body = instrument.instrument(function.body)
    ast.fix_missing_locations(tree)
    recorder = _Recorder(instrument.statements)
    module = types.ModuleType("gradwright_verify_trace")
    namespace: dict[str, Any] = vars(module)
    namespace[PROBE] = recorder
    # registered while it runs: a dataclass among the copied module data looks
    # its module up in sys.modules
    sys.modules[module.__name__] = module
    try:
        exec(compile(tree, FILENAME, "exec"), namespace)
    finally:
        del sys.modules[module.__name__]
    error: Finding | None = None
    try:
        call(namespace[grad_name])
    except Exception as exc:  # the user's arithmetic: OverflowError, ValueError, ...
        frames = [
            tb
            for tb in _frames(exc.__traceback__)
            if tb.tb_frame.f_code.co_filename == FILENAME
        ]
        if frames:
            last = frames[-1]
            statement = instrument.statement_at(last.tb_lineno)
            if statement is not None:
                scope = last.tb_frame.f_locals
                error = Finding(
                    statement,
                    "",
                    None,
                    _reads(statement, scope),
                    f"{type(exc).__name__}: {exc}",
                )
    return Trace(recorder.forward, recorder.reverse, error)


def quoted_statements(module_text: str, grad_name: str) -> list[str]:
    """The source statements quoted in ``grad_name``'s forward sweep, in order."""
    _, lines, function = _parse_function(module_text, grad_name)
    quoted: list[str] = []
    end = function.end_lineno or len(lines)
    for _, text in _comments(lines, function.lineno, end):
        if text == REVERSE_MARK:
            break
        statement = text[1:].strip()
        if statement not in quoted:
            quoted.append(statement)
    return quoted


def _frames(tb: TracebackType | None) -> list[TracebackType]:
    found = []
    while tb is not None:
        found.append(tb)
        tb = tb.tb_next
    return found


# ---------------------------------------------------------------------------------
# hints: stable rewrites of the classic unstable forms


def _is_call(node: ast.AST, name: str) -> bool:
    if not isinstance(node, ast.Call) or len(node.args) != 1 or node.keywords:
        return False
    func = node.func
    return (isinstance(func, ast.Name) and func.id == name) or (
        isinstance(func, ast.Attribute) and func.attr == name
    )


def _is_one(node: ast.AST) -> bool:
    return (
        isinstance(node, ast.Constant)
        and not isinstance(node.value, bool)
        and node.value == 1
    )


def _terms(node: ast.AST) -> list[ast.AST]:
    if isinstance(node, ast.BinOp) and isinstance(node.op, ast.Add):
        return _terms(node.left) + _terms(node.right)
    return [node]


def _parse(statement: str) -> ast.AST | None:
    text = statement
    if text.startswith("return "):
        text = text[len("return ") :]
    try:
        return ast.parse(text)
    except SyntaxError:
        return None


def stable_rewrite(statement: str) -> str | None:
    """A hint at the numerically stable form of ``statement``, where one is known."""
    tree = _parse(statement)
    if tree is None:
        return None
    for node in ast.walk(tree):
        if _is_call(node, "log"):
            terms = _terms(node.args[0])  # type: ignore[attr-defined]
            ones = [t for t in terms if _is_one(t)]
            exps = [t for t in terms if _is_call(t, "exp")]
            if len(terms) == 2 and ones and exps:
                u = ast.unparse(exps[0].args[0])  # type: ignore[attr-defined]
                return (
                    f"log(1 + exp(u)) overflows for large u and rounds to 0 for very"
                    f" negative u; write max({u}, 0.0) +"
                    f" math.log1p(math.exp(-abs({u})))"
                )
            if len(terms) == 2 and ones:
                other = next(t for t in terms if not _is_one(t))
                return (
                    "log(1 + u) loses u when |u| is tiny; write"
                    f" math.log1p({ast.unparse(other)})"
                )
            if len(exps) >= 2 and len(exps) == len(terms):
                args = [ast.unparse(e.args[0]) for e in exps]  # type: ignore
                shifted = " + ".join(f"math.exp({a} - m)" for a in args)
                return (
                    "a log of a sum of exponentials overflows or underflows unless"
                    " shifted by the largest exponent (the log-sum-exp shift):"
                    f" m = max({', '.join(args)}), then m + math.log({shifted})"
                )
            if len(terms) == 1 and exps:
                u = ast.unparse(exps[0].args[0])  # type: ignore[attr-defined]
                return f"log(exp(u)) is u: write {u} (exp underflows or overflows)"
        if (
            isinstance(node, ast.BinOp)
            and isinstance(node.op, ast.Sub)
            and _is_call(node.left, "exp")
            and _is_one(node.right)
        ):
            u = ast.unparse(node.left.args[0])  # type: ignore[attr-defined]
            return f"exp(u) - 1 cancels for small u; write math.expm1({u})"
    return None


def locate_source(source_text: str, function: str, statement: str) -> int | None:
    """The line of ``function``'s source where ``statement`` starts (best effort)."""
    lines = source_text.splitlines()
    start = next(
        (
            i
            for i, line in enumerate(lines)
            if line.lstrip().startswith(f"def {function}(")
        ),
        0,
    )
    collapsed = " ".join(statement.split())
    for number in range(start, len(lines)):
        text = " ".join(lines[number].split())
        if text and (collapsed.startswith(text) or text.startswith(collapsed)):
            return number + 1
    return None
