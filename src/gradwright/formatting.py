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
    formatted = black.format_str(text, mode=_mode(LINE_LENGTH - len(indent)))
    return textwrap.indent(formatted.rstrip("\n"), indent)
