"""The public entry points: source text in, generated module text out."""

from __future__ import annotations

import gc
import sys
import threading
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager

import libcst as cst

from gradwright.calculus.rules import ELEMENTWISE_OPS
from gradwright.diagnostics import GradwrightError, fail, file_location
from gradwright.emission.module import Compiled, render_module
from gradwright.emission.targets import DEFAULT_TARGET, get_target
from gradwright.header import regeneration_command, stamp
from gradwright.ir import Expr, SSAFunction, Var, const
from gradwright.lowering.frontend import (
    CheckedFunction,
    ModuleIndex,
    check_function,
    parse_module,
)
from gradwright.lowering.ssa import lower
from gradwright.sweeps.optimize import inline_adjoints, reuse_forward_values
from gradwright.sweeps.reverse import (
    active_values,
    defined_in,
    reverse_sweep,
    walk_lets,
)


def compile_function(
    index: ModuleIndex,
    name: str,
    wrt: tuple[str, ...] | None,
    call_stack: tuple[str, ...] = (),
) -> Compiled:
    checked = check_function(index, name, wrt)
    ssa = lower(index, checked, call_stack)
    seeds: tuple[Expr, ...] = (const(1.0),)
    if ssa.result.is_tuple:
        first = 1 + max(_uids(ssa))
        seeds = tuple(
            Var(first + k, f"seed_{k}", "param") for k in range(len(ssa.result.values))
        )
    # a helper's partials stay at the broadcast shape of its result: each call
    # site sums them back to its own operands' shapes
    broadcasting = bool(index.numpy_modules) and not call_stack
    sweep = reverse_sweep(ssa, checked.wrt, seeds, numpy=broadcasting)
    if len(sweep.unused_wrt) == len(sweep.wrt) and not call_stack:
        fail(
            f"the result of '{name}' does not depend differentiably on "
            + ", ".join(checked.wrt)
            + " (it is constant or integer-valued in them)",
            index.locate(_return_statement(checked)),
            "choose --wrt parameters the result varies with smoothly",
        )
    active = frozenset(active_values(ssa, checked.wrt))
    sweep = reuse_forward_values(inline_adjoints(sweep), ssa)
    return Compiled(checked, ssa, sweep, active)


def compile_with_callees(
    index: ModuleIndex, names: Sequence[str], wrt: tuple[str, ...] | None
) -> list[Compiled]:
    """The targets, then every function they call (each once), differentiated in
    all their parameters so any call site can use the partials it needs."""
    compiled = [compile_function(index, name, wrt) for name in names]
    done = set(names)
    pending = [(c.ssa.name, callee) for c in compiled for callee in c.ssa.callees]
    stacks = {c.ssa.name: (c.ssa.name,) for c in compiled}
    while pending:
        caller, callee = pending.pop(0)
        if callee in done:
            continue
        done.add(callee)
        item = compile_function(index, callee, None, stacks[caller])
        if item.ssa.result.is_tuple:
            fail(
                f"'{callee}' returns a tuple: helpers called by the model must return"
                " one number",
                file_location(index.path),
            )
        stacks[callee] = stacks[caller] + (callee,)
        compiled.append(item)
        pending += [(callee, c) for c in item.ssa.callees]
    _reject_cycles(index, compiled)
    _reject_list_helpers(index, compiled, set(names))
    if index.numpy_modules:
        _reject_array_helpers(index, compiled, set(names))
    return compiled


#: primitives on truth values and copies, elementwise on arrays too
_ELEMENTWISE_EXTRA = frozenset(
    {"lt", "le", "gt", "ge", "eq", "ne", "and", "or", "not", "copy"}
)


def _reject_array_helpers(
    index: ModuleIndex, compiled: list[Compiled], targets: set[str]
) -> None:
    """In an array model, a helper's partials are exact only when the helper works
    element by element; a call to any other helper is a located error (its
    reverse would need the helper's vector-Jacobian product, not partials). A
    listed function's gradient sums over broadcasting, so it cannot serve as a
    helper's partials either."""
    by_name = {c.ssa.name: c for c in compiled}
    verdicts: dict[str, bool] = {}

    def elementwise(name: str) -> bool:
        if name not in verdicts:
            verdicts[name] = False  # no recursion reaches here (rejected before)
            ops = {let.op for let in walk_lets(by_name[name].ssa.body)}
            verdicts[name] = all(
                op in ELEMENTWISE_OPS
                or op in _ELEMENTWISE_EXTRA
                or (op.startswith("call:") and elementwise(op.removeprefix("call:")))
                for op in ops
            )
        return verdicts[name]

    for item in compiled:
        for callee in item.ssa.callees:
            if callee in targets:
                fail(
                    f"'{callee}' is both differentiated on its own and called by"
                    f" '{item.ssa.name}': in an array model its gradient cannot also"
                    " serve the call",
                    index.locate(_first_call(item.checked, callee)),
                    f"generate '{callee}' in a run of its own",
                )
            if not elementwise(callee):
                fail(
                    f"'{callee}' does not work element by element (it reduces,"
                    " indexes or multiplies matrices), so its partial derivatives"
                    " cannot stand for its derivative in an array model",
                    index.locate(_first_call(item.checked, callee)),
                    f"write the body of '{callee}' into '{item.ssa.name}' where it"
                    " is called",
                )


def _reject_list_helpers(
    index: ModuleIndex, compiled: list[Compiled], targets: set[str]
) -> None:
    """A helper found to take a list (however it uses it) cannot be called: its
    partials are numbers, one per parameter. (The call site's own check reads the
    helper's syntax; this one reads what its lowering found.)"""
    lists = {
        c.ssa.name: [p.base for p in c.ssa.params if p.shape == "list"]
        for c in compiled
        if c.ssa.name not in targets
    }
    for item in compiled:
        for callee in item.ssa.callees:
            if lists.get(callee):
                fail(
                    f"'{callee}' takes a list ('{lists[callee][0]}'): passing lists"
                    " to helper functions is not supported",
                    index.locate(_first_call(item.checked, callee)),
                    "write the helper's loop into the caller, or pass the numbers",
                )


def _first_call(checked: CheckedFunction, callee: str) -> cst.CSTNode:
    found: list[cst.CSTNode] = []

    class Calls(cst.CSTVisitor):
        def visit_Call(self, node: cst.Call) -> None:
            if isinstance(node.func, cst.Name) and node.func.value == callee:
                found.append(node)

    checked.node.visit(Calls())
    return found[0] if found else checked.node.name


def _reject_cycles(index: ModuleIndex, compiled: list[Compiled]) -> None:
    """Recursion through functions that are all targets: lowering one along the
    cycle's path raises the located error at its call site."""
    calls = {c.ssa.name: c.ssa.callees for c in compiled}

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
) -> str:
    """Generate the gradient module for ``functions`` of the model ``source``.

    ``wrt`` names the parameters to differentiate with respect to (default: all of
    each function's parameters). ``path`` and ``output`` only label the header.
    ``target`` is the interpreter the module must run on: ``"cpython"`` (default)
    or ``"micropython"`` (stand-ins for the ``math`` functions MicroPython lacks);
    another name raises ValueError.
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
        compiled = compile_with_callees(index, functions, wanted)
        command = regeneration_command(path, functions, wrt, output, target)
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
