"""The model's expression language: Python syntax, translated node by node into sympy.

No eval and no sympify of user text: only the declared names, numbers and a whitelist of math
functions can appear.
"""

from __future__ import annotations

import ast
import math

import sympy as sp

from ..errors import ModelError, located
from .types import CONSTANTS, FUNCTION_ARITY, FUNCTIONS, _suggest, check_finite

_BINOPS = {ast.Add: lambda a, b: a + b, ast.Sub: lambda a, b: a - b,
           ast.Mult: lambda a, b: a * b, ast.Div: lambda a, b: a / b,
           ast.Pow: lambda a, b: a ** b}
_COMPARE = {ast.Lt: sp.StrictLessThan, ast.LtE: sp.LessThan, ast.Gt: sp.StrictGreaterThan,
            ast.GtE: sp.GreaterThan}
_FORBIDDEN = {
    ast.Attribute: "attribute access", ast.Lambda: "a lambda", ast.Subscript: "indexing",
    ast.ListComp: "a comprehension", ast.GeneratorExp: "a comprehension",
    ast.DictComp: "a comprehension", ast.SetComp: "a comprehension", ast.Starred: "unpacking",
    ast.JoinedStr: "a string", ast.NamedExpr: "an assignment", ast.IfExp: "'if ... else' "
    "(use Piecewise)", ast.Await: "await", ast.Yield: "yield", ast.Dict: "a dict", ast.Set: "a set",
    ast.List: "a list",
}


def parse_expression(text, symbols: dict[str, sp.Symbol], where: str, item: str) -> sp.Expr:
    """Translate one expression string into sympy, allowing only declared names and FUNCTIONS."""
    if not isinstance(text, str):
        if isinstance(text, (int, float)) and not isinstance(text, bool):
            check_finite(text, where, item)
            return sp.Rational(repr(float(text)))
        raise ModelError(located(where, item, f"expected an expression string, got {text!r}"))
    if not text.strip():
        raise ModelError(located(where, item, "empty expression"))
    try:
        tree = ast.parse(text.strip(), mode="eval")
    except SyntaxError as exc:
        raise ModelError(located(where, item, f"cannot parse {text.strip()!r}: {exc.msg}; "
                                 "write plain math such as 'a*x + b'")) from None
    translator = _Translator(symbols, where, item)
    expr = translator.visit(tree.body)
    if isinstance(expr, (sp.logic.boolalg.Boolean, sp.core.relational.Relational)) \
            and not isinstance(expr, sp.Expr):
        raise ModelError(located(where, item, "is a condition, not a value; use Piecewise((value, "
                                 "condition), (other, True))"))
    if expr.has(sp.zoo, sp.nan, sp.oo, -sp.oo):
        raise ModelError(located(where, item, "evaluates to an infinite or undefined value"))
    return expr


class _Translator:
    def __init__(self, symbols, where, item):
        self.symbols = symbols
        self.where = where
        self.item = item

    def fail(self, message):
        raise ModelError(located(self.where, self.item, message))

    def visit(self, node):
        if type(node) in _FORBIDDEN:
            self.fail(f"{_FORBIDDEN[type(node)]} is not allowed; expressions are plain math")
        method = getattr(self, "visit_" + type(node).__name__, None)
        if method is None:
            self.fail(f"'{type(node).__name__}' syntax is not allowed; expressions are plain math")
        return method(node)

    def visit_Constant(self, node):
        if isinstance(node.value, bool):
            return sp.true if node.value else sp.false
        if isinstance(node.value, int):
            return sp.Integer(node.value)
        if isinstance(node.value, float):
            if not math.isfinite(node.value):
                self.fail("numbers must be finite")
            return sp.Rational(repr(node.value))
        self.fail(f"{node.value!r} is not a number")

    def visit_Name(self, node):
        if node.id in self.symbols:
            return self.symbols[node.id]
        if node.id in CONSTANTS:
            return CONSTANTS[node.id]
        if node.id in FUNCTIONS:
            self.fail(f"'{node.id}' is a function; call it with arguments")
        self.fail(f"unknown symbol '{node.id}'{_suggest(node.id, self.symbols)}")

    def visit_BinOp(self, node):
        op = _BINOPS.get(type(node.op))
        if op is None:
            if isinstance(node.op, ast.BitAnd):
                return sp.And(self.condition(node.left), self.condition(node.right))
            if isinstance(node.op, ast.BitOr):
                return sp.Or(self.condition(node.left), self.condition(node.right))
            if isinstance(node.op, ast.BitXor):
                self.fail("'^' is not a power here; write x**2")
            self.fail(f"operator '{type(node.op).__name__}' is not allowed; use + - * / **")
        left, right = self.value(node.left), self.value(node.right)
        if isinstance(node.op, ast.Div) and right == 0:
            self.fail("division by zero")
        return op(left, right)

    def visit_UnaryOp(self, node):
        if isinstance(node.op, ast.USub):
            return -self.value(node.operand)
        if isinstance(node.op, ast.UAdd):
            return self.value(node.operand)
        if isinstance(node.op, (ast.Not, ast.Invert)):
            return sp.Not(self.condition(node.operand))
        self.fail("unsupported unary operator")

    def visit_Compare(self, node):
        parts = []
        left = self.value(node.left)
        for op, comparator in zip(node.ops, node.comparators):
            if type(op) not in _COMPARE:
                self.fail("only < <= > >= comparisons are allowed in conditions")
            right = self.value(comparator)
            parts.append(_COMPARE[type(op)](left, right))
            left = right
        return sp.And(*parts) if len(parts) > 1 else parts[0]

    def visit_BoolOp(self, node):
        values = [self.condition(v) for v in node.values]
        return sp.And(*values) if isinstance(node.op, ast.And) else sp.Or(*values)

    def visit_Call(self, node):
        if not isinstance(node.func, ast.Name):
            if type(node.func) in _FORBIDDEN:
                self.fail(f"{_FORBIDDEN[type(node.func)]} is not allowed; expressions are plain "
                          "math")
            self.fail("only calls of whitelisted math functions are allowed")
        name = node.func.id
        if name not in FUNCTIONS:
            self.fail(f"function '{name}' is not supported; allowed: "
                      f"{', '.join(sorted(FUNCTIONS))}")
        if node.keywords:
            self.fail(f"'{name}' takes no keyword arguments")
        low, high = FUNCTION_ARITY.get(name, (1, 1))
        n = len(node.args)
        if n < low or (high is not None and n > high):
            want = f"{low}" if low == high else f"at least {low}"
            self.fail(f"'{name}' takes {want} argument(s), got {n}")
        if name == "Piecewise":
            return self.piecewise(node.args)
        return FUNCTIONS[name](*[self.value(a) for a in node.args])

    def piecewise(self, args):
        pieces = []
        for i, arg in enumerate(args):
            if not isinstance(arg, ast.Tuple) or len(arg.elts) != 2:
                self.fail("Piecewise takes (value, condition) pairs")
            pieces.append((self.value(arg.elts[0]), self.condition(arg.elts[1])))
        if pieces[-1][1] is not sp.true:
            self.fail("the last Piecewise pair must be (value, True) so every case has a value")
        return sp.Piecewise(*pieces)

    def value(self, node):
        v = self.visit(node)
        if not isinstance(v, sp.Expr):
            self.fail("a condition is used where a value is expected")
        return v

    def condition(self, node):
        v = self.visit(node)
        if isinstance(v, sp.Expr):
            self.fail("a value is used where a condition (like x > 0) is expected")
        return v

    def visit_Tuple(self, node):
        self.fail("a tuple is only allowed as a (value, condition) pair inside Piecewise")

