"""Properties of a method from its data: order (rooted trees for tableaux, the Rosenbrock
conditions up to order 3) and linear stability.

Method -> MethodReport. Everything that decides a yes/no question (is a condition satisfied, is
the method A-stable, where does a stability interval end) is decided in exact arithmetic (order
conditions of data given in decimals: to the method's tolerance); floating point (mpmath at 50
digits) is only a fast filter in front of the exact test and the final rounding of a limit to a
float.

References
----------
Butcher, The Numerical Analysis of Ordinary Differential Equations, 1987 (rooted trees, elementary
weights, densities).
HNW: Hairer, Norsett & Wanner, Solving Ordinary Differential Equations I, 2nd ed., 1993, II.2-II.3
(order conditions), IV.2 (stability domains of explicit methods).
HW: Hairer & Wanner, Solving Ordinary Differential Equations II, 2nd ed., 1996, IV.3 (stability
function, det formula, A- and L-stability, E-polynomial), IV.7 (Rosenbrock methods).
"""

from __future__ import annotations

import functools
import math
from dataclasses import dataclass

import mpmath
import numpy as np
import sympy as sp

from ..errors import MethodError
from .types import EXACT, LINEARLY_IMPLICIT, LinearlyImplicit, Tableau, unit_lower_inverse

# The variable of the stability function, z = h * lambda.
Z = sp.Symbol("z")

# Working precision of the numerical filters; residuals of exact data are then below 1e-45.
_DIGITS = 50
# A numerical residual above this is certainly not an exact zero at _DIGITS working precision.
_NUMERIC_ZERO = mpmath.mpf("1e-40")
# Slack of the numerical region test, for points on the boundary |R| = 1 (double rounding).
_REGION_SLACK = 1e-12

Tree = tuple  # a rooted tree: the sorted tuple of its children's trees; () is the single node


# ---------------------------------------------------------------------------------------------
# Rooted trees and order conditions
# ---------------------------------------------------------------------------------------------

def _canonical(children) -> Tree:
    return tuple(sorted(children))


def _grow(tree: Tree):
    """Every tree obtained by attaching one new leaf to some node of tree."""
    yield _canonical(tree + ((),))
    for i, child in enumerate(tree):
        if i > 0 and child == tree[i - 1]:
            continue  # the same subtree again gives the same trees
        for grown in _grow(child):
            yield _canonical(tree[:i] + (grown,) + tree[i + 1:])


@functools.lru_cache(maxsize=None)
def rooted_trees(order: int) -> tuple[Tree, ...]:
    """All rooted trees with `order` nodes, each as a sorted tuple of subtrees, in a fixed order.

    References
    ----------
    Butcher 1987; the counts are OEIS A000081.
    """
    if order < 1:
        raise ValueError("a rooted tree has at least one node")
    if order == 1:
        return ((),)
    grown = {g for tree in rooted_trees(order - 1) for g in _grow(tree)}
    return tuple(sorted(grown))


def _tree_order(tree: Tree) -> int:
    return 1 + sum(_tree_order(child) for child in tree)


def _density(tree: Tree) -> int:
    return _tree_order(tree) * math.prod(_density(child) for child in tree)


def _symmetry(tree: Tree) -> int:
    result = 1
    for i, child in enumerate(tree):
        if i > 0 and child == tree[i - 1]:
            continue
        m = tree.count(child)
        result *= math.factorial(m) * _symmetry(child) ** m
    return result


def _notation(tree: Tree) -> str:
    if not tree:
        return "τ"
    return "[" + ",".join(_notation(child) for child in tree) + "]"


@dataclass(frozen=True)
class OrderCondition:
    """One order condition b^T Phi(t) = 1 / gamma(t) for the rooted tree t.

    tree is the nested tuple form, order its number of nodes, density gamma(t), symmetry sigma(t).

    References
    ----------
    Butcher 1987; HNW I, section II.2, Theorem 2.13 (from memory).
    """

    tree: Tree
    order: int
    density: int
    symmetry: int

    @property
    def notation(self) -> str:
        """Bracket notation: τ is one node, [t1,...,tm] grafts t1..tm onto a new root."""
        return _notation(self.tree)

    def elementary_weight(self, a, b) -> sp.Expr:
        """The elementary weight Phi(t) = sum_i b_i g_i(t) for the s x s matrix a and weights b."""
        cache: dict = {}
        return _expand(sum(bi * gi for bi, gi in zip(b, _exact_vector(self.tree, a, cache))))

    def residual(self, a, b) -> sp.Expr:
        """Phi(t) - 1/gamma(t), exact; zero when the condition holds."""
        return _clean(self.elementary_weight(a, b) - sp.Rational(1, self.density))


@functools.lru_cache(maxsize=None)
def order_conditions(order: int) -> tuple[OrderCondition, ...]:
    """The order conditions of exactly this order, one per rooted tree with `order` nodes."""
    return tuple(OrderCondition(t, order, _density(t), _symmetry(t)) for t in rooted_trees(order))


def condition_counts(max_order: int = 8) -> list[int]:
    """Number of order conditions of each order 1..max_order (1, 1, 2, 4, 9, 20, 48, 115, ...).

    References
    ----------
    OEIS A000081, citing Butcher 1987.
    """
    return [len(order_conditions(p)) for p in range(1, max_order + 1)]


def _expand(value):
    return value if isinstance(value, sp.Rational) else sp.expand(value)


def _exact_vector(tree: Tree, a, cache: dict) -> tuple:
    """g(t): g(τ) = 1 and g([t1..tm])_i = prod_k (a g(t_k))_i, exact, memoised in cache."""
    if tree in cache:
        return cache[tree]
    s = len(a)
    g = [sp.Integer(1)] * s
    for child in tree:
        ag = _exact_a_times(child, a, cache)
        g = [_expand(x * y) for x, y in zip(g, ag)]
    cache[tree] = tuple(g)
    return cache[tree]


def _exact_a_times(tree: Tree, a, cache: dict) -> tuple:
    key = ("a", tree)
    if key not in cache:
        g = _exact_vector(tree, a, cache)
        cache[key] = tuple(_expand(sum(aij * gj for aij, gj in zip(row, g))) for row in a)
    return cache[key]


def _numeric_vector(tree: Tree, a, cache: dict) -> list:
    """g(t) in mpmath at the working precision (same recursion as _exact_vector)."""
    if tree in cache:
        return cache[tree]
    s = len(a)
    g = [mpmath.mpf(1)] * s
    for child in tree:
        key = ("a", child)
        if key not in cache:
            gc = _numeric_vector(child, a, cache)
            cache[key] = [mpmath.fsum(aij * gj for aij, gj in zip(row, gc)) for row in a]
        g = [x * y for x, y in zip(g, cache[key])]
    cache[tree] = g
    return g


def _mp(value, digits: int = _DIGITS + 10) -> mpmath.mpf:
    """value as an mpmath number correct to `digits` digits (set mpmath's precision to match)."""
    return mpmath.mpf(sp.Float(sp.N(value, digits), digits)._mpf_)


def order_of(tableau: Tableau, weights=None, max_order: int = 8) -> int:
    """The largest p <= max_order such that every order condition of order <= p holds.

    weights replaces b (pass tableau.b_hat for the order of the embedded solution). Each condition
    is decided at the tableau's own tolerance (Tableau.tolerance): exactly for exact data, and as
    satisfied when |Phi(t) - 1/gamma(t)| <= tolerance for data given in rounded decimals or
    rounded on purpose. Returns 0 if even sum(b) = 1 fails.

    Each condition is first evaluated at 50 digits; one that is clearly not zero fails without
    exact work, one that is numerically zero is confirmed with exact arithmetic.

    References
    ----------
    Butcher 1987; HNW I, section II.2, Theorem 2.13 (from memory).
    """
    tol = tableau.tolerance
    b = tableau.b if weights is None else tuple(weights)
    if len(b) != tableau.stages:
        raise MethodError(f"{tableau.id}: weights: must have {tableau.stages} entries")
    a = tableau.a
    with mpmath.workdps(_DIGITS):
        a_num = [[_mp(v) for v in row] for row in a]
        b_num = [_mp(v) for v in b]
        tol_num = mpmath.mpf(tol)
        numeric_cache: dict = {}
        exact_cache: dict = {}
        for p in range(1, max_order + 1):
            for condition in order_conditions(p):
                g = _numeric_vector(condition.tree, a_num, numeric_cache)
                residual = mpmath.fsum(bi * gi for bi, gi in zip(b_num, g)) \
                    - mpmath.mpf(1) / condition.density
                if tol > 0:
                    if abs(residual) > tol_num:
                        return p - 1
                    continue
                if abs(residual) > _NUMERIC_ZERO:
                    return p - 1
                g_exact = _exact_vector(condition.tree, a, exact_cache)
                value = sum(bi * gi for bi, gi in zip(b, g_exact)) - sp.Rational(1, condition.density)
                if not _is_zero(value):
                    return p - 1
    return max_order


def hairer_wanner_form(method: LinearlyImplicit, weights=None) -> tuple[list, list, list]:
    """(Gamma, alpha, b) of a Rosenbrock method in the form of Hairer & Wanner, exact.

    Our form (I - gamma h J) k_i = f(y + h sum_j alpha_ij k_j) + sum_j coupling_ij k_j,
    y1 = y + h sum_i b_i k_i, is theirs, (I - gamma h J) K_i = h f(y + sum_j alpha_ij K_j)
    + h J sum_{j<i} gamma_ij K_j, y1 = y + sum_i b_i K_i, with h k = Gamma K / gamma: their
    Gamma = gamma (I - coupling)^-1 (diagonal gamma), their alpha = alpha (I - coupling)^-1 and
    their b = b (I - coupling)^-1. weights replaces b (pass b_hat for the embedded solution).

    References
    ----------
    HW, section IV.7, the transformation to the form with the matrix C (from memory).
    """
    s = method.stages
    inv = unit_lower_inverse(method.coupling)
    b = method.b if weights is None else tuple(weights)
    times = lambda row: [sp.expand(sum((row[k] * inv[k][j] for k in range(s)), sp.Integer(0)))
                         for j in range(s)]
    gamma = [[sp.expand(method.gamma * v) for v in row] for row in inv]
    return gamma, [times(row) for row in method.alpha], times(b)


def rosenbrock_residuals(method: LinearlyImplicit, weights=None) -> list[tuple[int, sp.Expr]]:
    """(order, residual) of each order condition of a Rosenbrock method up to order 3, exact.

    With beta_jk = alpha_jk + gamma_jk below the diagonal, beta_j = sum_k beta_jk and
    alpha_j = sum_k alpha_jk (Hairer & Wanner's coefficients, hairer_wanner_form):
    order 1: sum b_j = 1; order 2: sum b_j beta_j = 1/2 - gamma; order 3: sum b_j alpha_j^2 = 1/3
    and sum b_j beta_jk beta_k = 1/6 - gamma + gamma^2.

    References
    ----------
    HW, section IV.7, Table 7.1 (from memory; tests/test_analysis.py measures the convergence
    orders these conditions predict).
    """
    big_gamma, alpha, b = hairer_wanner_form(method, weights)
    s, g = method.stages, method.gamma
    beta = [[alpha[j][k] + big_gamma[j][k] for k in range(j)] for j in range(s)]
    beta_sum = [sum(row, sp.Integer(0)) for row in beta]
    alpha_sum = [sum(row, sp.Integer(0)) for row in alpha]
    half, third, sixth = sp.Rational(1, 2), sp.Rational(1, 3), sp.Rational(1, 6)
    return [
        (1, sum(b, sp.Integer(0)) - 1),
        (2, sum(b[j] * beta_sum[j] for j in range(s)) - (half - g)),
        (3, sum(b[j] * alpha_sum[j] ** 2 for j in range(s)) - third),
        (3, sum(b[j] * beta[j][k] * beta_sum[k] for j in range(s) for k in range(j))
         - (sixth - g + g ** 2)),
    ]


def rosenbrock_order(method: LinearlyImplicit, weights=None) -> int:
    """The largest p <= 3 such that every Rosenbrock order condition of order <= p holds.

    Decided at the method's own tolerance (exactly for exact data), as order_of does for
    tableaux; 0 if even the order-1 condition fails. Conditions above order 3 are not checked:
    a method of higher order reports 3.

    References
    ----------
    HW, section IV.7, Table 7.1 (from memory).
    """
    if weights is not None and len(weights) != method.stages:
        raise MethodError(f"{method.id}: weights: must have {method.stages} entries")
    tol = method.tolerance
    found = 3
    for order, residual in rosenbrock_residuals(method, weights):
        if order > found:
            break
        held = (abs(float(sp.N(residual, _DIGITS))) <= tol) if tol > 0 else _is_zero(residual)
        if not held:
            found = order - 1
    return found


# ---------------------------------------------------------------------------------------------
# Exact numbers: zero test, sign, simplification
# ---------------------------------------------------------------------------------------------

_X = sp.Symbol("x")


def _is_zero(value) -> bool:
    """Exact zero test for an algebraic number built from rationals and radicals."""
    value = sp.sympify(value)
    if value.is_Rational:
        return value == 0
    value = sp.expand(value)
    if value.is_Rational:
        return value == 0
    with mpmath.workdps(_DIGITS + 30):
        if abs(_mp(value, _DIGITS + 40)) > mpmath.mpf("1e-60"):
            return False
    if sp.radsimp(value) == 0 or sp.simplify(value) == 0:
        return True
    try:
        return sp.minimal_polynomial(value, _X) == _X
    except (NotImplementedError, sp.polys.polyerrors.NotAlgebraic):
        raise MethodError(f"cannot decide whether {value} is zero; use exact radicals "
                          "or rationals in the tableau") from None


def _clean(value) -> sp.Expr:
    """An exact value in expanded form, with exact zeros made 0."""
    value = sp.sympify(value)
    if value.is_Rational:
        return value
    value = sp.radsimp(sp.expand(value))
    return sp.Integer(0) if _is_zero(value) else value


def _sign(value) -> int:
    """Exact sign (-1, 0, 1) of a real algebraic number."""
    value = sp.sympify(value)
    if value.is_Rational:
        return 1 if value.is_positive else (-1 if value.is_negative else 0)
    if _is_zero(value):
        return 0
    digits = _DIGITS
    while True:
        approx = sp.N(value, digits)
        # A nonzero value whose approximation is tiny needs more digits to read its sign.
        if abs(approx) > sp.Float(10) ** (10 - digits):
            return 1 if approx > 0 else -1
        digits *= 2


# ---------------------------------------------------------------------------------------------
# Stability function
# ---------------------------------------------------------------------------------------------

def _reverse_charpoly(matrix: sp.Matrix) -> list:
    """Coefficients (low to high) of det(I - z M), exact."""
    lam = sp.Dummy("lam")
    coeffs = matrix.charpoly(lam).all_coeffs()  # det(lam I - M), high to low
    return [_clean(c) for c in coeffs]


def _trim(coeffs: list) -> list:
    coeffs = list(coeffs)
    while len(coeffs) > 1 and coeffs[-1] == 0:
        coeffs.pop()
    return coeffs


def _to_expr(coeffs: list) -> sp.Expr:
    return sp.Add(*[c * Z ** k for k, c in enumerate(coeffs)])


def _coeffs(expr) -> list:
    """Exact coefficients (low to high) of a polynomial in Z."""
    expr = sp.expand(expr)
    degree = sp.degree(expr, Z) if expr.has(Z) else 0
    return _trim([_clean(expr.coeff(Z, k)) for k in range(degree + 1)])


def _reduce(p: list, q: list) -> tuple[list, list]:
    """Cancel a common factor of P and Q and scale so that Q(0) = 1."""
    p_expr, q_expr = _to_expr(p), _to_expr(q)
    numbers = [c for c in p + q if not c.is_Rational]
    try:
        p_poly = sp.Poly(p_expr, Z, extension=True if numbers else None)
        q_poly = sp.Poly(q_expr, Z, extension=True if numbers else None)
        common = sp.gcd(p_poly, q_poly)
        if common.degree() > 0:
            p_expr = sp.quo(p_poly, common).as_expr()
            q_expr = sp.quo(q_poly, common).as_expr()
    except (sp.polys.polyerrors.PolynomialError, NotImplementedError):
        pass  # no common factor found; R is still correct, only not in lowest terms
    p, q = _coeffs(p_expr), _coeffs(q_expr)
    scale = q[0]
    return [_clean(c / scale) for c in p], [_clean(c / scale) for c in q]


@functools.lru_cache(maxsize=128)
def _tableau_polynomials(tableau: Tableau) -> tuple[tuple, tuple]:
    s = tableau.stages
    a = sp.Matrix(s, s, lambda i, j: tableau.a[i][j])
    ones_b = sp.Matrix(s, s, lambda i, j: tableau.b[j])
    # R = det(I - zA + z 1 b^T) / det(I - zA) (HW IV.3, Proposition 3.2).
    p = _trim(_reverse_charpoly(a - ones_b))
    q = _trim(_reverse_charpoly(a))
    p, q = _reduce(p, q)
    return tuple(p), tuple(q)


def stability_polynomials(tableau: Tableau) -> tuple[sp.Expr, sp.Expr]:
    """(P, Q), exact polynomials in z with R = P/Q in lowest terms and Q(0) = 1.

    References
    ----------
    HW, section IV.3, Proposition 3.2: R(z) = det(I - zA + z 1 b^T) / det(I - zA) (from memory).
    """
    p, q = _tableau_polynomials(tableau)
    return _to_expr(p), _to_expr(q)


def stability_function(tableau: Tableau) -> sp.Expr:
    """R(z) = 1 + z b^T (I - zA)^{-1} 1, the factor of one step on y' = lambda y, z = h lambda.

    References
    ----------
    HW, section IV.3, formula (3.3) and Proposition 3.2 (from memory).
    """
    p, q = stability_polynomials(tableau)
    return p / q


def _rosenbrock_coefficients(method: LinearlyImplicit) -> tuple[tuple, tuple]:
    gamma, alpha, coupling, b = method.gamma, method.alpha, method.coupling, method.b
    # On y' = lambda y, with K_i = h k_i / y:
    #   (1 - gamma z) K_i = z (1 + sum_j alpha_ij K_j) + sum_j coupling_ij K_j.
    stage_values = []
    for i in range(len(b)):
        rhs = Z * (1 + sum(alpha[i][j] * stage_values[j] for j in range(i))) \
            + sum(coupling[i][j] * stage_values[j] for j in range(i))
        stage_values.append(sp.cancel(rhs / (1 - gamma * Z)))
    r = sp.cancel(sp.together(1 + sum(bi * k for bi, k in zip(b, stage_values))))
    num, den = sp.fraction(r)
    return _reduce(_coeffs(num), _coeffs(den))


def rosenbrock_stability_function(method: LinearlyImplicit) -> sp.Expr:
    """R(z) of a Rosenbrock method, exact.

    Derived by applying the scheme of types.LinearlyImplicit to y' = lambda y with
    J = lambda. Rosenbrock-Euler gives 1/(1 - z); ROS2 gives
    (1 + (1 - 2 gamma) z + (gamma^2 - 2 gamma + 1/2) z^2) / (1 - gamma z)^2, whose z^2 term vanishes
    for gamma = 1 + 1/sqrt(2).

    References
    ----------
    HW, section IV.7 (from memory); Verwer, Spee, Blom & Hundsdorfer 1999, SIAM J. Sci. Comput. 20(4).
    """
    p, q = _rosenbrock_coefficients(method)
    return _to_expr(p) / _to_expr(q)


# ---------------------------------------------------------------------------------------------
# Sign analysis of real polynomials with exact (rational or algebraic) coefficients
# ---------------------------------------------------------------------------------------------

_T = sp.Symbol("t")
_S = sp.Symbol("s")


def _rational_shadow(coeffs: list) -> sp.Poly:
    """A polynomial over QQ whose real roots include those of sum coeffs[k] t^k.

    For algebraic coefficients this is the norm: the resultant, in the primitive element s of the
    coefficient field, of f(t, s) and the minimal polynomial of s.
    """
    expr = sp.Add(*[c * _T ** k for k, c in enumerate(coeffs)])
    if all(c.is_Rational for c in coeffs):
        return sp.Poly(expr, _T, domain=sp.QQ)
    poly = sp.Poly(expr, _T, extension=True)
    field = poly.domain

    def in_s(rationals):  # high-to-low rational coefficients -> polynomial in _S
        rationals = list(rationals)
        top = len(rationals) - 1
        return sp.Add(*[sp.Rational(int(r.numerator), int(r.denominator)) * _S ** (top - k)
                        for k, r in enumerate(rationals)])

    minpoly = in_s(field.mod.to_list())
    terms = poly.rep.to_list()  # high to low in t, each an element of QQ<s>
    lifted = sp.Add(*[in_s(coeff.to_list()) * _T ** (len(terms) - 1 - k)
                      for k, coeff in enumerate(terms)])
    norm = sp.resultant(lifted, minpoly, _S)
    return sp.Poly(norm, _T, domain=sp.QQ)


def _evaluate(coeffs: list, point: sp.Rational) -> sp.Expr:
    return sum(c * point ** k for k, c in enumerate(coeffs))


def _first_sign_loss(coeffs: list, upto: sp.Rational | None = None) -> sp.Rational | None:
    """Where f(t) = sum coeffs[k] t^k first stops being >= 0 for t > 0, exactly located.

    Returns 0 if f < 0 just right of 0, None if f >= 0 on all of (0, inf), otherwise the root t*
    (a rational within 1e-40 of it) with f >= 0 on [0, t*] and f < 0 just after it. Roots where f
    touches zero without changing sign (even multiplicity) do not end the interval. With upto,
    None also when f has no root at all in (0, upto] (a Sturm count, cheaper than locating one).
    """
    coeffs = _trim([_clean(c) for c in coeffs])
    low = next((k for k, c in enumerate(coeffs) if c != 0), None)
    if low is None:
        return None  # f is identically zero: |R| = 1 along the whole ray
    coeffs = coeffs[low:]  # t^low > 0 for t > 0: the sign is that of the rest
    if _sign(coeffs[0]) < 0:
        return sp.Integer(0)
    if len(coeffs) == 1:
        return None
    if upto is not None and _proven_positive(coeffs, upto):
        return None
    shadow = _rational_shadow(coeffs)
    if upto is not None and shadow.count_roots(0, upto) == 0:
        return None  # f(0) > 0 and no root of f (a root of its shadow) up to upto
    intervals = [iv for iv, _ in shadow.intervals(inf=0) if iv[1] > 0]
    # Sample f between isolating intervals, where it cannot vanish (a root of f is a root of its
    # shadow), so each sign is exact; the sign after the last root is that of the leading term.
    intervals = _separated(shadow, intervals)
    signs = [1]
    for (_, right), (left, _) in zip(intervals, intervals[1:]):
        signs.append(_sign(_evaluate(coeffs, (right + left) / 2)))
    signs.append(_sign(coeffs[-1]))
    for k, (left, right) in enumerate(intervals):
        if signs[k + 1] < 0:
            root_left, root_right = shadow.refine_root(left, right, eps=sp.Rational(1, 10 ** 40))
            return (sp.Rational(root_left) + sp.Rational(root_right)) / 2
    return None


# Floating-point proof that a polynomial stays positive: subintervals to start with, halving
# rounds for those not yet proven, and the most subintervals before the exact count takes over.
_PROOF_PIECES = 64
_PROOF_ROUNDS = 10
_PROOF_MAX_PIECES = 4096
# A float lower bound counts only when it exceeds this fraction of sum |c_k| t^k: far above the
# rounding of the coefficients (1e-16 relative) and of the float sums (degree * 1e-16).
_PROOF_MARGIN = 1e-9


def _proven_positive(coeffs: list, upto) -> bool:
    """True when f(t) = sum coeffs[k] t^k > 0 on all of [0, upto] is proven in floating point.

    On [a, b] with 0 <= a, each term c_k t^k is at least c_k a^k (c_k > 0) or c_k b^k (c_k < 0),
    so their sum bounds f from below; a piece is proven when that bound exceeds _PROOF_MARGIN
    times sum |c_k| b^k. False means only "not proven" (a root, a touch, or too close to tell):
    the caller then counts the roots exactly.
    """
    c = np.array([float(sp.N(v, 20)) for v in coeffs])
    if not np.all(np.isfinite(c)):
        return False
    k = np.arange(len(c))
    edges = np.linspace(0.0, float(upto), _PROOF_PIECES + 1)
    a, b = edges[:-1], edges[1:]
    for _ in range(_PROOF_ROUNDS):
        with np.errstate(over="ignore", invalid="ignore"):
            ta, tb = a[:, None] ** k, b[:, None] ** k
            low = np.where(c > 0, c * ta, c * tb).sum(axis=1)
            scale = (np.abs(c) * tb).sum(axis=1)
        open_ = ~(np.isfinite(low) & np.isfinite(scale) & (low > _PROOF_MARGIN * scale))
        if not open_.any():
            return True
        a, b = a[open_], b[open_]
        if 2 * a.size > _PROOF_MAX_PIECES:
            return False
        mid = (a + b) / 2
        a, b = np.concatenate([a, mid]), np.concatenate([mid, b])
    return False


def _separated(shadow: sp.Poly, intervals: list) -> list:
    """Refine isolating intervals until neighbours do not touch, so a sample fits between them."""
    intervals = [(sp.Rational(lo), sp.Rational(hi)) for lo, hi in intervals]
    eps = sp.Rational(1, 10 ** 6)
    while any(hi >= lo2 for (_, hi), (lo2, _) in zip(intervals, intervals[1:])):
        eps /= 1000
        intervals = [tuple(sp.Rational(v) for v in shadow.refine_root(lo, hi, eps=eps))
                     if lo != hi else (lo, hi) for lo, hi in intervals]
    return intervals


def _complex_powers(re, im, n: int) -> list:
    powers = [(sp.Integer(1), sp.Integer(0))]
    for _ in range(n):
        r, i = powers[-1]
        powers.append((_expand(r * re - i * im), _expand(r * im + i * re)))
    return powers


def _ray_polynomial(p: list, q: list, re, im) -> list:
    """Coefficients in h of |Q(h lambda)|^2 - |P(h lambda)|^2 for lambda = re + i im, exact.

    Nonnegative exactly where |R(h lambda)| <= 1 (or R has a pole with P = 0 there).
    """
    n = max(len(p), len(q))
    p = list(p) + [sp.Integer(0)] * (n - len(p))
    q = list(q) + [sp.Integer(0)] * (n - len(q))
    powers = _complex_powers(re, im, n)
    out = [sp.Integer(0)] * (2 * n - 1)
    for j in range(n):
        for k in range(n):
            weight = q[j] * q[k] - p[j] * p[k]
            if weight == 0:
                continue
            # Re(lambda^j conj(lambda^k)) for real coefficients.
            cross = powers[j][0] * powers[k][0] + powers[j][1] * powers[k][1]
            out[j + k] += weight * cross
    return [_clean(c) for c in out]


# ---------------------------------------------------------------------------------------------
# Stability report
# ---------------------------------------------------------------------------------------------

@dataclass(frozen=True)
class StabilityReport:
    """Linear stability of a method, from its stability function R = P/Q.

    r_infinity is lim R(z) for z -> infinity (None if R is unbounded there). real_axis_limit is the
    negative end x0 of the stable interval [x0, 0] (None if the whole negative axis is stable);
    imag_axis_limit is y0 >= 0 with |R(iy)| <= 1 on [0, y0] (0 when only the origin, None when the
    whole imaginary axis is stable).

    References
    ----------
    HW, sections IV.2-IV.3 (from memory).
    """

    numerator: sp.Expr
    denominator: sp.Expr
    a_stable: bool
    l_stable: bool
    r_infinity: sp.Expr | None
    real_axis_limit: float | None
    imag_axis_limit: float | None

    @property
    def function(self) -> sp.Expr:
        return self.numerator / self.denominator

    def as_dict(self) -> dict:
        return dict(stability_function=str(self.function), a_stable=self.a_stable,
                    l_stable=self.l_stable,
                    r_infinity=None if self.r_infinity is None else str(self.r_infinity),
                    real_axis_limit=self.real_axis_limit, imag_axis_limit=self.imag_axis_limit)


@dataclass(frozen=True)
class MethodReport:
    """What the analysis found about one method; stability fields are forwarded for convenience.

    order is None for the exact (zero-order-hold) propagator, which has no finite order;
    tolerance is the one the order conditions were decided to (0: exactly).
    """

    id: str
    name: str
    stages: int
    order: int | None
    embedded_order: int | None
    kind: str
    stability: StabilityReport
    source: str
    tolerance: float = 0.0

    @property
    def a_stable(self) -> bool:
        return self.stability.a_stable

    @property
    def l_stable(self) -> bool:
        return self.stability.l_stable

    @property
    def r_infinity(self):
        return self.stability.r_infinity

    @property
    def real_axis_limit(self):
        return self.stability.real_axis_limit

    @property
    def imag_axis_limit(self):
        return self.stability.imag_axis_limit

    def as_dict(self) -> dict:
        return dict(id=self.id, name=self.name, stages=self.stages, order=self.order,
                    embedded_order=self.embedded_order, kind=self.kind, source=self.source,
                    tolerance=self.tolerance, **self.stability.as_dict())


def _hurwitz_right(q: list) -> bool:
    """True if every root of the real polynomial Q lies in Re z > 0 (Routh-Hurwitz on Q(-z)).

    References
    ----------
    Hurwitz criterion as stated in HW, section IV.3 (from memory).
    """
    n = len(q) - 1
    if n == 0:
        return True
    flipped = [c * (-1) ** k for k, c in enumerate(q)]  # Q(-z), low to high
    high = list(reversed(flipped))  # a_0 z^n + ... + a_n
    if _sign(high[0]) < 0:
        high = [-c for c in high]

    def coeff(k):
        return high[k] if 0 <= k <= n else sp.Integer(0)

    hurwitz = sp.Matrix(n, n, lambda i, j: coeff(2 * (j + 1) - (i + 1)))
    return all(_sign(_clean(hurwitz[:m, :m].det())) > 0 for m in range(1, n + 1))


def _stability_report(p: list, q: list, explicit: bool) -> StabilityReport:
    p, q = list(p), list(q)
    deg_p, deg_q = len(p) - 1, len(q) - 1
    if deg_p > deg_q:
        r_infinity = None
    elif deg_p < deg_q:
        r_infinity = sp.Integer(0)
    else:
        r_infinity = _clean(p[-1] / q[-1])
    # Real axis: lambda = -1, h = -x.
    t_real = _first_sign_loss(_ray_polynomial(p, q, sp.Integer(-1), sp.Integer(0)))
    real_axis_limit = None if t_real is None else -float(t_real)
    # Imaginary axis: E(y) = |Q(iy)|^2 - |P(iy)|^2 is even in y; work in u = y^2.
    e = _ray_polynomial(p, q, sp.Integer(0), sp.Integer(1))
    if any(c != 0 for c in e[1::2]):
        raise AssertionError("E-polynomial of a real R must be even")  # pragma: no cover
    u_imag = _first_sign_loss(e[0::2])
    if u_imag is None:
        imag_axis_limit = None
    else:
        with mpmath.workdps(_DIGITS):
            imag_axis_limit = float(mpmath.sqrt(mpmath.mpf(u_imag.p) / u_imag.q))
    # A-stable iff no poles in Re z <= 0 and E(y) >= 0 for all y (HW IV.3, E-polynomial; from memory).
    a_stable = (not explicit and imag_axis_limit is None and r_infinity is not None
                and _hurwitz_right(q))
    l_stable = a_stable and r_infinity == 0
    return StabilityReport(_to_expr(p), _to_expr(q), a_stable, l_stable, r_infinity,
                           real_axis_limit, imag_axis_limit)


def stability_report(tableau: Tableau) -> StabilityReport:
    """Linear stability of a Runge-Kutta tableau (see StabilityReport)."""
    p, q = _tableau_polynomials(tableau)
    return _stability_report(p, q, tableau.is_explicit)


def rosenbrock_stability_report(method: LinearlyImplicit) -> StabilityReport:
    """Linear stability of a Rosenbrock method."""
    p, q = _rosenbrock_coefficients(method)
    return _stability_report(p, q, explicit=False)


def analyse(method) -> MethodReport:
    """Order, embedded order, kind and linear stability of any method (cached per method).

    Tableaux: order conditions at the tableau's own tolerance and the stability function;
    Rosenbrock methods: their order conditions up to order 3 at the method's own tolerance and
    their stability function; the exact discretization: R = exp(z), no finite order.

    References
    ----------
    Butcher 1987 (order conditions); HW, sections IV.2-IV.3 (stability) (from memory).
    """
    return _analyse(method)


@functools.lru_cache(maxsize=256)
def _analyse(method) -> MethodReport:
    if method.kind == EXACT:
        return analyse_exact(method)
    if method.kind == LINEARLY_IMPLICIT:
        order_fn, stability = rosenbrock_order, rosenbrock_stability_report(method)
    else:
        order_fn, stability = order_of, stability_report(method)
    order = order_fn(method)
    embedded = order_fn(method, method.b_hat) if method.b_hat is not None else None
    return MethodReport(method.id, method.name, method.stages, order, embedded, method.kind,
                        stability, method.source, method.tolerance)


def analyse_exact(method) -> MethodReport:
    """The exact zero-order-hold propagator of a linear model, R(z) = exp(z).

    A-stable (|exp(z)| < 1 for Re z < 0) and L-stable in the sense that R(x) -> 0 as x -> -inf along
    the real axis; r_infinity reports that limit. No finite order (order None), no bounded
    stability limits.

    References
    ----------
    Common practice, no source: |exp(z)| = exp(Re z).
    """
    stability = StabilityReport(sp.exp(Z), sp.Integer(1), True, True, sp.Integer(0), None, None)
    return MethodReport(method.id, method.name, method.stages, None, None, method.kind,
                        stability, method.source)


# ---------------------------------------------------------------------------------------------
# Numerical use of the stability function
# ---------------------------------------------------------------------------------------------

def _float_coefficients(method_or_r):
    """(P, Q) as float arrays (low to high) of a method of any kind, a rational expression in Z
    or a pair (P, Q); None for R = exp(z)."""
    if isinstance(method_or_r, tuple) and len(method_or_r) == 2:
        p, q = _coeffs(method_or_r[0]), _coeffs(method_or_r[1])
    elif isinstance(method_or_r, sp.Basic):
        if method_or_r == sp.exp(Z):
            return None
        num, den = sp.fraction(sp.cancel(sp.sympify(method_or_r)))
        if not (num.is_polynomial(Z) and den.is_polynomial(Z)):
            raise MethodError(f"stability function {method_or_r} is not rational in z")
        p, q = _coeffs(num), _coeffs(den)
    else:
        coefficients = stability_coefficients(method_or_r)
        if coefficients is None:
            return None
        p, q = coefficients
    return (np.array([float(c) for c in p]), np.array([float(c) for c in q]))


@functools.lru_cache(maxsize=64)
def float_stability_coefficients(method) -> tuple[np.ndarray, np.ndarray] | None:
    """(P, Q) of R = P/Q as float arrays, lowest power first, for a method of any kind; None for
    the exact discretization (R = exp(z)). The advice evaluates R on many h*lambda with them
    (kept per method: a Rosenbrock method's R takes sympy a moment)."""
    return _float_coefficients(method)


def in_stability_region(method_or_r, z) -> np.ndarray:
    """Elementwise |R(z)| <= 1 (with 1e-12 relative slack for boundary points), as a bool array.

    method_or_r is a method of any kind, a rational sympy expression in Z, a pair (P, Q), or
    sp.exp(Z) (stable exactly where Re z <= 0).

    References
    ----------
    HW, section IV.2, definition of the stability domain (from memory).
    """
    z = np.asarray(z, dtype=complex)
    coefficients = _float_coefficients(method_or_r)
    if coefficients is None:
        return z.real <= 0
    p, q = coefficients
    num = np.abs(np.polynomial.polynomial.polyval(z, p))
    den = np.abs(np.polynomial.polynomial.polyval(z, q))
    return num <= (1 + _REGION_SLACK) * den


def stability_coefficients(method) -> tuple[tuple, tuple] | None:
    """Exact coefficient lists (low to high) of R = P/Q for any method kind.

    A Tableau or a linearly implicit (Rosenbrock) method gives (P, Q); the exact discretization,
    whose R(z) = exp(z) is no rational function, gives None.
    """
    if method.kind == EXACT:
        return None
    if method.kind == LINEARLY_IMPLICIT:
        return _rosenbrock_coefficients(method)
    return _tableau_polynomials(method)


def ray_limit(coefficients: tuple[tuple, tuple], lam: complex,
              upto: float | None = None) -> float | None:
    """The first h > 0 at which h*lambda leaves the stability region of R = P/Q, or None.

    Found exactly as the first sign change of |Q(h lambda)|^2 - |P(h lambda)|^2 in h (a touch
    without crossing does not count). With upto, None also when the ray provably stays in the
    region up to h = upto.
    """
    p, q = coefficients
    # Followed in t = h * 2^k with 2^k near |lambda| (an exact scaling): the root is then of
    # order one whatever |lambda| is, and locating it to 1e-40 takes the same few steps for an
    # eigenvalue of 1e39 as for one of 1 (measured: minutes otherwise).
    k = math.frexp(abs(lam))[1]
    scale = sp.Integer(2) ** k
    bound = None if upto is None else sp.Rational(float(upto)) * scale
    t = _first_sign_loss(_ray_polynomial(list(p), list(q), sp.Rational(float(lam.real)) / scale,
                                         sp.Rational(abs(float(lam.imag))) / scale), bound)
    return None if t is None else float(t / scale)


def ray_directions(eigenvalues) -> np.ndarray:
    """One eigenvalue per ray direction, the largest: along a ray only the largest |lambda| binds.

    The limit on a ray is t*/|lambda| with t* fixed by the direction, so the largest |lambda| of
    a direction gives the smallest h. Conjugates share a direction (R has real coefficients);
    directions are compared to 12 digits; zero eigenvalues have none (they never bind).
    """
    best: dict = {}
    for v in np.atleast_1d(np.asarray(eigenvalues, dtype=complex)):
        r = abs(v)
        if r == 0:
            continue
        key = (round(v.real / r, 12), round(abs(v.imag) / r, 12))
        if key not in best or r > abs(best[key]):
            best[key] = complex(v.real, abs(v.imag))
    return np.array([best[k] for k in sorted(best)], dtype=complex)


def max_stable_dt(method, eigenvalues, margin: float = 1.0) -> float:
    """The largest h with h*lambda in the stability region for every eigenvalue, times margin.

    method: a Tableau, a linearly implicit method, or the exact discretization (always stable
    for decaying modes). eigenvalues: complex values (1/s), one or a whole envelope of them; the
    result is in seconds (stability_limit, which also names the eigenvalue that sets it). margin
    in (0, 1] is a safety factor.

    References
    ----------
    HW, section IV.2 (stability domain), IV.3 (A-stability); common practice, no source (step
    size from eigenvalues).
    """
    if not 0 < margin <= 1:
        raise ValueError("margin must be in (0, 1]")
    return stability_limit(method, eigenvalues)[0] * margin


def stability_limit(method, eigenvalues) -> tuple[float, complex | None]:
    """The largest h with h*lambda in the stability region for every eigenvalue, and the
    eigenvalue (its ray's representative, Im >= 0) that sets it (None when none does).

    The eigenvalues are reduced to one per ray direction (ray_directions); an A-stable method is
    unbounded when every Re lambda <= 0; otherwise each ray h*lambda, h >= 0, is followed
    outward from 0 to the first point where |R| = 1 is crossed, exactly (ray_limit): the most
    restrictive ray by a numerical scan first, every other ray only as far as the limit found so
    far (an exact root count), so the scan decides nothing. Returns math.inf if every ray stays
    stable, 0.0 if some h*lambda leaves the region at once (for example Re lambda > 0, or an
    explicit method with lambda on the imaginary axis).

    References
    ----------
    HW, section IV.2 (stability domain), IV.3 (A-stability); common practice, no source (step
    size from eigenvalues).
    """
    values = np.atleast_1d(np.asarray(eigenvalues, dtype=complex))
    bad = values[~np.isfinite(values)]
    if bad.size:
        raise ValueError(f"eigenvalue {bad[0]} is not finite")
    directions = ray_directions(values)
    coefficients = stability_coefficients(method)
    if coefficients is None:  # exp(z): stable exactly where Re(h lambda) <= 0
        growing = directions[directions.real > 0]
        return (0.0, complex(growing[0])) if growing.size else (math.inf, None)
    if directions.size == 0 or (np.all(directions.real <= 0) and analyse(method).a_stable):
        return math.inf, None
    # The most restrictive ray first (a numerical scan only orders the work): every later ray
    # then needs only the exact proof that it stays stable up to the limit found so far.
    limit, binding = math.inf, None
    for lam in directions[np.argsort(_scanned_limits(coefficients, directions), kind="stable")]:
        h = ray_limit(coefficients, lam, None if math.isinf(limit) else limit)
        if h is not None and h < limit:
            limit, binding = h, complex(lam)
    return limit, binding


# Geometric grid of h*|lambda| for the numerical scan that orders the rays (0.6 % steps).
_RAY_GRID = np.geomspace(1e-6, 1e4, 4001)


def _scanned_limits(coefficients, directions: np.ndarray) -> np.ndarray:
    """For each ray, the first grid point of h outside |R| <= 1 (inf if none): an estimate."""
    p, q = (np.array([float(c) for c in v]) for v in coefficients)
    out = np.full(directions.size, math.inf)
    for k, lam in enumerate(directions):
        z = _RAY_GRID * lam / abs(lam)
        with np.errstate(all="ignore"):
            outside = np.abs(np.polynomial.polynomial.polyval(z, p)) > \
                (1 + _REGION_SLACK) * np.abs(np.polynomial.polynomial.polyval(z, q))
        bad = np.flatnonzero(outside)
        if bad.size:
            out[k] = _RAY_GRID[bad[0]] / abs(lam)
    return out
