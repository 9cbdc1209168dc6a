"""Names for the laid-out values: which stored values share a source name, which
take one of their own, and one name for an adjoint carried through a loop where
that is safe (part of ``layout.Layout``; the layout check confirms each choice)."""

from __future__ import annotations

from collections.abc import Iterable, Iterator

from gradwright.ir import (
    AdjointAssign,
    Atom,
    Bar,
    Branch,
    CallAdjoint,
    ElementAdjoint,
    Expr,
    Let,
    Loop,
    PopAdjoint,
    ReverseBranch,
    ReverseLoop,
    ReverseStmt,
    SpreadAdjoint,
    Stmt,
    Var,
    walk,
)


class NamingLayout:
    """The naming part of ``Layout``; its state lives on the layout."""

    def _name_all(self) -> None:
        current: dict[str, Var] = {p.base: p for p in self.function.params}
        self._name_block(self.function.body, current)

    def _version_name(self, var: Var, current: dict[str, Var]) -> None:
        if var in self.namer.names:
            return
        if var.kind == "temp":  # a temporary never takes over another value's name
            self.namer.name(var)
            return
        if var.shape == "list" and var in self.roots and self.roots[var] != var:
            self.namer.names[var] = self.namer.name(self.roots[var])
            return
        previous = current.get(var.base)
        if not self.share_names:
            if var.base in self.bases_used or var.kind not in ("local", "index"):
                self.namer.names[var] = self.namer.fresh(var.base)
            else:
                self.namer.names[var] = var.base
                self.namer.taken.add(var.base)
                # a value named later (one the reverse sweep alone recomputes)
                # must not take the bare name too
                self.namer.claimed_bare.add(var.base)
            self.bases_used.add(var.base)
            return
        if previous is not None and previous in self.namer.names:
            # two versions the reverse body restores or recomputes need two names
            both_replayed = previous in self.replayed and var in self.replayed
            if previous not in self.pinned and not both_replayed:
                self.namer.names[var] = self.namer.names[previous]
                return
            self.namer.names[var] = self.namer.fresh(var.base)
            return
        if var.kind in ("local", "index") and var.base not in self.held:
            # no live version holds the source's own name on this path: take it
            self.namer.names[var] = var.base
            self.namer.taken.add(var.base)
            return
        self.namer.names[var] = self.namer.fresh(var.base)

    def _name_block(
        self,
        statements: tuple[Stmt, ...],
        current: dict[str, Var],
        indices: tuple[str, ...] = (),
    ) -> None:
        """Names for one block; ``indices``: the enclosing loops' index names."""
        for stmt in statements:
            if isinstance(stmt, Let):
                target = stmt.target
                if target.kind == "local":
                    if target in self.stored or target.shape == "list":
                        self._version_name(target, current)
                    current[target.base] = target
                elif target in self.stored:
                    self.namer.name(target)
            elif isinstance(stmt, Branch):
                sides = []
                # a name a value the reverse reads holds on one side is free on
                # the other (nothing on that path reads it); after the join,
                # held on either path is held
                before, held = set(self.held), set(self.held)
                for block in (stmt.then, stmt.orelse):
                    self.held.intersection_update(before)
                    inner = dict(current)
                    self._name_block(block, inner, indices)
                    sides.append(inner)
                    held |= self.held
                self.held.update(held)
                for phi in stmt.merges:
                    if phi.target.shape == "list":
                        self._version_name(phi.target, current)
                    else:
                        a, b = phi.first, phi.second
                        na = self.namer.names.get(a) if isinstance(a, Var) else None
                        nb = self.namer.names.get(b) if isinstance(b, Var) else None
                        if (
                            self.share_names
                            and na is not None
                            and na == nb
                            and phi.target.kind == "local"
                        ):
                            self.namer.names[phi.target] = na  # one name on both paths
                        else:
                            self._version_name(phi.target, current)
                    if phi.target.kind == "local":
                        current[phi.target.base] = phi.target
            else:
                index = stmt.index
                if index not in self.namer.names:
                    # loops one after another reuse the name; an enclosing loop's
                    # index, or a value the reverse sweep reads later, keeps it
                    kept = self.held
                    if index.base == "_" and self._saves(stmt):
                        # `_` says "not read", but the saved lists are indexed
                        # by it: a real name
                        free = [n for n in ("step", "k") if n not in self.namer.taken]
                        self.namer.names[index] = self.namer.claim(
                            free[0] if free else "step"
                        )
                    elif index.base in indices or index.base in kept:
                        self.namer.names[index] = self.namer.fresh(index.base)
                    else:
                        self.namer.names[index] = index.base
                        self.namer.taken.add(index.base)
                avoid = self._outer_replayed(stmt)
                for phi in stmt.carried:
                    init = phi.first
                    init_name = (
                        self.namer.names.get(init) if isinstance(init, Var) else None
                    )
                    if phi.target.shape == "list":
                        # one list changed in place: every version has its name
                        self._version_name(phi.target, current)
                    elif (
                        self.share_names
                        and init_name is not None
                        and init not in self.pinned
                        and init not in self.replayed
                        and phi.target not in self.pinned
                        and init_name not in avoid
                    ):
                        self.namer.names[phi.target] = init_name
                    elif init_name is not None and init_name in avoid:
                        base = phi.target.base
                        self.namer.names[phi.target] = self.namer.fresh(base)
                    else:
                        self._version_name(phi.target, current)
                    current[phi.target.base] = phi.target
                inner = dict(current)
                self._name_block(stmt.body, inner, indices + (self.namer.names[index],))
                for phi in stmt.carried:
                    assert phi.exit is not None
                    self.namer.names[phi.exit] = self.namer.names[phi.target]
                    current[phi.exit.base] = phi.exit
                if stmt.trips is not None:
                    self.namer.names[stmt.trips] = self.namer.claim("iterations")

    def _saves(self, loop: Loop) -> bool:
        """Whether ``loop`` saves values for its reverse, itself or inside."""
        return bool(self.tapes.get(loop)) or any(
            self._saves(child) for child in self.children.get(loop, [])
        )

    def _outer_replayed(self, loop: Loop) -> set[str]:
        """Names the reverse bodies of enclosing loops restore or recompute: an
        inner loop restoring into one of them would clobber it."""
        outer: set[Loop] = set()
        current = self.parent.get(loop)
        while current is not None:
            outer.add(current)
            current = self.parent.get(current)
        return {
            self.namer.names[v]
            for v in self.replayed
            if v in self.namer.names and self.loop_of.get(v) in outer
        }

    def _name_carries(self, statements: Iterable[ReverseStmt]) -> None:
        """One name for an adjoint that flows through a loop where that is safe.

        The carried adjoint takes the name of the adjoint it hands over to after
        the loop (``x_bar`` for a parameter) when that hand-over is its first write,
        and of the value after the loop; the adjoint of the value at the start of an
        iteration shares it too when no statement reads the carried one after the
        other is first written, so the update happens in place.
        """
        carries = dict(self.sweep.carries)
        statements = list(statements)
        for position, stmt in enumerate(statements):
            if isinstance(stmt, ReverseBranch):
                self._name_carries(stmt.then)
                self._name_carries(stmt.orelse)
            elif isinstance(stmt, ReverseLoop):
                self._name_carries(stmt.body)
                body = list(stmt.body)
                for phi in stmt.loop.carried:
                    carry = next(
                        (c for c, h in carries.items() if h == phi.target), None
                    )
                    if carry is None or carry in self.namer.bar_names:
                        continue
                    handed = _first_write_of(statements[position + 1 :], phi.first)
                    if phi.target in self.namer.bar_names and _writes_then_no_read(
                        body, phi.target, carry
                    ):
                        # named by an inner loop it is handed to (temp_bar through
                        # both loops of a nested time stepping): the carried
                        # adjoint is updated in place, no copies at the ends
                        name = self.namer.bar_names[phi.target]
                    elif handed is not None and handed.expr == Bar(carry):
                        name = self.namer.bar_name(phi.first)  # type: ignore[arg-type]
                    else:
                        # the start-of-iteration value's own name, claimed for the
                        # carried adjoint (that value shares it only if safe)
                        name = self.namer.claim(f"{self.namer.name(phi.target)}_bar")
                    self.namer.bar_names[carry] = name
                    if phi.exit is not None and phi.exit not in self.namer.bar_names:
                        self.namer.bar_names[phi.exit] = name
                    if phi.target in self.namer.bar_names:
                        continue
                    if _writes_then_no_read(body, phi.target, carry):
                        self.namer.bar_names[phi.target] = name

    def tape_name(self, loop: Loop, var: Var) -> str:
        key = (loop, var)
        known = self.tape_names.get(key)
        if known is None:
            known = self.namer.claim(f"{self.namer.name(var)}_saved")
            self.tape_names[key] = known
        return known

    # -- printing helpers -----------------------------------------------------------


def _first_write_of(statements: list[ReverseStmt], var: Atom) -> AdjointAssign | None:
    """The first statement of a block that assigns ``var``'s adjoint, if it is a
    plain assignment at the block's top level (anything else: None)."""
    for stmt in statements:
        if isinstance(stmt, AdjointAssign) and stmt.var == var:
            return None if stmt.accumulate else stmt
        if isinstance(stmt, CallAdjoint) and var in stmt.parts:
            return None
        if isinstance(stmt, (ReverseBranch, ReverseLoop)) and _writes(stmt, var, var):  # type: ignore[arg-type]
            return None
    return None


def _writes(stmt: ReverseStmt, var: Var, carry: Var) -> bool:
    """Whether ``stmt`` changes ``var``'s adjoint (a plain copy of the carried
    adjoint changes nothing)."""
    if isinstance(stmt, AdjointAssign):
        return stmt.var == var and not (stmt.expr == Bar(carry) and not stmt.accumulate)
    if isinstance(stmt, CallAdjoint):
        return var in stmt.parts
    if isinstance(stmt, ReverseBranch):
        return any(_writes(s, var, carry) for s in (*stmt.then, *stmt.orelse))
    if isinstance(stmt, ReverseLoop):
        return any(_writes(s, var, carry) for s in stmt.body)
    return False


def _writes_then_no_read(body: list[ReverseStmt], header: Var, carry: Var) -> bool:
    first = next((k for k, s in enumerate(body) if _writes(s, header, carry)), None)
    if first is None:
        return True  # the carried adjoint passes through unchanged
    if not isinstance(body[first], (AdjointAssign, CallAdjoint)):
        return False  # changed inside a branch or loop: keep the two apart
    for stmt in body[first + 1 :]:
        if isinstance(stmt, AdjointAssign) and stmt.var == carry:
            continue
        for expr in _reverse_exprs([stmt]):
            if any(isinstance(n, Bar) and n.var == carry for n in walk(expr)):
                return False
    return True


class _NoteHeld(dict):
    """The namer's names, noting into ``held`` each name a pinned value takes."""

    def __init__(self, names: dict, pinned: set, held: set[str]) -> None:
        super().__init__(names)
        self.pinned, self.held = pinned, held
        held.update(name for var, name in names.items() if var in pinned)

    def __setitem__(self, var: Var, name: str) -> None:
        super().__setitem__(var, name)
        if var in self.pinned:
            self.held.add(name)


def _reverse_exprs(statements: Iterable[ReverseStmt]) -> Iterator[Expr]:
    for stmt in statements:
        if isinstance(stmt, AdjointAssign):
            yield stmt.expr
        elif isinstance(stmt, ElementAdjoint):
            yield stmt.index
            yield stmt.expr
        elif isinstance(stmt, SpreadAdjoint):
            yield stmt.expr
        elif isinstance(stmt, CallAdjoint):
            yield from stmt.args
            yield stmt.seed
        elif isinstance(stmt, PopAdjoint):
            pass
        elif isinstance(stmt, ReverseBranch):
            yield stmt.condition
            yield from _reverse_exprs(stmt.then)
            yield from _reverse_exprs(stmt.orelse)
        else:
            yield from _reverse_exprs(stmt.body)
