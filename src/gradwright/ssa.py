"""Lowering a checked function to straight-line SSA.

One primitive per :class:`~gradwright.ir.Let`, every value named once. Re-binding a
source name makes a new value; tuple assignment evaluates every right-hand side
before binding (``a, b = b, a * b`` reads the old ``a``). Unsupported constructs are
rejected here, where they are met, with a located diagnostic.
"""

from __future__ import annotations

import itertools
import re

import libcst as cst

from .diagnostics import fail
from .frontend import CheckedFunction, ModuleIndex, literal_value, math_function_op
from .ir import Atom, Const, Let, Origin, Return, SSAFunction, Var
from .primitives import BINARY_OPERATORS, MATH_CONSTANTS, OPS

_BINARY_SYMBOLS: dict[type, str] = {
    cst.Add: "+",
    cst.Subtract: "-",
    cst.Multiply: "*",
    cst.Divide: "/",
    cst.FloorDivide: "//",
    cst.Modulo: "%",
    cst.Power: "**",
    cst.MatrixMultiply: "@",
    cst.LeftShift: "<<",
    cst.RightShift: ">>",
    cst.BitAnd: "&",
    cst.BitOr: "|",
    cst.BitXor: "^",
}

_AUGMENTED_SYMBOLS: dict[type, str] = {
    cst.AddAssign: "+",
    cst.SubtractAssign: "-",
    cst.MultiplyAssign: "*",
    cst.DivideAssign: "/",
    cst.FloorDivideAssign: "//",
    cst.ModuloAssign: "%",
    cst.PowerAssign: "**",
}

# Statement kinds we reject, with the message and the hint a user needs.
_STATEMENT_REJECTIONS: dict[type, tuple[str, str | None]] = {
    cst.While: (
        "while-loops are not supported (the trip count must be known when the loop"
        " starts)",
        "use `for _ in range(max_iter):` with an early exit test inside",
    ),
    cst.Try: (
        "try statements are not supported",
        "check inputs before calling the model; the gradient code cannot follow"
        " an exception",
    ),
    cst.With: ("with statements are not supported", None),
    cst.FunctionDef: (
        "nested function definitions are not supported",
        "define the helper at module level",
    ),
    cst.ClassDef: ("class definitions inside the model are not supported", None),
    cst.Global: (
        "global statements are not supported (the model must not change module"
        " state)",
        "pass the value in as a parameter and return it",
    ),
    cst.Nonlocal: ("nonlocal statements are not supported", None),
    cst.Del: ("del statements are not supported", None),
    cst.Raise: ("raise statements are not supported", None),
    cst.Assert: (
        "assert statements are not supported",
        "check inputs before calling the model",
    ),
    cst.Import: (
        "imports inside the model are not supported",
        "import at module level",
    ),
    cst.ImportFrom: (
        "imports inside the model are not supported",
        "import at module level",
    ),
    cst.If: (
        "if statements are not supported yet",
        "write the branch as arithmetic, or keep it out of the differentiated function",
    ),
    cst.For: (
        "for-loops are not supported yet",
        "unroll the loop by hand for now",
    ),
    cst.Break: ("break outside a loop", None),
    cst.Continue: ("continue outside a loop", None),
}

_EXPRESSION_REJECTIONS: dict[type, tuple[str, str | None]] = {
    cst.Lambda: (
        "lambda expressions are not supported",
        "define a module-level function",
    ),
    cst.ListComp: ("list comprehensions are not supported", None),
    cst.SetComp: ("set comprehensions are not supported", None),
    cst.DictComp: ("dict comprehensions are not supported", None),
    cst.GeneratorExp: ("generator expressions are not supported", None),
    cst.SimpleString: (
        "strings are not numbers: string operations are not supported",
        None,
    ),
    cst.ConcatenatedString: ("string operations are not supported", None),
    cst.FormattedString: ("f-strings are not supported", None),
    cst.Imaginary: ("complex numbers are not supported", None),
    cst.Comparison: ("comparisons are not supported yet", None),
    cst.BooleanOperation: ("and/or are not supported yet", None),
    cst.IfExp: ("conditional expressions are not supported yet", None),
    cst.Subscript: ("indexing is not supported yet", None),
    cst.Tuple: ("a tuple is not a number", None),
    cst.List: ("lists are not supported yet", None),
    cst.Dict: ("dicts are not supported", None),
    cst.Set: ("sets are not supported", None),
    cst.Await: ("await is not supported", None),
    cst.Yield: ("yield is not supported (generators cannot be differentiated)", None),
    cst.NamedExpr: (
        "assignment expressions (:=) are not supported",
        "assign on its own line",
    ),
    cst.StarredElement: ("starred expressions are not supported", None),
    cst.Ellipsis: ("... is not a number", None),
}

_WHITESPACE = re.compile(r"\s*\n\s*")


def _statement_text(index: ModuleIndex, node: cst.CSTNode) -> str:
    """The statement as written, on one line (for the quoting comments)."""
    return _WHITESPACE.sub(" ", index.code(node).strip())


def _assigned_names(statements: list[cst.CSTNode]) -> frozenset[str]:
    """Every name the function binds anywhere: Python makes those local throughout."""
    names: set[str] = set()
    for stmt in statements:
        if isinstance(stmt, cst.Assign):
            for target in stmt.targets:
                names.update(_target_names(target.target))
        elif isinstance(stmt, (cst.AugAssign, cst.AnnAssign)):
            names.update(_target_names(stmt.target))
    return frozenset(names)


def _target_names(target: cst.BaseExpression) -> list[str]:
    if isinstance(target, cst.Name):
        return [target.value]
    if isinstance(target, (cst.Tuple, cst.List)):
        return [n for el in target.elements for n in _target_names(el.value)]
    return []


class _Lowerer:
    def __init__(self, index: ModuleIndex, function: CheckedFunction) -> None:
        self.index = index
        self.function = function
        self.uids = itertools.count()
        self.lets: list[Let] = []
        self.env: dict[str, Atom] = {}
        self.local_names: frozenset[str] = frozenset()
        self.constants_read: dict[str, None] = {}
        self.origin = Origin("", 0)
        self.statement_count = itertools.count()

    # -- values -------------------------------------------------------------------

    def new_var(self, base: str, kind: str) -> Var:
        return Var(next(self.uids), base, kind)  # type: ignore[arg-type]

    def emit(self, op: str, args: tuple[Atom, ...], target: Var) -> Var:
        self.lets.append(Let(target, op, args, self.origin))
        return target

    def bind_value(self, node: cst.BaseExpression, base: str) -> Var:
        """Evaluate ``node`` into a fresh local value named after ``base``."""
        target = self.new_var(base, "local")
        atom = self.expr(node, base, target)
        if atom is not target:
            self.emit("copy", (atom,), target)
        return target

    # -- statements ---------------------------------------------------------------

    def lower(self) -> SSAFunction:
        node = self.function.node
        params = tuple(self.new_var(name, "param") for name in self.function.params)
        for param in params:
            self.env[param.base] = param
        body = node.body
        if not isinstance(body, cst.IndentedBlock):
            statements: list[cst.CSTNode] = list(body.body)  # def f(x): return x
        else:
            statements = []
            for stmt in body.body:
                if isinstance(stmt, cst.SimpleStatementLine):
                    statements.extend(stmt.body)
                else:
                    statements.append(stmt)
        if statements and _is_docstring(statements[0]):
            statements = statements[1:]
        self.local_names = _assigned_names(statements)
        result: Return | None = None
        for stmt in statements:
            if result is not None:
                fail(
                    "code after the return statement is never run",
                    self.index.locate(stmt),
                    "remove it, or move the return to the end",
                )
            self.origin = Origin(
                _statement_text(self.index, stmt), next(self.statement_count)
            )
            result = self.statement(stmt)
        if result is None:
            fail(
                f"'{self.function.name}' has no return statement: there is no result to"
                " differentiate",
                self.index.locate(node.name),
                "end the function with `return <expression>`",
            )
        assert result is not None
        return SSAFunction(
            self.function.name,
            params,
            tuple(self.lets),
            result,
            frozenset(self.local_names),
            tuple(self.constants_read),
        )

    def statement(self, stmt: cst.CSTNode) -> Return | None:
        if isinstance(stmt, cst.Pass):
            return None
        if isinstance(stmt, cst.Return):
            return self.return_statement(stmt)
        if isinstance(stmt, cst.Assign):
            self.assign(stmt)
            return None
        if isinstance(stmt, cst.AnnAssign):
            if stmt.value is None:
                fail(
                    "an annotation without a value binds nothing",
                    self.index.locate(stmt),
                )
            assert stmt.value is not None
            self.bind_targets([stmt.target], stmt.value)
            return None
        if isinstance(stmt, cst.AugAssign):
            self.augmented(stmt)
            return None
        if isinstance(stmt, cst.Expr):
            fail(
                "an expression statement has no effect on the result",
                self.index.locate(stmt),
                "assign the value to a name, or remove the statement",
            )
        message, hint = _STATEMENT_REJECTIONS.get(
            type(stmt), (f"{type(stmt).__name__} statements are not supported", None)
        )
        fail(message, self.index.locate(_keyword_span(stmt)), hint)
        return None

    def return_statement(self, stmt: cst.Return) -> Return:
        value = stmt.value
        if value is None:
            fail("return without a value: there is no result", self.index.locate(stmt))
        assert value is not None
        if isinstance(value, cst.Tuple):
            fail(
                "functions returning a tuple are not supported yet",
                self.index.locate(value),
                "differentiate one output at a time",
            )
        target = self.new_var("value", "local")
        atom = self.expr(value, "value", target)
        return Return((atom,), self.origin)

    def assign(self, stmt: cst.Assign) -> None:
        self.bind_targets([t.target for t in stmt.targets], stmt.value)

    def bind_targets(
        self, targets: list[cst.BaseAssignTargetExpression], value: cst.BaseExpression
    ) -> None:
        first = targets[0]
        for target in targets:
            self.check_target(target)
        if isinstance(first, (cst.Tuple, cst.List)):
            names = [el.value for el in first.elements]
            if not isinstance(value, (cst.Tuple, cst.List)):
                fail(
                    "tuple unpacking needs a tuple of expressions on the right",
                    self.index.locate(value),
                    "write `a, b = expr_a, expr_b`",
                )
            assert isinstance(value, (cst.Tuple, cst.List))
            if len(value.elements) != len(names):
                fail(
                    f"cannot unpack {len(value.elements)} values into {len(names)}"
                    " names",
                    self.index.locate(value),
                )
            # every right-hand side is evaluated before any name is bound
            computed = [
                self.bind_value(el.value, name.value)  # type: ignore[union-attr]
                for el, name in zip(value.elements, names, strict=True)
            ]
            for name, var in zip(names, computed, strict=True):
                self.env[name.value] = var  # type: ignore[union-attr]
            if len(targets) > 1:
                fail(
                    "chained tuple assignment is not supported",
                    self.index.locate(first),
                )
            return
        assert isinstance(first, cst.Name)
        var = self.bind_value(value, first.value)
        self.env[first.value] = var
        for other in targets[1:]:
            if not isinstance(other, cst.Name):
                fail(
                    "chained tuple assignment is not supported",
                    self.index.locate(other),
                )
            assert isinstance(other, cst.Name)
            self.env[other.value] = self.emit(
                "copy", (var,), self.new_var(other.value, "local")
            )

    def check_target(self, target: cst.BaseExpression) -> None:
        if isinstance(target, cst.Name):
            return
        if isinstance(target, (cst.Tuple, cst.List)):
            for el in target.elements:
                if not isinstance(el.value, cst.Name):
                    self.check_target(el.value)
                    fail("only names can be unpacked into", self.index.locate(el.value))
            return
        if isinstance(target, cst.Attribute):
            fail(
                "assigning to an attribute is not supported (the model must not"
                " change objects)",
                self.index.locate(target),
                "assign to a local name",
            )
        if isinstance(target, cst.Subscript):
            fail(
                "assigning to an element is not supported yet",
                self.index.locate(target),
            )
        fail("unsupported assignment target", self.index.locate(target))

    def augmented(self, stmt: cst.AugAssign) -> None:
        target = stmt.target
        self.check_target(target)
        assert isinstance(target, cst.Name)
        symbol = _AUGMENTED_SYMBOLS.get(type(stmt.operator))
        if symbol is None:
            fail(
                "this augmented assignment is not supported",
                self.index.locate(stmt.operator),
                "supported: += -= *= /= //= %= **=",
            )
        assert symbol is not None
        current = self.read_name(target)
        operand = self.expr(stmt.value, target.value, None)
        var = self.new_var(target.value, "local")
        self.emit(BINARY_OPERATORS[symbol], (current, operand), var)
        self.env[target.value] = var

    # -- expressions --------------------------------------------------------------

    def expr(self, node: cst.BaseExpression, base: str, target: Var | None) -> Atom:
        """Lower ``node``; its outermost primitive defines ``target`` when given."""
        if isinstance(node, (cst.Integer, cst.Float)):
            return Const(_normalize_number(node.value), literal_value(node))
        if isinstance(node, cst.Name):
            return self.read_name(node)
        if isinstance(node, cst.Attribute):
            return self.attribute(node)
        if isinstance(node, cst.UnaryOperation):
            return self.unary(node, base, target)
        if isinstance(node, cst.BinaryOperation):
            symbol = _BINARY_SYMBOLS[type(node.operator)]
            op = BINARY_OPERATORS.get(symbol)
            if op is None:
                fail(
                    f"the {symbol} operator is not supported on numbers here",
                    self.index.locate(node.operator),
                    "supported: + - * / // % **",
                )
            assert op is not None
            left = self.expr(node.left, base, None)
            right = self.expr(node.right, base, None)
            return self.emit(op, (left, right), target or self.new_var(base, "temp"))
        if isinstance(node, cst.Call):
            return self.call(node, base, target)
        message, hint = _EXPRESSION_REJECTIONS.get(
            type(node), (f"{type(node).__name__} expressions are not supported", None)
        )
        fail(message, self.index.locate(node), hint)
        raise AssertionError  # unreachable

    def read_name(self, node: cst.Name) -> Atom:
        name = node.value
        if name in self.env:
            return self.env[name]
        if name in self.local_names:
            fail(
                f"'{name}' is used before it is assigned",
                self.index.locate(node),
                "assign it earlier in the function",
            )
        if name in self.index.constants:
            self.constants_read[name] = None
            return Const(name, None)
        imported = self.index.math_names.get(name)
        if imported in MATH_CONSTANTS:
            return Const(f"math.{imported}", MATH_CONSTANTS[imported])
        if name in ("True", "False", "None"):
            fail(f"{name} is not a number", self.index.locate(node))
        if name in self.index.functions or imported is not None:
            fail(
                f"'{name}' is a function: call it",
                self.index.locate(node),
            )
        if name in self.index.module_names:
            fail(
                f"'{name}' is not a numeric module-level constant",
                self.index.locate(node),
                "models may read module-level names bound once to a number, such as"
                " `GRAVITY = 9.80665`",
            )
        fail(
            f"name '{name}' is not defined",
            self.index.locate(node),
            "a model reads its parameters, its own variables, math, and module-level"
            " numeric constants",
        )
        raise AssertionError  # unreachable

    def attribute(self, node: cst.Attribute) -> Atom:
        if (
            isinstance(node.value, cst.Name)
            and node.value.value in self.index.math_modules
        ):
            if node.attr.value in MATH_CONSTANTS:
                return Const(f"math.{node.attr.value}", MATH_CONSTANTS[node.attr.value])
            fail(
                f"math.{node.attr.value} is not a supported constant",
                self.index.locate(node),
                "supported: " + ", ".join(f"math.{c}" for c in MATH_CONSTANTS),
            )
        fail(
            "attribute access is not supported",
            self.index.locate(node),
            "models read plain names; math functions and constants are the exception",
        )
        raise AssertionError  # unreachable

    def unary(self, node: cst.UnaryOperation, base: str, target: Var | None) -> Atom:
        operator = node.operator
        if isinstance(operator, (cst.Minus, cst.Plus)):
            if isinstance(node.expression, (cst.Integer, cst.Float)) and not (
                node.expression.lpar
            ):
                # a negative literal is one constant, not an operation
                sign = "-" if isinstance(operator, cst.Minus) else ""
                value = literal_value(node.expression)
                return Const(
                    sign + _normalize_number(node.expression.value),
                    -value if sign else value,
                )
            operand = self.expr(node.expression, base, None)
            op = "neg" if isinstance(operator, cst.Minus) else "pos"
            return self.emit(op, (operand,), target or self.new_var(base, "temp"))
        fail(
            "this unary operator is not supported on numbers",
            self.index.locate(node),
        )
        raise AssertionError  # unreachable

    def call(self, node: cst.Call, base: str, target: Var | None) -> Atom:
        func = node.func
        op = math_function_op(self.index, func)
        if (
            op is None
            and isinstance(func, cst.Name)
            and func.value in ("abs", "min", "max")
        ):
            if func.value not in self.index.module_names:
                op = func.value
        if op is None:
            self.reject_call(func)
        assert op is not None
        for arg in node.args:
            if arg.keyword is not None or arg.star:
                fail(
                    "keyword and starred arguments are not supported in this call",
                    self.index.locate(arg),
                )
        spec = OPS[op]
        count = len(node.args)
        if op in ("min", "max"):
            if count < 2:
                fail(
                    f"{op}() needs two or more numbers here",
                    self.index.locate(node),
                    f"write {op}(a, b, ...)",
                )
        elif count < spec.min_args or (
            spec.max_args is not None and count > spec.max_args
        ):
            expected = (
                str(spec.min_args)
                if spec.max_args == spec.min_args
                else (
                    f"{spec.min_args} or more"
                    if spec.max_args is None
                    else f"{spec.min_args} to {spec.max_args}"
                )
            )
            fail(
                f"{spec.symbol}() takes {expected} arguments, not {count}",
                self.index.locate(node),
            )
        args = tuple(self.expr(a.value, base, None) for a in node.args)
        if op in ("min", "max"):
            # min(a, b, c) == min(min(a, b), c), selecting the same element
            acc = args[0]
            for i, arg in enumerate(args[1:], start=2):
                last = i == count
                acc = self.emit(
                    op,
                    (acc, arg),
                    (target if last and target else self.new_var(base, "temp")),
                )
            return acc
        return self.emit(op, args, target or self.new_var(base, "temp"))

    def reject_call(self, func: cst.BaseExpression) -> None:
        loc = self.index.locate(func)
        if isinstance(func, cst.Attribute) and isinstance(func.value, cst.Name):
            if func.value.value in self.index.math_modules:
                fail(
                    f"math.{func.attr.value} is not supported",
                    loc,
                    "see the supported-subset table in the README",
                )
        if isinstance(func, cst.Name):
            name = func.value
            if name == self.function.name:
                fail(
                    f"'{name}' calls itself: recursion is not supported",
                    loc,
                    "rewrite the recursion as a loop",
                )
            if name in self.index.functions:
                fail(
                    f"calls to other functions ('{name}') are not supported yet",
                    loc,
                    "inline the helper into the model for now",
                )
            if name in self.index.math_names:
                fail(f"math.{self.index.math_names[name]} is not supported", loc)
        fail(
            "unsupported call",
            loc,
            "models call math functions, abs, min and max",
        )


def _is_docstring(stmt: cst.CSTNode) -> bool:
    return isinstance(stmt, cst.Expr) and isinstance(
        stmt.value, (cst.SimpleString, cst.ConcatenatedString)
    )


def _keyword_span(stmt: cst.CSTNode) -> cst.CSTNode:
    """The part of a statement a caret should point at (the keyword and its test)."""
    for attr in ("test", "target", "name", "names"):
        child = getattr(stmt, attr, None)
        if isinstance(child, cst.CSTNode):
            return child
    return stmt


def _normalize_number(text: str) -> str:
    """A numeric literal as black prints it (lower-case prefix and exponent)."""
    lowered = text.lower()
    if lowered.startswith("0x"):
        return "0x" + text[2:].upper()
    return lowered


def lower(index: ModuleIndex, function: CheckedFunction) -> SSAFunction:
    return _Lowerer(index, function).lower()
