"""Shapes as tuples of sizes, and NumPy's rules for combining them.

The pieces ``shapes.py`` (the table of an SSA function's shapes) and
``text_shapes.py`` (shapes read from a copied statement's text) share.
"""

from __future__ import annotations

import ast
from dataclasses import dataclass

Dim = int | str


@dataclass(frozen=True)
class Like:
    """A shape known only to equal the shape of the value ``key`` names."""

    key: object


Shape = tuple[Dim, ...] | Like


def broadcast(a: Shape, b: Shape) -> Shape | None:
    """The shape of ``a + b``, or None where it is not known."""
    if a == () or a == b:
        return b
    if b == ():
        return a
    if not (isinstance(a, tuple) and isinstance(b, tuple)):
        return None
    out: list[Dim] = []
    for k in range(1, max(len(a), len(b)) + 1):
        x = a[-k] if k <= len(a) else 1
        y = b[-k] if k <= len(b) else 1
        if x == y or y == 1:
            out.append(x)
        elif x == 1:
            out.append(y)
        else:  # two names, or a name and a size: which one broadcasts is not known
            return None
    return tuple(reversed(out))


def matmul_shape(a: Shape, b: Shape) -> Shape | None:
    if not (isinstance(a, tuple) and isinstance(b, tuple)):
        return None
    if not (1 <= len(a) <= 2 and 1 <= len(b) <= 2) or a[-1] != b[0]:
        return None
    return a[:-1] + b[1:]


def nested_shape(node: object) -> tuple[int, ...] | None:
    """The shape of nested lists of number literals (rectangular), else None."""
    if isinstance(node, ast.UnaryOp) and isinstance(node.op, (ast.USub, ast.UAdd)):
        node = node.operand
    if isinstance(node, ast.Constant):
        ok = type(node.value) in (int, float)
        return () if ok else None
    if not isinstance(node, (ast.List, ast.Tuple)) or not node.elts:
        return None
    inner = [nested_shape(e) for e in node.elts]
    if inner[0] is None or any(i != inner[0] for i in inner):
        return None
    return (len(inner), *inner[0])
