"""The public entry points: source text in, generated module text out."""

from __future__ import annotations

import gc
import sys
import threading
from collections.abc import Callable, Iterator, Mapping, Sequence
from contextlib import contextmanager
from dataclasses import replace

import libcst as cst

from gradwright.diagnostics import GradwrightError, fail, file_location
from gradwright.emission.module import Compiled, HelperRole, render_module
from gradwright.emission.targets import DEFAULT_TARGET, get_target
from gradwright.header import regeneration_command, shape_words, stamp
from gradwright.ir import (
    Apply,
    CallAdjoint,
    Const,
    Expr,
    ReverseBranch,
    ReverseLoop,
    ReverseStmt,
    SSAFunction,
    Var,
    const,
    walk,
)
from gradwright.lowering.frontend import (
    CheckedFunction,
    ModuleIndex,
    check_function,
    parse_module,
)
from gradwright.lowering.ssa import lower
from gradwright.sweeps.broadcasting import Fitter
from gradwright.sweeps.call_shapes import CallShapes
from gradwright.sweeps.common import float_entries, fresh_uid, reuse_values
from gradwright.sweeps.factoring import tidy
from gradwright.sweeps.inplace import plan_in_place
from gradwright.sweeps.optimize import (
    all_statements,
    drop_dead_zeroing,
    inline_adjoints,
    map_sweep,
    spread_reads,
    sweep_exprs,
    tuple_seeds,
)
from gradwright.sweeps.quotients import share_quotients
from gradwright.sweeps.reverse import (
    active_values,
    defined_in,
    list_roots,
    reverse_sweep,
    walk_lets,
)
from gradwright.sweeps.scales import fold_scales
from gradwright.sweeps.selects import branch_selects
from gradwright.sweeps.shapes import Dim, ShapeTable, literal_shape, with_sizes
from gradwright.sweeps.zeros import merge_zero_starts, settle_zeros, sink_copies


def compile_function(
    index: ModuleIndex,
    name: str,
    wrt: tuple[str, ...] | None,
    call_stack: tuple[str, ...] = (),
) -> Compiled:
    """One function differentiated on its own (no helpers of any shape)."""
    checked = check_function(index, name, wrt)
    ssa = lower(index, checked, call_stack)
    return _differentiate(
        index, checked, ssa, "target" if not call_stack else "partials"
    )


def _differentiate(
    index: ModuleIndex,
    checked: CheckedFunction,
    ssa: SSAFunction,
    role: HelperRole,
    adjoint_helpers: Mapping[str, tuple[Var, ...]] | None = None,
    shapes: Mapping[str, tuple[Dim, ...]] | None = None,
    calls: CallShapes | None = None,
) -> Compiled:
    """The reverse sweep of a lowered function: a target (seeded with 1, or one
    seed per output), a helper in partials form (its partials, at the broadcast
    shape of its result: each call site sums them back to its operands' shapes)
    or a helper's adjoint function (seeded with its result's adjoint). ``shapes``:
    a target's declared array shapes, or those every call of a helper passes;
    ``calls``: helpers' result shapes at the calls."""
    name = checked.name
    declared = {p: dims for p, dims in (shapes or {}).items() if p in checked.params}
    ssa, sizes = with_sizes(
        ssa, declared, set(checked.params) | ssa.local_names | index.module_names
    )
    seeds: tuple[Expr, ...] = (const(1.0),)
    first = 1 + max(_uids(ssa))
    if ssa.result.is_tuple:
        seeds = tuple(
            Var(first + k, f"seed_{k}", "param") for k in range(len(ssa.result.values))
        )
    elif role == "adjoint":
        seeds = (Var(first, "seed", "param"),)
    broadcasting = bool(index.numpy_modules) and role != "partials"
    fitter = None
    if broadcasting:
        table = _shape_table(index, ssa, declared, calls)
        if role == "adjoint" and declared and not ssa.result.is_tuple:
            # every call passes its seed at the result's shape (Fitter.full)
            table.of[seeds[0]] = table.atom(ssa.result.values[0])  # type: ignore[index]
        fitter = Fitter(table, sizes)
    sweep = reverse_sweep(
        ssa, checked.wrt, seeds, broadcasting, adjoint_helpers, fitter
    )
    if len(sweep.unused_wrt) == len(sweep.wrt) and role == "target":
        fail(
            f"the result of '{name}' does not depend differentiably on "
            + ", ".join(checked.wrt)
            + " (it is constant or integer-valued in them)",
            index.locate(_return_statement(checked)),
            "choose --wrt parameters the result varies with smoothly",
        )
    active = frozenset(active_values(ssa, checked.wrt))
    # repeated calls of the reverse become forward values, in scalar models only
    # (in an array model each would be a whole array held for the reverse)
    scalar = not index.numpy_modules  # an array adjoint read twice would be shared
    if scalar:
        sweep = spread_reads(settle_zeros(sweep), ssa.body)
    sweep = inline_adjoints(sweep)
    if scalar:
        sweep = tuple_seeds(sweep, dict(ssa.tuple_sizes))
    sweep, ssa = reuse_values(
        drop_dead_zeroing(sweep), ssa, share=not index.numpy_modules
    )
    if scalar:
        sweep = branch_selects(sweep)
        sweep = share_quotients(sweep, fresh_uid(ssa, sweep))
        sweep = sink_copies(merge_zero_starts(fold_scales(sweep)))
        sweep = float_entries(sweep, ssa)
    if fitter is not None:
        sweep = plan_in_place(tidy(merge_zero_starts(sweep), fitter), fitter)
    return Compiled(checked, ssa, sweep, active, role, declared)


def compile_with_callees(
    index: ModuleIndex,
    names: Sequence[str],
    wrt: tuple[str, ...] | None,
    shapes: Mapping[str, tuple[Dim, ...]] | None = None,
) -> list[Compiled]:
    """The targets, then every function they call (each once), differentiated in
    all their parameters so any call site can use the adjoints it needs.

    A helper of numbers returning one number that works element by element is
    differentiated in partials form (``NAME_grad``: value and partials, the
    caller multiplies); any other helper in adjoint form (``NAME_adjoint``: the
    adjoints of its parameters from its result's adjoint)."""
    lowered: dict[str, tuple[CheckedFunction, SSAFunction]] = {}
    for name in names:
        checked = check_function(index, name, wrt)
        lowered[name] = (checked, lower(index, checked))
    helpers: dict[str, tuple[CheckedFunction, SSAFunction]] = {}
    pending = [(name, callee) for name in names for callee in lowered[name][1].callees]
    stacks = {name: (name,) for name in names}
    while pending:
        caller, callee = pending.pop(0)
        if callee in helpers:
            continue
        checked = check_function(index, callee, None)
        helpers[callee] = (checked, lower(index, checked, stacks[caller]))
        stacks.setdefault(callee, stacks[caller] + (callee,))
        pending += [(callee, c) for c in helpers[callee][1].callees]
    ssas = {name: ssa for name, (_, ssa) in {**helpers, **lowered}.items()}
    _reject_cycles(index, ssas)
    _reject_shared_lists(index, lowered, helpers)
    forms = _helper_forms(index, helpers, set(names))
    adjoint_helpers = {
        name: helpers[name][1].params
        for name, form in forms.items()
        if form == "adjoint"
    }
    calls = None
    if index.numpy_modules:
        targets = {
            name: {p: d for p, d in (shapes or {}).items() if p in checked.params}
            for name, (checked, _) in lowered.items()
        }
        calls = CallShapes(ssas, targets, lambda f, d, c: _shape_table(index, f, d, c))
    compiled = [
        _differentiate(index, checked, ssa, "target", adjoint_helpers, shapes, calls)
        for checked, ssa in lowered.values()
    ]
    for name, (checked, ssa) in helpers.items():
        if forms[name] == "partials" and name in lowered:
            continue  # the target's own gradient serves its calls
        own = calls.called_with(name) if calls and forms[name] == "adjoint" else None
        compiled.append(
            _differentiate(
                index, checked, ssa, forms[name], adjoint_helpers, own, calls
            )
        )
    return _narrow_helpers(
        index, compiled, set(lowered), stacks, adjoint_helpers, calls
    )


def _narrow_helpers(
    index: ModuleIndex,
    compiled: list[Compiled],
    targets: set[str],
    stacks: dict[str, tuple[str, ...]],
    adjoint_helpers: Mapping[str, tuple[Var, ...]],
    calls: CallShapes | None,
) -> list[Compiled]:
    """Each helper in partials form differentiated only in the parameters some
    call site reads a partial of (not an integer count, a tolerance or a constant
    limit every caller passes): its ``_grad`` computes and returns those alone, in
    parameter order, and its callers' partial indices follow. Callers are settled
    before their callees (the calls are acyclic), as a narrower caller needs fewer
    partials."""
    # keyed by name and role: a listed function that is also called as an
    # adjoint-form helper is compiled twice (its gradient and its adjoint)
    by_key = {(c.ssa.name, c.role): c for c in compiled}
    callers: dict[tuple[str, str], set[tuple[str, str]]] = {k: set() for k in by_key}
    for key, item in by_key.items():
        for callee in item.ssa.callees:
            for role in ("partials", "adjoint"):
                if (callee, role) in callers:
                    callers[(callee, role)].add(key)
    # only helpers are differentiated again
    settled = {k for k in by_key if k[1] == "target"}
    pending = [k for k in by_key if k not in settled]
    # helpers whose derivative no call site reads: their primal alone is printed
    dropped: set[tuple[str, str]] = set()
    while pending:
        key = next(k for k in pending if callers[k] <= settled)
        pending.remove(key)
        settled.add(key)
        name, role = key
        helper = by_key[key]
        read = _partials_read if role == "partials" else _adjoint_parts_read
        needed: set[int] = set()
        for caller in callers[key] - dropped:
            needed |= read(by_key[caller], name)
        params = [p.base for p in helper.ssa.params]
        wrt = tuple(base for k, base in enumerate(params) if k in needed)
        if not wrt:
            dropped.add(key)
            continue
        if wrt == helper.checked.wrt:
            continue
        if role == "adjoint" and helper.checked.wrt != tuple(params):
            continue  # its callers' parts are one per parameter: kept aligned
        checked = check_function(index, name, wrt)
        ssa = lower(index, checked, stacks[name])
        own = calls.called_with(name) if calls and role == "adjoint" else None
        by_key[key] = _differentiate(
            index, checked, ssa, role, adjoint_helpers, own, calls
        )
        positions = {params.index(base): j for j, base in enumerate(wrt)}
        for caller in callers[key] - dropped:  # (a dropped one calls no _grad)
            if role == "partials":
                by_key[caller] = _renumber_partials(by_key[caller], name, positions)
            else:
                by_key[caller] = _keep_parts(by_key[caller], name, set(positions))
    return [
        replace(by_key[key], primal_only=key in dropped)
        for key in ((c.ssa.name, c.role) for c in compiled)
    ]


def _adjoint_parts_read(item: Compiled, callee: str) -> set[int]:
    """The parameters of ``callee`` whose adjoints ``item`` takes from a call of
    its adjoint function: those whose argument is active at that call (as
    ``reverse.call_adjoint`` adds only those; an array model may then read the
    part through an in-place plan rather than an expression)."""
    return {
        k
        for stmt in all_statements(item.reverse.statements)
        if isinstance(stmt, CallAdjoint) and stmt.callee == callee
        for k, arg in enumerate(stmt.args)
        if isinstance(arg, Var) and arg in item.active
    }


def _keep_parts(item: Compiled, callee: str, kept: set[int]) -> Compiled:
    """``item`` with its calls of ``callee``'s adjoint receiving only the parts
    of the parameters in ``kept`` (the adjoint function returns those alone)."""

    def block(statements: tuple[ReverseStmt, ...]) -> tuple[ReverseStmt, ...]:
        out: list[ReverseStmt] = []
        for stmt in statements:
            if isinstance(stmt, CallAdjoint) and stmt.callee == callee:
                parts = tuple(p for k, p in enumerate(stmt.parts) if k in kept)
                stmt = replace(stmt, parts=parts)
            elif isinstance(stmt, ReverseBranch):
                stmt = replace(stmt, then=block(stmt.then), orelse=block(stmt.orelse))
            elif isinstance(stmt, ReverseLoop):
                stmt = replace(stmt, body=block(stmt.body))
            out.append(stmt)
        return tuple(out)

    return replace(
        item, reverse=replace(item.reverse, statements=block(item.reverse.statements))
    )


def _calls_of(item: Compiled, callee: str) -> set[Var]:
    return {
        let.target for let in walk_lets(item.ssa.body) if let.op == f"call:{callee}"
    }


def _partials_read(item: Compiled, callee: str) -> set[int]:
    calls = _calls_of(item, callee)
    found: set[int] = set()
    for expr in sweep_exprs(item.reverse.statements):
        for node in walk(expr):
            if (
                isinstance(node, Apply)
                and node.op == "partial"
                and node.args[0] in calls
            ):
                k = node.args[1]
                assert isinstance(k, Const) and isinstance(k.value, int)
                found.add(k.value)
    return found


def _renumber_partials(
    item: Compiled, callee: str, positions: dict[int, int]
) -> Compiled:
    calls = _calls_of(item, callee)

    def change(expr: Expr) -> Expr:
        if not isinstance(expr, Apply):
            return expr
        if expr.op == "partial" and expr.args[0] in calls:
            k = expr.args[1]
            assert isinstance(k, Const) and isinstance(k.value, int)
            return Apply("partial", (expr.args[0], const(positions[k.value])))
        return Apply(expr.op, tuple(change(a) for a in expr.args))

    return replace(item, reverse=map_sweep(item.reverse, change))


def _helper_forms(
    index: ModuleIndex,
    helpers: dict[str, tuple[CheckedFunction, SSAFunction]],
    targets: set[str],
) -> dict[str, HelperRole]:
    """Partials form where it is exact and cheaper: numbers in, one number out.
    Every other helper, and every helper of an array model, is reversed by its
    adjoint function: partials of array operands are exact only if every operand
    broadcasts to the result's shape, which an unused or reduced operand does not
    (``def g(a, b): return a`` with ``b`` a matrix raised a broadcasting error)."""
    forms: dict[str, HelperRole] = {}
    for name, (_, ssa) in helpers.items():
        scalar = (
            not ssa.result.is_tuple
            and all(v.shape == "scalar" for v in ssa.result.values)
            and all(p.shape == "scalar" for p in ssa.params)
            and not index.numpy_modules
        )
        forms[name] = "partials" if scalar else "adjoint"
    return forms


def _reject_shared_lists(
    index: ModuleIndex,
    targets: dict[str, tuple[CheckedFunction, SSAFunction]],
    helpers: dict[str, tuple[CheckedFunction, SSAFunction]],
) -> None:
    """A helper that returns a list it was passed would share it with its
    caller, whose values (and their adjoints) do not follow that: a located
    error at its first call. (Writing into a parameter is rejected where it is
    written.)"""
    callers = {**helpers, **targets}
    for name, (_, ssa) in helpers.items():
        roots = list_roots(ssa)
        params = {p for p in ssa.params if p.shape == "list"}
        returned = sorted(
            roots[v].base
            for v in ssa.result.values
            if isinstance(v, Var) and roots.get(v) in params
        )
        if not returned:
            continue
        caller = next(c for c, (_, s) in callers.items() if name in s.callees)
        fail(
            f"'{name}' returns the list '{returned[0]}' it is passed: the caller's"
            " list would change with it",
            index.locate(_first_call(callers[caller][0], name)),
            f"make a new list in '{name}' (ys = [0.0] * len(xs)) and return it",
        )


def _first_call(checked: CheckedFunction, callee: str) -> cst.CSTNode:
    found: list[cst.CSTNode] = []

    class Calls(cst.CSTVisitor):
        def visit_Call(self, node: cst.Call) -> None:
            if isinstance(node.func, cst.Name) and node.func.value == callee:
                found.append(node)

    checked.node.visit(Calls())
    return found[0] if found else checked.node.name


def _reject_cycles(index: ModuleIndex, ssas: dict[str, SSAFunction]) -> None:
    """Recursion through functions that are all targets: lowering one along the
    cycle's path raises the located error at its call site."""
    calls = {name: ssa.callees for name, ssa in ssas.items()}

    def visit(name: str, path: tuple[str, ...]) -> None:
        for callee in calls.get(name, ()):
            if callee in path:
                lower(index, check_function(index, name, None), path[:-1])
            elif callee in calls:
                visit(callee, path + (callee,))

    for name in calls:
        visit(name, (name,))


def _uids(ssa: SSAFunction) -> list[int]:
    found = [p.uid for p in ssa.params] + [0]
    found += [v.uid for v in defined_in(ssa.body)]
    return found


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
    target: str = DEFAULT_TARGET,
    shapes: Mapping[str, Sequence[int | str]] | None = None,
) -> str:
    """Generate the gradient module for ``functions`` of the model ``source``.

    ``wrt`` names the parameters to differentiate with respect to (default: all of
    each function's parameters). ``path`` and ``output`` only label the header.
    ``target`` is the interpreter the module must run on: ``"cpython"`` (default)
    or ``"micropython"`` (stand-ins for the ``math`` functions MicroPython lacks);
    another name raises ValueError. ``shapes`` declares array parameters' shapes
    (``{"X": ("n", 5), "b": ()}``: a name stands for a size that must agree
    wherever it appears); the gradient is written for them and checks them when
    called.
    Raises :class:`gradwright.GradwrightError` for input it cannot differentiate.
    The source is parsed, never executed.
    """
    if not functions:
        raise ValueError("generate() needs at least one function name")
    repeated = sorted({f for f in functions if list(functions).count(f) > 1})
    if repeated:
        raise GradwrightError.usage(
            f"function {', '.join(repeated)} is listed more than once"
        )
    if wrt is not None and not list(wrt):
        raise GradwrightError.usage(
            "wrt names no parameter",
            "name at least one parameter, or leave wrt out to take them all",
        )
    runtime = get_target(target)

    def work() -> str:
        index = parse_module(source, path)
        if index.numpy_modules and not runtime.numpy:
            fail(
                f"{runtime.runtime} has no numpy, and this model imports it",
                file_location(path),
                "write the model over lists for the board, or generate for cpython",
            )
        wanted = tuple(wrt) if wrt is not None else None
        declared = _declared_shapes(index, functions, shapes)
        compiled = compile_with_callees(index, functions, wanted, declared)
        command = regeneration_command(
            path, functions, wrt, output, target, shape_words(declared)
        )
        # the digest line lets --check see an untouched output without generating
        return stamp(render_module(index, compiled, command, runtime))

    with _collector_paused():
        try:
            return _with_deep_stack(work)
        except RecursionError:
            raise GradwrightError.usage(
                f"{path}: an expression or block is nested too deeply to generate",
                "split the long expression into several statements (CPython itself"
                " stops compiling near 3,000 terms in one sum)",
            ) from None


def _declared_shapes(
    index: ModuleIndex,
    functions: Sequence[str],
    shapes: Mapping[str, Sequence[int | str]] | None,
) -> dict[str, tuple[Dim, ...]]:
    if not shapes:
        return {}
    if not index.numpy_modules:
        raise GradwrightError.usage(
            "shapes are declared for array parameters, and this model does not"
            " import numpy"
        )
    params = {
        p.name.value
        for name in functions
        if name in index.functions
        for p in index.functions[name].params.params
    }
    declared: dict[str, tuple[Dim, ...]] = {}
    for name, dims in shapes.items():
        if name not in params:
            raise GradwrightError.usage(
                f"a shape is declared for '{name}', which is no parameter of "
                + ", ".join(functions)
            )
        for d in dims:
            valid = (isinstance(d, int) and d >= 0) or (
                isinstance(d, str) and d.isidentifier()
            )
            if not valid or isinstance(d, bool):
                raise GradwrightError.usage(
                    f"the shape of '{name}': {d!r} is neither a size nor a name"
                )
        declared[name] = tuple(dims)
    return dict(sorted(declared.items()))


#: generation recurses over expression trees as deep as the source's; a one-line
#: sum of thousands of terms, which CPython compiles, needs this much
_RECURSION_LIMIT = 100_000
_STACK_BYTES = 512 * 1024 * 1024


def _with_deep_stack(work: Callable[[], str]) -> str:
    """Run ``work`` in a thread with a large stack and recursion limit (common
    practice for recursive compilers in Python), re-raising what it raises."""
    outcome: list = []

    def run() -> None:
        try:
            outcome.append((True, work()))
        except BaseException as error:  # handed to the caller unchanged
            outcome.append((False, error))

    limit = sys.getrecursionlimit()
    size = threading.stack_size(_STACK_BYTES)
    sys.setrecursionlimit(max(limit, _RECURSION_LIMIT))
    try:
        thread = threading.Thread(target=run, name="gradwright-generate")
        thread.start()
        thread.join()
    finally:
        threading.stack_size(size)
        sys.setrecursionlimit(limit)
    ok, value = outcome[0]
    if not ok:
        raise value
    return value


@contextmanager
def _collector_paused() -> Iterator[None]:
    """Pause the cyclic garbage collector while generating (common practice for
    compilers): the syntax trees are large and acyclic, and full collections over
    them made generation time grow faster than the input."""
    was_enabled = gc.isenabled()
    gc.disable()
    try:
        yield
    finally:
        if was_enabled:
            gc.enable()


def _shape_table(
    index: ModuleIndex,
    ssa: SSAFunction,
    declared: Mapping[str, tuple[Dim, ...]],
    calls: CallShapes | None,
) -> ShapeTable:
    return ShapeTable(
        ssa.params,
        ssa.body,
        declared,
        index.constants,
        data_shapes(index),
        index.numpy_modules,
        calls.result if calls is not None else None,
    )


def data_shapes(index: ModuleIndex) -> dict[str, tuple[Dim, ...]]:
    """Module-level arrays bound once to a constructor of literal sizes
    (``MASSES = np.array([1.0, 0.8])``): their shapes, read from the text."""
    binders: dict[str, list[str]] = {}
    for statement in index.statements:
        for name in statement.binds:
            binders.setdefault(name, []).append(statement.text)
    shapes: dict[str, tuple[Dim, ...]] = {}
    for name in sorted(index.data_names):
        texts = binders.get(name, [])
        if len(texts) == 1:
            shape = literal_shape(texts[0], index.numpy_modules)
            if isinstance(shape, tuple):
                shapes[name] = shape
    return shapes
