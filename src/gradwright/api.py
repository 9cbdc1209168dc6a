"""The public entry points: source text in, generated module text out."""

from __future__ import annotations

import shlex
from collections.abc import Sequence

import libcst as cst

from .adjoint import reverse_sweep
from .diagnostics import fail
from .emit import Compiled, render_module
from .frontend import CheckedFunction, ModuleIndex, check_function, parse_module
from .ir import const
from .optimize import inline_adjoints, plan_forward
from .ssa import lower


def regeneration_command(
    path: str,
    functions: Sequence[str],
    wrt: Sequence[str] | None,
    output: str | None,
) -> str:
    """The canonical command line that regenerates a module (for its header)."""
    words = ["gradwright", "gen", path, *functions]
    if wrt is not None:
        words += ["--wrt", ",".join(wrt)]
    if output is not None:
        words += ["-o", output]
    return shlex.join(words)


def compile_function(
    index: ModuleIndex, name: str, wrt: tuple[str, ...] | None
) -> Compiled:
    checked = check_function(index, name, wrt)
    ssa = lower(index, checked)
    sweep = reverse_sweep(ssa, checked.wrt, (const(1.0),))
    if len(sweep.unused_wrt) == len(sweep.wrt):
        fail(
            f"the result of '{name}' does not depend differentiably on "
            + ", ".join(checked.wrt)
            + " (it is constant or integer-valued in them)",
            index.locate(_return_statement(checked)),
            "choose --wrt parameters the result varies with smoothly",
        )
    sweep = inline_adjoints(sweep)
    return Compiled(checked, ssa, plan_forward(ssa, sweep), sweep)


def _return_statement(checked: CheckedFunction) -> cst.CSTNode:
    body = checked.node.body
    last = body.body[-1]
    if isinstance(last, cst.SimpleStatementLine):
        return last.body[-1]
    return last


def generate(
    source: str,
    functions: Sequence[str],
    wrt: Sequence[str] | None = None,
    *,
    path: str = "<string>",
    output: str | None = None,
) -> str:
    """Generate the gradient module for ``functions`` of the model ``source``.

    ``wrt`` names the parameters to differentiate with respect to (default: all of
    each function's parameters). ``path`` and ``output`` only label the header.
    Raises :class:`gradwright.GradwrightError` for input it cannot differentiate.
    The source is parsed, never executed.
    """
    if not functions:
        raise ValueError("generate() needs at least one function name")
    index = parse_module(source, path)
    wanted = tuple(wrt) if wrt is not None else None
    compiled = [compile_function(index, name, wanted) for name in functions]
    command = regeneration_command(path, functions, wrt, output)
    return render_module(index, compiled, command)
