"""Module text: names, printed statements, jinja2 layout, black.

Takes the SSA function, its optimized sweeps and the module index, and renders the
generated module from the templates in the top-level ``templates/`` folder (shipped
inside the wheel as ``gradwright/templates``).
"""

from __future__ import annotations

import dataclasses
import hashlib
from collections.abc import Mapping
from dataclasses import dataclass, field
from functools import lru_cache
from importlib import resources
from pathlib import Path
from typing import Literal

import jinja2
import libcst as cst

from gradwright import __version__
from gradwright.calculus.numpy_rules import REVERSE_SPELLING
from gradwright.calculus.numpy_rules import helper_sources as numpy_helper_sources
from gradwright.diagnostics import fail
from gradwright.emission.formatting import format_function, format_statement
from gradwright.emission.naming import Namer
from gradwright.emission.print_sweeps import LayoutError, lay_out
from gradwright.emission.printer import Printer
from gradwright.emission.targets import (
    DEFAULT_TARGET,
    Target,
    check_helper_names,
    get_target,
    helper_source,
    helpers_for_ops,
    importable,
    prepare_primal,
)
from gradwright.header import shape_words
from gradwright.ir import ReverseSweep, SSAFunction, Var
from gradwright.lowering.frontend import CheckedFunction, ModuleIndex
from gradwright.sweeps.shapes import SHAPES_CALLED, SHAPES_DECLARED


@dataclass(frozen=True)
class RenderedGradient:
    """One target function's generated code, ready for the templates."""

    name: str
    #: "grad" (scalar result), "vjp" (tuple result, with a Jacobian too),
    #: "adjoint" (a helper's reverse: its parameters' adjoints from its result's)
    #: or "primal" (a helper no derivative of which is read: its copy alone)
    kind: str
    derived_name: str
    signature: str
    wrt: tuple[str, ...]
    bars: tuple[str, ...]
    forward: tuple[str, ...]
    reverse: tuple[str, ...]
    seed_unpack: str
    result: str
    primal: str
    #: for tuple results: ``NAME_jacobian``'s signature and its calls of the vjp
    jacobian_signature: str = ""
    jacobian_rows: tuple[str, ...] = ()
    jacobian_return: str = ""
    #: math names whose target stand-ins (``fallbacks.py``) this function calls
    helpers: frozenset[str] = frozenset()
    #: array helpers (``numpy_support.py``) this function calls
    numpy_helpers: frozenset[str] = frozenset()


#: what a generated function is for: a listed function's gradient (or vjp), a
#: helper's partials (``NAME_grad``) or a helper's adjoint function
#: (``NAME_adjoint``, see ``ir.HelperForm``)
HelperRole = Literal["target", "partials", "adjoint"]


@dataclass(frozen=True)
class Compiled:
    """Everything the emitter needs about one generated function."""

    checked: CheckedFunction
    ssa: SSAFunction
    reverse: ReverseSweep
    active: frozenset[Var]
    role: HelperRole = "target"
    #: array parameters' shapes declared with ``--shape`` (checked when called)
    declared: Mapping[str, tuple[int | str, ...]] = field(default_factory=dict)
    #: a helper whose derivative no call site reads: its primal copy alone
    primal_only: bool = False


def _template_dir() -> Path:
    packaged = resources.files("gradwright") / "templates"
    if packaged.is_dir():
        return Path(str(packaged))
    # source checkout / editable install: the top-level templates/ folder
    return Path(__file__).resolve().parents[3] / "templates"


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


def _call_arguments(node: cst.FunctionDef) -> str:
    """How a generated wrapper passes its own parameters on."""
    params = node.params
    positional = [p.name.value for p in (*params.posonly_params, *params.params)]
    keywords = [f"{p.name.value}={p.name.value}" for p in params.kwonly_params]
    return ", ".join(positional + keywords)


def _with_seed(node: cst.FunctionDef, signature: str, seed: str) -> str:
    params = node.params
    if isinstance(params.star_arg, cst.ParamStar) or params.kwonly_params:
        return f"{signature}, {seed}"
    if any(p.default is not None for p in (*params.posonly_params, *params.params)):
        return f"{signature}, *, {seed}"  # a plain parameter cannot follow defaults
    return f"{signature}, {seed}"


def render_primal(
    index: ModuleIndex, compiled: Compiled, target: Target
) -> RenderedGradient:
    """A helper no derivative of which is read (``Compiled.primal_only``): its
    copy alone, as the target runs it (with the stand-ins it calls)."""
    checked, names = compiled.checked, compiled.ssa.local_names
    node, helpers = prepare_primal(target, index, checked, names)
    check_helper_names(target, index, checked, names, helpers)
    primal = format_function(_strip_annotations(node), index.module, index.code)
    return RenderedGradient(
        name=checked.name,
        kind="primal",
        derived_name="",
        signature="",
        wrt=(),
        bars=(),
        forward=(),
        reverse=(),
        seed_unpack="",
        result="",
        primal=primal.rstrip("\n"),
        helpers=helpers,
    )


def render_function(
    index: ModuleIndex, compiled: Compiled, target: Target | None = None
) -> tuple[RenderedGradient, set[str]]:
    checked, ssa, sweep = compiled.checked, compiled.ssa, compiled.reverse
    target = target or get_target(DEFAULT_TARGET)
    node, helpers = prepare_primal(target, index, checked, ssa.local_names)
    node = _strip_annotations(node)
    reserved = (
        set(checked.params)
        | ssa.local_names
        | index.module_names
        | {"math", "abs", "min", "max", "len", "sum", "range", "reversed"}
    )
    is_vector = ssa.result.is_tuple
    is_adjoint = compiled.role == "adjoint"
    # a model that binds its own `math` gets the module under another name
    math_alias = "_gw_math" if "math" in set(checked.params) | ssa.local_names else None
    numpy = bool(index.numpy_modules)

    def lay_out_with(share_names: bool):  # noqa: ANN202
        namer = Namer(reserved)
        namer.share_arrays(sweep.updates)
        for param in ssa.params:
            namer.name(param)
        for param in sweep.wrt:
            namer.bar_name(param)  # the documented x_bar names come first
        seed_name = namer.claim("seed") if is_vector or is_adjoint else ""
        if is_adjoint and not is_vector:
            namer.names[sweep.seeds[0]] = seed_name  # the result's adjoint itself
        printer = Printer(
            namer.name,
            namer.bar_name,
            target.callees(),
            namer.partials_name,
            math_alias=math_alias,
        )
        reverse_printer = (
            Printer(
                namer.name,
                namer.bar_name,
                {**target.callees(), **REVERSE_SPELLING},
                namer.partials_name,
                where_call="np.where",
                math_alias=math_alias,
            )
            if numpy
            else None
        )
        laid_out = lay_out(
            # an adjoint function returns no value: its result is computed only
            # where the reverse sweep reads it
            (
                dataclasses.replace(
                    ssa, result=dataclasses.replace(ssa.result, values=())
                )
                if is_adjoint
                else ssa
            ),
            sweep,
            namer,
            printer,
            set(compiled.active),
            reverse_printer,
            share_names,
            target.records,
        )
        return namer, seed_name, printer, reverse_printer, laid_out

    try:
        try:
            attempt = lay_out_with(share_names=True)
        except LayoutError:
            # the readable layout shares names unsafely somewhere: give every
            # stored value a name of its own, which the check then confirms
            attempt = lay_out_with(share_names=False)
    except LayoutError as error:
        # a bug of ours, caught before it became a wrong gradient
        fail(
            f"internal error: the generated code for '{checked.name}' failed"
            f" gradwright's own layout check ({error.violations[0].describe()});"
            " nothing was written",
            index.locate(checked.node.name),
            "please report this model to the gradwright developers; rewriting the"
            " statement named above differently may avoid it meanwhile",
        )
    namer, seed_name, printer, reverse_printer, laid_out = attempt
    forward, reverse, result_exprs = laid_out
    if compiled.declared:
        check = _shape_check(ssa, compiled.declared)
        # first of all, before any size is read
        said = SHAPES_DECLARED if compiled.role == "target" else SHAPES_CALLED
        forward = [f"    # {said}", check, *forward]
    seed_unpack = ""
    if is_vector:
        names = [namer.name(seed) for seed in sweep.seeds]
        seed_unpack = (
            f"{', '.join(names)}{',' if len(names) == 1 else ''} = {seed_name}"
        )
    values = [printer(e) for e in result_exprs] or [""]
    value = (
        f"({', '.join(values)}{',' if len(values) == 1 else ''})"
        if is_vector
        else values[0]
    )
    bars = tuple(namer.bar_name(v) for v in sweep.wrt)
    returned = bars
    numpy_helpers = set(printer.helpers_used)
    if compiled.declared:
        numpy_helpers.add("_gw_check_shapes")
    if reverse_printer is not None:
        numpy_helpers |= reverse_printer.helpers_used
        returned = tuple(
            _returned_adjoint(bar, v, sweep.bare, compiled.declared, namer)
            for bar, v in zip(bars, sweep.wrt, strict=True)
        )
        if any(r.startswith("_gw_shaped(") for r in returned):
            numpy_helpers.add("_gw_shaped")
    result = f"{value}, ({', '.join(returned)}{',' if len(bars) == 1 else ''})"
    if is_adjoint:
        result = f"({returned[0]},)" if len(bars) == 1 else ", ".join(returned)

    helpers |= helpers_for_ops(target, printer.replaced_ops)
    check_helper_names(target, index, checked, ssa.local_names, helpers)
    signature = index.module.code_for_node(node.params)
    primal = format_function(node, index.module, index.code)
    jacobian_rows: tuple[str, ...] = ()
    if is_vector and not is_adjoint:
        outputs = len(ssa.result.values)
        arguments = _call_arguments(node)
        rows = []
        for i in range(outputs):
            unit = ", ".join("1.0" if j == i else "0.0" for j in range(outputs))
            unit = f"({unit}{',' if outputs == 1 else ''})"
            call = f"{checked.name}_vjp({arguments}, {seed_name}={unit})"
            target_text = f"value, row_{i}" if i == 0 else f"_, row_{i}"
            rows.append(format_statement(f"{target_text} = {call}", 1))
        jacobian_rows = tuple(rows)
    kind = "adjoint" if is_adjoint else "vjp" if is_vector else "grad"
    rendered = RenderedGradient(
        name=checked.name,
        kind=kind,
        derived_name=f"{checked.name}_{kind}",
        signature=(
            _with_seed(node, signature, seed_name)
            if is_vector or is_adjoint
            else signature
        ),
        wrt=checked.wrt,
        bars=bars,
        forward=tuple(forward),
        reverse=tuple(reverse),
        seed_unpack=seed_unpack,
        result=format_statement(f"return {result}", 1),
        primal=primal.rstrip("\n"),
        jacobian_signature=signature,
        jacobian_rows=jacobian_rows,
        jacobian_return=format_statement(
            "return value, ("
            + ", ".join(f"row_{i}" for i in range(len(jacobian_rows)))
            + ("," if len(jacobian_rows) == 1 else "")
            + ")",
            1,
        ),
        helpers=helpers,
        numpy_helpers=frozenset(numpy_helpers),
    )
    return rendered, printer.modules_used


def _returned_adjoint(
    bar: str,
    v: Var,
    bare: frozenset[Var],
    declared: Mapping[str, tuple[int | str, ...]],
    namer: Namer,
) -> str:
    """How an array model returns one parameter's adjoint."""
    if v in bare:
        return bar
    if declared.get(v.base) == ():
        # a number checked at the call: its adjoint is a number too (a plain
        # zero, a NumPy scalar or a 0-d array) and comes back as a float
        return f"float({bar})"
    # an adjoint that stayed a plain zero still comes back with its value's shape,
    # in an array of its own
    return f"_gw_shaped({bar}, {namer.name(v)})"


def _shape_check(
    ssa: SSAFunction, declared: Mapping[str, tuple[int | str, ...]]
) -> str:
    """The call that refuses arguments of other shapes than the declared ones."""
    names = [p.base for p in ssa.params if p.base in declared]
    spec = " ".join(shape_words({name: declared[name] for name in names}))
    return format_statement(f'_gw_check_shapes("{spec}", {", ".join(names)})', 1)


def render_module(
    index: ModuleIndex,
    compiled: list[Compiled],
    command: str,
    target: Target | None = None,
) -> str:
    target = target or get_target(DEFAULT_TARGET)
    functions: list[RenderedGradient] = []
    modules: set[str] = set()
    helpers: frozenset[str] = frozenset()
    order = {name: k for k, name in enumerate(index.functions)}
    roles = {"target": 0, "partials": 1, "adjoint": 2}
    # in the source's order, so a helper comes before the model that calls it
    ordered = sorted(compiled, key=lambda c: (order[c.checked.name], roles[c.role]))
    for k, item in enumerate(ordered):
        if item.primal_only:  # no derivative to lay out
            rendered, used = render_primal(index, item, target), set()
        else:
            rendered, used = render_function(index, item, target)
        if k and ordered[k - 1].checked.name == item.checked.name:
            # a listed function also called as a helper: its copy once
            rendered = dataclasses.replace(rendered, primal="")
        functions.append(rendered)
        modules |= used
        helpers |= rendered.helpers
    if helpers:
        modules.add("math")  # the stand-ins call math functions the target has

    # the primal copies keep the user's own spellings of math imports
    imports: list[str] = []
    if "math" in modules:
        imports.append("import math")
    for statement in index.math_imports:
        if statement != "import math" or "math" not in modules:
            imports.append(statement)
    if "_gw_math" in modules:
        imports.append("import math as _gw_math")
    imports = importable(target, imports)
    numpy_helpers = set().union(*(f.numpy_helpers for f in functions))
    if index.numpy_modules:
        # the generated code spells numpy `np`; the primal keeps the model's spelling
        imports.append("import numpy as np")
        imports += [i for i in index.numpy_imports if i != "import numpy as np"]
    helper_text = "\n\n\n".join(
        t for t in (helper_source(helpers), numpy_helper_sources(numpy_helpers)) if t
    )
    hoisted, constants = _module_slice(index, compiled)
    imports += hoisted

    header = {
        "version": __version__,
        "source_path": index.path,
        "sha256": hashlib.sha256(index.source.encode("utf-8")).hexdigest(),
        "command": command,
        "target": target.header,
    }
    text = (
        _environment()
        .get_template("module.py.j2")
        .render(
            header=header,
            imports=imports,
            constants=constants,
            helpers=helper_text,
            functions=functions,
        )
    )
    return text


def _default_names(node: cst.FunctionDef) -> set[str]:
    """Names the parameter defaults read (``def f(a, span=SPAN)``)."""
    params = node.params
    found: set[str] = set()
    for param in (*params.posonly_params, *params.params, *params.kwonly_params):
        if param.default is not None:
            found |= {
                n.value
                for n in _names_in(param.default)
                if isinstance(n, cst.Name)  # attribute names are not read
            }
    return found


def _names_in(node: cst.CSTNode) -> list[cst.Name]:
    found: list[cst.Name] = []

    class Visitor(cst.CSTVisitor):
        def visit_Name(self, name: cst.Name) -> None:
            found.append(name)

        def visit_Attribute(self, attribute: cst.Attribute) -> bool:
            attribute.value.visit(self)
            return False  # the attribute's own name is not read

    node.visit(Visitor())
    return found


def _module_slice(
    index: ModuleIndex, compiled: list[Compiled]
) -> tuple[list[str], list[str]]:
    """The module statements the functions depend on, in source order, as text:
    (the imports it starts with, to join the output's own; the rest).

    Names the functions read -> every statement binding them -> the names those
    read, and so on; a statement that may change a needed value in place (a call,
    an element assignment, a block) comes along too. def and class statements are
    copied only for a name they bind; math and numpy imports are written by the
    output itself; the ``__main__`` block never. Nothing is run: the copy is text.
    """
    wanted = {name for c in compiled for name in c.ssa.constants}
    for c in compiled:
        wanted |= _default_names(c.checked.node)
    wanted &= index.module_names
    statements = index.statements
    taken = [False] * len(statements)
    changed = True
    while changed:
        changed = False
        for k, statement in enumerate(statements):
            if taken[k] or statement.kind == "main":
                continue
            if statement.binds & wanted or (
                statement.kind == "other"
                and statement.mutates
                and statement.reads & wanted & index.data_names
            ):
                taken[k] = True
                changed = True
                wanted |= statement.reads & index.module_names
    parts: list[tuple[str, str]] = []
    for k, statement in enumerate(statements):
        if not taken[k] or statement.kind == "generated":
            continue
        if parts and parts[-1][1] == statement.text:
            continue  # two statements on one line: the line once
        parts.append((statement.kind, statement.text))
    # the imports the slice starts with join the output's own (one block, as
    # isort wants it); an import after other statements stays where it is
    hoisted: list[str] = []
    while parts and parts[0][0] == "import" and not parts[0][1].startswith("#"):
        hoisted.append(parts.pop(0)[1])
    # black's spacing: two blank lines around a def or class, one after imports
    blocks: list[str] = []
    for k, (kind, text) in enumerate(parts):
        previous = parts[k - 1][0] if k else ""
        if kind in ("def", "class") or previous in ("def", "class"):
            blocks.append(("\n\n" if blocks else "\n") + text)
        elif (previous == "import" and kind != "import") or (
            k and text.startswith("#")
        ):
            # after imports, and before a statement with its own comment lines
            blocks.append("\n" + text)
        else:
            blocks.append(text)
    return hoisted, blocks
