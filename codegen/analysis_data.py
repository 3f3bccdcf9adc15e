"""Implicit and linearly implicit methods as data, for the analysis stage and the built-in table.

``IMPLICIT_TABLEAUX`` has the same shape as ``method.BUILTIN_TABLEAUX`` (rows for
``method.tableau_from_data``): exact strings and the published source of each tableau.
``ROSENBROCK_METHODS`` describes two linearly implicit methods by their scheme coefficients; only
their stability functions are used here (see ``analysis.rosenbrock_stability_function``).

References
----------
HW: Hairer & Wanner, Solving Ordinary Differential Equations II, 2nd ed., 1996.
Alexander, Diagonally implicit Runge-Kutta methods for stiff O.D.E.'s, SIAM J. Numer. Anal. 14, 1977.
Verwer, Spee, Blom & Hundsdorfer, A second-order Rosenbrock method applied to photochemical
dispersion problems, SIAM J. Sci. Comput. 20(4), 1999.
"""

from __future__ import annotations

# Alexander's SDIRK3 diagonal: the root near 0.4358665215 of x^3 - 3x^2 + 3/2 x - 1/6. The cubic has
# three real roots, so its radical form needs complex numbers and the tableau parser takes only sqrt
# and Rational; it is kept as a 40-digit rational, with which the order conditions up to order 3
# hold to about 1e-40 rather than exactly. Use SDIRK3_TOL with analysis.order_of. Trigonometric form,
# for checking: 1 + sqrt(2)*cos(acos(2*sqrt(2)/3)/3 + 4*pi/3).
SDIRK3_GAMMA = "(4358665215084589994160194511935568425293/10**40)"

# Tolerance for the order conditions of tableaux whose data are rounded (a residual below it counts as
# satisfied): far below double rounding, far above the 1e-40 rounding of SDIRK3_GAMMA's effect.
SDIRK3_TOL = 1e-30

_G3 = SDIRK3_GAMMA
_SDIRK3_B1 = f"-(6*{_G3}**2 - 16*{_G3} + 1)/4"
_SDIRK3_B2 = f"(6*{_G3}**2 - 20*{_G3} + 5)/4"

# SDIRK2 diagonal; L-stable and order 2 (Alexander 1977).
_G2 = "(1 - sqrt(2)/2)"

IMPLICIT_TABLEAUX: dict[str, dict] = {
    "backward-euler": dict(
        name="backward Euler", order=1, c=[1], b=[1], a=[[1]],
        source="HNW I, section II.1 and HW, section IV.3 (from memory)"),
    "trapezoidal": dict(
        name="trapezoidal rule (Lobatto IIIA, 2 stages)", order=2, c=[0, 1], b=["1/2", "1/2"],
        a=[[0, 0], ["1/2", "1/2"]],
        source="HW, section IV.5 (from memory)"),
    "implicit-midpoint": dict(
        name="implicit midpoint (Gauss, 1 stage)", order=2, c=["1/2"], b=[1], a=[["1/2"]],
        source="HW, section IV.5 (from memory)"),
    "gauss2": dict(
        name="Gauss-Legendre, 2 stages", order=4,
        c=["1/2 - sqrt(3)/6", "1/2 + sqrt(3)/6"], b=["1/2", "1/2"],
        a=[["1/4", "1/4 - sqrt(3)/6"], ["1/4 + sqrt(3)/6", "1/4"]],
        source="HW, section IV.5, Table 5.2 (from memory)"),
    "radau-iia2": dict(
        name="Radau IIA, 2 stages", order=3, c=["1/3", 1], b=["3/4", "1/4"],
        a=[["5/12", "-1/12"], ["3/4", "1/4"]],
        source="HW, section IV.5, Table 5.5 (from memory)"),
    "radau-iia3": dict(
        name="Radau IIA, 3 stages", order=5,
        c=["(4 - sqrt(6))/10", "(4 + sqrt(6))/10", 1],
        b=["(16 - sqrt(6))/36", "(16 + sqrt(6))/36", "1/9"],
        a=[["(88 - 7*sqrt(6))/360", "(296 - 169*sqrt(6))/1800", "(-2 + 3*sqrt(6))/225"],
           ["(296 + 169*sqrt(6))/1800", "(88 + 7*sqrt(6))/360", "(-2 - 3*sqrt(6))/225"],
           ["(16 - sqrt(6))/36", "(16 + sqrt(6))/36", "1/9"]],
        source="HW, section IV.5, Table 5.6 (from memory)"),
    "lobatto-iiic2": dict(
        name="Lobatto IIIC, 2 stages", order=2, c=[0, 1], b=["1/2", "1/2"],
        a=[["1/2", "-1/2"], ["1/2", "1/2"]],
        source="HW, section IV.5 (from memory)"),
    "sdirk2": dict(
        name="SDIRK2 (Alexander, gamma = 1 - sqrt(2)/2)", order=2,
        c=[_G2, 1], b=[f"1 - {_G2}", _G2],
        a=[[_G2, 0], [f"1 - {_G2}", _G2]],
        source="Alexander 1977, SIAM J. Numer. Anal. 14 (from memory)"),
    "sdirk3": dict(
        name="SDIRK3 (Alexander, gamma = 0.4358665215...)", order=3,
        c=[_G3, f"(1 + {_G3})/2", 1], b=[_SDIRK3_B1, _SDIRK3_B2, _G3],
        a=[[_G3, 0, 0], [f"(1 - {_G3})/2", _G3, 0], [_SDIRK3_B1, _SDIRK3_B2, _G3]],
        source="Alexander 1977, SIAM J. Numer. Anal. 14 (from memory); gamma rounded to 40 digits"),
}

# Order-condition tolerance per method whose data are rounded (see SDIRK3_GAMMA); all others are exact.
ROUNDED_DATA_TOL: dict[str, float] = {"sdirk3": SDIRK3_TOL}

# Linearly implicit (Rosenbrock) methods in the form
#   (I - gamma h J) k_i = f(y + h sum_j alpha[i][j] k_j) + sum_j coupling[i][j] k_j,
#   y_next = y + h sum_i b_i k_i,
# with alpha and coupling strictly lower triangular.
ROSENBROCK_METHODS: dict[str, dict] = {
    "rosenbrock-euler": dict(
        name="linearly implicit Euler", order=1, gamma="1", alpha=[[0]], coupling=[[0]], b=[1],
        source="HW, section IV.7 (from memory)"),
    "ros2": dict(
        name="ROS2", order=2, gamma="1 + 1/sqrt(2)",
        alpha=[[0, 0], [1, 0]], coupling=[[0, 0], [-2, 0]], b=["3/2", "1/2"],
        source="Verwer, Spee, Blom & Hundsdorfer 1999, SIAM J. Sci. Comput. 20(4)"),
}
