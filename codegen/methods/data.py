"""Every built-in method as data, with its published source.

One table per kind, each row the plain data of one method (exact strings for coefficients, as a
method file would give them) and its source: a citation from CITATIONS plus the place in it. The
coefficients were checked against the exact order conditions of the analysis stage and against
scipy where scipy carries the same method (tests/test_analysis.py, tests/test_method.py).
Values marked "from memory" below were recalled, not copied from the page, and then verified by
those tests.
"""

from __future__ import annotations

# Full citations, shown by `tickwright methods`.
CITATIONS: dict[str, str] = {
    "HNW": "E. Hairer, S. P. Norsett and G. Wanner, Solving Ordinary Differential Equations I: "
           "Nonstiff Problems, 2nd edition, Springer, 1993",
    "HW": "E. Hairer and G. Wanner, Solving Ordinary Differential Equations II: Stiff and "
          "Differential-Algebraic Problems, 2nd edition, Springer, 1996",
    "Ralston": "A. Ralston, Runge-Kutta methods with minimum error bounds, Mathematics of "
               "Computation 16 (1962)",
    "Shu-Osher": "C.-W. Shu and S. Osher, Efficient implementation of essentially "
                 "non-oscillatory shock-capturing schemes, Journal of Computational Physics 77 "
                 "(1988)",
    "Bogacki-Shampine": "P. Bogacki and L. F. Shampine, A 3(2) pair of Runge-Kutta formulas, "
                        "Applied Mathematics Letters 2 (1989)",
    "Dormand-Prince": "J. R. Dormand and P. J. Prince, A family of embedded Runge-Kutta "
                      "formulae, Journal of Computational and Applied Mathematics 6 (1980)",
    "Alexander": "R. Alexander, Diagonally implicit Runge-Kutta methods for stiff O.D.E.'s, "
                 "SIAM Journal on Numerical Analysis 14 (1977)",
    "Verwer": "J. G. Verwer, E. J. Spee, J. G. Blom and W. Hundsdorfer, A second-order "
              "Rosenbrock method applied to photochemical dispersion problems, SIAM Journal on "
              "Scientific Computing 20(4) (1999)",
}


def cite(key: str, where: str = "") -> str:
    """The full citation of a source, with the place in it."""
    return CITATIONS[key] + (f", {where}" if where else "")


# ---------------------------------------------------------------------------------------------
# Explicit Runge-Kutta tableaux.
# ---------------------------------------------------------------------------------------------

EXPLICIT_TABLEAUX: dict[str, dict] = {
    # from memory (HNW II.1), verified by the order conditions
    "euler": dict(
        name="forward Euler", order=1, c=[0], b=[1], a=[[0]],
        source=cite("HNW", "section II.1")),
    # from memory (HNW II.1)
    "midpoint": dict(
        name="explicit midpoint (RK2)", order=2, c=[0, "1/2"], b=[0, 1],
        a=[[0, 0], ["1/2", 0]],
        source=cite("HNW", "section II.1")),
    # from memory (HNW II.1); 'modified Euler' in Burden & Faires, Numerical Analysis, ch. 5
    "heun": dict(
        name="Heun (explicit trapezoid)", order=2, c=[0, 1], b=["1/2", "1/2"],
        a=[[0, 0], [1, 0]],
        source=cite("HNW", "section II.1")),
    # from memory (Ralston 1962)
    "ralston2": dict(
        name="Ralston 2", order=2, c=[0, "2/3"], b=["1/4", "3/4"],
        a=[[0, 0], ["2/3", 0]],
        source=cite("Ralston")),
    # from memory (HNW Table 1.1)
    "kutta3": dict(
        name="Kutta 3", order=3, c=[0, "1/2", 1], b=["1/6", "2/3", "1/6"],
        a=[[0, 0, 0], ["1/2", 0, 0], [-1, 2, 0]],
        source=cite("HNW", "section II.1, Table 1.1")),
    # from memory (Shu & Osher 1988)
    "ssprk3": dict(
        name="SSPRK3 (Shu-Osher)", order=3, c=[0, 1, "1/2"], b=["1/6", "1/6", "2/3"],
        a=[[0, 0, 0], [1, 0, 0], ["1/4", "1/4", 0]],
        source=cite("Shu-Osher")),
    # from memory (HNW Table 1.2)
    "rk4": dict(
        name="classical RK4", order=4, c=[0, "1/2", "1/2", 1], b=["1/6", "1/3", "1/3", "1/6"],
        a=[[0, 0, 0, 0], ["1/2", 0, 0, 0], [0, "1/2", 0, 0], [0, 0, 1, 0]],
        source=cite("HNW", "section II.1, Table 1.2")),
    # from memory (HNW Table 1.2)
    "rk4-38": dict(
        name="3/8 rule", order=4, c=[0, "1/3", "2/3", 1], b=["1/8", "3/8", "3/8", "1/8"],
        a=[[0, 0, 0, 0], ["1/3", 0, 0, 0], ["-1/3", 1, 0, 0], [1, -1, 1, 0]],
        source=cite("HNW", "section II.1, Table 1.2")),
    # from memory; equals scipy's RK23 (tests/test_method.py)
    "bs3": dict(
        name="Bogacki-Shampine 3(2)", order=3, embedded_order=2,
        c=[0, "1/2", "3/4", 1], b=["2/9", "1/3", "4/9", 0],
        b_hat=["7/24", "1/4", "1/3", "1/8"],
        a=[[0, 0, 0, 0], ["1/2", 0, 0, 0], [0, "3/4", 0, 0], ["2/9", "1/3", "4/9", 0]],
        source=cite("Bogacki-Shampine")),
    # equals scipy's RK45, which cites the same paper (tests/test_method.py)
    "dp5": dict(
        name="Dormand-Prince 5(4)", order=5, embedded_order=4,
        c=[0, "1/5", "3/10", "4/5", "8/9", 1, 1],
        b=["35/384", 0, "500/1113", "125/192", "-2187/6784", "11/84", 0],
        b_hat=["5179/57600", 0, "7571/16695", "393/640", "-92097/339200", "187/2100", "1/40"],
        a=[[0, 0, 0, 0, 0, 0, 0],
           ["1/5", 0, 0, 0, 0, 0, 0],
           ["3/40", "9/40", 0, 0, 0, 0, 0],
           ["44/45", "-56/15", "32/9", 0, 0, 0, 0],
           ["19372/6561", "-25360/2187", "64448/6561", "-212/729", 0, 0, 0],
           ["9017/3168", "-355/33", "46732/5247", "49/176", "-5103/18656", 0, 0],
           ["35/384", 0, "500/1113", "125/192", "-2187/6784", "11/84", 0]],
        source=cite("Dormand-Prince")),
}

# ---------------------------------------------------------------------------------------------
# Implicit Runge-Kutta tableaux.
# ---------------------------------------------------------------------------------------------

# Alexander's SDIRK3 diagonal: the root near 0.4358665215 of x^3 - 3x^2 + 3/2 x - 1/6 (from
# memory). The cubic has three real roots, so its radical form needs complex numbers and the
# tableau parser takes only sqrt and Rational; it is kept as a 40-digit rational, with which the
# order conditions up to order 3 hold to about 1e-40 rather than exactly. Trigonometric form, for
# checking: 1 + sqrt(2)*cos(acos(2*sqrt(2)/3)/3 + 4*pi/3).
SDIRK3_GAMMA = "(4358665215084589994160194511935568425293/10**40)"
# Tolerance of SDIRK3's conditions (its data are rounded on purpose): far below double rounding,
# far above the 1e-40 effect of rounding SDIRK3_GAMMA.
SDIRK3_TOL = 1e-30

_G3 = SDIRK3_GAMMA
_SDIRK3_B1 = f"-(6*{_G3}**2 - 16*{_G3} + 1)/4"
_SDIRK3_B2 = f"(6*{_G3}**2 - 20*{_G3} + 5)/4"

# SDIRK2 diagonal; L-stable and order 2 (Alexander 1977, from memory).
_G2 = "(1 - sqrt(2)/2)"

IMPLICIT_TABLEAUX: dict[str, dict] = {
    # from memory
    "backward-euler": dict(
        name="backward Euler", order=1, c=[1], b=[1], a=[[1]],
        source=cite("HW", "section IV.3")),
    # from memory
    "trapezoidal": dict(
        name="trapezoidal rule (Lobatto IIIA, 2 stages)", order=2, c=[0, 1], b=["1/2", "1/2"],
        a=[[0, 0], ["1/2", "1/2"]],
        source=cite("HW", "section IV.5")),
    # from memory
    "implicit-midpoint": dict(
        name="implicit midpoint (Gauss, 1 stage)", order=2, c=["1/2"], b=[1], a=[["1/2"]],
        source=cite("HW", "section IV.5")),
    # from memory
    "gauss2": dict(
        name="Gauss-Legendre, 2 stages", order=4,
        c=["1/2 - sqrt(3)/6", "1/2 + sqrt(3)/6"], b=["1/2", "1/2"],
        a=[["1/4", "1/4 - sqrt(3)/6"], ["1/4 + sqrt(3)/6", "1/4"]],
        source=cite("HW", "section IV.5, Table 5.2")),
    # from memory
    "radau-iia2": dict(
        name="Radau IIA, 2 stages", order=3, c=["1/3", 1], b=["3/4", "1/4"],
        a=[["5/12", "-1/12"], ["3/4", "1/4"]],
        source=cite("HW", "section IV.5, Table 5.5")),
    # from memory; scipy's Radau carries the same method in transformed form
    "radau-iia3": dict(
        name="Radau IIA, 3 stages", order=5,
        c=["(4 - sqrt(6))/10", "(4 + sqrt(6))/10", 1],
        b=["(16 - sqrt(6))/36", "(16 + sqrt(6))/36", "1/9"],
        a=[["(88 - 7*sqrt(6))/360", "(296 - 169*sqrt(6))/1800", "(-2 + 3*sqrt(6))/225"],
           ["(296 + 169*sqrt(6))/1800", "(88 + 7*sqrt(6))/360", "(-2 - 3*sqrt(6))/225"],
           ["(16 - sqrt(6))/36", "(16 + sqrt(6))/36", "1/9"]],
        source=cite("HW", "section IV.5, Table 5.6")),
    # from memory
    "lobatto-iiic2": dict(
        name="Lobatto IIIC, 2 stages", order=2, c=[0, 1], b=["1/2", "1/2"],
        a=[["1/2", "-1/2"], ["1/2", "1/2"]],
        source=cite("HW", "section IV.5")),
    # from memory
    "sdirk2": dict(
        name="SDIRK2 (Alexander, gamma = 1 - sqrt(2)/2)", order=2,
        c=[_G2, 1], b=[f"1 - {_G2}", _G2],
        a=[[_G2, 0], [f"1 - {_G2}", _G2]],
        source=cite("Alexander")),
    # from memory; gamma rounded to 40 digits (SDIRK3_GAMMA), conditions to SDIRK3_TOL
    "sdirk3": dict(
        name="SDIRK3 (Alexander, gamma = 0.4358665215...)", order=3,
        c=[_G3, f"(1 + {_G3})/2", 1], b=[_SDIRK3_B1, _SDIRK3_B2, _G3],
        a=[[_G3, 0, 0], [f"(1 - {_G3})/2", _G3, 0], [_SDIRK3_B1, _SDIRK3_B2, _G3]],
        tolerance=SDIRK3_TOL,
        source=cite("Alexander")),
}

# ---------------------------------------------------------------------------------------------
# Linearly implicit (Rosenbrock) methods, in the form of types.LinearlyImplicit:
#   (I - gamma h J) k_i = f(y + h sum_j alpha[i][j] k_j) + sum_j coupling[i][j] k_j
#                         + time[i] h df/dt,
#   y_next = y + h sum_i b_i k_i,
# with alpha and coupling strictly lower triangular. time_i = sum_j gamma_ij of the method's
# Gamma matrix in Hairer & Wanner's form (needed when f depends on t explicitly); for ROS2 they
# are (gamma, -gamma), which makes the step reduce to the trapezoidal rule on y' = g(t).
# ---------------------------------------------------------------------------------------------

ROSENBROCK_METHODS: dict[str, dict] = {
    # from memory
    "rosenbrock-euler": dict(
        name="linearly implicit Euler", order=1, gamma="1", alpha=[[0]], coupling=[[0]], b=[1],
        time=["1"],
        source=cite("HW", "section IV.7")),
    # The embedded first-order solution y_hat = y + h k1 (Verwer et al. 1999, from memory): in
    # Hairer & Wanner's form b_hat (I - coupling)^-1 = (1, 0) as well, so b_hat = (1, 0) here and
    # the estimate h sum (b_j - b_hat_j) k_j is h (k1 + k2) / 2.
    "ros2": dict(
        name="ROS2", order=2, gamma="1 + 1/sqrt(2)",
        alpha=[[0, 0], [1, 0]], coupling=[[0, 0], [-2, 0]], b=["3/2", "1/2"],
        b_hat=[1, 0], embedded_order=1,
        time=["1 + 1/sqrt(2)", "-(1 + 1/sqrt(2))"],
        source=cite("Verwer")),
}

# ---------------------------------------------------------------------------------------------
# Exact discretization.
# ---------------------------------------------------------------------------------------------

EXACT_METHODS: dict[str, dict] = {
    "zoh-exact": dict(
        name="exact zero-order hold (matrix exponential)",
        source="common practice, no source; equals scipy.signal.cont2discrete(method='zoh')"),
}

# Other names a user may type for a built-in method.
ALIASES: dict[str, str] = {"crank-nicolson": "trapezoidal"}
