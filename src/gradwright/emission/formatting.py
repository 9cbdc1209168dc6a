"""black, applied where it has work to do.

Generated statements are printed in black's style already (``printer.py``); only a
statement longer than the line limit is handed to black, on its own, with the limit
reduced by its indentation, which gives the text black gives it in place; the most
common long one, an assignment of a conditional (the guarded derivatives), is split
here as black splits it (:func:`_wrapped_conditional`). The copied
primal is formatted function by function, and within a function only the statements
black could change go to black: a one-line statement already in the canonical
spelling (:func:`settled`) is copied as written. Whole-module black on the result is
a no-op; the tests check that.

black itself is imported on first use: a module with nothing for it to do never
loads it.
"""

from __future__ import annotations

import ast
import textwrap
from collections.abc import Callable
from functools import lru_cache

import libcst as cst

LINE_LENGTH = 88
INDENT = "    "

TYPE_CHECKING = False
if TYPE_CHECKING:
    import black


@lru_cache(maxsize=8)
def _mode(line_length: int) -> black.Mode:
    import black

    return black.Mode(
        target_versions={black.TargetVersion.PY310}, line_length=line_length
    )


def _black(text: str, line_length: int) -> str:
    import black

    return black.format_str(text, mode=_mode(line_length))


def format_code(text: str) -> str:
    """black's formatting of a complete piece of module-level code."""
    return _black(text, LINE_LENGTH)


def format_statement(text: str, depth: int) -> str:
    """One generated simple statement, indented ``depth`` levels, as black prints it."""
    indent = INDENT * depth
    if "\n" not in text and len(indent) + len(text) <= LINE_LENGTH:
        return indent + text
    if text == "else:":  # deep in nested blocks; black cannot split it either
        return indent + text
    wrapped = _wrapped_conditional(text, depth)
    if wrapped is not None:
        return wrapped
    header = text.rstrip().endswith(":")  # `if ...:` / `for ...:` lines
    source = f"{text}\n{INDENT}pass\n" if header else text
    formatted = _black(source, LINE_LENGTH - len(indent))
    if header:  # black needs a body to parse a header; drop it again
        formatted = formatted.rstrip("\n").rsplit("\n", 1)[0]
    return textwrap.indent(formatted.rstrip("\n"), indent)


#: where black's spelling and ``ast.unparse``'s can differ: comments, strings (quote
#: style), ``**`` (hugged operands), colons (slices, lambdas, annotations, dicts,
#: walrus), backslashes, semicolons
_UNSETTLED_CHARACTERS = frozenset("#'\"\\:;")


def settled(text: str, depth: int) -> bool:
    """Whether black leaves this one-line simple statement, indented ``depth``
    levels, exactly as it is.

    ``ast.unparse`` spells a statement canonically: one space around binary and
    comparison operators, none inside brackets or around keyword ``=``, no
    redundant parentheses, numbers as ``repr`` gives them. Outside the constructs
    excluded above (and ``del``, whose parentheses black drops), that is black's
    spelling of a line that fits, so a statement that reads the same after a round
    trip through ``ast`` is black's output already. The test is one-sided: any
    doubt sends the statement to black.
    """
    if "\n" in text or len(INDENT * depth) + len(text) > LINE_LENGTH:
        return False
    return _canonical(text)


def _canonical(text: str) -> bool:
    """Spelled as ``ast.unparse`` spells it, and free of the constructs where that
    and black's spelling differ."""
    if (
        not text.isascii()  # black measures wide characters differently
        or "**" in text
        or not _UNSETTLED_CHARACTERS.isdisjoint(text)
        or text.startswith("del ")
    ):
        return False
    return _round_trips(text)


def _round_trips(text: str) -> bool:
    try:
        return ast.unparse(ast.parse(text)) == text
    except (SyntaxError, ValueError):
        return False


def _wrapped_conditional(text: str, depth: int) -> str | None:
    """black's split of ``NAME = A if C else B`` (or ``NAME += ...``) too long for
    its line, when the conditional fits on a line of its own; else None.

    black puts the right-hand side of an assignment in optional parentheses and
    keeps them when the expression inside has more than one delimiter of its
    highest priority, which ``if`` and ``else`` at the top are; the head and the
    body then fit, so they are final. Only for canonical text (:func:`settled`'s
    round trip): the body is then black's own spelling too.
    """
    if "\n" in text or not _canonical(text):
        return None
    statement = ast.parse(text).body[0]
    if isinstance(statement, ast.Assign) and len(statement.targets) == 1:
        target = statement.targets[0]
    elif isinstance(statement, ast.AugAssign):
        target = statement.target
    else:
        return None
    value = statement.value
    if not isinstance(target, ast.Name) or not isinstance(value, ast.IfExp):
        return None
    if any(isinstance(n, ast.IfExp) for n in ast.walk(value) if n is not value):
        return None  # nested conditionals: more delimiters to split at
    head, equals, body = text.partition("= ")
    indent = INDENT * depth
    inner = indent + INDENT
    if not equals or len(indent) + len(head) + len("= (") > LINE_LENGTH:
        return None
    if len(inner) + len(body) <= LINE_LENGTH:
        lines = [body]
    else:
        # too long still: black splits before `if` and before `else`
        lines = _split_conditional(body)
        if any(len(inner) + len(line) > LINE_LENGTH for line in lines):
            return None
    middle = "".join(f"{inner}{line}\n" for line in lines)
    return f"{indent}{head}= (\n{middle}{indent})"


def _split_conditional(body: str) -> list[str]:
    """``A if C else B`` -> ``[A, "if C", "else B"]``, at bracket depth 0."""
    cuts, depth = [], 0
    for position, char in enumerate(body):
        depth += {"(": 1, "[": 1, "{": 1, ")": -1, "]": -1, "}": -1}.get(char, 0)
        if depth == 0 and body.startswith((" if ", " else "), position):
            cuts.append(position)
    if len(cuts) != 2:
        return [body]  # not the shape expected: the caller's check fails it
    first, second = cuts
    return [body[:first], body[first + 1 : second], body[second + 1 :]]


#: statements per black call when formatting a long copied function
CHUNK_STATEMENTS = 200


def format_function(
    node: cst.FunctionDef,
    module: cst.Module,
    code: Callable[[cst.CSTNode], str] | None = None,
) -> str:
    """black's formatting of a top-level function, in bounded pieces.

    Runs of :func:`settled` statements are copied as written; the rest is cut into
    runs of statements, each formatted as the body of a placeholder function (same
    depth, same rules) and stitched back. Cuts fall only before statements with no
    blank line or comment above them, so black's handling of blank lines and
    comments is the same as for the whole function. ``code`` gives a node's source
    text (default: libcst prints it).
    """
    text_of = code or module.code_for_node
    body = node.body
    if not isinstance(body, cst.IndentedBlock):
        return format_code(text_of(node))
    statements = list(body.body)
    copied = _copied_as_written(statements, body, module, text_of)
    header = _settled_header(node, module)
    if header is None:
        copied[0] = False  # the first statement goes to black with the `def` line
    pieces: list[str] = [] if header is None else [header]
    start = 0
    while start < len(statements):
        end = start + 1
        if copied[start]:
            while end < len(statements) and copied[end]:
                end += 1
            lines = (text_of(s.body[0]) for s in statements[start:end])  # type: ignore[attr-defined]
            pieces.append("".join(f"{INDENT}{line}\n" for line in lines))
        else:
            while end < len(statements) and not copied[end]:
                if (
                    end - start >= CHUNK_STATEMENTS
                    and not statements[end].leading_lines
                ):
                    break
                end += 1
            last = end == len(statements)
            block = body.with_changes(
                body=statements[start:end], footer=body.footer if last else ()
            )
            first = start == 0 and header is None
            pieces.append(_black_block(node, block, module, first))
        start = end
    return "".join(pieces)


def _copied_as_written(
    statements: list[cst.BaseStatement],
    body: cst.IndentedBlock,
    module: cst.Module,
    text_of: Callable[[cst.CSTNode], str],
) -> list[bool]:
    """Which statements go into the output as written (the rest go to black)."""
    if body.indent is not None or module.default_indent != INDENT:
        return [False] * len(statements)  # black re-indents the whole body
    copied = [
        isinstance(stmt, cst.SimpleStatementLine)
        and len(stmt.body) == 1
        and not stmt.leading_lines
        and stmt.trailing_whitespace.comment is None
        and not stmt.trailing_whitespace.whitespace.value
        and isinstance(stmt.body[0].semicolon, cst.MaybeSentinel)
        and settled(text_of(stmt.body[0]), 1)
        for stmt in statements
    ]
    # black must see what precedes a blank line or comment, and what ends the block
    for position, stmt in enumerate(statements):
        if stmt.leading_lines and position > 0:
            copied[position - 1] = False
    if body.footer and copied:
        copied[-1] = False
    return copied


_PASS = cst.IndentedBlock(body=[cst.SimpleStatementLine(body=[cst.Pass()])])


def _settled_header(node: cst.FunctionDef, module: cst.Module) -> str | None:
    """The `def` line as written when black leaves it so (no decorators, one line,
    canonical by the round trip of :func:`settled`), else None."""
    if node.decorators or node.leading_lines or node.asynchronous:
        return None
    text = module.code_for_node(node.with_changes(body=_PASS))
    line, _, rest = text.partition("\n")
    if (
        rest != f"{INDENT}pass\n"
        or len(line) > LINE_LENGTH
        or not line.isascii()
        or "**" in line
        or not _UNSETTLED_CHARACTERS.isdisjoint(line[:-1])
        or not _round_trips(text.rstrip("\n"))
    ):
        return None
    return line + "\n"


def _black_block(
    node: cst.FunctionDef,
    block: cst.IndentedBlock,
    module: cst.Module,
    first: bool,
) -> str:
    if first:
        return format_code(module.code_for_node(node.with_changes(body=block)))
    placeholder = cst.FunctionDef(
        name=cst.Name("_"), params=cst.Parameters(), body=block
    )
    return format_code(module.code_for_node(placeholder)).split("\n", 1)[1]
