"""Dicts: loops over constant dicts, and string-keyed dicts of active values.

A loop over a constant dict (module-level data, or a value a copied statement
bound) runs over its keys: ``keys = list(D)`` is copied before the loop (a
statement of the output's own, in the same IR as a copied source statement), the
loop counts over ``range(len(keys))``, and each iteration reads ``keys[i]`` and
``D[key]``, lookups with no derivative. ``for k, v in D.items()``, ``.keys()``,
``.values()`` and ``for k in D`` all read so.

A dict of numbers written out with string keys (``pos = {"a": xa, "b": xb}``) is a
list in the SSA, with the keys' order known when generating: ``pos["a"]`` is
element 0, so the adjoint is one list of the same positions (``pos_bar[0]`` is
the adjoint of ``pos["a"]``). A key computed at run time (a name bound by a loop
over a constant dict's keys) finds its position in a copied table ``{key:
position}``.
"""

from __future__ import annotations

from collections.abc import Callable

import libcst as cst

from gradwright.diagnostics import fail
from gradwright.ir import Atom, Const, Copied, Let, Var

_VIEWS = ("items", "keys", "values")


class DictLowering:
    """Part of the lowering (see ``ssa._Lowerer``); state lives on the lowerer."""

    # -- loops over constant dicts ----------------------------------------------------

    def dict_reader(
        self, node: cst.BaseExpression
    ) -> tuple[Atom, Callable[[Var], object], str] | None:
        """(length, read, index name) for a loop over a constant dict, else None."""
        view = "keys"
        source = node
        if (
            isinstance(node, cst.Call)
            and isinstance(node.func, cst.Attribute)
            and node.func.attr.value in _VIEWS
        ):
            view, source = node.func.attr.value, node.func.value
            if node.args:
                fail(
                    f".{view}() takes no arguments",
                    self.index.locate(node),
                    "call it without arguments: d.items()",
                )
        numbers = self.env.get(source.value) if isinstance(source, cst.Name) else None
        if isinstance(numbers, Var) and self.root_of(numbers) in self.dict_keys:
            return self.numbers_reader(numbers, view)
        table = self.constant_container(source, view != "keys" or node is not source)
        if table is None:
            return None
        keys = self.copy_text(
            f"keys = list({self.index.code(source).strip()})", table, source, "keys"
        )
        length = self.emit("len", (keys,), self.new_var("n", "temp"))
        return length, _reader(self, keys, view, table), "key_index"

    def numbers_reader(
        self, numbers: Var, view: str
    ) -> tuple[Atom, Callable[[Var], object], str]:
        """A loop over a dict of numbers: its keys are known, its values are the
        list's elements (active values, read with getitem)."""
        names = self.dict_keys[self.root_of(numbers)]
        keys = self.copy_text(
            f"keys = [{', '.join(names)}]", Const("", None), None, "keys"
        )
        return (
            Const(str(len(names)), len(names)),
            _reader(self, keys, view, numbers),
            "key_index",
        )

    def constant_container(
        self, source: cst.BaseExpression, dict_view: bool
    ) -> Atom | None:
        """The module-level dict (or a value a copied statement bound) ``source``
        names; a plain name of module data only when it is a dict literal."""
        if isinstance(source, cst.Name):
            bound = self.env.get(source.value)
            if (
                isinstance(bound, Var)
                and bound in self.opaque
                and bound not in self.opaque_sequences
            ):
                return bound
            if bound is not None:
                if dict_view:
                    fail(
                        f"'{source.value}' is not a constant dict: a loop over its"
                        " items is not supported",
                        self.index.locate(source),
                        "keep the constants in a module-level dict, or loop over"
                        " range(len(...))",
                    )
                return None
        if self.data_root(source) is None:
            return None
        is_dict = (
            isinstance(source, cst.Name)
            and self.index.data_kinds.get(source.value) == "a dict"
        )
        if not (dict_view or is_dict):
            return None
        return self.data(source, "table")

    def copy_text(
        self, text: str, table: Atom, source: cst.BaseExpression | None, name: str
    ) -> Var:
        """A statement of the output's own (``keys = list(D)``), copied like a
        source statement: it reads ``source`` and binds ``name``."""
        reads: tuple[str, ...] = ()
        args: tuple[Atom, ...] = ()
        if isinstance(table, Var) and isinstance(source, cst.Name):
            reads, args = (source.value,), (table,)
        var = self.new_var(name, "local")
        statement = self.new_var("copied", "temp")
        copied = Copied(text, reads, ((text.split(" = ")[0], var),), fixed=True)
        self.blocks[-1].append(Let(statement, "copied", args, self.origin, copied))
        self.inert_values.add(statement)
        self.emit("written", (statement,), var)
        self.opaque.add(var)
        self.fresh.discard(var)
        return var

    # -- dicts of active values -------------------------------------------------------

    def dict_literal(self, node: cst.Dict, target: Var | None, base: str) -> Atom:
        """``{"a": xa, "b": xb}``: a list of the values, its keys remembered."""
        keys: list[str] = []
        values: list[Atom] = []
        for element in node.elements:
            key = getattr(element, "key", None)
            if not isinstance(key, cst.SimpleString) or key.value in keys:
                fail(
                    "a dict of numbers needs distinct string keys written out",
                    self.index.locate(element),
                    'write {"a": xa, "b": xb}',
                )
            keys.append(key.value)  # type: ignore[union-attr]
            value = element.value
            values.append(self.scalar(self.expr(value, base, None), value))
        made = target if target is not None and target.shape == "list" else None
        made = made or self.new_var(base, "local", "list")
        listed = self.emit("listlit", tuple(values), made)
        self.dict_keys[listed] = tuple(keys)
        self.dict_made[listed] = (self.blocks[-1], self.blocks[-1][-1])
        return listed

    def dict_position(self, container: Var, node: cst.Subscript) -> Atom | None:
        """The position of ``d[key]`` in a dict of numbers (None: not one)."""
        keys = self.dict_keys.get(self.root_of(container))
        if keys is None:
            return None
        key = node.slice[0].slice.value if len(node.slice) == 1 else None  # type: ignore[union-attr]
        if isinstance(key, cst.SimpleString):
            if key.value not in keys:
                fail(
                    f"the dict has no key {key.value}",
                    self.index.locate(key),
                    "its keys: " + ", ".join(keys),
                )
            return Const(str(keys.index(key.value)), keys.index(key.value))
        if key is None:
            fail(
                "one key at a time",
                self.index.locate(node),
                "index one key at a time: d[key]",
            )
        found = self.scalar(self.expr(key, "key", None), key)
        root = self.root_of(container)
        table = self.positions.get(root)
        if table is None:
            table = self.position_table(root, keys)
        return self.emit("dataitem", (table, found), self.new_var("at", "temp"))

    def position_table(self, root: Var, keys: tuple[str, ...]) -> Var:
        """``positions = {"a": 0, ...}``, copied where the dict was made (so every
        later lookup reads it) on its first lookup with a key known only when
        the model runs."""
        entries = ", ".join(f"{k}: {n}" for n, k in enumerate(keys))
        block, made = self.dict_made[root]
        here = self.blocks[-1]
        # right after the dict is made, when that block is still open
        opened = any(b is block for b in self.blocks)
        if opened:
            at = next(k for k, s in enumerate(block) if s is made) + 1
            self.blocks[-1] = block
            tail = block[at:]
            del block[at:]
        try:
            table = self.copy_text(
                f"at = {{{entries}}}", Const("", None), None, f"{root.base}_at"
            )
        finally:
            if opened:
                self.inserted.extend((block, stmt) for stmt in block[at:])
                block.extend(tail)
                self.blocks[-1] = here
        self.positions[root] = table
        return table


def _reader(
    low, keys: Var, view: str, values: Atom
) -> Callable[[Var], object]:  # noqa: ANN001
    """What iteration ``index`` binds: the key ``keys[index]``, the value
    ``values[key]`` (a constant dict) or ``values[index]`` (a dict of numbers)."""

    def read(index: Var) -> object:
        made: list[Var] = []

        def key(name: str = "key") -> Var:
            if not made:
                kind = "local" if name != "key" else "temp"
                made.append(
                    low.emit("dataitem", (keys, index), low.new_var(name, kind))
                )
            return made[0]

        def value(name: str) -> Var:
            if isinstance(values, Var) and values.shape == "list":
                return low.emit("getitem", (values, index), low.new_var(name, "local"))
            return low.emit("dataitem", (values, key()), low.new_var(name, "local"))

        if view == "items":
            return (key, value)
        return value if view == "values" else key

    return read
