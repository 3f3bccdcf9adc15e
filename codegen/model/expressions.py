"""The model's expression language: Python syntax, translated node by node into sympy.

No eval and no sympify of user text: only the declared names, numbers and a whitelist of math
functions can appear. Long flat sums and products (spreadsheet-built models have thousands of
terms) are translated without recursion; only nesting (parentheses, calls, powers, unary signs)
costs depth, and beyond MAX_NESTING it is refused with one line.
"""

from __future__ import annotations

import ast
import contextlib
import math
import sys

import sympy as sp

from ..errors import ModelError, located
from .types import CONSTANTS, FUNCTION_ARITY, FUNCTIONS, _suggest, check_finite

_COMPARE = {ast.Lt: sp.StrictLessThan, ast.LtE: sp.LessThan, ast.Gt: sp.StrictGreaterThan,
            ast.GtE: sp.GreaterThan}
# Characters of one expression: a 5000-term sum of 'k12*sin(x3)' is about 70,000; beyond this
# the text is almost surely not meant as one formula, and parsing time grows with it.
MAX_EXPRESSION_CHARS = 400_000
# Operator characters of one expression (a number's exponent sign counts too). Python's parser
# builds a chain of n operators n levels deep, so parsing needs up to that much recursion (raised
# for the parse only); 100,000 is five times what a 5000-term sum of products has and keeps the
# parser inside an 8 MiB C stack (measured: a 300,000-term chain crashes it).
MAX_OPERATORS = 100_000
# Levels of nesting that are not a flat chain (parentheses, calls, powers, unary signs). Later
# passes (sympy's derivatives, CSE, the printer) recurse once or more per level; 64 is far above
# any physical model and well inside Python's default recursion limit for those passes.
MAX_NESTING = 64
# The largest finite double: a constant beyond it cannot be printed in any precision.
DOUBLE_MAX = sys.float_info.max
# Bits of the largest double's exponent: a power of numbers with more bits is beyond the range
# (and computing it exactly could take minutes).
DOUBLE_MAX_BITS = 1024
_ADDITIVE = (ast.Add, ast.Sub)
_MULTIPLICATIVE = (ast.Mult, ast.Div)
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
    text = text.strip()
    _check_text(text, where, item)
    try:
        with _recursion_for(text):
            tree = ast.parse(text, mode="eval")
    except SyntaxError as exc:
        raise ModelError(located(where, item, f"cannot parse {_shown(text)}: {exc.msg}; "
                                 "write plain math such as 'a*x + b'")) from None
    except (ValueError, RecursionError, MemoryError) as exc:
        # ValueError: an integer literal of thousands of digits; the others: no parse at all.
        raise ModelError(located(where, item, f"cannot parse {_shown(text)}: "
                                 f"{str(exc) or type(exc).__name__}; write plain math such as "
                                 "'a*x + b'")) from None
    depth = nesting(tree.body)
    if depth > MAX_NESTING:
        raise ModelError(located(where, item, f"nested {depth} levels deep (parentheses, calls, "
                                 f"powers, signs); at most {MAX_NESTING} are accepted: write "
                                 "it flatter or split it into outputs"))
    translator = _Translator(symbols, where, item)
    expr = translator.visit(tree.body)
    if isinstance(expr, (sp.logic.boolalg.Boolean, sp.core.relational.Relational)) \
            and not isinstance(expr, sp.Expr):
        raise ModelError(located(where, item, "is a condition, not a value; use Piecewise((value, "
                                 "condition), (other, True))"))
    if expr.has(sp.zoo, sp.nan, sp.oo, -sp.oo):
        raise ModelError(located(where, item, "evaluates to an infinite or undefined value"))
    for number in sorted(expr.atoms(sp.Number), key=abs, reverse=True)[:1]:
        if abs(number) > DOUBLE_MAX:
            raise ModelError(located(where, item, f"the number {_cut(str(number))} is beyond "
                                     "the range of double; rescale the model"))
    return expr


def power_problem(base: sp.Expr, exponent: sp.Expr) -> str:
    """What is wrong with base**exponent of two numbers, or '' (also for anything symbolic).

    A power of numbers beyond the double range is refused before it is computed:
    2**2**2**2**2**2 would take sympy minutes and end beyond any float; 0 to a negative power is a
    division by zero.
    """
    if not (base.is_Number and exponent.is_Number):
        return ""
    if base == 0:
        return "division by zero (zero to a negative power)" if exponent < 0 else ""
    if abs(base) == 1 or exponent == 0:
        return ""
    size = _log2_abs(exponent) + math.log2(max(abs(_log2_abs(base)), 1e-300))
    if size > math.log2(DOUBLE_MAX_BITS):
        return (f"the power {_cut(str(base))}**{_cut(str(exponent))} is beyond the range of "
                "double; rescale the model")
    return ""


def _log2_abs(number: sp.Number) -> float:
    """log2 |number| of a non-zero sympy number, without overflow for integers of any size."""
    if number.is_Rational:
        return math.log2(abs(int(number.p))) - math.log2(int(number.q))
    return math.log2(abs(float(number)))


def _cut(text: str, limit: int = 60) -> str:
    """Text cut to limit characters, so that a message stays short."""
    return text if len(text) <= limit else text[:limit] + "..."


def _shown(text: str) -> str:
    """User text quoted (and cut) for a message."""
    return repr(_cut(text))


def _check_text(text: str, where: str, item: str) -> None:
    """Refuse text no legitimate formula has: non-ASCII letters, control characters, huge size.

    Python folds look-alike letters (fullwidth, ligatures) into ASCII names (NFKC), so a rate
    could silently use a name that is not written in it; only ASCII is accepted.
    """
    for column, ch in enumerate(text, start=1):
        if not (32 <= ord(ch) < 127 or ch in "\t\n\r"):
            raise ModelError(located(where, item, f"character U+{ord(ch):04X} at column {column}"
                                     " is not allowed; expressions are plain ASCII math"))
    if len(text) > MAX_EXPRESSION_CHARS:
        raise ModelError(located(where, item, f"{len(text)} characters long; at most "
                                 f"{MAX_EXPRESSION_CHARS} are accepted in one expression"))
    if _operators(text) > MAX_OPERATORS:
        raise ModelError(located(where, item, f"about {_operators(text)} operators; at most "
                                 f"{MAX_OPERATORS} are accepted in one expression"))


def _operators(text: str) -> int:
    """How many operator characters text has: a bound on the depth of its syntax tree's chains."""
    return sum(text.count(op) for op in "+-*/<>=&|~")


@contextlib.contextmanager
def _recursion_for(text: str):
    """Raise Python's recursion limit for the parse: a chain of n operators is n levels deep."""
    old = sys.getrecursionlimit()
    sys.setrecursionlimit(old + min(_operators(text), MAX_OPERATORS) + 100)
    try:
        yield
    finally:
        sys.setrecursionlimit(old)


def _chain_children(node):
    """(child, same level) pairs: a flat chain's own continuation does not add a level."""
    if isinstance(node, ast.BinOp) and isinstance(node.op, _ADDITIVE + _MULTIPLICATIVE):
        group = _ADDITIVE if isinstance(node.op, _ADDITIVE) else _MULTIPLICATIVE
        left_same = isinstance(node.left, ast.BinOp) and isinstance(node.left.op, group)
        return [(node.left, left_same), (node.right, False)]
    return [(child, False) for child in ast.iter_child_nodes(node)]


def nesting(root: ast.AST) -> int:
    """Levels of nesting of a syntax tree, a flat chain of + - or * / counting as one level.

    Iterative, so a tree thousands of levels deep is measured without recursion.
    """
    deepest, stack = 0, [(root, 1)]
    while stack:
        node, depth = stack.pop()
        deepest = max(deepest, depth)
        for child, same in _chain_children(node):
            if not isinstance(child, (ast.operator, ast.unaryop, ast.boolop, ast.cmpop,
                                      ast.expr_context)):
                stack.append((child, depth if same else depth + 1))
    return deepest


def _chain(node, group):
    """A left-leaning chain a op b op c ... as its first operand and [(op, operand), ...]."""
    links = []
    while isinstance(node, ast.BinOp) and isinstance(node.op, group):
        links.append((node.op, node.right))
        node = node.left
    links.reverse()
    return node, links


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
        if isinstance(node.op, _ADDITIVE):
            first, links = _chain(node, _ADDITIVE)
            terms = [self.value(first)]
            for op, operand in links:
                term = self.value(operand)
                terms.append(term if isinstance(op, ast.Add) else -term)
            return sp.Add(*terms)
        if isinstance(node.op, _MULTIPLICATIVE):
            first, links = _chain(node, _MULTIPLICATIVE)
            factors = [self.value(first)]
            for op, operand in links:
                factor = self.value(operand)
                if isinstance(op, ast.Div):
                    if factor == 0:
                        self.fail("division by zero")
                    factor = 1 / factor
                factors.append(factor)
            return sp.Mul(*factors)
        if isinstance(node.op, ast.Pow):
            return self.power(self.value(node.left), self.value(node.right))
        if isinstance(node.op, ast.BitAnd):
            return sp.And(self.condition(node.left), self.condition(node.right))
        if isinstance(node.op, ast.BitOr):
            return sp.Or(self.condition(node.left), self.condition(node.right))
        if isinstance(node.op, ast.BitXor):
            self.fail("'^' is not a power here; write x**2")
        self.fail(f"operator '{type(node.op).__name__}' is not allowed; use + - * / **")

    def power(self, base, exponent):
        """base**exponent, refused (power_problem) before sympy computes it."""
        problem = power_problem(base, exponent)
        if problem:
            self.fail(problem)
        return base ** exponent

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
            try:
                parts.append(_COMPARE[type(op)](left, right))
            except TypeError:  # sympy refuses to order a non-real value (log(0), sqrt(-1))
                self.fail("compares a value that is not a finite real number")
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
        result = FUNCTIONS[name](*[self.value(a) for a in node.args])
        if result.has(sp.zoo, sp.nan, sp.oo, -sp.oo):
            self.fail(f"'{name}' of these arguments is infinite or undefined")
        return result

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

