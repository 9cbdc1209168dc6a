"""Lowering a checked function to straight-line SSA.

One primitive per :class:`~gradwright.ir.Let`, every value named once. Re-binding a
source name makes a new value; tuple assignment evaluates every right-hand side
before binding (``a, b = b, a * b`` reads the old ``a``). Unsupported constructs are
rejected here, where they are met, with a located diagnostic.
"""

from __future__ import annotations

import itertools

import libcst as cst

from gradwright.diagnostics import GradwrightError, fail
from gradwright.ir import (
    Atom,
    Const,
    Let,
    Origin,
    Return,
    SSAFunction,
    Stmt,
    Var,
)
from gradwright.lowering.assignments import AssignmentLowering
from gradwright.lowering.base import (
    _RESULT,
    _TRUTH_OPS,
    _VIEWS,
    IN_PLACE,
    BlockMark,
    _ListParameter,
    _Unbound,
)
from gradwright.lowering.calls import CallLowering
from gradwright.lowering.common_values import share_common_values
from gradwright.lowering.comprehensions import ComprehensionLowering
from gradwright.lowering.dicts import DictLowering
from gradwright.lowering.expressions import ExpressionLowering
from gradwright.lowering.frontend import (
    CheckedFunction,
    ModuleIndex,
)
from gradwright.lowering.inactive import InactiveLowering
from gradwright.lowering.loops import LoopLowering
from gradwright.lowering.numpy_calls import NumpyLowering
from gradwright.lowering.statements import StatementLowering
from gradwright.lowering.syntax import (
    _assigned_names,
    _block_statements,
    _is_docstring,
)


def _is_list_call(node: cst.BaseExpression) -> bool:
    """``list(...)``, ``tuple(...)``: a new list."""
    return (
        isinstance(node, cst.Call)
        and isinstance(node.func, cst.Name)
        and node.func.value in ("list", "tuple")
        and len(node.args) == 1
    )


class _Lowerer(
    StatementLowering,
    LoopLowering,
    ComprehensionLowering,
    AssignmentLowering,
    ExpressionLowering,
    CallLowering,
    NumpyLowering,
    InactiveLowering,
    DictLowering,
):
    """The lowering of one function; each kind of construct is lowered by one of
    the mixins it is made of, over the state held here."""

    def __init__(
        self,
        index: ModuleIndex,
        function: CheckedFunction,
        call_stack: tuple[str, ...],
        list_params: frozenset[str] = frozenset(),
    ) -> None:
        self.index = index
        #: parameters used as lists (found while lowering, see _ListParameter)
        self.list_params = list_params
        self.function = function
        self.call_stack = call_stack + (function.name,)
        self.uids = itertools.count()
        self.blocks: list[list[Stmt]] = [[]]
        self.env: dict[str, Atom | _Unbound] = {}
        self.local_names: frozenset[str] = frozenset()
        self.constants_read: dict[str, None] = {}
        self.callees: dict[str, None] = {}
        #: helpers lowered on their own, for their shapes (see CallLowering)
        self.callee_ssas: dict[str, SSAFunction] = {}
        #: the tuples and lists helper calls return
        self.helper_results: set[Var] = set()
        self.origin = Origin("", 0)
        self.statement_count = itertools.count()
        self.loop_depth = 0
        self.numpy = bool(index.numpy_modules)
        #: values known to be arrays of their own (see is_fresh)
        self.fresh: set[Var] = set()
        #: values that are truth values (results of comparisons and logic)
        self.truth_values: set[Var] = set()
        #: errors met so far (the lowering goes on to report them all)
        self.errors: list[GradwrightError] = []
        #: how many elements each list made by a literal has
        self.literal_sizes: dict[Var, int] = {}
        #: the list object each list value is a version of
        self.list_root: dict[Var, Var] = {}
        #: `y = x` copies, to find the parameter behind a name used as a list
        self.copy_of: dict[Var, Atom] = {}
        self.result_arity: int | None = None
        self.return_origins: list[Origin] = []
        #: values that can never be active (see ExpressionLowering.is_inert)
        self.inert_values: set[Var] = set()
        #: values bound by statements copied as written (see lowering/inactive.py)
        self.opaque: set[Var] = set()
        #: opaque values bound to a list or tuple literal (tables of rows)
        self.opaque_sequences: set[Var] = set()
        #: opaque values surely arrays of their own: a copied `name op= ...` on
        #: one changes nothing else
        self.copied_fresh: set[Var] = set()
        #: elements of module data (a table's row, ``for row in TABLE``): indexed
        #: again as data (``row[0]``), never active
        self.data_items: set[Var] = set()
        #: dicts of numbers (lists in the SSA): their keys, where each was made,
        #: and the copied table of positions for keys known only at run time
        self.dict_keys: dict[Var, tuple[str, ...]] = {}
        self.dict_made: dict[Var, tuple[list, Stmt]] = {}
        self.positions: dict[Var, Var] = {}
        #: statements put in the middle of an open block (a dict's table of
        #: positions), for ``rewind_blocks`` to take out again
        self.inserted: list[tuple[list[Stmt], Stmt]] = []

    # -- undoing a rejected statement ---------------------------------------------

    def mark_blocks(self) -> BlockMark:
        """Where the open blocks end now: a rejected statement's lowering rewinds
        to it. Lengths, not copies: copying every block before each statement
        made lowering quadratic in the length of the function."""
        ends = [(block, len(block)) for block in self.blocks]
        return ends, len(self.inserted), frozenset(self.positions)

    def rewind_blocks(self, mark: BlockMark) -> None:
        """The open blocks as they were at ``mark`` (and the dicts' tables of
        positions: one made by the rejected statement is gone with it)."""
        ends, inserted, positions = mark
        for root in set(self.positions) - positions:
            del self.positions[root]
        for block, stmt in reversed(self.inserted[inserted:]):
            del block[next(k for k, s in enumerate(block) if s is stmt)]
        del self.inserted[inserted:]
        for block, length in ends:
            del block[length:]
        self.blocks[:] = [block for block, _ in ends]

    # -- values -------------------------------------------------------------------

    def new_var(self, base: str, kind: str, shape: str = "scalar") -> Var:
        return Var(next(self.uids), base, kind, shape)  # type: ignore[arg-type]

    def emit(self, op: str, args: tuple[Atom, ...], target: Var) -> Var:
        self.blocks[-1].append(Let(target, op, args, self.origin))
        if op in _TRUTH_OPS:
            self.truth_values.add(target)
        if op == "listlit":
            self.literal_sizes[target] = len(args)
        if target.shape == "list":
            # every version of a list made by element writes is one list object
            self.list_root[target] = (
                self.root_of(args[0]) if op in IN_PLACE else target  # type: ignore[arg-type]
            )
        # (a name bound to a number, `cost = 0.0`, holds no array another shares)
        number = (
            op == "copy" and isinstance(args[0], Const) and args[0].value is not None
        )
        if op not in _VIEWS or number:
            self.fresh.add(target)
        elif args and isinstance(args[0], Var):
            # `alias = cost` (or a view of it): two names now hold one array, so
            # a later `cost += ...` would change `alias` too
            self.fresh.discard(args[0])
        if op == "copy":
            self.copy_of[target] = args[0]
        if op == "dataitem" or (op == "copy" and args[0] in self.data_items):
            self.data_items.add(target)
        self.note_inert(op, args, target)
        return target

    def root_of(self, var: Var) -> Var:
        return self.list_root.get(var, var)

    def is_fresh(self, atom: Atom) -> bool:
        """Whether a value is an array of its own (not a parameter, another name's
        array, a slice or a view), so that ``x += ...`` changes nothing else."""
        return isinstance(atom, Const) or atom in self.fresh

    def bind_value(self, node: cst.BaseExpression, base: str) -> Var:
        """Evaluate ``node`` into a fresh local value named after ``base``."""
        target = self.new_var(base, "local", self.shape_of_expression(node))
        atom = self.expr(node, base, target)
        if isinstance(atom, Var) and atom.shape == "list" and target.shape == "list":
            if self.root_of(atom) == target:
                return atom  # the list itself, after the writes that filled it
        if (
            isinstance(atom, Var)
            and atom.shape == "scalar"
            and atom.kind == "local"
            and atom.base == target.base
            and atom.uid > target.uid
        ):
            return atom  # made while evaluating ``node``, under this name already
        if atom is not target:
            if isinstance(atom, Var) and atom.shape == "list":
                # a second name for the same list (`w = u`, `u, v = v, u`): changing
                # it through one name while the other is read is refused there
                # (AssignmentLowering.check_one_name)
                return atom
            self.emit("copy", (atom,), target)
        return target

    def shape_of_expression(self, node: cst.BaseExpression) -> str:
        if isinstance(node, (cst.List, cst.ListComp, cst.Tuple, cst.Dict)):
            return "list"
        if _is_list_call(node) or self.returns_list(node):
            return "list"
        if (
            isinstance(node, cst.Subscript)
            and not self.numpy
            and isinstance(node.slice[0].slice, cst.Slice)
        ):
            return "list"  # xs[1:]: a new list
        if (
            isinstance(node, cst.Call)
            and not self.numpy
            and isinstance(node.func, cst.Attribute)
            and node.func.attr.value == "copy"
        ):
            return "list"  # v.copy()
        if isinstance(node, cst.BinaryOperation) and isinstance(
            node.operator, cst.Multiply
        ):
            if isinstance(node.left, cst.List) or isinstance(node.right, cst.List):
                return "list"
        return "scalar"

    def as_list(self, atom: Atom) -> None:
        """A parameter first seen as a number turns out to be used as a list."""
        while isinstance(atom, Var) and atom in self.copy_of:
            atom = self.copy_of[atom]  # `y = x` then `y[0]`: x is the list
        if isinstance(atom, Var) and atom.kind == "param" and atom.shape == "scalar":
            if not self.numpy:
                raise _ListParameter(atom.base)

    def scalar(self, atom: Atom, node: cst.CSTNode) -> Atom:
        if isinstance(atom, Var) and atom in self.helper_results:
            size = self.literal_sizes.get(atom)
            what = f"a tuple of {size} numbers" if size else "a list"
            fail(
                f"'{atom.base}' returns {what}, not a number",
                self.index.locate(node),
                (
                    f"unpack it: {', '.join(f'v{k}' for k in range(size))} = ..."
                    if size
                    else "bind it to a name and index it"
                ),
            )
        if isinstance(atom, Var) and atom.shape == "list":
            fail(
                f"'{atom.base}' is a list, not a number",
                self.index.locate(node),
                f"index it: {atom.base}[i]",
            )
        return atom

    def set_origin(self, text: str) -> None:
        self.origin = Origin(text, next(self.statement_count))

    # -- the function ---------------------------------------------------------------

    def lower(self) -> SSAFunction:
        node = self.function.node
        lists = self.list_params
        params = tuple(
            self.new_var(name, "param", "list" if name in lists else "scalar")
            for name in self.function.params
        )
        for param in params:
            self.env[param.base] = param
        statements = _block_statements(node.body)
        if statements and _is_docstring(statements[0]):
            statements = statements[1:]
        self.local_names = frozenset(_assigned_names(statements))
        returned = self.sequence(statements)
        if self.errors:
            raise GradwrightError.several(self.errors)
        if not returned:
            if self.result_arity is None:
                fail(
                    f"'{self.function.name}' has no return statement: there is no"
                    " result to differentiate",
                    self.index.locate(node.name),
                    "end the function with `return <expression>`",
                )
            fail(
                f"'{self.function.name}' can reach its end without returning",
                self.index.locate(node.name),
                "end the function with a return statement",
            )
        assert self.result_arity is not None
        values = tuple(self.env[f"{_RESULT}{i}"] for i in range(abs(self.result_arity)))
        origin = (
            self.return_origins[0]
            if len(self.return_origins) == 1
            else Origin("the result", next(self.statement_count))
        )
        result = Return(values, origin, self.result_arity < 0)  # type: ignore[arg-type]
        return SSAFunction(
            self.function.name,
            params,
            tuple(self.blocks[0]),
            result,
            frozenset(self.local_names),
            tuple(self.constants_read),
            tuple(self.callees),
            tuple(
                sorted(
                    (v, self.literal_sizes[v])
                    for v in self.helper_results
                    if v in self.literal_sizes
                )
            ),
        )


def lower(
    index: ModuleIndex, function: CheckedFunction, call_stack: tuple[str, ...] = ()
) -> SSAFunction:
    """``call_stack``: the callers being lowered, to reject recursion where it is."""
    lists: frozenset[str] = frozenset()
    while True:
        try:
            lowered = _Lowerer(index, function, call_stack, lists).lower()
            return share_common_values(lowered)
        except _ListParameter as found:
            # lowered again with that parameter a list (once per list parameter)
            lists |= {found.name}
