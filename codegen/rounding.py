"""Rounding: the unit roundoff of each precision, correct rounding of exact values, and the advice's
round-off budget (the estimate that chooses float or double).

The cross-check's bound (verify/bound.py) uses the unit roundoff; the coefficient audit
(verify/audit.py) uses correctly_rounded, which is independent of the printer's own rounding.

References
----------
IEEE 754-2008: binary32 and binary64 have 24 and 53 significand bits, so one rounding to
nearest is off by at most 2^-24 and 2^-53 of the value (unit roundoff).
"""

from __future__ import annotations

import math
from fractions import Fraction

# Unit roundoff of each precision (IEEE 754 binary32 and binary64, round to nearest).
UNIT_ROUNDOFF = {"float": 2.0 ** -24, "double": 2.0 ** -53}
# Rounding units allowed per stage and step: each stage adds a handful of roundings of |x|-sized
# values (the stage sum, the rate evaluation, the update): a few units per stage and step.
ULPS_PER_STAGE = 4


def rounding_per_step(stages: int, precision: str) -> float:
    """Rounding error one step may add, relative to the state's scale: ULPS_PER_STAGE units of
    roundoff for each stage and one more for the update."""
    return ULPS_PER_STAGE * (stages + 1) * UNIT_ROUNDOFF[precision]

# Significand bits (with the hidden bit), smallest normal and largest exponent of each format.
_FORMATS = {"float": (24, -126, 127), "double": (53, -1022, 1023)}


def exact_fraction(value) -> Fraction:
    """The exact value of a sympy number (or int, float, str of a decimal) as a Fraction.

    Rationals and binary floats are exact; other numbers (sqrt(2), pi) are taken at 60 digits,
    far beyond the 17 that double precision needs, so rounding them once more is correct except
    for values within 1e-60 of a rounding boundary.
    """
    import sympy as sp

    if isinstance(value, (int, float, str, Fraction)):
        return Fraction(value)
    value = sp.sympify(value)
    if value.is_Rational:
        return Fraction(int(value.p), int(value.q))
    number = value if isinstance(value, sp.Float) else sp.Float(sp.N(value, 60), 60)
    sign, mantissa, exponent, _ = number._mpf_
    exact = Fraction(int(mantissa)) * (Fraction(2) ** int(exponent))
    return -exact if sign else exact


def correctly_rounded(value: Fraction, precision: str) -> float:
    """value rounded to the nearest binary32 or binary64 number, ties to even (IEEE 754-2008,
    section 4.3.1), as a Python float; +-inf beyond the largest finite number.

    Independent of the printer's rounding on purpose: the coefficient audit compares the two.
    """
    value = Fraction(value)
    if value == 0:
        return 0.0
    bits, emin, emax = _FORMATS[precision]
    a, b = abs(value.numerator), value.denominator
    e = a.bit_length() - b.bit_length()  # floor(log2 |value|), after the correction below
    if (e >= 0 and a < (b << e)) or (e < 0 and (a << -e) < b):
        e -= 1
    e = max(e, emin)  # subnormals keep the smallest exponent
    scaled = abs(value) * Fraction(2) ** (bits - 1 - e)
    q, r = divmod(scaled.numerator, scaled.denominator)
    if 2 * r > scaled.denominator or (2 * r == scaled.denominator and q % 2 == 1):
        q += 1
    if q >= 2 ** bits:  # the rounding carried into the next binade
        q //= 2
        e += 1
    if e > emax:
        return math.copysign(math.inf, value)
    return math.copysign(float(Fraction(q) * Fraction(2) ** (e - bits + 1)), value)
