"""Rounding budgets shared by the verification (the cross-check's bound) and the advice
(the round-off estimate that chooses float or double).

References
----------
IEEE 754-2008: binary32 and binary64 have 24 and 53 significand bits, so one rounding to
nearest is off by at most 2^-24 and 2^-53 of the value (unit roundoff).
"""

from __future__ import annotations

# Unit roundoff of each precision (IEEE 754 binary32 and binary64, round to nearest).
UNIT_ROUNDOFF = {"float": 2.0 ** -24, "double": 2.0 ** -53}
# Rounding units allowed per stage and step: each stage adds a handful of roundings of |x|-sized
# values (the stage sum, the rate evaluation, the update): a few units per stage and step.
ULPS_PER_STAGE = 4


def rounding_per_step(stages: int, precision: str) -> float:
    """Rounding error one step may add, relative to the state's scale: ULPS_PER_STAGE units of
    roundoff for each stage and one more for the update."""
    return ULPS_PER_STAGE * (stages + 1) * UNIT_ROUNDOFF[precision]
