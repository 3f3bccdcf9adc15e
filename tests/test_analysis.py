"""Order conditions and linear stability (codegen.analysis) against published values.

Sources: HNW = Hairer, Norsett & Wanner, Solving Ordinary Differential Equations I, 2nd ed., 1993;
HW = Hairer & Wanner, Solving Ordinary Differential Equations II, 2nd ed., 1996; Lambert = Lambert,
Numerical Methods for Ordinary Differential Systems, 1991; Butcher 1987 = Butcher, The Numerical
Analysis of Ordinary Differential Equations, 1987. "[mem]" marks a value recalled from that source,
not read from the page (each is reproduced here by exact or numerical computation).
"""

from __future__ import annotations

import dataclasses

import math

import mpmath
import numpy as np
import pytest
import sympy as sp

from codegen.methods import analysis
from codegen.methods.analysis import Z
from codegen.errors import MethodError
from codegen.methods.data import IMPLICIT_TABLEAUX, SDIRK3_GAMMA, SDIRK3_TOL
from codegen.methods import builtin, builtin_ids, exact, tableau_from_data


def implicit(method_id):
    return tableau_from_data(IMPLICIT_TABLEAUX[method_id], f"implicit method {method_id}", method_id)


# Gauss-Legendre, 3 stages, order 6: HW IV.5, Table 5.2 [mem]. Only here, to exercise radicals in
# the exact order test up to order 7.
GAUSS3 = dict(
    name="Gauss-Legendre, 3 stages",
    c=["1/2 - sqrt(15)/10", "1/2", "1/2 + sqrt(15)/10"], b=["5/18", "4/9", "5/18"],
    a=[["5/36", "2/9 - sqrt(15)/15", "5/36 - sqrt(15)/30"],
       ["5/36 + sqrt(15)/24", "2/9", "5/36 - sqrt(15)/24"],
       ["5/36 + sqrt(15)/30", "2/9 + sqrt(15)/15", "5/36"]])


# ---------------------------------------------------------------------------------------------
# Rooted trees
# ---------------------------------------------------------------------------------------------

def test_condition_counts_per_order_and_cumulative():
    counts = analysis.condition_counts(8)
    # OEIS A000081, citing Butcher 1987.
    assert counts == [1, 1, 2, 4, 9, 20, 48, 115]
    # OEIS A087803, "number of order conditions", citing Butcher 1987.
    assert list(np.cumsum(counts)) == [1, 2, 4, 8, 17, 37, 85, 200]


def test_trees_are_distinct_and_have_their_order():
    for p in range(1, 9):
        conditions = analysis.order_conditions(p)
        assert len({c.tree for c in conditions}) == len(conditions)
        assert all(c.order == p for c in conditions)


@pytest.mark.parametrize("n", range(1, 9))
def test_symmetry_counts_labelled_trees(n):
    # A tree t has n!/sigma(t) labellings; all labelled rooted trees on n nodes number n^(n-1)
    # (Cayley's formula; common practice, no source).
    total = sum(sp.factorial(n) / c.symmetry for c in analysis.order_conditions(n))
    assert total == n ** (n - 1)


@pytest.mark.parametrize("n", range(1, 9))
def test_density_and_symmetry_count_monotone_labellings(n):
    # alpha(t) = n!/(sigma(t) gamma(t)) monotone labellings; their sum over |t| = n is (n-1)!
    # (HNW I, section II.2, number of heap-ordered trees [mem]).
    total = sum(sp.factorial(n) / (c.symmetry * c.density) for c in analysis.order_conditions(n))
    assert total == sp.factorial(n - 1)


def test_densities_of_small_trees():
    # gamma: tau 1, [tau] 2, [tau,tau] 3, [[tau]] 6 (HNW I, Table 2.2 [mem]).
    found = {c.notation: c.density for p in (1, 2, 3) for c in analysis.order_conditions(p)}
    assert found == {"τ": 1, "[τ]": 2, "[τ,τ]": 3, "[[τ]]": 6}


def test_elementary_weights_of_rk4_for_third_order_trees():
    rk4 = builtin("rk4")
    weights = {c.notation: c.elementary_weight(rk4.a, rk4.b) for c in analysis.order_conditions(3)}
    # b^T c^2 = 1/3 and b^T A c = 1/6 for RK4 (HNW I, section II.1, order conditions [mem]).
    assert weights == {"[τ,τ]": sp.Rational(1, 3), "[[τ]]": sp.Rational(1, 6)}


# ---------------------------------------------------------------------------------------------
# Orders
# ---------------------------------------------------------------------------------------------

# Orders and embedded orders of the built-in explicit methods: HNW I II.1 and Tables 1.1-1.2 [mem];
# Ralston 1962, Math. Comp. 16 [mem]; Shu & Osher 1988, J. Comput. Phys. 77 [mem]; Bogacki &
# Shampine 1989, Appl. Math. Lett. 2 [mem]; Dormand & Prince 1980, J. Comput. Appl. Math. 6.
EXPLICIT_ORDERS = {"euler": 1, "midpoint": 2, "heun": 2, "ralston2": 2, "kutta3": 3, "ssprk3": 3,
                   "rk4": 4, "rk4-38": 4, "bs3": 3, "dp5": 5}
EMBEDDED_ORDERS = {"bs3": 2, "dp5": 4}


# Rosenbrock-Euler is order 1 (common practice, no source); ROS2 order 2 (Verwer, Spee, Blom &
# Hundsdorfer 1999, SIAM J. Sci. Comput. 20(4)); the exact discretization has no finite order.
OTHER_ORDERS = {"rosenbrock-euler": 1, "ros2": 2, "zoh-exact": None}


def test_every_builtin_method_has_a_published_order():
    published = {**EXPLICIT_ORDERS, **IMPLICIT_ORDERS, **OTHER_ORDERS}
    assert sorted(builtin_ids()) == sorted(published)
    for method_id in builtin_ids():
        assert builtin(method_id).order == published[method_id], method_id


@pytest.mark.parametrize("method_id", sorted(EXPLICIT_ORDERS))
def test_order_of_builtin_explicit_methods(method_id):
    tableau = builtin(method_id)
    assert analysis.order_of(tableau) == EXPLICIT_ORDERS[method_id]
    # Only the published embedded pairs carry embedded weights.
    assert (tableau.b_hat is not None) == (method_id in EMBEDDED_ORDERS)


@pytest.mark.parametrize("method_id", sorted(EMBEDDED_ORDERS))
def test_embedded_order_of_builtin_pairs(method_id):
    tableau = builtin(method_id)
    assert analysis.order_of(tableau, tableau.b_hat) == EMBEDDED_ORDERS[method_id]
    assert analysis.analyse(tableau).embedded_order == EMBEDDED_ORDERS[method_id]


# Orders of the implicit set: HW IV.5 [mem]; Alexander 1977, SIAM J. Numer. Anal. 14 [mem].
IMPLICIT_ORDERS = {"backward-euler": 1, "trapezoidal": 2, "implicit-midpoint": 2, "gauss2": 4,
                   "radau-iia2": 3, "radau-iia3": 5, "lobatto-iiic2": 2, "sdirk2": 2, "sdirk3": 3}


def test_implicit_set_is_complete():
    assert sorted(IMPLICIT_TABLEAUX) == sorted(IMPLICIT_ORDERS)


@pytest.mark.parametrize("method_id", sorted(IMPLICIT_ORDERS))
def test_order_of_implicit_methods(method_id):
    tableau = implicit(method_id)
    assert analysis.order_of(tableau) == IMPLICIT_ORDERS[method_id]
    assert tableau.order == IMPLICIT_ORDERS[method_id]


def test_gauss3_is_order_six_exactly():
    # Gauss with s stages has order 2s (HW IV.5, Theorem 5.2 [mem]).
    assert analysis.order_of(tableau_from_data(GAUSS3, "test")) == 6


def test_sdirk3_gamma_is_the_published_root():
    gamma = exact(SDIRK3_GAMMA)
    # Root of x^3 - 3x^2 + 3/2 x - 1/6 near 0.435866521508459 (Alexander 1977 [mem]).
    assert abs(float(gamma) - 0.435866521508459) < 1e-15
    with mpmath.workdps(60):
        root = mpmath.findroot(lambda x: x ** 3 - 3 * x ** 2 + mpmath.mpf(3) / 2 * x - mpmath.mpf(1) / 6,
                               mpmath.mpf("0.4358"))
        assert abs(root - mpmath.mpf(str(gamma.p)) / gamma.q) < mpmath.mpf("1e-40")


def test_sdirk3_rounded_gamma_needs_the_tolerance():
    # The data are a 40-digit rounding, so the conditions that pin gamma hold only to ~1e-40:
    # exact arithmetic must say so, and a tolerance must recover the published order 3.
    sdirk3 = implicit("sdirk3")
    assert sdirk3.tolerance == SDIRK3_TOL
    assert analysis.order_of(dataclasses.replace(sdirk3, tolerance=0.0)) < 3
    assert analysis.order_of(sdirk3) == 3
    assert analysis.order_of(sdirk3, max_order=3) == 3


def test_wrong_coefficient_is_detected():
    # RK4 with b = (1/6, 1/6, 1/2, 1/6): sum b = 1, b.c = 1/2 and b.c^2 = 1/3 still hold, but
    # b.Ac = 5/24 != 1/6 (HNW I, section II.1, order conditions [mem]), so it is only order 2.
    wrong = dict(name="RK4 with a wrong weight", order=4, c=[0, "1/2", "1/2", 1],
                 b=["1/6", "1/6", "1/2", "1/6"],
                 a=[[0, 0, 0, 0], ["1/2", 0, 0, 0], [0, "1/2", 0, 0], [0, 0, 1, 0]])
    tableau = tableau_from_data(wrong, "wrong.toml")
    assert analysis.order_of(tableau) == 2
    assert analysis.analyse(tableau).order == 2


def test_tiny_error_in_a_coefficient_is_not_rounded_away():
    # Moving 1e-45 from a32 to a31 of RK4 keeps the row sum and b.c, b.c^2 but changes
    # b.Ac = b3 a32 c2 by -1e-45/6 (HNW I, section II.1, order conditions [mem]): far below float
    # precision, yet the exact test must reject order 3.
    rk4 = builtin("rk4")
    data = dict(name="RK4 perturbed", c=[0, "1/2", "1/2", 1], b=["1/6", "1/3", "1/3", "1/6"],
                a=[[0, 0, 0, 0], ["1/2", 0, 0, 0], ["1/10**45", "1/2 - 1/10**45", 0, 0], [0, 0, 1, 0]])
    tableau = tableau_from_data(data, "perturbed.toml")
    assert analysis.order_of(rk4) == 4
    assert analysis.order_of(tableau) == 2
    # With a tolerance the perturbation is accepted and the order-4 conditions hold to 1e-45 too.
    assert analysis.order_of(dataclasses.replace(tableau, tolerance=1e-30)) == 4


def test_order_of_respects_max_order_and_weights_length():
    assert analysis.order_of(builtin("dp5"), max_order=3) == 3
    with pytest.raises(MethodError, match="weights: must have 4 entries"):
        analysis.order_of(builtin("rk4"), weights=(1, 0))


# ---------------------------------------------------------------------------------------------
# Stability function
# ---------------------------------------------------------------------------------------------

def taylor_exp(p):
    return sp.series(sp.exp(Z), Z, 0, p + 1).removeO()


@pytest.mark.parametrize("method_id", ["euler", "midpoint", "heun", "ralston2", "kutta3", "ssprk3",
                                       "rk4", "rk4-38", "bs3"])
def test_explicit_stability_function_is_taylor_polynomial(method_id):
    # For explicit methods with p = s <= 4 (and BS3, whose fourth stage is FSAL-only with b4 = 0),
    # R is the degree-p Taylor polynomial of e^z (HNW I IV.2 [mem]).
    tableau = builtin(method_id)
    assert sp.expand(analysis.stability_function(tableau) - taylor_exp(EXPLICIT_ORDERS[method_id])) == 0


def test_dp5_stability_function():
    # R = T5 + z^6/600 for Dormand-Prince 5 (HNW I IV.2 [mem]).
    r = analysis.stability_function(builtin("dp5"))
    assert sp.expand(r - taylor_exp(5) - Z ** 6 / 600) == 0


def pade_exp(num_degree, den_degree):
    """The (k, j) Pade approximant of exp at 0, from mpmath (independent of the tableau)."""
    with mpmath.workdps(30):
        taylor = [mpmath.mpf(1) / mpmath.factorial(k) for k in range(num_degree + den_degree + 1)]
        p, q = mpmath.pade(taylor, num_degree, den_degree)
    return [float(v) for v in p], [float(v) for v in q]


# R of Gauss s = (s, s) Pade, Radau IIA s = (s-1, s), Lobatto IIIC s = (s-2, s) approximant of e^z;
# trapezoidal and backward Euler are (1, 1) and (0, 1) (HW IV.3 Table 3.1 and IV.5 [mem]).
PADE = {"backward-euler": (0, 1), "trapezoidal": (1, 1), "implicit-midpoint": (1, 1),
        "gauss2": (2, 2), "radau-iia2": (1, 2), "radau-iia3": (2, 3), "lobatto-iiic2": (0, 2)}


@pytest.mark.parametrize("method_id", sorted(PADE))
def test_collocation_stability_functions_are_pade_approximants(method_id):
    p, q = analysis.stability_polynomials(implicit(method_id))
    want_p, want_q = pade_exp(*PADE[method_id])
    got_p = [float(p.coeff(Z, k)) for k in range(len(want_p))]
    got_q = [float(q.coeff(Z, k)) for k in range(len(want_q))]
    assert sp.degree(p, Z) == PADE[method_id][0] and sp.degree(q, Z) == PADE[method_id][1]
    assert np.allclose(got_p, want_p, rtol=1e-14) and np.allclose(got_q, want_q, rtol=1e-14)


def test_stability_function_matches_the_definition_numerically():
    # R(z) = 1 + z b^T (I - zA)^{-1} 1 (HW IV.3, formula (3.3) [mem]) evaluated with numpy.
    for tableau in [implicit("radau-iia3"), implicit("sdirk2"), builtin("dp5"),
                    tableau_from_data(GAUSS3, "test")]:
        a, b, _ = tableau.floats()
        r = analysis.stability_function(tableau)
        for z in (-0.7 + 0.3j, 1.9j, -5.0):
            direct = 1 + z * b @ np.linalg.solve(np.eye(len(b)) - z * a, np.ones(len(b)))
            assert abs(complex(r.subs(Z, z)) - direct) < 1e-12


def test_stability_function_is_in_lowest_terms():
    # A second stage that no weight uses adds a factor (1 - z) to both P and Q; it must cancel so
    # that r_infinity and the poles are those of the method actually used.
    data = dict(name="padded implicit midpoint", a=[["1/2", 0], [0, 1]], b=[1, 0], c=["1/2", 1])
    p, q = analysis.stability_polynomials(tableau_from_data(data, "padded.toml"))
    assert sp.expand(p - (1 + Z / 2)) == 0 and sp.expand(q - (1 - Z / 2)) == 0


# ---------------------------------------------------------------------------------------------
# Stability limits and flags
# ---------------------------------------------------------------------------------------------

# (real-axis limit, imaginary-axis limit): Lambert 1991 section 5.12 [mem] (-2.51, -2.78) and
# HNW I IV.2 [mem] (stability domains, DP5), to the digits of the roots of |R| = 1; sqrt(3) and
# 2 sqrt(2) exact.
AXIS_LIMITS = {
    "euler": (-2.0, 0.0), "midpoint": (-2.0, 0.0), "heun": (-2.0, 0.0), "ralston2": (-2.0, 0.0),
    "kutta3": (-2.512745327, math.sqrt(3)), "ssprk3": (-2.512745327, math.sqrt(3)),
    "bs3": (-2.512745327, math.sqrt(3)),
    "rk4": (-2.785293563, 2 * math.sqrt(2)), "rk4-38": (-2.785293563, 2 * math.sqrt(2)),
    "dp5": (-3.306567893, 0.997189),
}


@pytest.mark.parametrize("method_id", sorted(AXIS_LIMITS))
def test_axis_limits_of_explicit_methods(method_id):
    report = analysis.analyse(builtin(method_id))
    real, imag = AXIS_LIMITS[method_id]
    assert abs(report.real_axis_limit - real) < 1e-6
    assert abs(report.imag_axis_limit - imag) < 1e-6
    # Explicit methods are never A-stable and R is unbounded at infinity (HW IV.3 [mem]).
    assert not report.a_stable and not report.l_stable and report.r_infinity is None
    assert report.kind == "explicit"


def test_real_axis_limit_of_rk3_is_the_real_root_of_t3_plus_one():
    # Independent check: on the negative axis T3 falls monotonically, so the limit is where
    # T3(x) = -1 (common practice, no source); numpy's roots of x^3/6 + x^2/2 + x + 2.
    roots = np.roots([1 / 6, 1 / 2, 1, 2])
    real = roots[np.abs(roots.imag) < 1e-12].real
    assert abs(analysis.analyse(builtin("kutta3")).real_axis_limit - real.max()) < 1e-12


# A-stable, R(infinity), L-stable: HW IV.3-IV.6 [mem].
IMPLICIT_FLAGS = {
    "backward-euler": (True, 0, True),
    "trapezoidal": (True, -1, False), "implicit-midpoint": (True, -1, False),
    "gauss2": (True, 1, False),
    "radau-iia2": (True, 0, True), "radau-iia3": (True, 0, True), "lobatto-iiic2": (True, 0, True),
    "sdirk2": (True, 0, True), "sdirk3": (True, 0, True),
}


@pytest.mark.parametrize("method_id", sorted(IMPLICIT_FLAGS))
def test_implicit_stability_flags(method_id):
    report = analysis.analyse(implicit(method_id))
    a_stable, r_inf, l_stable = IMPLICIT_FLAGS[method_id]
    assert report.a_stable is a_stable
    assert report.r_infinity == r_inf
    assert report.l_stable is l_stable
    # A-stable: the whole negative real axis and the whole imaginary axis are stable.
    assert report.real_axis_limit is None and report.imag_axis_limit is None
    assert report.order == IMPLICIT_ORDERS[method_id]


def test_implicit_but_not_a_stable_method():
    # theta-method with theta = 1/4: R = (1 + 3z/4)/(1 - z/4) is A-stable only for theta >= 1/2
    # (HW IV.3 [mem]); on the real axis |R| <= 1 for x >= -4 ((1 + 3x/4) = -(1 - x/4) at x = -4),
    # and |R(iy)| > 1 for all y > 0, and R(inf) = -3.
    data = dict(name="theta = 1/4", a=[[0, 0], ["3/4", "1/4"]], b=["3/4", "1/4"], c=[0, 1])
    report = analysis.analyse(tableau_from_data(data, "theta.toml"))
    assert not report.a_stable and not report.l_stable
    assert report.r_infinity == -3
    assert abs(report.real_axis_limit - (-4.0)) < 1e-12
    assert report.imag_axis_limit == 0.0


def test_pole_in_left_half_plane_is_not_a_stable():
    # a = diag(1, -1), b = (5/4, -1/4): R = 1 + z b^T (I - zA)^{-1} 1 = (1 + z + z^2/2)/(1 - z^2),
    # so E(y) = 2y^2 + 3y^4/4 >= 0 on the imaginary axis, but R has a pole at z = -1 and is therefore
    # not A-stable (HW IV.3, definition of A-stability [mem]).
    data = dict(name="pole at -1", a=[[1, 0], [0, -1]], b=["5/4", "-1/4"], c=[1, -1])
    report = analysis.analyse(tableau_from_data(data, "neg.toml"))
    assert report.imag_axis_limit is None
    assert not report.a_stable
    assert sp.simplify(report.stability.function - (1 + Z + Z ** 2 / 2) / (1 - Z ** 2)) == 0
    assert -1 < report.real_axis_limit < 0


def test_ros2_and_rosenbrock_euler():
    # Rosenbrock-Euler: R = 1/(1 - z) (HW IV.7 [mem]); A- and L-stable (HW IV.3-IV.6 [mem]).
    assert sp.simplify(analysis.rosenbrock_stability_function(builtin("rosenbrock-euler")) - 1 / (1 - Z)) == 0
    # ROS2, gamma = 1 + 1/sqrt(2): A- and L-stable, R(inf) = 0 (Verwer, Spee, Blom & Hundsdorfer
    # 1999, SIAM J. Sci. Comput. 20(4)).
    for method_id in ("rosenbrock-euler", "ros2"):
        report = analysis.rosenbrock_stability_report(builtin(method_id))
        assert report.a_stable and report.l_stable and report.r_infinity == 0
    # One ROS2 step on y' = lambda y written out from the scheme of Verwer, Spee, Blom & Hundsdorfer
    # 1999: (I - g h J) k1 = f(y), (I - g h J) k2 = f(y + h k1) - 2 k1, y1 = y + 3/2 h k1 + 1/2 h k2.
    r = analysis.rosenbrock_stability_function(builtin("ros2"))
    g = 1 + 1 / math.sqrt(2)
    for lam, h in ((-3.0 + 1j, 0.1), (-50.0, 0.3), (2j, 0.7)):
        k1 = lam / (1 - g * h * lam)
        k2 = (lam * (1 + h * k1) - 2 * k1) / (1 - g * h * lam)
        y1 = 1 + 1.5 * h * k1 + 0.5 * h * k2
        assert abs(complex(r.subs(Z, h * lam)) - y1) < 1e-13
    # Second order: R = 1 + z + z^2/2 + O(z^3) (Verwer et al. 1999: ROS2 is of order 2).
    assert sp.simplify(sp.series(r, Z, 0, 3).removeO() - taylor_exp(2)) == 0


def test_exact_propagator_report():
    report = analysis.analyse_exact(builtin("zoh-exact"))
    # |exp(z)| = exp(Re z) <= 1 exactly on Re z <= 0 (common practice, no source).
    assert report.a_stable and report.l_stable and report.order is None
    assert report.real_axis_limit is None and report.imag_axis_limit is None
    z = np.array([-1e6, -0.1 + 50j, 3j, 0.01])
    assert list(analysis.in_stability_region(report.stability.function, z)) == [True, True, True, False]


def test_in_stability_region_near_the_rk4_limits():
    # -2.785293563 (Lambert 1991, section 5.12 [mem]) and 2 sqrt(2) (HNW I IV.2 [mem]) for any
    # 4-stage order-4 method.
    z = np.array([-2.7852, -2.7854, 2.8284j, 2.8285j, 0, -1 - 1j, 1 + 0j])
    got = analysis.in_stability_region(builtin("rk4"), z)
    assert list(got) == [True, False, True, False, True, True, False]
    # The same test through the exact R as an expression.
    r = analysis.stability_function(builtin("rk4"))
    assert list(analysis.in_stability_region(r, z)) == list(got)


# ---------------------------------------------------------------------------------------------
# Largest stable step
# ---------------------------------------------------------------------------------------------

def test_max_stable_dt_on_the_negative_axis():
    # |1 + h lambda| <= 1 gives h <= 2/1000 for Euler (common practice, no source); RK4 and DP5:
    # real-axis limits (Lambert 1991, section 5.12 [mem]; HNW I IV.2 [mem]) divided by 1000.
    assert abs(analysis.max_stable_dt(builtin("euler"), [-1000.0]) - 0.002) < 0.002 * 1e-9
    assert abs(analysis.max_stable_dt(builtin("rk4"), [-1000.0]) - 2.785293563e-3) < 2.79e-3 * 1e-6
    assert abs(analysis.max_stable_dt(builtin("dp5"), [-1000.0]) - 3.306567893e-3) < 3.31e-3 * 1e-6


def first_unstable_step(r_numeric, lam, h_max, samples=200_000):
    """Independent check: scan |R(h lambda)| on a grid from 0, then bisect the first crossing."""
    hs = np.linspace(0, h_max, samples)[1:]
    bad = np.nonzero(np.abs(r_numeric(hs * lam)) > 1 + 1e-13)[0]
    assert len(bad), "no instability on the scanned range"
    lo = hs[bad[0] - 1] if bad[0] > 0 else 0.0
    hi = hs[bad[0]]
    for _ in range(60):
        mid = (lo + hi) / 2
        lo, hi = (mid, hi) if abs(r_numeric(mid * lam)) <= 1 else (lo, mid)
    return hi


def test_max_stable_dt_for_a_lightly_damped_pair_matches_bisection():
    # R of RK4 is the Taylor polynomial T4 (HNW I IV.2 [mem]), evaluated here independently of the
    # tableau.
    def r4(z):
        return 1 + z + z ** 2 / 2 + z ** 3 / 6 + z ** 4 / 24

    lam = -1 + 100j
    want = first_unstable_step(r4, lam, 0.05)
    got = analysis.max_stable_dt(builtin("rk4"), [lam, np.conj(lam)])
    assert abs(got - want) < 0.01 * want
    # Close to the imaginary-axis limit 2 sqrt(2)/|lambda| (HNW I IV.2 [mem]), slightly beyond it.
    assert 2 * math.sqrt(2) / abs(lam) < got < 1.05 * 2 * math.sqrt(2) / abs(lam)


def test_max_stable_dt_takes_the_most_restrictive_eigenvalue():
    eigenvalues = [0.0, -10.0, -1000.0, -3 + 4j, -3 - 4j]
    got = analysis.max_stable_dt(builtin("rk4"), eigenvalues, margin=0.5)
    # RK4's real-axis limit (Lambert 1991, section 5.12 [mem]) divided by 1000, halved by the
    # margin.
    assert abs(got - 0.5 * 2.785293563e-3) < 1e-9


def test_max_stable_dt_on_the_imaginary_axis():
    # Euler and RK2: only the origin of the imaginary axis is stable (HNW I IV.2 [mem]: limit 0).
    assert analysis.max_stable_dt(builtin("euler"), [100j]) == 0.0
    assert analysis.max_stable_dt(builtin("heun"), [100j]) == 0.0
    # RK4: 2 sqrt(2)/100; DP5: 0.997189/100 (HNW I IV.2 [mem]; DP5 to the digits computed here).
    assert abs(analysis.max_stable_dt(builtin("rk4"), [100j]) - 2 * math.sqrt(2) / 100) < 1e-12
    assert abs(analysis.max_stable_dt(builtin("dp5"), [100j]) - 0.00997189) < 1e-8
    # Trapezoidal has |R(iy)| = 1 everywhere (HW IV.3 [mem]): touching is not leaving, unbounded.
    assert analysis.max_stable_dt(implicit("trapezoidal"), [100j, -1e9]) == math.inf


def test_max_stable_dt_of_a_stable_methods_is_unbounded_for_decaying_modes():
    eigenvalues = [-1e8, -1 + 1e5j, -1e3 - 1e3j]
    for method_id in ("backward-euler", "radau-iia3", "sdirk2", "gauss2"):
        assert analysis.max_stable_dt(implicit(method_id), eigenvalues) == math.inf


def test_max_stable_dt_of_a_growing_mode_is_zero():
    # |R(h lambda)| = 1 + h Re(lambda) + O(h^2) > 1 for small h when Re lambda > 0 (common practice,
    # no source), for explicit and implicit methods alike.
    assert analysis.max_stable_dt(builtin("rk4"), [0.5 + 2j]) == 0.0
    assert analysis.max_stable_dt(implicit("backward-euler"), [1.0]) == 0.0


def test_first_sign_loss_with_radical_coefficients_and_a_touch():
    # f = (sqrt(2) - t)(t + 1): positive on [0, sqrt(2)), negative after.
    r2 = sp.sqrt(2)
    root = analysis._first_sign_loss([r2, r2 - 1, -1])
    assert abs(float(root) - math.sqrt(2)) < 1e-15
    # f = (t - sqrt(2))^2 (t + 1) touches zero at sqrt(2) without changing sign: no loss.
    touch = sp.Poly(sp.expand((analysis._T - r2) ** 2 * (analysis._T + 1)), analysis._T)
    assert analysis._first_sign_loss(list(reversed(touch.all_coeffs()))) is None
    # f = t^2 (t - 3)^2 (5 - t): the touches at 0 and 3 are kept, the crossing at 5 ends it.
    cross = sp.Poly(sp.expand(analysis._T ** 2 * (analysis._T - 3) ** 2 * (5 - analysis._T)),
                    analysis._T)
    assert analysis._first_sign_loss(list(reversed(cross.all_coeffs()))) == 5


def test_report_as_dict_is_plain_data():
    data = analysis.analyse(builtin("bs3")).as_dict()
    assert data["order"] == 3 and data["embedded_order"] == 2 and data["stages"] == 4
    assert data["r_infinity"] is None and data["stability_function"] == str(taylor_exp(3))


def test_max_stable_dt_takes_every_method_kind():
    from codegen.methods import builtin

    # Rosenbrock-Euler has R = 1/(1 - z) (A-stable): no limit for decaying modes; the exact
    # discretization is stable exactly where Re(h lambda) <= 0 (common practice, no source).
    assert analysis.max_stable_dt(builtin("rosenbrock-euler"), [-1e6, -3 + 4j]) == math.inf
    assert analysis.max_stable_dt(builtin("zoh-exact"), [-1e6]) == math.inf
    assert analysis.max_stable_dt(builtin("zoh-exact"), [0.5]) == 0.0
    assert analysis.stability_coefficients(builtin("zoh-exact")) is None


def test_ray_directions_keep_the_largest_eigenvalue_of_each_direction():
    # On a ray the limit is t*/|lambda| (t* fixed by the direction): only the largest |lambda| of
    # a direction binds; conjugates share a direction, zero has none.
    values = [-1.0, -1000.0, -3 + 4j, -6 - 8j, -0.3 + 0.4j, 0.0, 2j, -5j]
    got = analysis.ray_directions(values)
    assert sorted(got, key=lambda v: (v.real, v.imag)) == [-1000.0, -6 + 8j, 5j]


def test_the_float_proof_of_positivity_proves_only_what_holds():
    # (t - 2)^2 + 1/1000 > 0 everywhere; (t - 2)^2 touches 0 at 2; 1 - t crosses at 1 (exact
    # algebra, no source needed).
    c = lambda expr: [sp.Rational(v) for v in reversed(sp.Poly(expr, analysis._T).all_coeffs())]
    t = analysis._T
    assert analysis._proven_positive(c((t - 2) ** 2 + sp.Rational(1, 1000)), 5)
    assert not analysis._proven_positive(c((t - 2) ** 2), 5)
    assert analysis._proven_positive(c(1 - t), sp.Rational(99, 100))
    assert not analysis._proven_positive(c(1 - t), 2)
    # ray_limit with a bound: None when the ray stays stable up to it, the limit when it does not.
    rk4 = analysis.stability_coefficients(builtin("rk4"))
    assert analysis.ray_limit(rk4, -1000 + 0j, upto=2.7e-3) is None
    assert abs(analysis.ray_limit(rk4, -1000 + 0j, upto=2.9e-3) - 2.785293563e-3) < 1e-11


def envelope_eigenvalues():
    """A lightly to well damped pair swept over its natural frequency, plus real modes: many
    directions, same-direction repeats, conjugates, a zero (common practice, no source:
    lambda = -zeta w +- i w sqrt(1 - zeta^2))."""
    values = [0.0, -5.0, -40.0]
    for w in (20.0, 35.0, 50.0):
        for zeta in (0.05, 0.2, 0.7):
            pole = complex(-zeta * w, w * math.sqrt(1 - zeta ** 2))
            values += [pole, pole.conjugate()]
    return np.array(values)


@pytest.mark.parametrize("method_id, r_numeric", [
    ("euler", lambda z: 1 + z),
    ("kutta3", lambda z: 1 + z + z ** 2 / 2 + z ** 3 / 6),
    ("rk4", lambda z: 1 + z + z ** 2 / 2 + z ** 3 / 6 + z ** 4 / 24),
])
def test_max_stable_dt_over_an_envelope_is_the_smallest_single_limit(method_id, r_numeric):
    # The envelope use (many eigenvalues at once, reduced to one per direction) must give the
    # smallest of the limits found one eigenvalue at a time by an independent scan of |R| (R the
    # Taylor polynomial, HNW I IV.2 [mem]).
    values = envelope_eigenvalues()
    got = analysis.max_stable_dt(builtin(method_id), values)
    singles = [first_unstable_step(r_numeric, lam, 10.0 / abs(lam), samples=20_000)
               for lam in values if lam != 0]
    assert abs(got - min(singles)) < 1e-3 * min(singles)
    # ...and the exact use, one eigenvalue at a time, agrees with each scan.
    for lam, want in zip([v for v in values if v != 0][:4], singles[:4]):
        assert abs(analysis.max_stable_dt(builtin(method_id), [lam]) - want) < 1e-3 * want


def test_max_stable_dt_of_an_a_stable_method_over_an_envelope_is_unbounded_or_zero():
    values = envelope_eigenvalues()
    # Rosenbrock-Euler R = 1/(1 - z) and SDIRK2 are A-stable (HW IV.3, IV.7 [mem]).
    for method in (builtin("rosenbrock-euler"), implicit("sdirk2"), builtin("zoh-exact")):
        assert analysis.max_stable_dt(method, values) == math.inf
        # A growing mode leaves the region at once (|R(h lambda)| > 1 for small h > 0).
        assert analysis.max_stable_dt(method, np.append(values, 0.5 + 3j)) == 0.0


# ---------------------------------------------------------------------------------------------
# Rosenbrock order conditions
# ---------------------------------------------------------------------------------------------

# Two Rosenbrock methods built for these tests in the form of types.LinearlyImplicit. The first
# was constructed in Hairer & Wanner's form (gamma = 1/2, their alpha21 = 1/2, alpha32 = 1,
# gamma21 = 1, gamma32 = -41/35, b = (23/36, 1/27, 35/108)) to meet the order conditions up to
# order 3, then transformed to ours; its stage times (0, 1/2, 1) differ from the row sums of our
# alpha (0, 1/2, -1). The second meets only the order-1 condition.
ORDER3_ROSENBROCK = dict(
    kind="rosenbrock", name="3 stages, order 3 (test)", gamma="1/2",
    alpha=[[0, 0, 0], ["1/2", 0, 0], [-2, 1, 0]],
    coupling=[[0, 0, 0], [2, 0, 0], ["164/35", "-82/35", 0]],
    b=["-103/108", "43/54", "35/108"])
ORDER1_ROSENBROCK = dict(
    kind="rosenbrock", name="2 stages, order 1 (test)", gamma=1,
    alpha=[[0, 0], [1, 0]], coupling=[[0, 0], [-1, 0]], b=[1, "1/2"])


def rosenbrock(data):
    from codegen.methods import rosenbrock_from_data

    return rosenbrock_from_data(data, "test")


def test_rosenbrock_order_conditions_of_the_builtins_and_the_test_methods():
    # Rosenbrock-Euler is order 1, ROS2 order 2 (Verwer et al. 1999; HW IV.7 [mem]).
    assert analysis.rosenbrock_order(builtin("rosenbrock-euler")) == 1
    assert analysis.rosenbrock_order(builtin("ros2")) == 2
    assert analysis.analyse(builtin("ros2")).order == 2
    assert analysis.rosenbrock_order(rosenbrock(ORDER3_ROSENBROCK)) == 3
    assert analysis.rosenbrock_order(rosenbrock(ORDER1_ROSENBROCK)) == 1
    assert rosenbrock(ORDER3_ROSENBROCK).c == (0, sp.Rational(1, 2), 1)
    # A tolerance accepts a residual below it and nothing larger.
    nudged = dict(ORDER3_ROSENBROCK, b=["-103/108 + 1e-14", "43/54", "35/108 - 1e-14"])
    assert rosenbrock(nudged).tolerance > 0 and analysis.rosenbrock_order(rosenbrock(nudged)) == 3
    assert analysis.rosenbrock_order(dataclasses.replace(rosenbrock(nudged), tolerance=0.0)) < 3


def hairer_wanner_step(method, f, jac, y, h):
    """One step in Hairer & Wanner's form, written out here from HW IV.7 (7.4) [mem]:
    (I - gamma h J) K_i = h f(y + sum_j alpha_ij K_j) + h J sum_{j<i} gamma_ij K_j,
    y1 = y + sum_i b_i K_i (autonomous f)."""
    big_gamma, alpha, b = analysis.hairer_wanner_form(method)
    s, n, g = method.stages, len(y), float(method.gamma)
    J = jac(y)
    K = np.zeros((s, n))
    for i in range(s):
        rhs = h * f(y + sum(float(alpha[i][j]) * K[j] for j in range(i))) \
            + h * J @ sum((float(big_gamma[i][j]) * K[j] for j in range(i)), np.zeros(n))
        K[i] = np.linalg.solve(np.eye(n) - g * h * J, rhs)
    return y + sum(float(b[i]) * K[i] for i in range(s))


def nonlinear_model():
    x, y = sp.Symbol("x", real=True), sp.Symbol("y", real=True)
    from codegen.model import State, define

    return define("nl", [State("x", initial=1.0, rate=-x * y + sp.sin(y)),
                         State("y", initial=0.5, rate=x - y ** 3)])


@pytest.mark.parametrize("data", [ORDER3_ROSENBROCK, ORDER1_ROSENBROCK], ids=["order3", "order1"])
def test_our_rosenbrock_form_is_hairer_wanners_after_the_transformation(data):
    from codegen.reference import jacobian_function, rate_function, stepper

    method, model = rosenbrock(data), nonlinear_model()
    f, jac = rate_function(model), jacobian_function(model)
    y, h = np.array([1.0, 0.5]), 0.1
    theirs = hairer_wanner_step(method, lambda v: f(0.0, v, []), lambda v: jac(0.0, v, []), y, h)
    ours = stepper(model, method)(0.0, y, [], h).x
    np.testing.assert_allclose(ours, theirs, rtol=1e-13, atol=1e-15)


def time_dependent_model():
    x, t = sp.Symbol("x", real=True), sp.Symbol("t", real=True)
    from codegen.model import State, define

    return define("td", [State("x", initial=1.0, rate=-x + sp.sin(3 * t) * x ** 2 / 4 + sp.cos(t))])


def measured_order(model, method, steps=(128, 256, 512, 1024)):
    from codegen.reference import high_accuracy, run

    exact = high_accuracy(model, 1.0, np.zeros((1, 0)), rtol=1e-13).xs[-1]
    errors = [np.max(np.abs(run(model, method, 1.0 / n, 1, np.zeros((n, 0))).xs[-1] - exact))
              for n in steps]
    return float(-np.polyfit(np.log(steps), np.log(errors), 1)[0])


@pytest.mark.parametrize("make", [nonlinear_model, time_dependent_model], ids=["nl", "time"])
@pytest.mark.parametrize("method, order", [
    (lambda: builtin("ros2"), 2), (lambda: builtin("rosenbrock-euler"), 1),
    (lambda: rosenbrock(ORDER3_ROSENBROCK), 3), (lambda: rosenbrock(ORDER1_ROSENBROCK), 1)],
    ids=["ros2", "rosenbrock-euler", "order3", "order1"])
def test_rosenbrock_conditions_predict_the_measured_convergence_order(make, method, order):
    # The conditions (HW IV.7, Table 7.1, from memory) are confirmed by the convergence order the
    # reference reaches against solve_ivp; on the time-dependent model the derived stage times
    # and time weights are needed as well (with the row sums of our alpha as stage times the
    # order-3 method drops to order 1).
    method = method()
    assert analysis.rosenbrock_order(method) == order
    assert abs(measured_order(make(), method) - order) < 0.15


def test_in_stability_region_takes_every_method_kind():
    # ROS2's R (written out from Verwer et al. 1999, see test_ros2_and_rosenbrock_euler) and
    # exp(z) of the exact discretization, |exp(z)| = exp(Re z) (common practice, no source).
    g = 1 + 1 / math.sqrt(2)
    z = np.array([-1e3, -0.5 + 3j, 0.2, 1e-3 + 1e3j, 5.0])
    r = (1 + (1 - 2 * g) * z + (g * g - 2 * g + 0.5) * z ** 2) / (1 - g * z) ** 2
    assert list(analysis.in_stability_region(builtin("ros2"), z)) == list(np.abs(r) <= 1)
    assert list(analysis.in_stability_region(builtin("zoh-exact"), z)) == \
        [True, True, False, False, False]
