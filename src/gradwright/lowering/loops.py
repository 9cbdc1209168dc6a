"""Lowering for and while loops: the loop, its carried values (one Phi each), its
bounds or test, and how it may end early (break, return: flags merged like any
value, see ``statements.py``)."""

from __future__ import annotations

from collections.abc import Callable

import libcst as cst

from gradwright.diagnostics import fail
from gradwright.ir import (
    Atom,
    Branch,
    Const,
    Let,
    Loop,
    Origin,
    Phi,
    Var,
)
from gradwright.lowering.base import (
    _RESULT,
    _RETURNED,
    _STOP,
    FALSE,
    TRUE,
    _Tuple,
    _Unbound,
    flow_base,
)
from gradwright.lowering.syntax import (
    _assigned_names,
    _block_statements,
    _contains_return,
    _may_break,
    _return_arity,
    _statement_text,
)


class LoopLowering:
    """Part of the lowering (see ``ssa._Lowerer``); state lives on the lowerer."""

    # -- loops --------------------------------------------------------------------

    def loop_statement(
        self, node: cst.For | cst.While, rest: tuple[list[cst.CSTNode], ...]
    ) -> bool:
        """A for or while statement, then ``rest`` (what runs next, see
        ``sequence``) on the paths where no return inside the loop ran; True
        when every path returned."""
        if isinstance(node, cst.For):
            self.for_statement(node)
        else:
            self.while_statement(node)
        returned = self.env.get(_RETURNED)
        if returned is None or returned is FALSE or isinstance(returned, _Unbound):
            return self.sequence(rest[0], rest[1:]) if rest else False
        if _endless(node):  # it ends only by a return: nothing runs after it
            if rest:
                self.recovering(self.never_reached, rest[0][0])
            if self.loop_depth:
                self.env[_STOP] = TRUE
            return not self.loop_depth
        # the code after the loop selects: the result the loop returned, or the
        # rest of the function
        origin = self.origin
        before = dict(self.env)
        self.blocks.append([])
        if self.loop_depth:  # inside an enclosing loop: it stops too
            self.env[_STOP] = TRUE
        returned_then = not self.loop_depth
        then_block, then_env = self.blocks.pop(), self.env
        self.env = dict(before)
        self.blocks.append([])
        returned_else = self.sequence(rest[0], rest[1:]) if rest else False
        else_block, else_env = self.blocks.pop(), self.env
        self.env = dict(before)
        merges = self.merge(before, then_env, else_env, returned_then, returned_else)
        self.origin = origin
        self.blocks[-1].append(
            Branch(returned, tuple(then_block), tuple(else_block), merges, origin)  # type: ignore[arg-type]
        )
        return returned_then and returned_else

    def never_reached(self, stmt: cst.CSTNode) -> None:
        fail(
            "code after a `while True:` loop with no break is never run (only a"
            " return ends the loop)",
            self.index.locate(stmt),
            "remove it, or end the loop with a break",
        )

    def for_statement(self, node: cst.For) -> None:
        if node.orelse is not None:
            fail(
                "for-else is not supported",
                self.index.locate(node.orelse),
                "set a flag before break and test it after the loop",
            )
        if node.asynchronous is not None:
            fail(
                "async for is not supported",
                self.index.locate(node),
                "use a plain for loop",
            )
        target_text = _statement_text(self.index, node.target)
        self.set_origin(
            f"for {target_text} in {_statement_text(self.index, node.iter)}:"
        )
        origin = self.origin
        names = _target_names(node.target)
        if names is None:
            fail(
                "the loop target must be a name or a tuple of names",
                self.index.locate(node.target),
                "write `for x, y in zip(xs, ys):` or `for i, x in enumerate(xs):`",
            )
        assert names is not None
        plan = self.iteration(node.iter, node.target)
        self.run_loop(plan, names, _block_statements(node.body), node, origin)

    def while_statement(self, node: cst.While) -> None:
        if node.orelse is not None:
            fail(
                "while-else is not supported",
                self.index.locate(node.orelse),
                "set a flag before break and test it after the loop",
            )
        self.set_origin(f"while {_statement_text(self.index, node.test)}:")
        origin = self.origin
        # the index counts the iterations run, from 0 (the saved lists' slot);
        # named k unless the model has a k of its own (a drag constant's k_2
        # reads as a version of it)
        taken = self.local_names | set(self.function.params)
        counter = "k" if "k" not in taken else "iteration"
        plan = (Const("0", 0), Const("0", 0), Const("1", 1), counter, lambda _: None)
        statements = _block_statements(node.body)
        test = node.test
        if isinstance(test, cst.Name) and test.value == "True":
            test = None  # `while True:` ends at a break or a return
        self.run_loop(plan, [], statements, node, origin, test, forever=test is None)

    def run_loop(
        self,
        plan: tuple[Atom, Atom, Atom, str, Callable[[Var], None]],
        names: list[str],
        statements: list[cst.CSTNode],
        node: cst.CSTNode,
        origin: Origin,
        test: cst.BaseExpression | None = None,
        forever: bool = False,
    ) -> None:
        """A loop over ``plan`` (see ``iteration``) binding ``names`` each
        iteration, with ``statements`` as its body; a while loop while ``test``
        holds."""
        start, stop, step, index_base, bind = plan
        assigned = _assigned_names(statements)
        for name in names:
            assigned[name] = None
        flow: set[str] = set()
        if _contains_return(statements):
            # a return inside: the result and the flag saying so are carried
            self.env.setdefault(_RETURNED, FALSE)
            for k in range(_return_arity(statements)):
                self.env.setdefault(f"{_RESULT}{k}", Const("0.0", 0.0))
            flow = {n for n in self.env if n == _RETURNED or n.startswith(_RESULT)}
        before = dict(self.env)
        # a tuple's elements are carried as names of their own
        carried = [
            n
            for n in before
            if (n in flow or n.split("\0")[0] in assigned)
            and n not in names
            and not isinstance(before[n], (_Unbound, _Tuple))
        ]
        headers: dict[str, Var] = {}
        for n in carried:
            init = before[n]
            shape = init.shape if isinstance(init, Var) else "scalar"
            headers[n] = self.new_var(flow_base(n), "local", shape)
            if shape == "list":
                self.list_root[headers[n]] = self.root_of(init)  # type: ignore[arg-type]
            if self.is_fresh(init):  # type: ignore[arg-type]
                self.fresh.add(headers[n])
            if isinstance(init, Var) and shape == "scalar":
                self.copy_of[headers[n]] = init  # a parameter indexed in the loop
            self.env[n] = headers[n]
        index_var = self.new_var(index_base, "index")
        self.blocks.append([])
        self.loop_depth += 1
        self.env[_STOP] = FALSE  # no break yet in this iteration
        bind(index_var)
        condition: Atom | None = TRUE if forever else None
        if test is not None:  # computed at the head of every iteration
            condition = self.condition(test)
        test_size = len(self.blocks[-1]) if test is not None else 0
        self.sequence(statements)
        self.loop_depth -= 1
        body = self.blocks.pop()
        body_env = self.env
        self.env = dict(before)
        phis = []
        # names the body binds to another list (`u = new`, `u, v = v, u`): each
        # such header is a list of its own (assignments.check_rebound)
        rebound = self.check_rebound(carried, before, body_env, node)
        for n in rebound:
            self.list_root[headers[n]] = headers[n]
        for n in carried:
            exit_var = self.new_var(flow_base(n), "local", headers[n].shape)
            phis.append(Phi(headers[n], before[n], body_env[n], exit_var))  # type: ignore[arg-type]
            if exit_var.shape == "list":
                self.list_root[exit_var] = self.root_of(headers[n])
            self.env[n] = exit_var
        for n in assigned:
            if isinstance(before.get(n), _Tuple) and not _silent(body_env.get(n)):
                if body_env.get(n) != before[n]:
                    fail(
                        f"'{n}' is a tuple of another length at the end of the loop",
                        self.index.locate(node),
                        "keep the tuple's length the same in every iteration",
                    )
                self.env[n] = before[n]
                continue
            if _silent(before.get(n)) or _silent(body_env.get(n)):
                self.env[n] = _Unbound("", "", silent=True)  # reported already
            elif n not in carried:
                self.env[n] = _Unbound(
                    f"'{n}' is assigned only inside the loop (which may run zero"
                    " times)",
                    "assign it before the loop",
                )
        flag = body_env.get(_STOP)
        exit_flag = (
            None if flag is FALSE or not isinstance(flag, (Var, Const)) else flag
        )
        trips = None
        if condition is not None or exit_flag is not None:
            # the trip count is known when the loop ends: recorded for the reverse
            trips = self.new_var("iterations", "temp")
        self.origin = origin
        self.blocks[-1].append(
            Loop(
                index_var,
                start,
                stop,
                step,
                tuple(phis),
                tuple(body),
                origin,
                condition,
                test_size,
                exit_flag,
                trips,
            )
        )

    # -- what a loop runs over ------------------------------------------------------

    def iteration(
        self, iterable: cst.BaseExpression, target: cst.BaseExpression
    ) -> tuple[Atom, Atom, Atom, str, Callable[[Var], None]]:
        """The index range of a loop over ``iterable`` and how each iteration binds
        ``target`` from the index: (start, stop, step, index name, bind)."""
        call = _builtin_call(self, iterable)
        if call == "range" and isinstance(target, cst.Name):
            start, stop, step = self.range_bounds(iterable)  # type: ignore[arg-type]
            name = target.value
            return start, stop, step, name, lambda index: self.bind_name(name, index)
        if call == "reversed" and isinstance(target, cst.Name):
            inner = iterable.args[0].value  # type: ignore[attr-defined]
            if _builtin_call(self, inner) == "range":
                start, stop, step = self.range_bounds(inner)  # type: ignore[arg-type]
                if not (isinstance(step, Const) and step.value == 1):
                    fail(
                        "reversed(range(...)) with a step is not supported",
                        self.index.locate(inner),
                        "write range(start, stop, -step) with the bounds you mean",
                    )
                one = Const("1", 1)
                first = self.emit("sub", (stop, one), self.new_var("start", "temp"))
                last = self.emit("sub", (start, one), self.new_var("stop", "temp"))
                name = target.value
                bind = lambda index: self.bind_name(name, index)  # noqa: E731
                return first, last, Const("-1", -1), name, bind
        length, read, _ = self.sequence_reader(iterable)

        def bind(index: Var) -> None:
            self.bind_target(target, read(index), index)

        # the index is named for the target: `for reading in readings` counts with
        # reading_index; `for i, x in enumerate(xs)` with i itself
        # (the first name that is not `_`: `for _, q in BOOK` counts with q_index)
        named = [n for n in _target_names(target) if n != "_"]
        base = f"{named[0] if named else 'row'}_index"
        if (
            call == "enumerate"
            and isinstance(target, (cst.Tuple, cst.List))
            and len(iterable.args) == 1  # type: ignore[attr-defined]
            and isinstance(target.elements[0].value, cst.Name)
        ):
            base = target.elements[0].value.value
        return Const("0", 0), length, Const("1", 1), base, bind

    def range_bounds(self, node: cst.Call) -> tuple[Atom, Atom, Atom]:
        args = node.args
        if not 1 <= len(args) <= 3 or any(a.keyword or a.star for a in args):
            fail(
                "range() takes one to three positional arguments",
                self.index.locate(node),
                "write range(stop), range(start, stop) or range(start, stop, step)",
            )
        bounds = [self.scalar(self.expr(a.value, "range", None), a.value) for a in args]
        if len(bounds) == 1:
            return Const("0", 0), bounds[0], Const("1", 1)
        if len(bounds) == 2:
            return bounds[0], bounds[1], Const("1", 1)
        return bounds[0], bounds[1], bounds[2]

    def bind_name(self, name: str, value: Atom) -> None:
        self.env[name] = value

    def sequence_reader(
        self, node: cst.BaseExpression
    ) -> tuple[Atom, Callable[[Var], object], str]:
        """(length, read, index name): ``read(index)`` gives what iteration
        ``index`` binds (a value, or a tuple of them for zip and enumerate)."""
        call = _builtin_call(self, node)
        if call in ("zip", "enumerate", "reversed") and any(
            a.keyword or a.star for a in node.args  # type: ignore[attr-defined]
        ):
            if call != "enumerate" or any(
                a.star or (a.keyword and a.keyword.value != "start")
                for a in node.args  # type: ignore[attr-defined]
            ):
                fail(
                    f"{call}() takes plain arguments here",
                    self.index.locate(node),
                    "pass the sequences by position: zip(xs, ys)",
                )
        if call == "zip":
            parts = [self.sequence_reader(a.value) for a in node.args]  # type: ignore[attr-defined]
            if len(parts) < 2:
                fail(
                    "zip() needs two or more sequences here",
                    self.index.locate(node),
                    "loop over the sequence itself: for x in xs",
                )
            length = parts[0][0]
            made = {s.target: s for s in self.blocks[-1] if isinstance(s, Let)}
            for other, _, _ in parts[1:]:  # zip stops at the shortest
                if not _same_count(length, other, made):  # zip(q[1:], q[:-1])
                    length = self.emit(
                        "min", (length, other), self.new_var("n", "temp")
                    )
            readers = [read for _, read, _ in parts]
            return length, lambda i: tuple(r(i) for r in readers), parts[0][2]
        if call == "enumerate":
            args = node.args  # type: ignore[attr-defined]
            if not 1 <= len(args) <= 2:
                fail(
                    "enumerate() takes a sequence and a start",
                    self.index.locate(node),
                    "write enumerate(xs) or enumerate(xs, 1)",
                )
            length, read, base = self.sequence_reader(args[0].value)
            offset = (
                self.scalar(self.expr(args[1].value, "start", None), args[1].value)
                if len(args) == 2
                else Const("0", 0)
            )

            def counted(index: Var) -> tuple[object, object]:
                if isinstance(offset, Const) and offset.value == 0:
                    return index, read(index)
                position = self.emit("add", (index, offset), self.new_var("k", "temp"))
                return position, read(index)

            return length, counted, base
        if call == "reversed":
            args = node.args  # type: ignore[attr-defined]
            if len(args) != 1:
                fail(
                    "reversed() takes one sequence",
                    self.index.locate(node),
                    "write reversed(xs)",
                )
            length, read, base = self.sequence_reader(args[0].value)

            def backwards(index: Var) -> object:
                last = self.emit(
                    "sub", (length, Const("1", 1)), self.new_var("k", "temp")
                )
                position = self.emit("sub", (last, index), self.new_var("k", "temp"))
                return read(position)  # type: ignore[arg-type]

            return length, backwards, base
        rows = _literal_rows(node)
        if rows is not None:
            sizes = sorted({len(row) for row in rows})
            if len(sizes) > 1:
                fail(
                    "the rows here have different lengths"
                    f" ({', '.join(map(str, sizes))})",
                    self.index.locate(node),
                    "give every row the same number of values",
                )
            # rows written out, ((m1, r1), (m2, r2)): one list per column, read
            # together as zip(...) reads its lists; evaluated row by row, as written
            grid = [
                [self.scalar(self.expr(item, "values", None), item) for item in row]
                for row in rows
            ]
            columns = [
                self.emit(
                    "listlit",
                    tuple(row[j] for row in grid),
                    self.new_var("values", "local", "list"),
                )
                for j in range(len(grid[0]))
            ]
            count = Const(str(len(grid)), len(grid))
            return count, lambda i: tuple(self.element(c, i) for c in columns), "k"
        held = self.tuple_of(node)
        if isinstance(node, (cst.Tuple, cst.List)) or held is not None:
            # a tuple of values, written out or bound to a name: a local list of them
            if held is not None:
                values = tuple(held)
            else:
                values = tuple(
                    self.scalar(self.expr(el.value, "values", None), el.value)
                    for el in node.elements  # type: ignore[attr-defined]
                )
            if not values or any(
                isinstance(el, cst.StarredElement)
                for el in getattr(node, "elements", ())
            ):
                fail(
                    "loop over a tuple of plain values",
                    self.index.locate(node),
                    "write the values out: for q in (q1, q2, q3)",
                )
            listed = self.emit(
                "listlit", values, self.new_var("values", "local", "list")
            )
            count = Const(str(len(values)), len(values))
            return count, lambda i: self.element(listed, i), "k"
        sliced = self.slice_reader(node)  # xs[1:], TABLE[:-1] (comprehensions.py)
        if sliced is not None:
            return sliced
        found = self.dict_reader(node)  # a constant dict (lowering/dicts.py)
        if found is not None:
            return found
        copied = self.env.get(node.value) if isinstance(node, cst.Name) else None
        if self.data_root(node) is not None or (
            isinstance(copied, Var) and copied in self.opaque_sequences
        ):
            # module-level data, or a local table a statement copied as written
            # bound (rays = [(1.0, 0.0), ...]): its rows are inactive constants
            table = copied if copied is not None else self.data(node, "table")
            length = self.emit("len", (table,), self.new_var("n", "temp"))

            def row(index: Var) -> object:
                return _DataRow(self, table, index)

            return length, row, "row_index"
        sequence = self.expr(node, "xs", None)
        self.as_list(sequence)
        if not (isinstance(sequence, Var) and sequence.shape == "list"):
            fail(
                "for-loops run over range(...), a list, zip(...), enumerate(...) or"
                " reversed(...)",
                self.index.locate(node),
                "write `for i in range(n):`",
            )
        assert isinstance(sequence, Var)
        length = self.emit("len", (sequence,), self.new_var("n", "temp"))
        return length, lambda i: self.element(sequence, i), f"{sequence.base}_index"

    def element(self, sequence: Var, index: Atom) -> Callable[[str], Var]:
        """Reading one element, under the name of the target it binds."""
        return lambda name: self.emit(
            "getitem", (sequence, index), self.new_var(name, "local")
        )

    def bind_target(
        self, target: cst.BaseExpression, value: object, index: Var
    ) -> None:
        """Bind a loop target (a name or nested tuple of names) to what one
        iteration reads."""
        if isinstance(value, _DataRow):
            value = value.unpacked(target)
        if isinstance(target, cst.Name):
            if isinstance(value, tuple):
                fail(
                    f"each item here is a tuple of {len(value)} values",
                    self.index.locate(target),
                    "unpack it: `for a, b in ...`",
                )
            # an element is read under the target's name (``x = xs[i]``)
            name = target.value
            self.env[name] = value(name) if callable(value) else value  # type: ignore[assignment]
            return
        assert isinstance(target, (cst.Tuple, cst.List))
        elements = [el.value for el in target.elements]
        if callable(value) and not isinstance(value, tuple):
            # a row of a list the model was given (`for k, (t, v) in
            # enumerate(log)`): read once, its items by position, as data
            row = value("row")
            if not self.never_active(row):
                fail(
                    "the rows this loop target unpacks are data, with no"
                    " derivative, but they depend on the --wrt parameters",
                    self.index.locate(target),
                    "a list of rows is data: leave it out of --wrt (parameters"
                    " are numbers or lists of numbers)",
                )
            value = row_items(self, row, len(elements))
        if not isinstance(value, tuple) or len(value) != len(elements):
            fail(
                "the loop target does not match what the loop runs over",
                self.index.locate(target),
                "zip(a, b) gives pairs, enumerate(xs) gives (index, value)",
            )
        for element, part in zip(elements, value, strict=True):  # type: ignore[arg-type]
            self.bind_target(element, part, index)


def _target_names(target: cst.BaseExpression) -> list[str]:
    """The names a loop target binds, in order (nested tuples flattened)."""
    if isinstance(target, (cst.Tuple, cst.List)):
        return [n for el in target.elements for n in _target_names(el.value)]
    return [target.value] if isinstance(target, cst.Name) else []


def _literal_rows(node: cst.BaseExpression) -> list[list[cst.BaseExpression]] | None:
    """The items of a tuple or list written out whose every element is itself a
    tuple or list (``[(m1, r1), (m2, r2)]``), row by row."""
    if not isinstance(node, (cst.Tuple, cst.List)) or not node.elements:
        return None
    rows = []
    for element in node.elements:
        row = element.value
        if isinstance(element, cst.StarredElement) or not isinstance(
            row, (cst.Tuple, cst.List)
        ):
            return None
        if not row.elements or any(
            isinstance(item, cst.StarredElement) for item in row.elements
        ):
            return None
        rows.append([item.value for item in row.elements])
    return rows


class _DataRow:
    """Element ``index`` of a module-level table: a number, or a row that a tuple
    target unpacks (``for t, conc in SAMPLES``)."""

    def __init__(self, lowering: object, table: Atom, index: Var) -> None:
        self.lowering, self.table, self.index = lowering, table, index

    def unpacked(self, target: cst.BaseExpression) -> object:
        low = self.lowering
        if isinstance(target, cst.Name):
            return lambda name: low.emit(  # type: ignore[attr-defined]
                "dataitem", (self.table, self.index), low.new_var(name, "local")  # type: ignore[attr-defined]
            )
        row = low.emit(  # type: ignore[attr-defined]
            "dataitem", (self.table, self.index), low.new_var("row", "temp")  # type: ignore[attr-defined]
        )
        return row_items(low, row, len(target.elements))  # type: ignore[attr-defined]


def row_items(lowering: object, row: Var, count: int) -> tuple[Callable, ...]:
    """Readers of a row's ``count`` items by position, each under the name of the
    target it binds (``t = row[0]``): data, with no derivative."""
    low = lowering

    def item(j: int) -> Callable[[str], Var]:
        def read(name: str) -> Var:
            var = low.emit(  # type: ignore[attr-defined]
                "dataitem", (row, Const(str(j), j)), low.new_var(name, "local")  # type: ignore[attr-defined]
            )
            low.fresh.discard(var)  # type: ignore[attr-defined]
            return var

        return read

    return tuple(item(j) for j in range(count))


def _endless(node: cst.For | cst.While) -> bool:
    """``while True:`` with no break: only a return ends it."""
    return (
        isinstance(node, cst.While)
        and isinstance(node.test, cst.Name)
        and node.test.value == "True"
        and not _may_break(_block_statements(node.body))
    )


def _silent(bound: object) -> bool:
    return isinstance(bound, _Unbound) and bound.silent


def _target_names(target: cst.BaseExpression) -> list[str] | None:
    if isinstance(target, cst.Name):
        return [target.value]
    if isinstance(target, (cst.Tuple, cst.List)):
        names: list[str] = []
        for element in target.elements:
            if isinstance(element, cst.StarredElement):
                return None
            inner = _target_names(element.value)
            if inner is None:
                return None
            names += inner
        return names
    return None


def _builtin_call(lowering: object, node: cst.BaseExpression) -> str | None:
    """``range``/``zip``/``enumerate``/``reversed`` when ``node`` calls the builtin
    (not a module-level name that shadows it)."""
    if (
        isinstance(node, cst.Call)
        and isinstance(node.func, cst.Name)
        and node.func.value in ("range", "zip", "enumerate", "reversed")
        and node.func.value not in lowering.index.module_names  # type: ignore[attr-defined]
    ):
        return node.func.value
    return None


def _same_count(a: Atom, b: Atom, made: dict[Var, Let]) -> bool:
    """Whether two lengths just computed are the same count (the same
    operations on the same values: ``max(len(q) - 1, 0)`` for ``q[1:]`` and
    ``q[:-1]``)."""
    if a == b:
        return True
    first, second = made.get(a), made.get(b)  # type: ignore[arg-type]
    return (
        first is not None
        and second is not None
        and first.op == second.op
        and len(first.args) == len(second.args)
        and all(
            _same_count(x, y, made)
            for x, y in zip(first.args, second.args, strict=True)
        )
    )
