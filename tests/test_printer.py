"""Exact-text tests of the C expression printer."""

from __future__ import annotations

import numpy as np
import pytest
import sympy as sp

from codegen.emit.printer import Printer, literal

x, y = sp.symbols("x y", real=True)


@pytest.mark.parametrize("expr, float_text, double_text", [
    (x ** 2, "(x*x)", "(x*x)"),
    (x ** 3 * y, "(x*x*x)*y", "(x*x*x)*y"),
    (x ** -2, "(1.0F/(x*x))", "(1.0/(x*x))"),
    (sp.sqrt(x), "sqrtf(x)", "sqrt(x)"),
    (x ** sp.Rational(5, 2), "powf(x, 2.5F)", "pow(x, 2.5)"),
    (sp.sin(x), "sinf(x)", "sin(x)"),
    (sp.exp(x), "expf(x)", "exp(x)"),
    (sp.Abs(x), "fabsf(x)", "fabs(x)"),
    (sp.atan2(y, x), "atan2f(y, x)", "atan2(y, x)"),
    (sp.pi * x, "3.14159274F*x", "3.141592653589793*x"),
    (sp.Rational(1, 10), "0.100000001F", "0.1"),
    (sp.Piecewise((x, x < 0), (y, True)), "(((x < 0.0F)) ? (x) : (y))",
     "(((x < 0.0)) ? (x) : (y))"),
])
def test_expressions_print_in_each_precision(expr, float_text, double_text):
    assert Printer("float").expr(expr) == float_text
    assert Printer("double").expr(expr) == double_text


@pytest.mark.parametrize("expr, text", [
    (x - 2 * y, "x - (2.0F*y)"),
    (-x * y + 3, "-(x*y) + 3.0F"),
    ((x - y / 3) / y, "(x - ((0.333333343F)*y))/y"),
    (sp.sin(x) * y + x ** 2, "(x*x) + (y*sinf(x))"),
])
def test_products_in_sums_are_parenthesized(expr, text):
    # MISRA C:2012 rule 12.1: make operator precedence explicit.
    assert Printer("float").expr(expr) == text


def test_float_text_has_no_double_literal_or_function():
    expr = sp.sin(x) / 3 + sp.exp(-x) * sp.pi + sp.Rational(7, 10) * x ** 2 + sp.sqrt(y) + sp.E
    text = Printer("float").expr(expr)
    import re

    literals = re.findall(r"\d+\.\d+(?:e[-+]?\d+)?F?", text)
    assert literals and all(lit.endswith("F") for lit in literals), text
    for fn in ("sin(", "exp(", "sqrt(", "pow("):
        assert fn not in text.replace("sinf(", "").replace("expf(", "").replace("sqrtf(", "")


@pytest.mark.parametrize("value", [sp.Rational(1, 3), sp.Rational(2, 7), sp.sqrt(2), sp.pi,
                                   sp.Rational(-2187, 6784), sp.Rational(1, 10 ** 30)])
def test_literals_round_trip_and_are_correctly_rounded(value):
    # Correct rounding: the printed float32 is the one nearest to the exact value (mpmath at
    # 50 digits is the outside reference).
    import mpmath

    mpmath.mp.dps = 50
    exact = mpmath.mpf(sp.N(value, 50))
    f_text = literal(value, "float")
    f = np.float32(f_text[:-1])
    for neighbour in (np.nextafter(f, np.float32(np.inf)), np.nextafter(f, np.float32(-np.inf))):
        assert abs(mpmath.mpf(float(f)) - exact) <= abs(mpmath.mpf(float(neighbour)) - exact)
    d = float(literal(value, "double"))
    assert d == float(mpmath.nstr(exact, 40))
