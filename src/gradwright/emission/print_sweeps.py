"""Printing the laid-out sweeps: indented lines under comments quoting the source.

``lay_out`` is the entry point: it builds the :class:`~gradwright.layout.Layout` of
a function and prints its forward sweep (``forward_lines``: the stored values, with
what each loop saves for its reverse) and its reverse sweep (``reverse_lines``:
restores, recomputations and adjoint statements), gives the expressions the function
returns, and has the layout check confirm every name the lines read.
"""

from __future__ import annotations

from gradwright.emission.formatting import format_statement
from gradwright.emission.forward_lines import ForwardLines
from gradwright.emission.layout import Layout
from gradwright.emission.layout_check import Violation, check
from gradwright.emission.naming import Namer
from gradwright.emission.printer import Printer
from gradwright.emission.reverse_lines import ReverseLines
from gradwright.ir import (
    Const,
    Expr,
    ReverseSweep,
    SSAFunction,
    Var,
)


class _Emitter(ForwardLines, ReverseLines):
    """Prints the sweeps of a :class:`Layout`."""


def lay_out(
    function: SSAFunction,
    sweep: ReverseSweep,
    namer: Namer,
    printer: Printer,
    active: set[Var],
    reverse_printer: Printer | None = None,
    share_names: bool = True,
    records: bool = True,
) -> tuple[list[str], list[str], tuple[Expr, ...]]:
    """Forward lines, reverse lines and the result expressions.

    ``reverse_printer`` prints the reverse sweep's own expressions (NumPy spellings
    in an array model); the forward sweep's always print as the source wrote them.
    """
    # an array model returns its parameters' adjoints through _gw_shaped
    shaped = reverse_printer is not None
    layout = Layout(
        function, sweep, namer, printer, active, share_names, shaped, records
    )
    layout.reverse_printer = reverse_printer or printer
    layout.numpy = (
        reverse_printer is not None and reverse_printer.where_call is not None
    )
    emitter = _Emitter(layout)
    trace = emitter.trace
    for param in function.params:
        trace.write(namer.name(param), emitter.key(param))
    for seed in sweep.seeds:
        trace.write(namer.name(seed), emitter.key(seed))
    forward = emitter.forward()
    result = [emitter.value(a) for a in function.result.values]
    with trace.capture() as reverse_events:
        reverse = emitter.reverse()
    # a returned value whose name the reverse sweep reuses is kept aside first
    trace.at(function.result.origin.text)
    for k, value in enumerate(result):
        if isinstance(value, Var) and namer.name(value) in emitter.restored:
            keep = namer.claim("value")
            forward.append(f"    # {function.result.origin.text}")
            forward.append(format_statement(f"{keep} = {namer.name(value)}", 1))
            trace.read(namer.name(value), emitter.key(value))
            trace.write(keep, emitter.key(value))
            result[k] = Const(keep, None)
            reverse_events.append(("read", keep, emitter.key(value), "the result"))
        else:
            with trace.capture() as reads:
                emitter.reads(value)
            reverse_events.extend(reads)
    trace.extend(reverse_events)
    trace.at("the gradient returned")
    for var in sweep.wrt:
        trace.read(namer.bar_name(var), emitter.bar_key(var))
    violations = check(trace)
    if violations:
        raise LayoutError(function.name, violations)
    return forward, reverse, tuple(result)


class LayoutError(Exception):
    """The printed sweeps would read a name that does not hold its value."""

    def __init__(self, function: str, violations: list[Violation]) -> None:
        self.function = function
        self.violations = violations
        details = "; ".join(v.describe() for v in violations[:3])
        super().__init__(f"layout check failed in '{function}': {details}")
