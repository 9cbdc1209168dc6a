"""Printing expression trees as Python source in black's style.

The text is what black itself would produce for a line that fits: spaces around
binary operators, ``**`` hugged between simple operands, ``-(x**2)`` made explicit,
and only the parentheses the tree's shape needs. Long lines are left to black
(see ``formatting.py``).
"""

from __future__ import annotations

from collections.abc import Callable, Mapping

from gradwright.calculus.primitives import (
    OPS,
    PREC_ATOM,
    PREC_COMPARE,
    PREC_IFEXP,
    PREC_UNARY,
)
from gradwright.ir import Apply, Bar, Const, Expr, Var, const

_COMPARISONS = frozenset({"lt", "le", "gt", "ge", "eq", "ne"})


class Printer:
    """Prints trees; ``name`` and ``bar_name`` give the output names of values."""

    def __init__(
        self,
        name: Callable[[Var], str],
        bar_name: Callable[[Var], str],
        callees: Mapping[str, str] | None = None,
        partials_name: Callable[[Var], str] | None = None,
        where_call: str | None = None,
        math_alias: str | None = None,
    ) -> None:
        self.name = name
        self.bar_name = bar_name
        self.partials_name = partials_name or (lambda var: f"{name(var)}_partials")
        #: for array code: conditionals print as this elementwise call (np.where)
        self.where_call = where_call
        #: the name the math module goes by when the model binds its own `math`
        self.math_alias = math_alias
        #: generated helper functions the printed text calls (``_gw_...``)
        self.helpers_used: set[str] = set()
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
            if self._sign_select(expr) is not None:
                return OPS["mul"].precedence
            if expr.op == "ifexp" and self.where_call is not None:
                return PREC_ATOM  # printed as a call: np.where(c, a, b)
            if self._kink_as_ifexp(expr):
                return PREC_IFEXP
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

    def _kink_as_ifexp(self, expr: Apply) -> bool:
        """Two-argument scalar max/min of names or numbers, printed as a test."""
        return (
            expr.op in ("max", "min")
            and len(expr.args) == 2
            and self.where_call is None
            and expr.op not in self.callees
            and all(isinstance(a, (Var, Bar, Const)) for a in expr.args)
        )

    def _sign_select(self, expr: Apply) -> Apply | None:
        """``np.where(c, a, -a)`` as ``a * (2.0 * c - 1.0)``: the same values (a
        product by exactly +1.0 or -1.0; signed zeros kept, NaN stays NaN) without
        np.where's branch per element, which costs about ten times as much on an
        unsorted mask (abs's slope over data of both signs)."""
        if expr.op != "ifexp" or self.where_call is None:
            return None
        body, test, orelse = expr.args
        if orelse != Apply("neg", (body,)):
            return None
        sign = Apply("sub", (Apply("mul", (const(2.0), test)), const(1.0)))
        return Apply("mul", (body, sign))

    def _wrap(self, expr: Expr, parens: bool) -> str:
        text = self._print(expr)
        return f"({text})" if parens else text

    def _print(self, expr: Expr) -> str:
        if isinstance(expr, Var):
            return self.name(expr)
        if isinstance(expr, Bar):
            return self.bar_name(expr.var)
        if isinstance(expr, Const):
            text = self._module_alias(expr.text)
            if "." in text and not text[0].isdigit():
                self.modules_used.add(text.lstrip("-").split(".")[0])
            return text
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
        if spec.syntax == "tuple":
            items = ", ".join(self._print(a) for a in args)
            return f"({items}{',' if len(args) == 1 else ''})"
        if spec.syntax == "repeat":
            fill, count = args
            parens = self.precedence(count) <= spec.precedence
            return f"[{self._print(fill)}] * {self._wrap(count, parens)}"
        if spec.syntax == "attr":
            head = self._wrap(args[0], self.precedence(args[0]) < PREC_ATOM)
            return f"{head}.{spec.symbol}"
        if spec.syntax == "method":
            head = self._wrap(args[0], self.precedence(args[0]) < PREC_ATOM)
            rest = ", ".join(self._print(a) for a in args[1:])
            return f"{head}.{spec.symbol}({rest})"
        if spec.syntax in ("index", "scatter"):
            return self._index(expr.op, spec.symbol, args)
        if spec.syntax == "listcall":
            parts = [a for a in args if not _is_keyword(a)]
            keywords = [self._print(a) for a in args if _is_keyword(a)]
            listed = f"[{', '.join(self._print(a) for a in parts)}]"
            return f"{spec.symbol}({', '.join([listed, *keywords])})"
        if spec.syntax == "partial":
            var, position = args
            assert isinstance(var, Var)
            return f"{self.partials_name(var)}[{self._print(position)}]"
        if self._kink_as_ifexp(expr):
            # max(a, b) keeps a unless b > a (min: unless b < a): the same value
            # as the call, NaNs included, at a third of a builtin call's cost
            a, b = (self._print(arg) for arg in args)
            test = ">" if expr.op == "max" else "<"
            if isinstance(args[1], Const):  # a clamp reads value-first
                flipped = "<" if test == ">" else ">"
                return f"{b} if {a} {flipped} {b} else {a}"
            return f"{b} if {b} {test} {a} else {a}"
        if spec.syntax == "call":
            symbol = self._module_alias(self.callees.get(expr.op, spec.symbol))
            if symbol.startswith("_gw_"):
                self.helpers_used.add(symbol)
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
        signed = self._sign_select(expr)
        if signed is not None:
            return self._print(signed)
        if expr.op == "ifexp" and self.where_call is not None:
            body, test, orelse = args
            parts = ", ".join(self._print(a) for a in (test, body, orelse))
            return f"{self.where_call}({parts})"
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

    def _module_alias(self, text: str) -> str:
        if self.math_alias is not None and text.lstrip("-").startswith("math."):
            return text.replace("math.", f"{self.math_alias}.", 1)
        return text

    def _index(self, op: str, symbol: str, args: tuple[Expr, ...]) -> str:
        if op == "shape_at":
            return f"{self._print(args[0])}.shape[{self._print(args[1])}]"
        if op == "npindex":
            container, pattern, *values = args
            assert isinstance(pattern, Const)
            inside = pattern.text.format(*(self._print(v) for v in values))
            head = self._wrap(container, self.precedence(container) < PREC_ATOM)
            return f"{head}[{inside}]"
        g, container, pattern, *values = args
        assert isinstance(pattern, Const)
        inside = pattern.text.format(*(self._print(v) for v in values))
        self.helpers_used.add(symbol)
        return f"{symbol}({self._print(g)}, {self._print(container)}, np.s_[{inside}])"


def _is_keyword(expr: Expr) -> bool:
    """A keyword argument carried as a constant (``axis=0``)."""
    return isinstance(expr, Const) and "=" in expr.text and expr.value is None
