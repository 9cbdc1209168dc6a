"""The intermediate forms shared by the stages: plain frozen dataclasses.

SSA form: every value is a :class:`Var` defined once by a :class:`Let` that applies
one primitive to atoms (vars or constants). Expression trees (:class:`Apply` over
atoms and :class:`Bar` adjoint references) are what the reverse sweep and the folded
forward sweep are printed from.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

VarKind = Literal["param", "local", "temp"]


@dataclass(frozen=True, order=True)
class Var:
    """One SSA value. ``base`` is the source name it belongs to (used for naming)."""

    uid: int
    base: str
    kind: VarKind


@dataclass(frozen=True)
class Const:
    """A constant operand: a literal (``value`` known) or a named constant.

    ``text`` is how it prints: ``"2.0"``, ``"math.pi"``, ``"GRAVITY"``.
    """

    text: str
    value: float | int | None = None


@dataclass(frozen=True)
class Bar:
    """The adjoint of a value (printed ``x_bar``)."""

    var: Var


@dataclass(frozen=True)
class Apply:
    """A primitive applied to sub-expressions; ``op`` is a key of ``primitives.OPS``."""

    op: str
    args: tuple[Expr, ...]


Atom = Var | Const
Expr = Var | Const | Bar | Apply


@dataclass(frozen=True)
class Origin:
    """The source statement a group of generated statements comes from."""

    text: str
    index: int


@dataclass(frozen=True)
class Let:
    target: Var
    op: str
    args: tuple[Atom, ...]
    origin: Origin


@dataclass(frozen=True)
class Return:
    values: tuple[Atom, ...]
    origin: Origin


@dataclass(frozen=True)
class SSAFunction:
    name: str
    params: tuple[Var, ...]
    body: tuple[Let, ...]
    result: Return
    #: every name the source function binds (reserved when naming temporaries)
    local_names: frozenset[str] = frozenset()
    #: module-level constants it reads, in first-read order
    constants: tuple[str, ...] = ()


@dataclass(frozen=True)
class AdjointAssign:
    """``x_bar = expr`` or, when ``accumulate``, ``x_bar += expr``."""

    var: Var
    expr: Expr
    accumulate: bool
    origin: Origin


@dataclass(frozen=True)
class ReverseSweep:
    statements: tuple[AdjointAssign, ...]
    wrt: tuple[Var, ...]
    #: wrt parameters the result does not depend on: their adjoint is a plain zero.
    unused_wrt: tuple[Var, ...]


def const(value: float | int) -> Const:
    """A literal constant with the text Python's repr gives (exact round trip)."""
    return Const(repr(value), value)
