"""How the C printer groups sums and products, for the code that follows the printed C exactly.

StepPrinter (printer.py) writes a sum term by term in its canonical order, a negative term as a
subtraction (a leading one as a negation), and a product as an optional sign, the numerator
factors, then '/' and the denominator (negative powers moved below the line). The operation count
(advice/cost.py) and the rounding-error bound (verify/bound.py) walk expressions in the same
order and grouping, so they describe the operations the C performs, not sympy's tree.
"""

from __future__ import annotations

import sympy as sp
from sympy.core.mul import _keep_coeff

from .printer import StepPrinter

# One printer for the ordering only: term and factor order do not depend on the precision.
_ORDER = StepPrinter("float")


def printed_terms(expr: sp.Add) -> list[tuple[bool, sp.Expr]]:
    """(negative, body) per term of a sum, in the order printed: body is subtracted when negative
    (negated when it is the first term)."""
    out = []
    for term in _ORDER._as_ordered_terms(expr, order=None):
        negative = term.could_extract_minus_sign()
        out.append((negative, -term if negative else term))
    return out


def printed_product(expr: sp.Mul) -> tuple[bool, list[sp.Expr], list[sp.Expr]]:
    """(sign, numerator, denominator) of a product as printed: '-' if sign, the numerator factors
    joined by '*' (at least one, 1 when all factors are below the line), then '/' and the
    denominator factors (the bases of the negative powers, with their exponents made positive)."""
    c, rest = expr.as_coeff_Mul()
    sign = bool(c < 0)
    if sign:
        expr = _keep_coeff(-c, rest)
    numerator, denominator = [], []
    for item in expr.as_ordered_factors():
        if item.is_commutative and item.is_Pow and item.exp.is_Rational and item.exp.is_negative:
            denominator.append(sp.Pow(item.base, -item.exp, evaluate=False)
                               if item.exp != -1 else item.base)
        else:
            numerator.append(item)
    return sign, numerator or [sp.S.One], denominator
