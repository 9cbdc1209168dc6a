"""Run-time targets: which interpreter the generated module must run on.

``cpython`` (the default) may use everything CPython's ``math`` has. ``micropython``
restricts the module to what MicroPython's ``math`` module and language have (see
``tests/micropython/PROBE.md``):

* a ``math`` function MicroPython lacks is called through an accurate pure-Python
  stand-in from :mod:`gradwright.fallbacks` (``_gw_log1p(x)`` for ``math.log1p(x)``),
  in the reverse sweep (the printer maps the op to the helper), in the copied primal
  (rewritten here, whatever spelling the model used) and where a derivative rule
  needs the function although the model does not call it (``asinh`` needs
  ``hypot``); each helper used is emitted once into the module;
* ``from math import NAME`` for a missing ``NAME`` is dropped (it would raise
  ImportError on the board);
* positional-only parameters (``def f(a, /, b)``, a SyntaxError in MicroPython) become
  ordinary positional parameters: every call that worked still works;
* a missing function without an accurate stand-in
  (:data:`gradwright.fallbacks.NO_ACCURATE_FALLBACK`) is a located error.

The generated text itself never needs more: no f-strings, no imports but ``math``.
"""

from __future__ import annotations

from dataclasses import dataclass

import libcst as cst

from gradwright.calculus.algebra import E
from gradwright.calculus.primitives import MATH_FUNCTIONS, OPS
from gradwright.calculus.rules import RULES
from gradwright.diagnostics import fail
from gradwright.emission import fallbacks
from gradwright.ir import Apply, Const, Expr, Var
from gradwright.lowering.frontend import CheckedFunction, ModuleIndex

DEFAULT_TARGET = "cpython"


@dataclass(frozen=True)
class Target:
    """What the generated module may use at run time.

    Attributes:
        name: the ``--target`` value.
        header: the text of the module's ``# target:`` line (None: no such line).
        missing_math: ``math`` names the interpreter lacks.
        stand_ins: the names of ``missing_math`` that have an accurate helper in
            :data:`gradwright.fallbacks.FALLBACKS`.
        positional_only: whether ``def f(a, /, b)`` is valid syntax there.
        runtime: how diagnostics name the interpreter.
        numpy: whether NumPy models can run there.
        records: whether a loop saves an iteration's values as one tuple (one
            store and one list per iteration: faster on CPython) rather than one
            list per value (no tuple per iteration: the smaller heap of a board).
    """

    name: str
    header: str | None
    missing_math: frozenset[str]
    stand_ins: frozenset[str]
    positional_only: bool
    runtime: str
    numpy: bool = True
    records: bool = True

    @property
    def rewrites(self) -> bool:
        """Whether the copied primal may need changes for this target."""
        return bool(self.missing_math) or not self.positional_only

    def helper_name(self, math_name: str) -> str | None:
        """The stand-in's function name for ``math.<math_name>``, if it needs one."""
        if math_name in self.stand_ins:
            return fallbacks.FALLBACKS[math_name].helper_name
        return None

    def callees(self) -> dict[str, str]:
        """Op key -> the callee the printer writes instead of ``math.NAME``."""
        mapping: dict[str, str] = {}
        for op in OPS:
            helper = self.helper_name(_math_name_of_op(op) or "")
            if helper is not None:
                mapping[op] = helper
        return mapping


def _cpython() -> Target:
    return Target(
        name="cpython",
        header=None,
        missing_math=frozenset(),
        stand_ins=frozenset(),
        positional_only=True,
        runtime="CPython",
        numpy=True,
    )


def _micropython() -> Target:
    # read at call time, so the tables in fallbacks.py are the single source
    missing = frozenset(fallbacks.MICROPYTHON_MISSING)
    stand_ins = frozenset(
        name
        for name in missing
        if name in fallbacks.FALLBACKS and name not in fallbacks.NO_ACCURATE_FALLBACK
    )
    version = fallbacks.MICROPYTHON_VERSION
    return Target(
        name="micropython",
        header=f"micropython (math as in MicroPython {version})",
        missing_math=missing,
        stand_ins=stand_ins,
        positional_only=False,
        runtime=f"MicroPython {version}",
        numpy=False,  # list parameters are the vector container there
        records=False,
    )


_TARGETS = {"cpython": _cpython, "micropython": _micropython}

#: The accepted ``target`` names, default first.
TARGET_NAMES: tuple[str, ...] = tuple(_TARGETS)


def get_target(name: str) -> Target:
    """The target called ``name``; ValueError for an unknown name."""
    build = _TARGETS.get(name)
    if build is None:
        raise ValueError(
            f"unknown target {name!r}: choose one of {', '.join(TARGET_NAMES)}"
        )
    return build()


def _math_name_of_op(op: str) -> str | None:
    symbol = OPS[op].symbol
    return symbol.removeprefix("math.") if symbol.startswith("math.") else None


def math_names_in(expr: Expr) -> set[str]:
    """The ``math`` functions and constants an expression tree refers to."""
    found: set[str] = set()
    pending: list[Expr] = [expr]
    while pending:
        node = pending.pop()
        if isinstance(node, Apply):
            name = _math_name_of_op(node.op)
            if name is not None:
                found.add(name)
            pending.extend(node.args)
        elif isinstance(node, Const) and node.text.lstrip("-").startswith("math."):
            found.add(node.text.lstrip("-").removeprefix("math."))
    return found


def derivative_math_names(op: str) -> frozenset[str]:
    """``math`` names the adjoint rule of ``op`` writes (``asinh`` -> ``hypot``)."""
    rule = RULES.get(op)
    if rule is None:
        return frozenset()
    spec = OPS[op]
    counts = {spec.min_args, spec.max_args or spec.min_args + 1}
    found: set[str] = set()
    for count in sorted(counts):
        args = [E(Var(i, "x", "param")) for i in range(count)]
        g, out = E(Var(count, "g", "local")), E(Var(count + 1, "out", "local"))
        for part in rule(g, out, *args):
            if part is not None:
                found |= math_names_in(part.node)
    return frozenset(found)


def helpers_for_ops(target: Target, ops: set[str]) -> frozenset[str]:
    """The ``math`` names whose stand-ins printed calls of ``ops`` need."""
    names = {_math_name_of_op(op) for op in ops}
    return frozenset(n for n in names if n is not None and n in target.stand_ins)


# ---------------------------------------------------------------------------------
# the copied primal


class _PrimalRewriter(cst.CSTTransformer):
    def __init__(
        self, target: Target, index: ModuleIndex, shadowed: frozenset[str]
    ) -> None:
        super().__init__()
        self.target = target
        self.index = index
        self.shadowed = shadowed
        #: math names whose stand-ins the rewritten function calls
        self.used: set[str] = set()

    def math_name(self, node: cst.CSTNode) -> str | None:
        """The ``math`` name ``node`` refers to: ``math.x``, ``m.x``, imported ``x``."""
        if isinstance(node, cst.Attribute) and isinstance(node.value, cst.Name):
            module = node.value.value
            if module in self.index.math_modules and module not in self.shadowed:
                return node.attr.value
        if isinstance(node, cst.Name) and node.value not in self.shadowed:
            return self.index.math_names.get(node.value)
        return None

    def reject_missing(self, name: str, node: cst.CSTNode) -> None:
        if name in self.target.missing_math and name not in self.target.stand_ins:
            fail(
                f"math.{name} is not available on {self.target.runtime}, and"
                " gradwright has no accurate stand-in for it",
                self.index.locate(node),
                _hint(self.target),
            )

    def visit_Attribute(self, node: cst.Attribute) -> bool:
        name = self.math_name(node)
        if name is not None:
            self.reject_missing(name, node)
            return False  # the attribute's own Name is not a separate reference
        return True

    def visit_Name(self, node: cst.Name) -> bool:
        name = self.math_name(node)
        if name is not None:
            self.reject_missing(name, node)
        return False

    def leave_Call(self, original_node: cst.Call, updated_node: cst.Call) -> cst.Call:
        name = self.math_name(original_node.func)
        if name is None:
            return updated_node
        op = MATH_FUNCTIONS.get(name)
        for needed in sorted(derivative_math_names(op) if op else ()):
            if needed in self.target.missing_math and needed not in (
                self.target.stand_ins
            ):
                fail(
                    f"the derivative of math.{name} needs math.{needed}, which"
                    f" {self.target.runtime} lacks, and gradwright has no accurate"
                    " stand-in for it",
                    self.index.locate(original_node.func),
                    _hint(self.target),
                )
        helper = self.target.helper_name(name)
        if helper is None:
            return updated_node
        self.used.add(name)
        return updated_node.with_changes(func=cst.Name(helper))

    def leave_Parameters(
        self, original_node: cst.Parameters, updated_node: cst.Parameters
    ) -> cst.Parameters:
        if self.target.positional_only or not updated_node.posonly_params:
            return updated_node
        return updated_node.with_changes(
            params=[*updated_node.posonly_params, *updated_node.params],
            posonly_params=[],
            posonly_ind=cst.MaybeSentinel.DEFAULT,
        )


def _hint(target: Target) -> str:
    return (
        f"generate for the default target (CPython), or write the model with"
        f" functions {target.runtime}'s math module has"
    )


def prepare_primal(
    target: Target,
    index: ModuleIndex,
    checked: CheckedFunction,
    locals_: frozenset[str],
) -> tuple[cst.FunctionDef, frozenset[str]]:
    """The function as the target runs it, and the math names whose stand-ins it calls.

    ``locals_`` are the names the function binds (they shadow module-level names).
    Raises a located error for a missing ``math`` name without an accurate stand-in,
    whether the model calls it or a derivative rule needs it.
    """
    if not target.rewrites:
        return checked.node, frozenset()
    rewriter = _PrimalRewriter(target, index, frozenset(checked.params) | locals_)
    node = checked.node.visit(rewriter)
    assert isinstance(node, cst.FunctionDef)
    return node, frozenset(rewriter.used)


def check_helper_names(
    target: Target,
    index: ModuleIndex,
    checked: CheckedFunction,
    locals_: frozenset[str],
    used: frozenset[str],
) -> None:
    """A stand-in's name must not be one of the model's own names."""
    taken = index.module_names | frozenset(checked.params) | locals_
    for name in sorted(used):
        helper = target.helper_name(name)
        if helper is not None and helper in taken:
            fail(
                f"the name '{helper}' is needed for the {target.runtime} stand-in"
                f" for math.{name}, but the model uses it",
                index.locate(checked.node.name),
                f"rename '{helper}' in the model",
            )


# ---------------------------------------------------------------------------------
# module parts


def importable(target: Target, statements: list[str]) -> list[str]:
    """The math import statements, without names the target's math lacks."""
    if not target.missing_math:
        return list(statements)
    kept: list[str] = []
    for text in statements:
        statement = cst.parse_statement(text)
        assert isinstance(statement, cst.SimpleStatementLine)
        small = statement.body[0]
        if not isinstance(small, cst.ImportFrom) or isinstance(
            small.names, cst.ImportStar
        ):
            kept.append(text)
            continue
        parts = []
        for alias in small.names:
            imported = cst.Module([]).code_for_node(alias.name)
            if imported in target.missing_math:
                continue
            local = alias.evaluated_alias
            parts.append(imported if local is None else f"{imported} as {local}")
        if parts:
            kept.append(f"from math import {', '.join(parts)}")
    return kept


def helper_source(names: frozenset[str]) -> str:
    """The stand-ins' definitions, dependencies first, without a final newline."""
    return fallbacks.helper_sources(names).rstrip("\n")
