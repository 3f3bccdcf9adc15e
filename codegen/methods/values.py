"""Exact numbers from text: tableau and method entries such as 1, 0.5, "1/3" or "sqrt(3)/6".

Only numbers, + - * / **, parentheses, sqrt() and Rational() are accepted, parsed from Python's
syntax tree (no eval). A float or a decimal literal is taken as the exact decimal it is written as
(0.1 -> 1/10); whether any entry of a method was written that way decides whether its conditions
are checked exactly or to a tolerance (see types.DECIMAL_DATA_TOL).
"""

from __future__ import annotations

import ast

import sympy as sp

from ..errors import MethodError, located
from ..model.expressions import MAX_NESTING, nesting, power_problem

# Characters of one entry: the longest published coefficient in closed form is far shorter.
MAX_ENTRY_CHARS = 2000

_EXACT_FUNCTIONS = {"sqrt": sp.sqrt, "Rational": sp.Rational}


def exact(value, where: str = "", item: str = "") -> sp.Expr:
    """Turn a number or a string such as "1/3" or "sqrt(3)/6" into an exact sympy value.

    Floats are taken as the exact decimal they are written as (0.1 -> 1/10).
    """
    if isinstance(value, bool):
        raise MethodError(located(where, item, "expected a number or an exact string like \"1/3\""))
    if isinstance(value, int):
        return sp.Integer(value)
    if isinstance(value, float):
        if value != value or value in (float("inf"), float("-inf")):
            raise MethodError(located(where, item, "must be a finite number"))
        return sp.Rational(repr(value))
    if not isinstance(value, str):
        raise MethodError(located(where, item, "expected a number or an exact string like \"1/3\""))
    shown = repr(value if len(value) <= 60 else value[:60] + "...")
    if len(value) > MAX_ENTRY_CHARS or not value.isascii():
        raise MethodError(located(where, item, f"cannot read {shown}; write a number or an exact "
                                  "expression such as \"1/3\" (plain ASCII, at most "
                                  f"{MAX_ENTRY_CHARS} characters)"))
    try:
        tree = ast.parse(value.strip(), mode="eval")
    except (SyntaxError, ValueError, RecursionError, MemoryError):
        raise MethodError(located(where, item, f"cannot read {shown}; write a number or an exact "
                                  "expression such as \"1/3\" or \"sqrt(3)/6\"")) from None
    if nesting(tree.body) > MAX_NESTING:
        raise MethodError(located(where, item, f"{shown} is nested more than {MAX_NESTING} levels "
                                  "deep; write it flatter"))
    result = _exact_node(tree.body, shown, where, item)
    if result.has(sp.zoo, sp.nan, sp.oo, -sp.oo) or result.is_real is False \
            or not result.is_number:
        raise MethodError(located(where, item, f"{shown} is not a finite real number"))
    return result


def _exact_node(node, text, where, item):
    if isinstance(node, ast.Constant) and isinstance(node.value, (int, float)) \
            and not isinstance(node.value, bool):
        return exact(node.value, where, item)
    if isinstance(node, ast.UnaryOp) and isinstance(node.op, (ast.UAdd, ast.USub)):
        v = _exact_node(node.operand, text, where, item)
        return -v if isinstance(node.op, ast.USub) else v
    if isinstance(node, ast.BinOp) and isinstance(node.op, (ast.Add, ast.Sub, ast.Mult, ast.Div,
                                                            ast.Pow)):
        left = _exact_node(node.left, text, where, item)
        right = _exact_node(node.right, text, where, item)
        if isinstance(node.op, ast.Div) and right == 0:
            raise MethodError(located(where, item, f"division by zero in {text}"))
        problem = power_problem(left, right) if isinstance(node.op, ast.Pow) else ""
        if problem:
            raise MethodError(located(where, item, f"{text}: {problem}"))
        ops = {ast.Add: lambda x, y: x + y, ast.Sub: lambda x, y: x - y,
               ast.Mult: lambda x, y: x * y, ast.Div: lambda x, y: x / y,
               ast.Pow: lambda x, y: x ** y}
        return ops[type(node.op)](left, right)
    if isinstance(node, ast.Call) and isinstance(node.func, ast.Name) \
            and node.func.id in _EXACT_FUNCTIONS and not node.keywords:
        args = [_exact_node(arg, text, where, item) for arg in node.args]
        if node.func.id == "sqrt" and len(args) != 1 or \
                node.func.id == "Rational" and not (1 <= len(args) <= 2):
            wanted = "one argument" if node.func.id == "sqrt" else "p or p, q"
            raise MethodError(located(where, item, f"{text}: {node.func.id}() takes {wanted}"))
        if node.func.id == "Rational" and (not all(a.is_Rational for a in args)
                                           or len(args) == 2 and args[1] == 0):
            raise MethodError(located(where, item, f"{text}: Rational(p, q) takes whole "
                                      "numbers p and q with q not zero"))
        return _EXACT_FUNCTIONS[node.func.id](*args)
    raise MethodError(located(where, item, f"{text} is not an exact number; only numbers, "
                              "+ - * / **, parentheses, sqrt() and Rational() are allowed"))


def _vector(values, where, item):
    if not isinstance(values, list) or not values:
        raise MethodError(located(where, item, "must be a non-empty list of numbers"))
    return tuple(exact(v, where, f"{item}[{i}]") for i, v in enumerate(values))


def written_in_decimals(value) -> bool:
    """Whether a raw entry (number or string) holds a decimal literal such as 0.1666 or 1e-15.

    Such data are rounded by whoever wrote them, so the method's conditions can hold only to
    about the digits given.
    """
    if isinstance(value, float):
        return True
    if isinstance(value, list):
        return any(written_in_decimals(v) for v in value)
    if not isinstance(value, str):
        return False
    try:
        tree = ast.parse(value.strip(), mode="eval")
    except SyntaxError:
        return False
    return any(isinstance(node, ast.Constant) and isinstance(node.value, float)
               for node in ast.walk(tree))
