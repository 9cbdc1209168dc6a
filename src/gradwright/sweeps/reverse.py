"""The reverse sweep: adjoint statements from the rule table, in reverse order.

Activity analysis runs first: a value is active when it depends on a ``wrt``
parameter through a differentiable primitive, and only active values receive adjoint
contributions. A contribution to a value that already has an adjoint accumulates
(``+=``); the first one assigns.

Control flow keeps its shape. A branch is reversed into a branch on the same
condition; a value that gets an adjoint in only one side gets a zero in the other.
A loop is reversed into a loop over the same range backwards: each loop-carried
value has one adjoint that flows from the end of an iteration to its start, and
values from outside the loop that gain adjoint inside it start at zero before it.

Lists: all versions of a list (one per element write) share one adjoint list, a
list of zeros when the reverse sweep starts.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping

from gradwright.calculus.algebra import E, is_zero, literal_arithmetic, simplify
from gradwright.calculus.numpy_rules import BROADCASTING
from gradwright.calculus.rules import RULES, known_power, rule_for
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
    const,
)
from gradwright.sweeps.broadcasting import SMALL_OK, Fitter
from gradwright.sweeps.shapes import shape_expr

#: primitives on lists that adjoints flow through
_LIST_FLOW = frozenset(
    {"getitem", "setitem", "append", "newlist", "listlit", "sum", "fsum"}
)
#: primitives whose result is a new version of their first (list) operand
_IN_PLACE = frozenset({"setitem", "append"})
#: primitives whose value is a condition, rebuilt in the reverse sweep
_LOGIC = frozenset({"lt", "le", "gt", "ge", "eq", "ne", "and", "or", "not"})


def differentiable(op: str) -> bool:
    return op in RULES or op in _LIST_FLOW or op.startswith("call:")


def walk_loops(statements: Iterable[Stmt]) -> Iterable[Loop]:
    for stmt in statements:
        if isinstance(stmt, Branch):
            yield from walk_loops(stmt.then)
            yield from walk_loops(stmt.orelse)
        elif isinstance(stmt, Loop):
            yield stmt
            yield from walk_loops(stmt.body)


def walk_lets(statements: Iterable[Stmt]) -> Iterable[Let]:
    for stmt in statements:
        if isinstance(stmt, Let):
            yield stmt
        elif isinstance(stmt, Branch):
            yield from walk_lets(stmt.then)
            yield from walk_lets(stmt.orelse)
        else:
            yield from walk_lets(stmt.body)


def defined_in(statements: Iterable[Stmt]) -> set[Var]:
    """Every value a run of statements defines, nested blocks included."""
    found: set[Var] = set()
    for stmt in statements:
        if isinstance(stmt, Let):
            found.add(stmt.target)
        elif isinstance(stmt, Branch):
            found |= defined_in(stmt.then) | defined_in(stmt.orelse)
            found |= {phi.target for phi in stmt.merges}
        else:
            found |= defined_in(stmt.body) | {stmt.index}
            for phi in stmt.carried:
                found.add(phi.target)
                if phi.exit is not None:
                    found.add(phi.exit)
            if stmt.trips is not None:
                found.add(stmt.trips)
    return found


def _source_order(statements: tuple[Stmt, ...]) -> list[Stmt]:
    """The statements in reverse order, each source statement's primitives taken
    from the outermost down, left operand first.

    Any order that handles a temporary after its one user is valid; this one makes
    ``a + b * t + c * u`` give ``a_bar``, ``b_bar``, ``c_bar`` in the order of the
    source.
    """
    out: list[Stmt] = []
    position = len(statements)
    while position > 0:
        end = position
        origin = getattr(statements[end - 1], "origin", None)
        start = end
        while (
            start > 0
            and isinstance(statements[start - 1], Let)
            and (statements[start - 1].origin == origin)  # type: ignore[union-attr]
        ):
            start -= 1
        if start == end:  # a branch or a loop
            out.append(statements[end - 1])
            position = end - 1
            continue
        group: list[Let] = list(statements[start:end])  # type: ignore[arg-type]
        out += _tree_order(group)
        position = start
    return out


def _tree_order(group: list[Let]) -> list[Let]:
    temps = {let.target: let for let in group if let.target.kind == "temp"}
    uses: dict[Var, int] = {}
    for let in group:
        for arg in let.args:
            if isinstance(arg, Var) and arg in temps:
                uses[arg] = uses.get(arg, 0) + 1
    if any(n != 1 for n in uses.values()):
        return list(reversed(group))  # not a tree: plain reverse order
    ordered: list[Let] = []

    def visit(let: Let) -> None:
        ordered.append(let)
        for arg in let.args:
            if isinstance(arg, Var) and arg in temps:
                visit(temps[arg])

    roots = [let for let in group if let.target not in uses]
    for root in reversed(roots):
        visit(root)
    return ordered if len(ordered) == len(group) else list(reversed(group))


def _is_active(atom: Atom, active: set[Var]) -> bool:
    return isinstance(atom, Var) and atom in active


def _mark(statements: tuple[Stmt, ...], active: set[Var]) -> None:
    for stmt in statements:
        if isinstance(stmt, Let):
            if differentiable(stmt.op) and any(
                _is_active(a, active) for a in stmt.args
            ):
                active.add(stmt.target)
        elif isinstance(stmt, Branch):
            _mark(stmt.then, active)
            _mark(stmt.orelse, active)
            for phi in stmt.merges:
                if _is_active(phi.first, active) or _is_active(phi.second, active):
                    active.add(phi.target)
        else:
            # a carried value turns active once any iteration makes it so
            while True:
                size = len(active)
                for phi in stmt.carried:
                    if _is_active(phi.first, active) or _is_active(phi.second, active):
                        active.add(phi.target)
                _mark(stmt.body, active)
                for phi in stmt.carried:
                    if phi.target in active or _is_active(phi.second, active):
                        active.add(phi.target)
                        assert phi.exit is not None
                        active.add(phi.exit)
                if len(active) == size:
                    break


def active_values(function: SSAFunction, wrt: tuple[str, ...]) -> set[Var]:
    """Values that depend on a wrt parameter through differentiable primitives."""
    active = {p for p in function.params if p.base in wrt}
    _mark(function.body, active)
    return active


class _Reverse:
    def __init__(
        self,
        function: SSAFunction,
        active: set[Var],
        numpy: bool = False,
        adjoint_helpers: Mapping[str, tuple[Var, ...]] | None = None,
        fitter: Fitter | None = None,
    ) -> None:
        self.active = active
        self.numpy = numpy
        #: shapes known at generation time (NumPy models): explicit sums, no helper
        self.fitter = fitter
        #: helpers reversed by their adjoint function, with their parameters
        self.adjoint_helpers = adjoint_helpers or {}
        self.has: set[Var] = set()
        self.root: dict[Var, Var] = {}
        self.body = function.body
        #: loop-carried lists whose name the loop body binds to another list
        self.rebound: set[Var] = set()
        self.carries: dict[Var, Var] = {}
        #: working out which values gain adjoint, the statements are thrown away
        self.dry = False
        self.defs = {let.target: let for let in walk_lets(function.body)}
        self.next_uid = 1 + max(
            [v.uid for v in function.params]
            + [v.uid for v in defined_in(function.body)]
            + [0]
        )
        self._link_lists(function.params, function.body)

    # -- lists ---------------------------------------------------------------------

    def _link_lists(self, params: tuple[Var, ...], body: tuple[Stmt, ...]) -> None:
        for p in params:
            if p.shape == "list":
                self.root[p] = p
        self._link_block(body)

    def _link_block(self, statements: tuple[Stmt, ...]) -> None:
        for stmt in statements:
            if isinstance(stmt, Let):
                if stmt.target.shape != "list":
                    continue
                if stmt.op in _IN_PLACE:
                    self.root[stmt.target] = self.root[stmt.args[0]]  # type: ignore[index]
                else:
                    self.root[stmt.target] = stmt.target
            elif isinstance(stmt, Branch):
                self._link_block(stmt.then)
                self._link_block(stmt.orelse)
                for phi in stmt.merges:
                    if phi.target.shape == "list":
                        self.root[phi.target] = self.root[phi.first]  # type: ignore[index]
            else:
                self._link_loop(stmt)

    def _link_loop(self, loop: Loop) -> None:
        """A carried list is the list it starts as, unless the body rebinds its name
        to another list (``u = new``, ``u, v = v, u``): then the value at the start
        of an iteration is a list of its own (``rebound``), whose adjoint list the
        reverse loop hands on (``rebinding``)."""
        lists = [phi for phi in loop.carried if phi.target.shape == "list"]
        own: set[Var] = set()
        while True:
            for phi in lists:
                # a rebound list's root is its value after the loop, a value the
                # loop's iterations do not make (the layout check keeps it past the
                # loop's end)
                base = (
                    phi.exit if phi.target in own else self.root[phi.first]  # type: ignore[index]
                )
                self.root[phi.target] = base
                assert phi.exit is not None
                self.root[phi.exit] = base
            self._link_block(loop.body)
            moved = {
                phi.target
                for phi in lists
                if self.root[phi.second] != self.root[phi.target]  # type: ignore[index]
            }
            if moved <= own:
                break
            own |= moved
        self.rebound |= own

    def list_roots(self) -> tuple[Var, ...]:
        roots = {self.root[v] for v in self.active if v.shape == "list"}
        return tuple(sorted(roots))

    # -- contributions -------------------------------------------------------------

    def contribute(
        self, var: Atom, expr: Expr, origin: Origin, out: list[ReverseStmt]
    ) -> None:
        if not (isinstance(var, Var) and var in self.active):
            return
        expr = simplify(expr)
        if is_zero(expr):
            return
        if self.fitter is not None:
            self.fitter.record(var, expr, var in self.has)
        out.append(AdjointAssign(var, expr, var in self.has, origin))
        self.has.add(var)

    def block(self, statements: tuple[Stmt, ...]) -> list[ReverseStmt]:
        out: list[ReverseStmt] = []
        for stmt in _source_order(statements):
            if isinstance(stmt, Let):
                self.let(stmt, out)
            elif isinstance(stmt, Branch):
                self.branch(stmt, out)
            else:
                self.loop(stmt, out)
        return out

    def let(self, let: Let, out: list[ReverseStmt]) -> None:
        target, op, args, origin = let.target, let.op, let.args, let.origin
        if target not in self.active:
            return
        if target.shape == "list":
            self.list_let(let, out)
            return
        if target not in self.has:
            return
        g = Bar(target)
        if op == "getitem":
            root = self.root[args[0]]  # type: ignore[index]
            out.append(ElementAdjoint(root, args[1], g, True, origin))
            return
        if op in ("sum", "fsum"):
            if args[0] in self.active:
                out.append(SpreadAdjoint(self.root[args[0]], g, origin))  # type: ignore[index]
            if len(args) == 2:  # sum(xs, start)
                self.contribute(args[1], g, origin, out)
            return
        if op.startswith("call:") and op[5:] in self.adjoint_helpers:
            # the helper's reverse reads its seed as a whole array
            full = self.fitter.full(g, target) if self.fitter is not None else g
            self.call_adjoint(let, full, out)
            return
        if op.startswith("call:"):
            for k, arg in enumerate(args):
                partial = Apply("partial", (target, const(k)))
                total: Expr = Apply("mul", (g, partial))
                if self.numpy and any(isinstance(a, Var) for a in args if a != arg):
                    # an elementwise helper broadcasts its operands like `+`
                    total = self.unbroadcast(total, arg, target)
                self.contribute(arg, total, origin, out)
            return
        parts = self.parts(op, g, target, args)
        grouped: dict[Var, Expr] = {}
        for arg, part in zip(args, parts, strict=False):
            if part is None or not (isinstance(arg, Var) and arg in self.active):
                continue
            previous = grouped.get(arg)
            grouped[arg] = part if previous is None else Apply("add", (previous, part))
        for var, total in grouped.items():
            others = [a for a in args if a != var]
            if (
                self.numpy
                and op in BROADCASTING
                and (self.fitter is not None or any(isinstance(a, Var) for a in others))
            ):
                # an operand broadcast against a larger one gets its adjoint summed
                # (against constants only, it has the result's shape already)
                total = self.unbroadcast(total, var, target)
            self.contribute(var, total, origin, out)

    def parts(
        self, op: str, g: Expr, target: Var, args: tuple[Atom, ...]
    ) -> tuple[Expr | None, ...]:
        """One contribution per argument: from shapes known at generation time
        where that writes it out, else from the rule table."""
        if self.fitter is not None:
            known = self.fitter.rule(op, g, args)
            if known is not None:
                return known
            if op not in SMALL_OK:
                g = self.fitter.full(g, target)
        active = tuple(isinstance(a, Var) and a in self.active for a in args)
        rule = rule_for(op, self.numpy, active)
        computed = isinstance(args[1], Var) if len(args) > 1 else False
        if op in ("pow", "math_pow") and computed and not self.numpy and not active[1]:
            exponent = self.literal_value(args[1])
            if exponent is not None:  # x ** (2.0 / 3.0): a constant exponent
                rule = known_power(exponent)
        parts = rule(E(g), E(target), *(E(a) for a in args))
        return tuple(None if p is None else p.node for p in parts)

    def literal_value(self, atom: Atom) -> float | int | None:
        """The value of an exponent the model computes from literals with + - * /
        (``2.0 / 3.0``): the number the model gets (the same operations on the
        same ints and floats), else None."""
        if isinstance(atom, Const):
            value = atom.value
            if isinstance(value, bool) or not isinstance(value, (int, float)):
                return None
            return value if math.isfinite(value) else None
        let = self.defs.get(atom)
        if let is None:
            return None
        values = [self.literal_value(a) for a in let.args]
        if any(v is None for v in values):
            return None
        return literal_arithmetic(let.op, values)  # type: ignore[arg-type]

    def unbroadcast(self, total: Expr, var: Atom, result: Var) -> Expr:
        if self.fitter is not None and isinstance(var, Var):
            return self.fitter.fit(total, var, result)
        return Apply("_gw_unbroadcast", (total, var))

    def call_adjoint(self, let: Let, seed: Expr, out: list[ReverseStmt]) -> None:
        """``NAME_adjoint(args, seed)`` gives every parameter's adjoint; each
        active argument's adjoint then takes its part (a list's element by
        element). The helper's forward work runs again inside it (joint
        reversal): the caller keeps only the arguments."""
        callee = let.op.removeprefix("call:")
        params = self.adjoint_helpers[callee]
        parts = []
        for param in params:
            parts.append(Var(self.next_uid, param.base, "temp", param.shape))
            self.next_uid += 1
        out.append(CallAdjoint(callee, let.args, seed, tuple(parts), let.origin))
        if self.fitter is not None:
            # the helper returns each adjoint at its parameter's shape (_gw_shaped)
            for arg, part in zip(let.args, parts, strict=True):
                self.fitter.adj[part] = self.fitter.table.atom(arg)
        for arg, part in zip(let.args, parts, strict=True):
            if not (isinstance(arg, Var) and arg in self.active):
                continue
            if arg.shape == "list":
                out.append(SpreadAdjoint(self.root[arg], Bar(part), let.origin, True))
            else:
                # (a part is no value of the forward sweep: never zeroed on
                # a branch's other side or before a loop)
                self.contribute(arg, Bar(part), let.origin, out)

    def list_let(self, let: Let, out: list[ReverseStmt]) -> None:
        root = self.root[let.target]
        buffer = Bar(root)
        if let.op.startswith("call:"):
            self.call_adjoint(let, buffer, out)
            return
        if let.op == "setitem":
            _, index, value = let.args
            self.contribute(value, Apply("getitem", (buffer, index)), let.origin, out)
            out.append(ElementAdjoint(root, index, const(0.0), False, let.origin))
        elif let.op == "append":
            value = let.args[1]
            if isinstance(value, Var) and value in self.active:
                out.append(PopAdjoint(root, value, value in self.has, let.origin))
                self.has.add(value)
            else:
                out.append(PopAdjoint(root, None, False, let.origin))
        elif let.op == "newlist":
            self.contribute(let.args[0], Apply("sum", (buffer,)), let.origin, out)
        elif let.op == "listlit":
            for k, element in enumerate(let.args):
                self.contribute(
                    element,
                    Apply("getitem", (buffer, Const(str(k), k))),
                    let.origin,
                    out,
                )

    # -- branches ------------------------------------------------------------------

    def condition(self, atom: Atom) -> Expr:
        """The condition as an expression over stored values (recomputed, cheap)."""
        if isinstance(atom, Var) and atom in self.defs and self.defs[atom].op in _LOGIC:
            let = self.defs[atom]
            return Apply(let.op, tuple(self.condition(a) for a in let.args))
        return atom

    def branch(self, branch: Branch, out: list[ReverseStmt]) -> None:
        before = set(self.has)
        fitter = self.fitter
        state = fitter.snapshot() if fitter is not None else {}
        states = []
        sides: list[tuple[list[ReverseStmt], set[Var]]] = []
        for side, block in ((0, branch.then), (1, branch.orelse)):
            self.has = set(before)
            if fitter is not None:
                fitter.restore(state)
            side_out: list[ReverseStmt] = []
            for phi in branch.merges:
                if phi.target in before and phi.target.shape == "scalar":
                    source = phi.first if side == 0 else phi.second
                    self.contribute(source, Bar(phi.target), branch.origin, side_out)
            side_out += self.block(block)
            sides.append((side_out, self.has))
            states.append(fitter.snapshot() if fitter is not None else {})
        (then_out, then_has), (else_out, else_has) = sides
        # values from before the branch that gained adjoint on one side only get a
        # zero on the other; values made inside a side are done with there
        inside = defined_in(branch.then) | defined_in(branch.orelse)
        gained = sorted((then_has | else_has) - before - inside)
        for var in gained:
            for (side_out, side_has), side_state in zip(sides, states, strict=True):
                if var not in side_has:
                    side_out.append(
                        AdjointAssign(var, const(0.0), False, branch.origin)
                    )
                    side_state[var] = ()
        if fitter is not None:
            fitter.merge(*states)
        self.has = before | set(gained)
        if then_out or else_out:
            out.append(
                ReverseBranch(
                    self.condition(branch.condition),
                    tuple(then_out),
                    tuple(else_out),
                    branch.origin,
                    branch,
                )
            )

    # -- loops ---------------------------------------------------------------------

    def new_carry(self, phi: Phi) -> Var:
        var = Var(self.next_uid, phi.target.base, "temp")
        self.next_uid += 1
        self.active.add(var)
        self.carries[var] = phi.target
        return var

    def rebinding(self, loop: Loop) -> list[ReverseStmt]:
        """At the start of a reverse iteration, each rebound list's adjoint list
        becomes that of the list its name was bound to at the end of the body (all
        at once, as ``u, v = v, u`` swaps); a rebound list no adjoint list is handed
        to gets zeros (its length is that of this iteration's list)."""
        roots = set(self.list_roots())
        phis = [
            phi
            for phi in loop.carried
            if phi.target in self.rebound and self.root[phi.target] in roots
        ]
        moves = [(self.root[phi.second], self.root[phi.target]) for phi in phis]  # type: ignore[index]
        moves = [(to, source) for to, source in moves if to in roots]
        out: list[ReverseStmt] = []
        targets = {to for to, _ in moves}
        held: dict[Var, Var] = {}
        for _, source in moves:
            if source in targets:  # read before it is written over
                held[source] = Var(self.next_uid, source.base, "temp", "list")
                self.next_uid += 1
                out.append(AdjointAssign(held[source], Bar(source), False, loop.origin))
        for to, source in moves:
            out.append(
                AdjointAssign(to, Bar(held.get(source, source)), False, loop.origin)
            )
        for phi in phis:
            own = self.root[phi.target]
            if own not in targets:
                zeros = Apply("newlist", (const(0.0), Apply("len", (phi.target,))))
                out.append(AdjointAssign(own, zeros, False, loop.origin))
        return out

    def handed_over(self, loop: Loop) -> list[ReverseStmt]:
        """After the reverse loop, a rebound list's adjoint list is that of the list
        the loop started from."""
        roots = set(self.list_roots())
        out: list[ReverseStmt] = []
        for phi in loop.carried:
            start = self.root.get(phi.first)  # type: ignore[arg-type]
            own = self.root.get(phi.target)
            if phi.target not in self.rebound or own not in roots or start not in roots:
                continue
            if start.kind == "param":  # type: ignore[union-attr]
                # other names may hold the parameter's list: add element by element
                out.append(SpreadAdjoint(start, Bar(own), loop.origin, True))  # type: ignore[arg-type]
            else:
                out.append(AdjointAssign(start, Bar(own), False, loop.origin))  # type: ignore[arg-type]
        return out

    def moved_roots(self) -> tuple[Var, ...]:
        """Lists whose adjoint list is handed over from a rebound list (never
        made of zeros where the list is made)."""
        own = {self.root[v] for v in self.rebound}
        moved: set[Var] = set()
        for loop in walk_loops(self.body):
            for phi in loop.carried:
                if phi.target in self.rebound:
                    if self.root[phi.first].kind != "param":  # type: ignore[index]
                        moved.add(self.root[phi.first])  # type: ignore[index]
                    if self.root[phi.second] not in own:  # type: ignore[index]
                        moved.add(self.root[phi.second])  # type: ignore[index]
        return tuple(sorted(moved & set(self.list_roots())))

    def loop_body(self, loop: Loop, carries: dict[Phi, Var]) -> list[ReverseStmt]:
        body_out: list[ReverseStmt] = self.rebinding(loop)
        for phi, carry in carries.items():
            self.contribute(phi.second, Bar(carry), loop.origin, body_out)
        body_out += self.block(loop.body)
        for phi, carry in carries.items():
            if phi.target in self.has:
                body_out.append(
                    AdjointAssign(carry, Bar(phi.target), False, loop.origin)
                )
            else:
                body_out.append(AdjointAssign(carry, const(0.0), False, loop.origin))
        return body_out

    def loop(self, loop: Loop, out: list[ReverseStmt]) -> None:
        # a loop reaches the rest only through its carried values: when none of
        # them has an adjoint (and it changes no active list), it has no reverse
        reaches = any(
            phi.exit in self.has
            or (phi.target.shape == "list" and phi.target in self.active)
            for phi in loop.carried
        )
        if not reaches:
            return
        scalar_phis = [
            phi
            for phi in loop.carried
            if phi.target.shape == "scalar" and phi.target in self.active
        ]
        carries = {phi: self.new_carry(phi) for phi in scalar_phis}
        fitter = self.fitter
        #: the shape each carried adjoint enters the loop with, where known
        entry: dict[Var, tuple] = {}
        #: carried adjoints that start at zero: their place in ``out`` and the
        #: array of zeros of their value's shape they may start as instead
        zero_starts: dict[Var, tuple[int, Expr]] = {}
        for phi, carry in carries.items():
            assert phi.exit is not None
            value: Expr = Bar(phi.exit) if phi.exit in self.has else const(0.0)
            out.append(AdjointAssign(carry, value, False, loop.origin))
            self.has.add(carry)
            if fitter is not None:  # it changes from one iteration to the next
                shape = fitter.shape(value)
                full = fitter.table.atom(phi.target)
                zeros = (
                    shape_expr(full, fitter.sizes)
                    if is_zero(value) and full and isinstance(full, tuple)
                    else None
                )
                if zeros is not None:
                    # np.zeros of the value's shape keeps the shape every trip
                    # hands back (a state vector's adjoint), where 0.0 would not
                    zero_starts[carry] = (len(out) - 1, Apply("np.zeros", (zeros,)))
                    shape = full
                if isinstance(shape, tuple):
                    entry[carry] = shape
                fitter.forget(carry)
        inside = defined_in(loop.body) | {phi.target for phi in loop.carried}
        if self.dry:  # only which values gain adjoint matters here
            self.loop_body(loop, carries)
            self.has = {v for v in self.has if v not in inside}
            for phi, carry in carries.items():
                self.contribute(phi.first, Bar(carry), loop.origin, out)
            self.has -= set(carries.values())
            return
        # a dry run finds the outer values that gain adjoint inside the loop (loops
        # inside it run once in it, so the cost stays quadratic in the nesting)
        before = set(self.has)
        saved_uid = self.next_uid
        state = fitter.snapshot() if fitter is not None else {}
        while True:
            # carried adjoints assumed to keep their entry shape through the body;
            # an assumption the body breaks is dropped and the body tried again
            for carry, shape in entry.items():
                fitter.adj[carry] = shape  # type: ignore[union-attr]
            self.dry = True
            self.loop_body(loop, carries)
            self.dry = False
            kept = {}
            if fitter is not None:
                # the shape each handed back at the end of the body
                kept = {
                    carry: entry[carry]
                    for phi, carry in carries.items()
                    if carry in entry
                    and phi.target in self.has
                    and fitter.adj.get(phi.target) == entry[carry]
                }
                fitter.restore(state)
            if kept == entry:
                break
            entry = kept
            self.has, self.next_uid = set(before), saved_uid
        outer = sorted(
            v for v in self.has - before if v not in inside and v not in self.carries
        )
        self.has, self.next_uid = set(before), saved_uid
        for var in outer:
            out.append(AdjointAssign(var, const(0.0), False, loop.origin))
            self.has.add(var)
        for carry, (place, zeros) in zero_starts.items():
            if carry in entry:
                out[place] = AdjointAssign(carry, zeros, False, loop.origin)
        if fitter is not None:
            fitter.adj.update(entry)
        body_out = self.loop_body(loop, carries)
        if fitter is not None:  # what a loop adds depends on its trip count
            for var in [*outer, *carries.values()]:
                fitter.forget(var)
            fitter.adj.update(entry)  # a carried adjoint whose shape no trip changes
        self.has = {v for v in self.has if v not in inside}
        out.append(ReverseLoop(loop, tuple(body_out), loop.origin))
        out += self.handed_over(loop)
        for phi, carry in carries.items():
            self.contribute(phi.first, Bar(carry), loop.origin, out)
        # a carried adjoint ends with its loop: it is no value an enclosing branch
        # should zero on its other side
        self.has -= set(carries.values())


def list_roots(function: SSAFunction) -> dict[Var, Var]:
    """The list object (a parameter or a list the function makes) each list
    value of ``function`` is a version of."""
    return dict(_Reverse(function, set()).root)


def reverse_sweep(
    function: SSAFunction,
    wrt: tuple[str, ...],
    seeds: tuple[Expr, ...],
    numpy: bool = False,
    adjoint_helpers: Mapping[str, tuple[Var, ...]] | None = None,
    fitter: Fitter | None = None,
) -> ReverseSweep:
    """Adjoint statements for ``sum(seed_i * d result_i)``, in reverse order.

    ``numpy``: the model works on arrays, so broadcasting operands get their
    adjoints summed back to their own shapes. ``adjoint_helpers``: the helpers
    whose calls are reversed by their adjoint function (the rest by partials).
    A list result's seed is a list, added into the result's adjoint list.
    ``fitter``: the shapes known at generation time, for a NumPy model."""
    active = active_values(function, wrt)
    reverse = _Reverse(
        function, active, numpy, adjoint_helpers, fitter if numpy else None
    )
    out: list[ReverseStmt] = []
    result = function.result
    for atom, seed in zip(result.values, seeds, strict=True):
        if isinstance(atom, Var) and atom.shape == "list":
            if atom in active:
                out.append(SpreadAdjoint(reverse.root[atom], seed, result.origin, True))
            continue
        reverse.contribute(atom, seed, result.origin, out)
    out += reverse.block(function.body)
    wrt_vars = tuple(p for name in wrt for p in function.params if p.base == name)
    unused = tuple(
        v
        for v in wrt_vars
        if v not in reverse.has and not (v.shape == "list" and v in active)
    )
    return ReverseSweep(
        tuple(out),
        wrt_vars,
        unused,
        reverse.list_roots(),
        tuple(sorted(reverse.root.items())),
        tuple(s for s in seeds if isinstance(s, Var)),
        tuple(sorted(reverse.carries.items())),
        moved=reverse.moved_roots(),
        rebound=tuple(sorted(reverse.rebound)),
    )
