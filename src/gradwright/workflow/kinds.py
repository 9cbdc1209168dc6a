"""What each parameter of a model function holds, read from its code (never run).

``verify`` and ``--emit-test`` draw a value for each parameter; a float drawn for a
list or a trip count puts every point outside the model's domain. The subset the
generator accepts says how each kind is used:

- a **list**: ``for v in xs``, ``xs[i]``, ``len(xs)``, ``sum(xs)`` (no numpy);
- a **trip count**: a name in ``range(...)``'s arguments, directly or through local
  arithmetic (``n = 2 * steps``), but not inside ``len(...)``;
- an **index**: a name inside ``xs[...]``;
- a NumPy **array**: in a module that imports numpy, an operand of ``@``, a name with
  an attribute (``x.T``, ``x.shape``), indexed or measured with ``len``; any other
  parameter of such a model may be a number or an array (``verify`` tries both);
- otherwise a **number**.

Calls to other functions of the module pass their parameters' kinds back to the
arguments given by name. These are guesses: ``verify`` says so when a point fails.
"""

from __future__ import annotations

import ast
from dataclasses import dataclass, field

NUMBER = "number"
LIST = "list"
COUNT = "trip count"
INDEX = "index"
ARRAY = "array"
NUMBER_OR_ARRAY = "number or array"

#: how the uses of a name are recorded while walking a function
_ITERATED, _INDEXED, _SIZED, _ARRAY_USE = "iterated", "indexed", "sized", "array"
_MEASURES = frozenset({"len", "sum"})


@dataclass
class _Uses:
    by_name: dict[str, set[str]] = field(default_factory=dict)
    counts: set[str] = field(default_factory=set)  # names in range(...) bounds
    indices: set[str] = field(default_factory=set)  # names inside x[...]

    def add(self, name: str, use: str) -> None:
        self.by_name.setdefault(name, set()).add(use)


def _names(node: ast.AST | None) -> set[str]:
    """Names read in ``node``, except the lists measured by ``len``/``sum`` and the
    containers of subscripts (their values are not the integer being computed)."""
    found: set[str] = set()
    if node is None:
        return found
    pending = [node]
    while pending:
        item = pending.pop()
        if isinstance(item, ast.Name):
            found.add(item.id)
        elif isinstance(item, ast.Call) and _callee(item) in _MEASURES:
            continue
        elif isinstance(item, ast.Subscript):
            pending.append(item.slice)
        else:
            pending.extend(ast.iter_child_nodes(item))
    return found


def _callee(call: ast.Call) -> str | None:
    return call.func.id if isinstance(call.func, ast.Name) else None


def _walk(function: ast.FunctionDef) -> _Uses:
    uses = _Uses()
    integer_locals: dict[str, set[str]] = {}  # local name -> names it is computed from
    for node in ast.walk(function):
        if isinstance(node, ast.For):
            if isinstance(node.iter, ast.Name):
                uses.add(node.iter.id, _ITERATED)
            elif isinstance(node.iter, ast.Call) and _callee(node.iter) == "range":
                for arg in node.iter.args:
                    uses.counts |= _names(arg)
        elif isinstance(node, ast.Subscript):
            if isinstance(node.value, ast.Name):
                uses.add(node.value.id, _INDEXED)
            uses.indices |= _names(node.slice)
        elif isinstance(node, ast.Call) and _callee(node) in _MEASURES:
            for arg in node.args:
                if isinstance(arg, ast.Name):
                    uses.add(arg.id, _SIZED)
        elif isinstance(node, ast.BinOp) and isinstance(node.op, ast.MatMult):
            for side in (node.left, node.right):
                if isinstance(side, ast.Name):
                    uses.add(side.id, _ARRAY_USE)
        elif isinstance(node, ast.Attribute) and isinstance(node.value, ast.Name):
            uses.add(node.value.id, _ARRAY_USE)
        elif isinstance(node, (ast.Assign, ast.AugAssign, ast.AnnAssign)):
            targets = node.targets if isinstance(node, ast.Assign) else [node.target]
            for target in targets:
                if isinstance(target, ast.Name):
                    integer_locals.setdefault(target.id, set()).update(
                        _names(node.value)
                    )
    # a local that bounds a loop or indexes makes what it is computed from do so
    for wanted in (uses.counts, uses.indices):
        pending = list(wanted)
        while pending:
            for source in integer_locals.get(pending.pop(), ()):
                if source not in wanted:
                    wanted.add(source)
                    pending.append(source)
    return uses


def _imports_numpy(tree: ast.Module) -> bool:
    for node in tree.body:
        if isinstance(node, ast.Import) and any(
            a.name.split(".")[0] == "numpy" for a in node.names
        ):
            return True
        if isinstance(node, ast.ImportFrom) and (node.module or "").startswith("numpy"):
            return True
    return False


def parameter_kinds(module_text: str, function: str) -> dict[str, str]:
    """Each parameter of top-level ``function`` in ``module_text``: its kind."""
    tree = ast.parse(module_text)
    functions = {n.name: n for n in tree.body if isinstance(n, ast.FunctionDef)}
    numpy = _imports_numpy(tree)
    return _kinds(functions, function, numpy, ())


def _parameters(function: ast.FunctionDef) -> list[str]:
    args = function.args
    return [a.arg for a in (*args.posonlyargs, *args.args, *args.kwonlyargs)]


def _kinds(
    functions: dict[str, ast.FunctionDef],
    name: str,
    numpy: bool,
    stack: tuple[str, ...],
) -> dict[str, str]:
    function = functions[name]
    params = _parameters(function)
    uses = _walk(function)
    kinds = {p: _kind(p, uses, numpy) for p in params}
    # a parameter handed on to a helper has the helper's parameter's kind
    for node in ast.walk(function):
        if not isinstance(node, ast.Call):
            continue
        callee = _callee(node)
        if callee not in functions or callee in stack or callee == name:
            continue
        inner = _kinds(functions, callee, numpy, (*stack, name))
        inner_params = _parameters(functions[callee])
        given = list(zip(inner_params, node.args, strict=False))
        given += [(k.arg, k.value) for k in node.keywords if k.arg is not None]
        for inner_name, arg in given:
            if isinstance(arg, ast.Name) and kinds.get(arg.id) in (
                NUMBER,
                NUMBER_OR_ARRAY,
            ):
                kinds[arg.id] = inner.get(inner_name, kinds[arg.id])
    return kinds


def _kind(name: str, uses: _Uses, numpy: bool) -> str:
    seen = uses.by_name.get(name, set())
    if name in uses.indices:
        return INDEX
    if name in uses.counts:
        return COUNT
    if numpy:
        return ARRAY if seen & {_INDEXED, _SIZED, _ARRAY_USE} else NUMBER_OR_ARRAY
    if seen & {_ITERATED, _INDEXED, _SIZED}:
        return LIST
    return NUMBER
