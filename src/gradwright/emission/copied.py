"""Printing a statement copied as written (``lowering/inactive.py``).

The text is the source's; only the function's names in it change, to the names
the output gives their values. The renaming goes through libcst's scope analysis
of the statement, the same analysis that found the names (a name in a string, an
attribute or a comprehension's own variable is never touched). A name the
statement both reads and binds takes the name of the value it binds; when that
differs from the name its value had before, a copy ``new = old`` comes first, so
the statement starts from the old value on paths that do not bind it.
"""

from __future__ import annotations

from collections.abc import Callable

import libcst as cst

from gradwright.ir import Atom, Copied, Var
from gradwright.lowering.inactive import statement_names


def copied_lines(
    copied: Copied,
    args: tuple[Atom, ...],
    text_of: Callable[[Atom], str],
    name_of: Callable[[Var], str],
    claim: Callable[[str], str],
) -> tuple[list[tuple[str, Atom, Var]], str]:
    """The copies that come first (name, old value, new value) and the renamed
    statement. ``text_of`` prints an argument, ``name_of`` names a value bound,
    ``claim`` gives a free output name for a name local to a guard."""
    before = dict(zip(copied.reads, args, strict=True))
    mapping: dict[str, str] = {name: text_of(atom) for name, atom in before.items()}
    copies: list[tuple[str, Atom, Var]] = []
    for name, var in copied.writes:
        new = name_of(var)
        old = before.get(name)
        if old is not None and mapping[name] != new:
            copies.append((new, old, var))
        mapping[name] = new
    module = cst.parse_module(copied.text)
    names = statement_names(module)
    if copied.guard:
        # names a guard binds exist only on the path that raises: free names
        for node in names.writes:
            if node.value not in mapping:
                mapping[node.value] = claim(node.value)
    if all(mapping.get(n.value, n.value) == n.value for n in _all(names)):
        return copies, copied.text
    targets = {id(n): mapping[n.value] for n in _all(names) if n.value in mapping}
    renamed = module.visit(_Rename(targets))
    return copies, renamed.code.rstrip()


def _all(names) -> list[cst.Name]:  # noqa: ANN001
    return [*names.reads, *names.writes]


class _Rename(cst.CSTTransformer):
    def __init__(self, targets: dict[int, str]) -> None:
        super().__init__()
        self.targets = targets

    def leave_Name(self, original: cst.Name, updated: cst.Name) -> cst.BaseExpression:
        text = self.targets.get(id(original))
        if text is None or text == original.value:
            return updated
        if text.isidentifier():
            return updated.with_changes(value=text)
        # a constant in place of the name (a tuple element bound to a number)
        return cst.parse_expression(f"({text})")
