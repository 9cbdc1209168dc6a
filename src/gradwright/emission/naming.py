"""Output names: stable, readable and never clashing with the user's names.

A user variable keeps its name; a later binding of the same name, and each stored
temporary, takes the name it helps build plus a per-name index (``inv_t_1``), so
editing one statement renames nothing elsewhere. Adjoints are ``x_bar``; the adjoint
of a temporary the forward sweep folded (so has no name) is a numbered part of its
variable's, ``x_bar_1``.
"""

from __future__ import annotations

from gradwright.ir import Var


class Namer:
    def __init__(self, reserved: set[str]) -> None:
        self.taken = set(reserved)
        self.counters: dict[str, int] = {}
        self.names: dict[Var, str] = {}
        self.bar_names: dict[Var, str] = {}
        self.partial_names: dict[Var, str] = {}
        self.claimed_bare: set[str] = set()
        #: adjoints that take over one array (``ReverseSweep.updates``), each
        #: to the first of them, and the one name each such array has
        self.same_array: dict[Var, Var] = {}
        self.array_names: dict[Var, str] = {}

    def share_arrays(self, updates: tuple[tuple[Var, Var], ...]) -> None:
        """One name for the adjoints that take over one array in turn."""
        for var, lender in updates:
            first = self.same_array.setdefault(lender, lender)
            self.same_array[var] = first

    def fresh(self, base: str) -> str:
        k = self.counters.get(base, 0)
        while True:
            k += 1
            candidate = f"{base}_{k}"
            if candidate not in self.taken:
                self.counters[base] = k
                self.taken.add(candidate)
                return candidate

    def name(self, var: Var) -> str:
        known = self.names.get(var)
        if known is not None:
            return known
        if var.kind == "param" or (
            var.kind in ("local", "index") and var.base not in self.claimed_bare
        ):
            # the user's own name (already reserved, so never handed out as fresh)
            chosen = var.base
            self.claimed_bare.add(var.base)
            self.taken.add(chosen)
        else:
            chosen = self.fresh(var.base)
        self.names[var] = chosen
        return chosen

    def partials_name(self, var: Var) -> str:
        """The tuple of partial derivatives returned with a helper call's value."""
        return self._derived(var, "partials", self.partial_names)

    def bar_name(self, var: Var) -> str:
        known = self.bar_names.get(var)
        first = self.same_array.get(var)
        if known is None and first is not None and first in self.array_names:
            known = self.bar_names[var] = self.array_names[first]
        if known is None and var.kind == "temp" and var not in self.names:
            # a temporary the forward sweep folded has no name of its own: its
            # adjoint is a numbered part of its variable's (r_bar_1), never a
            # value_4_bar beside no value_4
            known = self.bar_names[var] = self.fresh(f"{var.base}_bar")
        known = known or self._derived(var, "bar", self.bar_names)
        if first is not None:
            self.array_names.setdefault(first, known)
        return known

    def _derived(self, var: Var, suffix: str, table: dict[Var, str]) -> str:
        known = table.get(var)
        if known is not None:
            return known
        chosen = self.claim(f"{self.name(var)}_{suffix}")
        table[var] = chosen
        return chosen

    def claim(self, wanted: str) -> str:
        """``wanted`` if no one has it yet, else a fresh variant; taken either way."""
        chosen = wanted if wanted not in self.taken else self.fresh(wanted)
        self.taken.add(chosen)
        return chosen
