"""Lowering for-loops: the loop, its carried values (one Phi each) and its bounds."""

from __future__ import annotations

import libcst as cst

from gradwright.diagnostics import fail
from gradwright.ir import (
    Const,
    Loop,
    Phi,
    Var,
)
from gradwright.lowering.base import (
    _Unbound,
)
from gradwright.lowering.syntax import (
    _assigned_names,
    _block_statements,
    _statement_text,
)


class LoopLowering:
    """Part of the lowering (see ``ssa._Lowerer``); state lives on the lowerer."""

    # -- loops --------------------------------------------------------------------

    def for_statement(self, node: cst.For) -> None:
        if node.orelse is not None:
            fail("for-else is not supported", self.index.locate(node.orelse))
        if node.asynchronous is not None:
            fail("async for is not supported", self.index.locate(node))
        if not isinstance(node.target, cst.Name):
            fail(
                "the loop variable must be a single name",
                self.index.locate(node.target),
            )
        assert isinstance(node.target, cst.Name)
        name = node.target.value
        self.set_origin(f"for {name} in {_statement_text(self.index, node.iter)}:")
        origin = self.origin
        over_list: Var | None = None
        if (
            isinstance(node.iter, cst.Call)
            and isinstance(node.iter.func, cst.Name)
            and node.iter.func.value == "range"
            and "range" not in self.index.module_names
        ):
            args = node.iter.args
            if not 1 <= len(args) <= 3 or any(a.keyword or a.star for a in args):
                fail(
                    "range() takes one to three positional arguments",
                    self.index.locate(node.iter),
                )
            bounds = [
                self.scalar(self.expr(a.value, name, None), a.value) for a in args
            ]
            if len(bounds) == 1:
                start, stop, step = Const("0", 0), bounds[0], Const("1", 1)
            elif len(bounds) == 2:
                start, stop, step = bounds[0], bounds[1], Const("1", 1)
            else:
                start, stop, step = bounds
        else:
            if isinstance(node.iter, (cst.Tuple, cst.List)):
                fail(
                    "for-loops run over range(...) or a list parameter",
                    self.index.locate(node.iter),
                    "name the values in a list parameter, or write one statement"
                    " per value",
                )
            iterable = self.expr(node.iter, name, None)
            self.as_list(iterable)
            if not (isinstance(iterable, Var) and iterable.shape == "list"):
                fail(
                    "for-loops run over range(...) or a list",
                    self.index.locate(node.iter),
                    "write `for i in range(n):`",
                )
            assert isinstance(iterable, Var)
            over_list = iterable
            start, step = Const("0", 0), Const("1", 1)
            stop = self.emit("len", (iterable,), self.new_var(name, "temp"))

        assigned = _assigned_names(_block_statements(node.body))
        assigned[name] = None
        before = dict(self.env)
        carried = [
            n
            for n in before
            if n in assigned and n != name and not isinstance(before[n], _Unbound)
        ]
        headers: dict[str, Var] = {}
        for n in carried:
            init = before[n]
            shape = init.shape if isinstance(init, Var) else "scalar"
            headers[n] = self.new_var(n, "local", shape)
            if shape == "list":
                self.list_root[headers[n]] = self.root_of(init)  # type: ignore[arg-type]
            if self.is_fresh(init):  # type: ignore[arg-type]
                self.fresh.add(headers[n])
            self.env[n] = headers[n]
        index_var = self.new_var(
            name if over_list is None else f"{name}_index", "index"
        )
        self.blocks.append([])
        self.loop_depth += 1
        if over_list is None:
            self.env[name] = index_var
        else:
            self.env[name] = self.emit(
                "getitem", (over_list, index_var), self.new_var(name, "local")
            )
        self.sequence(_block_statements(node.body))
        self.loop_depth -= 1
        body = self.blocks.pop()
        body_env = self.env
        self.env = dict(before)
        phis = []
        for n in carried:
            if headers[n].shape == "list" and self.root_of(
                before[n]  # type: ignore[arg-type]
            ) != self.root_of(
                body_env[n]
            ):  # type: ignore[arg-type]
                fail(
                    f"'{n}' is bound to a new list inside the loop (the reverse"
                    " sweep needs each list to stay one object)",
                    self.index.locate(node),
                    f"update the elements of {n} in place ({n}[i] = ...), with a"
                    " second list made before the loop for the new values",
                )
            exit_var = self.new_var(n, "local", headers[n].shape)
            phis.append(Phi(headers[n], before[n], body_env[n], exit_var))  # type: ignore[arg-type]
            if exit_var.shape == "list":
                self.list_root[exit_var] = self.root_of(headers[n])
            self.env[n] = exit_var
        for n in assigned:
            if n not in carried:
                self.env[n] = _Unbound(
                    f"'{n}' is assigned only inside the loop (which may run zero"
                    " times)",
                    "assign it before the loop",
                )
        self.origin = origin
        self.blocks[-1].append(
            Loop(index_var, start, stop, step, tuple(phis), tuple(body), origin)
        )
