"""black, applied where it has work to do.

Generated statements are printed in black's style already (``printer.py``); only a
statement longer than the line limit is handed to black, on its own, with the limit
reduced by its indentation, which gives the text black gives it in place. The copied
primal is formatted function by function. Whole-module black on the result is a
no-op; the tests check that.
"""

from __future__ import annotations

import textwrap
from functools import lru_cache

import black
import libcst as cst

LINE_LENGTH = 88
INDENT = "    "


@lru_cache(maxsize=8)
def _mode(line_length: int) -> black.Mode:
    return black.Mode(
        target_versions={black.TargetVersion.PY310}, line_length=line_length
    )


def format_code(text: str) -> str:
    """black's formatting of a complete piece of module-level code."""
    return black.format_str(text, mode=_mode(LINE_LENGTH))


def format_statement(text: str, depth: int) -> str:
    """One generated simple statement, indented ``depth`` levels, as black prints it."""
    indent = INDENT * depth
    if "\n" not in text and len(indent) + len(text) <= LINE_LENGTH:
        return indent + text
    header = text.rstrip().endswith(":")  # `if ...:` / `for ...:` lines
    source = f"{text}\n{INDENT}pass\n" if header else text
    formatted = black.format_str(source, mode=_mode(LINE_LENGTH - len(indent)))
    if header:  # black needs a body to parse a header; drop it again
        formatted = formatted.rstrip("\n").rsplit("\n", 1)[0]
    return textwrap.indent(formatted.rstrip("\n"), indent)


#: statements per black call when formatting a long copied function
CHUNK_STATEMENTS = 200


def format_function(node: cst.FunctionDef, module: cst.Module) -> str:
    """black's formatting of a top-level function, in bounded pieces.

    A long body is cut into runs of statements, each formatted as the body of a
    placeholder function (same depth, same rules) and stitched back. Cuts fall only
    before statements with no blank line or comment above them, so black's handling of
    blank lines and comments is the same as for the whole function.
    """
    body = node.body
    if not isinstance(body, cst.IndentedBlock) or len(body.body) <= CHUNK_STATEMENTS:
        return format_code(module.code_for_node(node))
    chunks: list[list[cst.BaseStatement]] = [[]]
    for stmt in body.body:
        if len(chunks[-1]) >= CHUNK_STATEMENTS and not stmt.leading_lines:
            chunks.append([])
        chunks[-1].append(stmt)
    pieces: list[str] = []
    for number, chunk in enumerate(chunks):
        last = number == len(chunks) - 1
        block = body.with_changes(body=chunk, footer=body.footer if last else ())
        if number == 0:
            pieces.append(
                format_code(module.code_for_node(node.with_changes(body=block)))
            )
            continue
        placeholder = cst.FunctionDef(
            name=cst.Name("_"), params=cst.Parameters(), body=block
        )
        text = format_code(module.code_for_node(placeholder))
        pieces.append(text.split("\n", 1)[1])
    return "".join(pieces)
