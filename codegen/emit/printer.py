"""C expression printer: sympy expressions to C99 text in float or double precision.

Behaviour is driven by small tables (function names per precision). Literals are printed from exact
values, correctly rounded to the target precision; small integer powers become multiplications;
pi and e become literals (M_PI is double and not C99).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from fractions import Fraction

import numpy as np
import sympy as sp
from sympy.printing.c import C99CodePrinter

from ..errors import EmitError

FLOAT = "float"
DOUBLE = "double"
PRECISIONS = (FLOAT, DOUBLE)

# Digits that let a value round-trip: 9 for IEEE binary32, 17 for binary64.
ROUND_TRIP_DIGITS = {FLOAT: 9, DOUBLE: 17}
# Precision used to evaluate exact values before rounding them once to the target format.
EXACT_DIGITS = 50
# Largest integer power written out as multiplications; beyond it powf/pow is cheaper in code size.
MAX_EXPANDED_POWER = 4

_MATH = {  # sympy function -> C99 math.h name (double); float appends 'f'
    "sin": "sin", "cos": "cos", "tan": "tan", "asin": "asin", "acos": "acos", "atan": "atan",
    "atan2": "atan2", "sinh": "sinh", "cosh": "cosh", "tanh": "tanh", "exp": "exp", "log": "log",
    "Abs": "fabs", "floor": "floor", "ceiling": "ceil", "Min": "fmin", "Max": "fmax",
}


# Magnitudes that round to infinity and to zero in every precision (double's largest finite
# number is about 1.8e308, its smallest subnormal about 4.9e-324).
OUTSIDE_DOUBLE = sp.Float("1e310")
BELOW_DOUBLE = sp.Float("1e-330")


def rounded(value: sp.Expr, precision: str) -> float:
    """The exact value correctly rounded to the target floating-point format.

    Values far beyond the double range round to +-inf, far below it to +-0, before any exact
    arithmetic: exp(1e39) as a fraction would have 10^38 digits.
    """
    approx = sp.Float(sp.N(value, EXACT_DIGITS), EXACT_DIGITS)
    if abs(approx) > OUTSIDE_DOUBLE:
        return math.copysign(math.inf, float(sp.sign(approx)))
    if abs(approx) < BELOW_DOUBLE:
        return math.copysign(0.0, float(sp.sign(approx)) or 1.0)
    exact = Fraction(str(approx))
    try:
        as_double = float(exact)
    except OverflowError:
        return math.copysign(math.inf, exact)
    if precision == DOUBLE:
        return as_double
    with np.errstate(over="ignore"):
        f = np.float32(as_double)
    if not np.isfinite(f):
        return float(f)
    candidates = [f, np.nextafter(f, np.float32(np.inf)), np.nextafter(f, np.float32(-np.inf))]
    best = min(candidates, key=lambda v: abs(Fraction(float(v)) - exact))
    return float(best)


# The smallest positive normal number of each precision: a tick or a constant below it has lost
# its precision (a subnormal) or rounds to zero.
SMALLEST_NORMAL = {FLOAT: float(np.finfo(np.float32).tiny),
                   DOUBLE: float(np.finfo(np.float64).tiny)}
# The largest finite number of each precision.
LARGEST = {FLOAT: float(np.finfo(np.float32).max), DOUBLE: float(np.finfo(np.float64).max)}


def _short(value, limit: int = 40) -> str:
    text = str(value)
    return text if len(text) <= limit else str(sp.N(value, 4))[:limit]


def literal(value, precision: str) -> str:
    """A C floating literal for an exact value, with enough digits to round-trip."""
    v = rounded(sp.sympify(value), precision)
    if not np.isfinite(v):
        fix = "use --precision double" if precision == FLOAT else "use a shorter --dt"
        raise EmitError(f"the constant {_short(value)} is beyond the range of {precision}; "
                        f"rescale the model or {fix}")
    if precision == FLOAT:
        text = f"{np.float32(v):.{ROUND_TRIP_DIGITS[FLOAT]}g}"
        if float(np.float32(text)) != v:  # pragma: no cover - guarded by the round-trip test
            raise AssertionError(f"literal {text} does not round-trip")
    else:
        text = repr(v)
    if "e" not in text and "." not in text and "inf" not in text:
        text += ".0"
    if "e" in text and "." not in text.split("e")[0]:
        mantissa, exponent = text.split("e")
        text = f"{mantissa}.0e{exponent}"
    return text + ("F" if precision == FLOAT else "")


class StepPrinter(C99CodePrinter):
    """sympy's C99 printer with float/double literals and functions, and expanded small powers."""

    def __init__(self, precision: str):
        super().__init__({"math_macros": {}})
        self.precision = precision
        self.suffix = "f" if precision == FLOAT else ""

    def _lit(self, value) -> str:
        return literal(value, self.precision)

    def _print_Integer(self, expr):
        return self._lit(expr)

    def _print_Rational(self, expr):
        return self._lit(expr)

    def _print_Float(self, expr):
        return self._lit(expr)

    def _print_NumberSymbol(self, expr):
        return self._lit(expr)

    _print_Pi = _print_NumberSymbol
    _print_Exp1 = _print_NumberSymbol

    def _print_Pow(self, expr):
        base, e = expr.base, expr.exp
        PREC = sp.printing.precedence.precedence(expr)
        if base == sp.E:
            return f"exp{self.suffix}({self._print(e)})"
        if e.is_Integer and 1 <= abs(int(e)) <= MAX_EXPANDED_POWER:
            b = self.parenthesize(base, PREC)
            product = "*".join([b] * abs(int(e)))
            if int(e) > 0:
                return f"({product})" if abs(int(e)) > 1 else product
            return f"({self._lit(1)}/({product}))"
        if e == sp.Rational(1, 2):
            return f"sqrt{self.suffix}({self._print(base)})"
        if e == -sp.Rational(1, 2):
            return f"({self._lit(1)}/sqrt{self.suffix}({self._print(base)}))"
        return f"pow{self.suffix}({self._print(base)}, {self._print(e)})"

    def _print_Function(self, expr):
        name = type(expr).__name__
        if name in _MATH:
            args = ", ".join(self._print(a) for a in expr.args)
            if name in ("Min", "Max") and len(expr.args) > 2:
                first, rest = expr.args[0], type(expr)(*expr.args[1:])
                args = f"{self._print(first)}, {self._print(rest)}"
            return f"{_MATH[name]}{self.suffix}({args})"
        raise EmitError(f"function '{name}' has no C translation")

    _print_Abs = _print_Function
    _print_Min = _print_Function
    _print_Max = _print_Function
    _print_floor = _print_Function
    _print_ceiling = _print_Function
    _print_sin = _print_Function
    _print_cos = _print_Function
    _print_tan = _print_Function
    _print_asin = _print_Function
    _print_acos = _print_Function
    _print_atan = _print_Function
    _print_atan2 = _print_Function
    _print_sinh = _print_Function
    _print_cosh = _print_Function
    _print_tanh = _print_Function
    _print_exp = _print_Function
    _print_log = _print_Function

    def _print_Add(self, expr, order=None):
        """Sums with every product or quotient operand in parentheses (MISRA C:2012 rule 12.1)."""
        terms = self._as_ordered_terms(expr, order=order)
        text = ""
        for i, term in enumerate(terms):
            negative = term.could_extract_minus_sign()
            body = -term if negative else term
            piece = self._print(body)
            if body.is_Mul and not _enclosed(piece):
                piece = f"({piece})"
            if i == 0:
                text = f"-{piece}" if negative else piece
            else:
                text += f" - {piece}" if negative else f" + {piece}"
        return text

    def _print_sign(self, expr):
        x = self._print(expr.args[0])
        zero, one = self._lit(0), self._lit(1)
        return f"(({x} > {zero}) ? {one} : (({x} < {zero}) ? -{one} : {zero}))"

    def _print_Piecewise(self, expr):
        *pieces, (last, cond) = expr.args
        if cond is not sp.true:
            raise EmitError("Piecewise needs a final (value, True) branch")
        text = self._print(last)
        for value, condition in reversed(pieces):
            text = f"(({self._print(condition)}) ? ({self._print(value)}) : ({text}))"
        return text

    def _print_Relational(self, expr):
        return f"({self._print(expr.lhs)} {expr.rel_op} {self._print(expr.rhs)})"

    def _print_And(self, expr):
        return "(" + " && ".join(self._print(a) for a in sorted(expr.args, key=sp.default_sort_key)) + ")"

    def _print_Or(self, expr):
        return "(" + " || ".join(self._print(a) for a in sorted(expr.args, key=sp.default_sort_key)) + ")"

    def _print_Not(self, expr):
        return f"(!{self._print(expr.args[0])})"

    def _print_BooleanTrue(self, expr):
        return "1"

    def _print_BooleanFalse(self, expr):
        return "0"


def _enclosed(text: str) -> bool:
    """True when text is one parenthesized group: '(a*b)' but not '(a)*b'."""
    if not text.startswith("("):
        return False
    depth = 0
    for i, ch in enumerate(text):
        depth += ch == "("
        depth -= ch == ")"
        if depth == 0:
            return i == len(text) - 1
    return False


@dataclass(frozen=True)
class Printer:
    """Prints expressions and literals for one precision."""

    precision: str

    def expr(self, e) -> str:
        return StepPrinter(self.precision).doprint(e)

    def literal(self, value) -> str:
        return literal(value, self.precision)

    @property
    def real(self) -> str:
        return self.precision
