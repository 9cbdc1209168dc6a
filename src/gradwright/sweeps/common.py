"""Each value the reverse sweep reads computed once.

Two mechanisms, both exact: they change which name holds a value, never how it is
computed.

- Value numbering of the forward SSA. Two ``Let``s applying one primitive to the
  same values compute the same float (``q1 + q2`` in two statements; ``u[i]`` read
  twice from one version of a list). Within one block, or in a block and a block it
  encloses (from before the inner block starts), the later one is the earlier one:
  the reverse sweep reads the first, and a rule that recomputes a forward value
  (``cos(x)`` in the rule for ``sin(x)`` when the model takes ``cos(x)``) reads it,
  inside loops and branch sides too.
- Shared subexpressions of the reverse sweep. A math call or power that one block
  of the reverse sweep evaluates twice on forward values (atan2's rule divides by
  ``hypot(x, y)`` twice in each of its two contributions) becomes one forward value:
  a ``Let`` added to the forward block the reverse block mirrors, so the layout
  stores, saves or recomputes it like any other value. Only occurrences that the
  reverse sweep always evaluates count (not a side of a conditional expression,
  which may guard a domain error), so computing the value in the forward sweep
  raises nowhere the reverse would not.
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Iterable, Iterator
from dataclasses import replace

from gradwright.calculus.algebra import simplify
from gradwright.calculus.primitives import OPS
from gradwright.ir import (
    AdjointAssign,
    Apply,
    Atom,
    Bar,
    Branch,
    CallAdjoint,
    Const,
    ElementAdjoint,
    Expr,
    Let,
    Loop,
    Origin,
    Phi,
    PopAdjoint,
    ReverseBranch,
    ReverseLoop,
    ReverseStmt,
    ReverseSweep,
    SpreadAdjoint,
    SSAFunction,
    Stmt,
    Var,
    walk,
)
from gradwright.sweeps.optimize import (
    all_statements,
    change_expr,
    map_sweep,
    sweep_exprs,
)
from gradwright.sweeps.reverse import defined_in, walk_lets, walk_loops

Table = dict[Apply, Var]
#: a block of the forward SSA: None for the function body, the loop, or a side
Scope = object

_TOP = "body"


_ARITHMETIC = frozenset(
    {"add", "sub", "mul", "div", "floordiv", "mod", "neg", "pos", "len", "copy"}
    | {"lt", "le", "gt", "ge", "eq", "ne", "and", "or", "not"}
)


def _numbered(let: Let) -> bool:
    return (
        let.target.shape == "scalar"
        and not let.op.startswith("call:")
        and let.op not in ("setitem", "newlist", "listlit")
        # a statement copied as written binds values of its own, whatever it read
        and let.op not in ("copied", "written")
    )


class ValueNumbers:
    """Which forward values are another's, and what each block has computed."""

    def __init__(self, function: SSAFunction) -> None:
        #: a later value -> the earlier one it equals
        self.same: dict[Var, Var] = {}
        #: those the reverse sweep reads as the earlier one: not arithmetic, which
        #: is as cheap to recompute as to read (and keeps its own, clearer name)
        self.read_first: dict[Var, Var] = {}
        #: per block (``_TOP``, a loop's id, ``(branch id, side)``): every value
        #: computed in it or before it in the blocks enclosing it, by expression
        self.tables: dict[object, Table] = {}
        self._block(function.body, {}, _TOP)

    def canon(self, atom: Atom) -> Atom:
        return self.same.get(atom, atom) if isinstance(atom, Var) else atom

    def _block(self, statements: tuple[Stmt, ...], table: Table, key: object) -> None:
        for stmt in statements:
            if isinstance(stmt, Let):
                if not _numbered(stmt):
                    continue
                expr = Apply(stmt.op, tuple(self.canon(a) for a in stmt.args))
                known = table.get(expr)
                if known is not None:
                    self.same[stmt.target] = known
                    if stmt.op not in _ARITHMETIC:
                        self.read_first[stmt.target] = known
                    continue
                table[expr] = stmt.target
                if stmt.op in ("add", "mul"):
                    # a*b and b*a are the same float (IEEE + and * commute)
                    table.setdefault(Apply(stmt.op, expr.args[::-1]), stmt.target)
            elif isinstance(stmt, Branch):
                self._block(stmt.then, dict(table), (id(stmt), 0))
                self._block(stmt.orelse, dict(table), (id(stmt), 1))
            else:
                self._block(stmt.body, dict(table), id(stmt))
        self.tables[key] = table

    def change(self, expr: Expr, table: Table) -> Expr:
        """``expr`` reading forward values where it recomputes them."""
        if isinstance(expr, Var):
            return self.read_first.get(expr, expr)
        if isinstance(expr, Apply):
            node = Apply(expr.op, tuple(self.change(a, table) for a in expr.args))
            if any(isinstance(a, (Apply, Bar)) for a in node.args):
                return node  # the forward values are primitives on atoms
            known = table.get(Apply(node.op, tuple(self.canon(a) for a in node.args)))
            return node if known is None else known
        return expr


def reuse_values(
    sweep: ReverseSweep, function: SSAFunction, share: bool
) -> tuple[ReverseSweep, SSAFunction]:
    """The reverse sweep reading forward values instead of recomputing them, and
    (``share``) with its repeated calls made forward values of their own."""
    numbers = ValueNumbers(function)

    def block(statements: tuple[ReverseStmt, ...], key: object) -> tuple:
        table = numbers.tables.get(key, {})
        out: list[ReverseStmt] = []
        for stmt in statements:
            if isinstance(stmt, ReverseBranch):
                sides = (stmt.then, stmt.orelse)
                if stmt.branch is not None:
                    keys: tuple[object, object] = (
                        (id(stmt.branch), 0),
                        (id(stmt.branch), 1),
                    )
                else:
                    keys = (key, key)
                out.append(
                    replace(
                        stmt,
                        then=block(sides[0], keys[0]),
                        orelse=block(sides[1], keys[1]),
                    )
                )
            elif isinstance(stmt, ReverseLoop):
                inner = id(stmt.loop) if id(stmt.loop) in numbers.tables else key
                out.append(replace(stmt, body=block(stmt.body, inner)))
            else:
                out.append(
                    change_expr(stmt, lambda e: simplify(numbers.change(e, table)))
                )
        return tuple(out)

    sweep = replace(sweep, statements=block(sweep.statements, _TOP))
    sweep = float_entries(sweep, function)
    if not share:
        return sweep, function
    return _Sharing(sweep, function).run()


#: primitives whose result is an int for int operands (or always, the first group)
_INT_RESULTS = frozenset({"sum", "len", "int", "round", "floor", "ceil", "trunc"})
# (``pow``: an int to a non-negative int power is an int)
_INT_PRESERVING = frozenset(
    {"add", "sub", "mul", "floordiv", "mod", "neg", "pos", "copy", "abs", "max", "min"}
    | {"pow"}
)


def _merges(statements: Iterable[Stmt]) -> Iterator[Phi]:
    for stmt in statements:
        if isinstance(stmt, Branch):
            yield from _merges(stmt.then)
            yield from _merges(stmt.orelse)
            yield from stmt.merges
        elif isinstance(stmt, Loop):
            yield from stmt.carried
            yield from _merges(stmt.body)


def float_entries(sweep: ReverseSweep, function: SSAFunction) -> ReverseSweep:
    """An adjoint made only of values that may be ints (``x *= sum(zs)`` with an
    empty ``zs``: ``x_bar = x_1`` once the seed's ``1.0 *`` is folded) is made a
    float, as the seed would have made it. Run again after the kinks branch:
    a side of ``y if c else sum(zs)`` is ``sum(zs)`` alone."""
    # a range bound is an int (``return y * n`` after ``for k in range(n)``)
    maybe_int: set[Var] = {
        bound
        for loop in walk_loops(function.body)
        for bound in loop.bounds
        if isinstance(bound, Var)
    }

    def int_atom(a: object) -> bool:
        return (isinstance(a, Var) and (a in maybe_int or a.kind == "index")) or (
            isinstance(a, Const) and isinstance(a.value, int)
        )

    lets = list(walk_lets(function.body))
    merges = list(_merges(function.body))
    # lists the function makes that may hold an int (``buf[0] = sum(zs)``)
    int_lists: set[Var] = set()
    size = -1
    while size != len(maybe_int) + len(int_lists):  # a merge may see one later
        size = len(maybe_int) + len(int_lists)
        for let in lets:
            ints = all(int_atom(a) for a in let.args)
            stored = _stored(let)
            if stored is not None:
                if (
                    let.args
                    and let.args[0] in int_lists
                    or any(int_atom(a) for a in stored)
                ):
                    int_lists.add(let.target)
            elif let.op == "getitem" and let.args[0] in int_lists:
                maybe_int.add(let.target)
            elif let.op in _INT_RESULTS or let.op == "dataitem":
                maybe_int.add(let.target)
            elif (let.op in _INT_PRESERVING or let.op.startswith("call:")) and ints:
                maybe_int.add(let.target)  # a helper may hand an int argument back
            elif let.op == "ifexp" and any(int_atom(a) for a in let.args):
                maybe_int.add(let.target)  # an int on one side
        for phi in merges:  # either side's value (``y if c else sum(zs)``)
            if phi.first in int_lists or phi.second in int_lists:
                int_lists.add(phi.target)
                if phi.exit is not None:
                    int_lists.add(phi.exit)
            if int_atom(phi.first) or int_atom(phi.second):
                maybe_int.add(phi.target)
                if phi.exit is not None:
                    maybe_int.add(phi.exit)

    def int_valued(expr: Expr) -> bool:
        if isinstance(expr, Var):
            return expr in maybe_int or expr.kind == "index"
        if isinstance(expr, Const):
            return isinstance(expr.value, int)
        if isinstance(expr, Apply) and expr.op in _INT_PRESERVING:
            return all(int_valued(a) for a in expr.args)
        return False

    if not maybe_int:
        return sweep
    return map_sweep(sweep, lambda e: Apply("float", (e,)) if int_valued(e) else e)


def _stored(let: Let) -> tuple[Atom, ...] | None:
    """The values a list operation puts in its list (None: not one)."""
    if let.op == "setitem":
        return let.args[2:]
    if let.op == "append":
        return let.args[1:]
    if let.op == "listlit":
        return let.args
    if let.op == "newlist":
        return let.args[:1]
    return None


def _costly(expr: Expr) -> bool:
    """A math call or a power on forward values alone."""
    if not isinstance(expr, Apply):
        return False
    spec = OPS.get(expr.op)
    call = (
        spec is not None and spec.syntax == "call" and spec.symbol.startswith("math.")
    )
    if not (call or expr.op in ("pow", "math_pow")):
        return False
    return not any(isinstance(n, Bar) for n in walk(expr))


def _always_evaluated(expr: Expr) -> Iterable[Expr]:
    """The sub-expressions evaluated whenever ``expr`` is: a conditional
    expression's condition, not its sides; the left of ``and``/``or`` only."""
    stack = [expr]
    while stack:
        node = stack.pop()
        yield node
        if isinstance(node, Apply):
            if node.op == "ifexp":
                stack.append(node.args[1])
            elif node.op in ("and", "or"):
                stack.append(node.args[0])
            else:
                stack.extend(reversed(node.args))


def _replace(expr: Expr, found: dict[Expr, Var]) -> Expr:
    hit = found.get(expr)
    if hit is not None:
        return hit
    if isinstance(expr, Apply):
        return Apply(expr.op, tuple(_replace(a, found) for a in expr.args))
    return expr


class _Sharing:
    """Repeated calls of each reverse block made into forward values."""

    def __init__(self, sweep: ReverseSweep, function: SSAFunction) -> None:
        self.sweep = sweep
        self.function = function
        self.next_uid = 0  # found when the first value is added
        #: new Lets per forward block (by the id of its owner), with the index of
        #: the statement of that block each goes after
        self.added: dict[object, list[tuple[int, Let]]] = {}

    def run(self) -> tuple[ReverseSweep, SSAFunction]:
        statements = self._block(
            self.sweep.statements,
            self.function.body,
            _TOP,
            frozenset(self.function.params),
        )
        if not self.added:
            return self.sweep, self.function
        rebuilt: dict[int, Stmt] = {}
        body = self._insert(self.function.body, _TOP, rebuilt)
        function = replace(self.function, body=body)
        sweep = replace(self.sweep, statements=_relink(statements, rebuilt))
        return sweep, function

    # -- finding --------------------------------------------------------------------

    def _block(
        self,
        statements: tuple[ReverseStmt, ...],
        forward: tuple[Stmt, ...],
        key: object,
        entry: frozenset[Var],
    ) -> tuple[ReverseStmt, ...]:
        """``entry``: the values that exist when the forward block starts (a value
        of the enclosing block made after it, such as the merge of the branch whose
        side this is, does not)."""
        position, hidden = _positions(forward)

        def before(nested: Stmt) -> frozenset[Var]:
            k = next(i for i, s in enumerate(forward) if s is nested)
            return entry | {v for v, at in position.items() if at < k}

        out: list[ReverseStmt] = []
        for stmt in statements:
            if isinstance(stmt, ReverseLoop):
                loop = stmt.loop
                inner = before(loop) | {loop.index} | {p.target for p in loop.carried}
                out.append(
                    replace(
                        stmt, body=self._block(stmt.body, loop.body, id(loop), inner)
                    )
                )
            elif isinstance(stmt, ReverseBranch) and stmt.branch is not None:
                branch = stmt.branch
                inner = before(branch)
                out.append(
                    replace(
                        stmt,
                        then=self._block(
                            stmt.then, branch.then, (id(branch), 0), inner
                        ),
                        orelse=self._block(
                            stmt.orelse, branch.orelse, (id(branch), 1), inner
                        ),
                    )
                )
            else:
                out.append(stmt)
        flat = [
            s
            for s in out
            if isinstance(s, (AdjointAssign, ElementAdjoint, SpreadAdjoint))
        ]
        counts: Counter[Expr] = Counter()
        first: dict[Expr, Origin] = {}
        for stmt in flat:
            for node in _always_evaluated(stmt.expr):
                if _costly(node):
                    counts[node] += 1
                    first.setdefault(node, stmt.origin)
        found: dict[Expr, Var] = {}
        for expr, count in counts.items():
            if count < 2:
                continue
            free = {n for n in walk(expr) if isinstance(n, Var)}
            if free & hidden:
                continue  # made inside a nested block: not a value of this one
            if not free <= entry | set(position):
                continue  # made after this block (the merge of its branch)
            origin = first[expr]
            # as early as its values allow, but not before its statement's first
            # primitive (it prints under that statement's comment, and reads
            # names before the statement re-binds them)
            own = [
                k
                for k, s in enumerate(forward)
                if isinstance(s, Let) and s.origin == origin
            ]
            after = max(
                [position.get(v, -1) for v in free] + [own[0] - 1 if own else -1]
            )
            base = next(
                (
                    s.target.base
                    for s in reversed(forward)
                    if isinstance(s, Let) and s.origin == origin
                ),
                "shared",
            )
            found[expr] = self._lets(expr, base, origin, key, after)
        if not found:
            return tuple(out)
        return tuple(change_expr(s, lambda e: _replace(e, found)) for s in out)

    def _lets(
        self, expr: Expr, base: str, origin: Origin, key: object, after: int
    ) -> Var:
        assert isinstance(expr, Apply)
        args: list[Atom] = []
        for arg in expr.args:
            if isinstance(arg, Apply):
                args.append(self._lets(arg, base, origin, key, after))
            else:
                assert isinstance(arg, (Var, Const))
                args.append(arg)
        if not self.next_uid:
            self.next_uid = fresh_uid(self.function, self.sweep)
        target = Var(self.next_uid, base, "temp")
        self.next_uid += 1
        self.added.setdefault(key, []).append(
            (after, Let(target, expr.op, tuple(args), origin))
        )
        return target

    # -- rebuilding the forward SSA ---------------------------------------------------

    def _insert(
        self, statements: tuple[Stmt, ...], key: object, rebuilt: dict[int, Stmt]
    ) -> tuple[Stmt, ...]:
        added = self.added.get(key, [])
        out: list[Stmt] = [let for after, let in added if after < 0]
        for k, stmt in enumerate(statements):
            if isinstance(stmt, Loop):
                new: Stmt = replace(
                    stmt, body=self._insert(stmt.body, id(stmt), rebuilt)
                )
                rebuilt[id(stmt)] = new
                stmt = new
            elif isinstance(stmt, Branch):
                new = replace(
                    stmt,
                    then=self._insert(stmt.then, (id(stmt), 0), rebuilt),
                    orelse=self._insert(stmt.orelse, (id(stmt), 1), rebuilt),
                )
                rebuilt[id(stmt)] = new
                stmt = new
            out.append(stmt)
            out += [let for after, let in added if after == k]
        return tuple(out)


def _positions(forward: tuple[Stmt, ...]) -> tuple[dict[Var, int], set[Var]]:
    """Where each value of a block is made (its statement's index), and the values
    made only inside its nested blocks."""
    position: dict[Var, int] = {}
    hidden: set[Var] = set()
    for k, stmt in enumerate(forward):
        if isinstance(stmt, Let):
            position[stmt.target] = k
        elif isinstance(stmt, Branch):
            for side in (stmt.then, stmt.orelse):
                hidden |= defined_in(side)
            for phi in stmt.merges:
                position[phi.target] = k
        else:
            hidden |= defined_in(stmt.body) | {stmt.index}
            for phi in stmt.carried:
                hidden.add(phi.target)
                if phi.exit is not None:
                    position[phi.exit] = k
    return position, hidden - set(position)


def _relink(statements: tuple[ReverseStmt, ...], rebuilt: dict[int, Stmt]) -> tuple:
    """The reverse sweep pointing at the rebuilt loops and branches."""
    out: list[ReverseStmt] = []
    for stmt in statements:
        if isinstance(stmt, ReverseLoop):
            loop = rebuilt.get(id(stmt.loop), stmt.loop)
            assert isinstance(loop, Loop)
            out.append(replace(stmt, loop=loop, body=_relink(stmt.body, rebuilt)))
        elif isinstance(stmt, ReverseBranch):
            branch = rebuilt.get(id(stmt.branch)) if stmt.branch is not None else None
            out.append(
                replace(
                    stmt,
                    branch=branch if branch is not None else stmt.branch,  # type: ignore[arg-type]
                    then=_relink(stmt.then, rebuilt),
                    orelse=_relink(stmt.orelse, rebuilt),
                )
            )
        else:
            out.append(stmt)
    return tuple(out)


def fresh_uid(function: SSAFunction, sweep: ReverseSweep) -> int:
    """A uid no value of the function or its reverse sweep has."""
    return max((v.uid for v in _vars(function, sweep)), default=0) + 1


def _vars(function: SSAFunction, sweep: ReverseSweep) -> Iterable[Var]:
    """Every value the function and its reverse sweep name (for a fresh uid)."""
    yield from function.params
    yield from defined_in(function.body)
    yield from sweep.seeds
    yield from sweep.wrt
    for stmt in all_statements(sweep.statements):
        if isinstance(stmt, AdjointAssign):
            yield stmt.var
        elif isinstance(stmt, CallAdjoint):
            yield from stmt.parts
        elif isinstance(stmt, PopAdjoint) and stmt.var is not None:
            yield stmt.var
    for expr in sweep_exprs(sweep.statements):
        for node in walk(expr):
            if isinstance(node, Var):
                yield node
            elif isinstance(node, Bar):
                yield node.var
