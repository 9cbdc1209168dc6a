"""Printing expression trees as Python source in black's style.

The text is what black itself would produce for a line that fits: spaces around
binary operators, ``**`` hugged between simple operands, ``-(x**2)`` made explicit,
and only the parentheses the tree's shape needs. Long lines are left to black
(see ``formatting.py``).
"""

from __future__ import annotations

from collections.abc import Callable, Mapping

from .ir import Apply, Bar, Const, Expr, Var
from .primitives import OPS, PREC_ATOM, PREC_COMPARE, PREC_IFEXP, PREC_UNARY

_COMPARISONS = frozenset({"lt", "le", "gt", "ge", "eq", "ne"})


class Printer:
    """Prints trees; ``name`` and ``bar_name`` give the output names of values."""

    def __init__(
        self,
        name: Callable[[Var], str],
        bar_name: Callable[[Var], str],
        callees: Mapping[str, str] | None = None,
        partials_name: Callable[[Var], str] | None = None,
    ) -> None:
        self.name = name
        self.bar_name = bar_name
        self.partials_name = partials_name or (lambda var: f"{name(var)}_partials")
        #: op key -> callee written instead of the op's own (a target's stand-in)
        self.callees: Mapping[str, str] = callees or {}
        #: top-level modules the printed text refers to, for the import list
        self.modules_used: set[str] = set()
        #: ops printed with a callee from ``callees``
        self.replaced_ops: set[str] = set()

    def __call__(self, expr: Expr) -> str:
        return self._print(expr)

    def precedence(self, expr: Expr) -> int:
        if isinstance(expr, Apply):
            if expr.op.startswith("call:"):
                return PREC_ATOM
            return OPS[expr.op].precedence
        if isinstance(expr, Const) and expr.text.startswith("-"):
            return PREC_UNARY
        return PREC_ATOM

    def _simple_power_operand(self, expr: Expr) -> bool:
        # black hugs ** between names, numbers, dotted names and their negation
        if isinstance(expr, (Var, Bar, Const)):
            return True
        return (
            isinstance(expr, Apply)
            and expr.op == "neg"
            and isinstance(expr.args[0], (Var, Bar, Const))
            and not self._print(expr.args[0]).startswith("-")
        )

    def _wrap(self, expr: Expr, parens: bool) -> str:
        text = self._print(expr)
        return f"({text})" if parens else text

    def _print(self, expr: Expr) -> str:
        if isinstance(expr, Var):
            return self.name(expr)
        if isinstance(expr, Bar):
            return self.bar_name(expr.var)
        if isinstance(expr, Const):
            if "." in expr.text and not expr.text[0].isdigit():
                self.modules_used.add(expr.text.lstrip("-").split(".")[0])
            return expr.text
        args = expr.args
        if expr.op.startswith("call:"):  # a function of the model's own file
            callee = expr.op.removeprefix("call:")
            return f"{callee}({', '.join(self._print(a) for a in args)})"
        spec = OPS[expr.op]
        if spec.syntax == "copy":
            return self._print(args[0])
        if spec.syntax == "subscript":
            container, index = args
            return f"{self._print(container)}[{self._print(index)}]"
        if spec.syntax == "list":
            return f"[{', '.join(self._print(a) for a in args)}]"
        if spec.syntax == "repeat":
            fill, count = args
            parens = self.precedence(count) <= spec.precedence
            return f"[{self._print(fill)}] * {self._wrap(count, parens)}"
        if spec.syntax == "partial":
            var, position = args
            assert isinstance(var, Var)
            return f"{self.partials_name(var)}[{self._print(position)}]"
        if spec.syntax == "call":
            symbol = self.callees.get(expr.op, spec.symbol)
            if symbol != spec.symbol:
                self.replaced_ops.add(expr.op)
            if "." in symbol:
                self.modules_used.add(symbol.split(".")[0])
            return f"{symbol}({', '.join(self._print(a) for a in args)})"
        if spec.syntax == "prefix":
            operand = args[0]
            inner = self.precedence(operand)
            # black writes -(x**2) although Python would not need the parentheses
            parens = inner < spec.precedence or (
                isinstance(operand, Apply) and operand.op == "pow"
            )
            return spec.symbol + self._wrap(operand, parens)
        if spec.syntax == "ifexp":
            body, test, orelse = args
            return (
                f"{self._wrap(body, self.precedence(body) <= PREC_IFEXP)} if "
                f"{self._wrap(test, self.precedence(test) <= PREC_IFEXP)} else "
                f"{self._wrap(orelse, self.precedence(orelse) <= PREC_IFEXP)}"
            )
        left, right = args
        p = spec.precedence
        lp, rp = self.precedence(left), self.precedence(right)
        if expr.op == "pow":
            # right-associative, and the exponent may be unary unparenthesized: x**-y
            left_parens, right_parens = lp <= p, rp < PREC_UNARY
        elif p == PREC_COMPARE:
            left_parens, right_parens = lp <= p, rp <= p
        else:
            left_parens, right_parens = lp < p, rp <= p
        left_text = self._wrap(left, left_parens)
        right_text = self._wrap(right, right_parens)
        if (
            expr.op == "pow"
            and not left_parens
            and not right_parens
            and self._simple_power_operand(left)
            and self._simple_power_operand(right)
        ):
            return f"{left_text}**{right_text}"
        return f"{left_text} {spec.symbol} {right_text}"
