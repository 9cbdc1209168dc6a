"""Array shapes across the calls between a model's functions.

A helper's result shape at a call is worked out from the helper's own body with
the call's argument shapes as its parameters' (nothing is executed), so the
caller's reverse sweep knows the shape of the seed it passes and of the adjoints
it gets back. When every call of a helper passes arguments of one known set of
shapes, the helper's adjoint is written for those shapes, like a target with
declared shapes, and checks them when called (``_gw_check_shapes``): called with
others, it refuses rather than return a wrong gradient.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator, Mapping

from gradwright.ir import Branch, Let, Loop, SSAFunction, Stmt
from gradwright.sweeps.shape_algebra import Dim, Shape
from gradwright.sweeps.shapes import ShapeTable, is_static

#: the table of one function from its parameters' declared shapes, given a way to
#: find call results
TableMaker = Callable[
    [SSAFunction, Mapping[str, tuple[Dim, ...]], "CallShapes"], ShapeTable
]
Declared = dict[str, tuple[Dim, ...]]


class CallShapes:
    """Result shapes of calls and the shapes each helper is written for.

    ``functions``: every function compiled, by name; ``targets``: the targets'
    declared shapes (helpers have none of their own)."""

    def __init__(
        self,
        functions: Mapping[str, SSAFunction],
        targets: Mapping[str, Declared],
        make_table: TableMaker,
    ) -> None:
        self.functions = functions
        self.targets = targets
        self.make_table = make_table
        self._results: dict[tuple[str, tuple[Shape, ...]], Shape | None] = {}
        self._tables: dict[str, ShapeTable] = {}
        self._declared: dict[str, Declared | None] = {}

    def result(self, callee: str, shapes: tuple[Shape, ...]) -> Shape | None:
        """The shape ``callee`` returns for arguments of ``shapes`` (None: not
        known, or not one array or number)."""
        key = (callee, shapes)
        if key not in self._results:
            self._results[key] = None  # (no cycles: rejected before)
            ssa = self.functions.get(callee)
            if (
                ssa is not None
                and not ssa.result.is_tuple
                and len(shapes) == len(ssa.params)
                and all(is_static(s) for s in shapes)
            ):
                declared = {p.base: s for p, s in zip(ssa.params, shapes, strict=True)}
                table = self.make_table(ssa, declared, self)  # type: ignore[arg-type]
                found = table.atom(ssa.result.values[0])
                self._results[key] = found if is_static(found) else None
        return self._results[key]

    def declared(self, name: str) -> Declared | None:
        """The shapes every call of helper ``name`` passes, when they are one
        known set (a target's declared shapes as given)."""
        if name in self.targets:
            return dict(self.targets[name])
        if name not in self._declared:
            self._declared[name] = None
            self._declared[name] = self._one_signature(name)
        return self._declared[name]

    def called_with(self, name: str) -> Declared | None:
        """The shapes helper ``name``'s adjoint is written for: those every call
        passes (none for a target also called as a helper: its calls may pass
        other shapes than its declared ones)."""
        return None if name in self.targets else self.declared(name)

    def table(self, name: str) -> ShapeTable:
        """The shape table of function ``name``, as its sweep will see it."""
        if name not in self._tables:
            ssa = self.functions[name]
            self._tables[name] = self.make_table(ssa, self.declared(name) or {}, self)
        return self._tables[name]

    def _one_signature(self, name: str) -> Declared | None:
        params = self.functions[name].params
        signature: tuple[Shape, ...] | None = None
        callers = [f for f, ssa in self.functions.items() if name in ssa.callees]
        called = {c for ssa in self.functions.values() for c in ssa.callees}
        for caller in callers:
            if caller in self.targets and caller in called:
                # its calls run at its declared shapes and, in its general
                # adjoint, at whatever its own callers pass
                return None
            table = self.table(caller)
            for let in _calls(self.functions[caller].body, f"call:{name}"):
                shapes = tuple(table.atom(a) for a in let.args)
                if len(shapes) != len(params) or not all(map(is_static, shapes)):
                    return None
                if signature is not None and shapes != signature:
                    return None
                signature = shapes
        if signature is None:
            return None
        return {p.base: s for p, s in zip(params, signature, strict=True)}  # type: ignore[misc]


def _calls(body: tuple[Stmt, ...], op: str) -> Iterator[Let]:
    for stmt in body:
        if isinstance(stmt, Let):
            if stmt.op == op:
                yield stmt
        elif isinstance(stmt, Branch):
            yield from _calls(stmt.then, op)
            yield from _calls(stmt.orelse, op)
        elif isinstance(stmt, Loop):
            yield from _calls(stmt.body, op)
