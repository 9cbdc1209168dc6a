"""Module text: names, printed statements, jinja2 layout, black.

Takes the SSA function, its optimized sweeps and the module index, and renders the
generated module from the templates in the top-level ``templates/`` folder (shipped
inside the wheel as ``gradwright/templates``).
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass
from functools import lru_cache
from importlib import resources
from pathlib import Path

import jinja2
import libcst as cst

from . import __version__
from .formatting import format_code, format_statement
from .frontend import CheckedFunction, ModuleIndex
from .ir import Expr, ReverseSweep, SSAFunction
from .naming import Namer
from .optimize import ForwardPlan
from .printer import Printer


@dataclass(frozen=True)
class Group:
    """Statements from one source statement, under a comment quoting it."""

    comment: str
    lines: tuple[str, ...]


@dataclass(frozen=True)
class RenderedGradient:
    name: str
    grad_name: str
    signature: str
    wrt: tuple[str, ...]
    bars: tuple[str, ...]
    forward: tuple[Group, ...]
    reverse: tuple[Group, ...]
    result: str
    primal: str


@dataclass(frozen=True)
class Compiled:
    """Everything the emitter needs about one target function."""

    checked: CheckedFunction
    ssa: SSAFunction
    forward: ForwardPlan
    reverse: ReverseSweep


def _template_dir() -> Path:
    packaged = resources.files("gradwright") / "templates"
    if packaged.is_dir():
        return Path(str(packaged))
    # source checkout / editable install: the top-level templates/ folder
    return Path(__file__).resolve().parents[2] / "templates"


@lru_cache(maxsize=1)
def _environment() -> jinja2.Environment:
    return jinja2.Environment(
        loader=jinja2.FileSystemLoader(str(_template_dir())),
        trim_blocks=True,
        lstrip_blocks=True,
        keep_trailing_newline=True,
        undefined=jinja2.StrictUndefined,
        autoescape=False,
    )


def _strip_annotations(node: cst.FunctionDef) -> cst.FunctionDef:
    """Annotations may name types the generated module does not import."""

    def bare(param: cst.Param) -> cst.Param:
        return param.with_changes(annotation=None)

    params = node.params
    stripped = params.with_changes(
        params=[bare(p) for p in params.params],
        posonly_params=[bare(p) for p in params.posonly_params],
        kwonly_params=[bare(p) for p in params.kwonly_params],
    )
    return node.with_changes(params=stripped, returns=None, leading_lines=[])


def _group(items: list[tuple[str, str]]) -> tuple[Group, ...]:
    """Consecutive (comment, line) pairs with the same comment share one group."""
    groups: list[Group] = []
    for comment, line in items:
        if groups and groups[-1].comment == comment:
            groups[-1] = Group(comment, groups[-1].lines + (line,))
        else:
            groups.append(Group(comment, (line,)))
    return tuple(groups)


def render_function(
    index: ModuleIndex, compiled: Compiled
) -> tuple[RenderedGradient, set[str]]:
    checked, ssa = compiled.checked, compiled.ssa
    node = _strip_annotations(checked.node)
    reserved = (
        set(checked.params)
        | ssa.local_names
        | index.module_names
        | {"math", "abs", "min", "max"}
    )
    namer = Namer(reserved)
    for param in ssa.params:
        namer.name(param)
    printer = Printer(namer.name, namer.bar_name)

    forward: list[tuple[str, str]] = []
    for let, expr in compiled.forward.statements:
        text = f"{namer.name(let.target)} = {printer(expr)}"
        forward.append((let.origin.text, format_statement(text, 1)))

    reverse: list[tuple[str, str]] = []
    for stmt in compiled.reverse.statements:
        operator = "+=" if stmt.accumulate else "="
        text = f"{namer.bar_name(stmt.var)} {operator} {printer(stmt.expr)}"
        reverse.append((stmt.origin.text, format_statement(text, 1)))
    for var in compiled.reverse.unused_wrt:
        reverse.append(
            (
                f"{var.base} does not affect the result",
                format_statement(f"{namer.bar_name(var)} = 0.0", 1),
            )
        )

    result_exprs: tuple[Expr, ...] = compiled.forward.result
    value = printer(result_exprs[0])
    bars = tuple(namer.bar_name(v) for v in compiled.reverse.wrt)
    result = f"{value}, ({', '.join(bars)}{',' if len(bars) == 1 else ''})"

    signature = index.module.code_for_node(node.params)
    primal = format_code(index.module.code_for_node(node))
    rendered = RenderedGradient(
        name=checked.name,
        grad_name=f"{checked.name}_grad",
        signature=signature,
        wrt=checked.wrt,
        bars=bars,
        forward=_group(forward),
        reverse=_group(reverse),
        result=result,
        primal=primal.rstrip("\n"),
    )
    return rendered, printer.modules_used


def _uses_math_module(primal_code: str, index: ModuleIndex) -> bool:
    return any(f"{alias}." in primal_code for alias in index.math_modules)


def render_module(
    index: ModuleIndex,
    compiled: list[Compiled],
    command: str,
) -> str:
    functions: list[RenderedGradient] = []
    modules: set[str] = set()
    for item in compiled:
        rendered, used = render_function(index, item)
        functions.append(rendered)
        modules |= used

    # the primal copies keep the user's own spellings of math imports
    imports: list[str] = []
    if "math" in modules:
        imports.append("import math")
    for statement in index.math_imports:
        if statement != "import math" or "math" not in modules:
            imports.append(statement)
    constants = _constants_used(index, [c.ssa for c in compiled])

    header = {
        "version": __version__,
        "source_path": index.path,
        "sha256": hashlib.sha256(index.source.encode("utf-8")).hexdigest(),
        "command": command,
    }
    text = (
        _environment()
        .get_template("module.py.j2")
        .render(
            header=header, imports=imports, constants=constants, functions=functions
        )
    )
    return text


def _constants_used(index: ModuleIndex, functions: list[SSAFunction]) -> list[str]:
    """The module constants the functions read, with what they read, in source order."""
    wanted = {name for fn in functions for name in fn.constants}
    pending = list(wanted)
    while pending:
        name = pending.pop()
        for dep in index.constants[name].depends_on:
            if dep not in wanted:
                wanted.add(dep)
                pending.append(dep)
    return [c.text for name, c in index.constants.items() if name in wanted]
