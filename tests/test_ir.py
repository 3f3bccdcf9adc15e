"""The discretized step on its own: exact h-products in the IR, checked without generating C.

Every expected value below is typed from the published tableau (source beside it) and multiplied
out here, independently of codegen/methods/data.py; sympy decides exact equality.
"""

from __future__ import annotations

import pytest
import sympy as sp

from codegen.discretize import (INVERSE, CoupledStage, DiagonalStage, RosenbrockStage,
                                discretize, zoh_propagator)
from codegen.methods import DIAGONALLY_IMPLICIT, Tableau, builtin
from codegen.model import Input, State, define

DT = sp.Rational(1, 10)
x, t, u = (sp.Symbol(n, real=True) for n in ("x", "t", "u"))


def nonlinear():
    """x' = -x^3: J = -3 x^2 depends on x, so every iteration matrix is factored at run time."""
    return define("cubic", states=[State(name="x", initial=1.0, rate=-x ** 3)])


def time_dependent():
    """x' = -x^3 + sin(t): df/dt = cos(t) is not zero."""
    return define("forced", states=[State(name="x", initial=1.0, rate=-x ** 3 + sp.sin(t))])


def lti(a=-2, e=0):
    """x' = a x + u + e: J is the constant a, so iteration matrices are inverted at generation time."""
    return define("lti", states=[State(name="x", initial=1.0, rate=a * x + u + e)],
                  inputs=[Input(name="u", default=0.0)])


def same(a, b) -> bool:
    return sp.simplify(sp.sympify(a) - sp.sympify(b)) == 0


def same_pairs(pairs, expected) -> bool:
    return len(pairs) == len(expected) and all(
        i == j and same(v, w) for (i, v), (j, w) in zip(pairs, expected))


def test_backward_euler_is_one_implicit_stage_with_diagonal_h():
    # Backward Euler: a = [[1]], b = [1], c = [1] (HW section IV.3, from memory).
    step = discretize(nonlinear(), builtin("backward-euler"), DT)
    (stage,) = step.stages
    assert isinstance(stage, DiagonalStage)
    assert same(stage.c, 1) and same(stage.time_offset, DT) and stage.terms == ()
    assert same(stage.diagonal, DT) and stage.solve_index == 0 and stage.refactor
    assert same_pairs(step.weights, [(0, DT)])
    assert step.z_weights == () and step.gamma_h is None
    assert len(step.solve.diagonals) == 1 and same(step.solve.diagonals[0], DT)


def test_sdirk2_stages_share_one_factorization():
    # Alexander 1977 (SIAM J. Numer. Anal. 14), from memory: gamma = 1 - sqrt(2)/2,
    # a = [[gamma, 0], [1 - gamma, gamma]], b = [1 - gamma, gamma], c = [gamma, 1].
    gamma = 1 - sp.sqrt(2) / 2
    step = discretize(nonlinear(), builtin("sdirk2"), DT)
    first, second = step.stages
    assert same(first.c, gamma) and same(first.time_offset, gamma * DT) and first.terms == ()
    assert same(first.diagonal, gamma * DT) and first.solve_index == 0 and first.refactor
    assert same(second.c, 1) and same(second.time_offset, DT)
    assert same_pairs(second.terms, [(0, (1 - gamma) * DT)])
    assert same(second.diagonal, gamma * DT) and second.solve_index == 0
    assert not second.refactor  # same h*a_ii: the factors of stage 1 are reused
    assert same_pairs(step.weights, [(0, (1 - gamma) * DT), (1, gamma * DT)])
    assert len(step.solve.diagonals) == 1 and same(step.solve.diagonals[0], gamma * DT)


def two_diagonals() -> Tableau:
    """A diagonally implicit tableau with two different a_ii (rows sum to c; b sums to 1)."""
    one, zero, half = sp.Integer(1), sp.Integer(0), sp.Rational(1, 2)
    return Tableau(id="two-diagonals", name="two diagonals", a=((one, zero), (-half, half)),
                   b=(half, half), c=(one, zero))


def test_a_new_diagonal_refactors_and_selects_its_own_solve():
    method = two_diagonals()
    assert method.kind == DIAGONALLY_IMPLICIT
    step = discretize(nonlinear(), method, DT)
    first, second = step.stages
    assert first.refactor and first.solve_index == 0 and same(first.diagonal, DT)
    assert second.refactor and second.solve_index == 1 and same(second.diagonal, DT / 2)
    assert same_pairs(second.terms, [(0, -DT / 2)])


def test_a_constant_jacobian_gets_one_generation_time_inverse_per_diagonal():
    # x' = -2 x: the iteration matrix 1 - g (-2) = 1 + 2 g has the inverse 1 / (1 + 2 g).
    step = discretize(lti(), two_diagonals(), DT)
    assert step.solve.kind == INVERSE
    assert not any(stage.refactor for stage in step.stages)
    assert [stage.solve_index for stage in step.stages] == [0, 1]
    for g, inverse in zip((DT, DT / 2), step.solve.inverses):
        assert abs(inverse[0][0] - 1 / (1 + 2 * g)) < sp.Float(10) ** -45


def test_an_explicit_first_stage_has_no_solve():
    # Trapezoidal rule as Lobatto IIIA: a = [[0, 0], [1/2, 1/2]], b = [1/2, 1/2], c = [0, 1]
    # (HW section IV.5, from memory).
    step = discretize(nonlinear(), builtin("trapezoidal"), DT)
    first, second = step.stages
    assert first.solve_index is None and not first.refactor and same(first.diagonal, 0)
    assert same(first.time_offset, 0)
    assert second.refactor and same(second.diagonal, DT / 2)
    assert same_pairs(second.terms, [(0, DT / 2)])


def test_radau_iia2_updates_with_d_equal_to_the_last_unit_vector():
    # Radau IIA, 2 stages: a = [[5/12, -1/12], [3/4, 1/4]], b = [3/4, 1/4], c = [1/3, 1]
    # (HW section IV.5, Table 5.5, from memory). It is stiffly accurate (b^T is the last row of
    # a), so d = b^T A^-1 = (0, 1) (HW section IV.8, from memory); checked by sympy here.
    a = sp.Matrix([[sp.Rational(5, 12), sp.Rational(-1, 12)], [sp.Rational(3, 4), sp.Rational(1, 4)]])
    b = sp.Matrix([[sp.Rational(3, 4), sp.Rational(1, 4)]])
    assert list(b * a.inv()) == [0, 1]
    step = discretize(nonlinear(), builtin("radau-iia2"), DT)
    assert all(isinstance(stage, CoupledStage) for stage in step.stages)
    first, second = step.stages
    assert same(first.time_offset, DT / 3) and same(second.time_offset, DT)
    assert same_pairs(first.terms, [(0, a[0, 0] * DT), (1, a[0, 1] * DT)])
    assert same_pairs(second.terms, [(0, a[1, 0] * DT), (1, a[1, 1] * DT)])
    assert same_pairs(step.z_weights, [(1, 1)]) and step.weights == ()


def test_radau_iia3_is_stiffly_accurate_too():
    # Radau IIA, 3 stages (HW section IV.5, Table 5.6, from memory): d = (0, 0, 1).
    assert same_pairs(discretize(nonlinear(), builtin("radau-iia3"), DT).z_weights, [(2, 1)])


def test_gauss2_keeps_the_stage_update():
    # Gauss, 2 stages (HW section IV.5, Table 5.2, from memory): a = [[1/4, 1/4 - sqrt(3)/6],
    # [1/4 + sqrt(3)/6, 1/4]], b = [1/2, 1/2]; d = b^T A^-1 = (-sqrt(3), sqrt(3)) by sympy.
    r3 = sp.sqrt(3)
    a = sp.Matrix([[sp.Rational(1, 4), sp.Rational(1, 4) - r3 / 6],
                   [sp.Rational(1, 4) + r3 / 6, sp.Rational(1, 4)]])
    d = sp.Matrix([[sp.Rational(1, 2), sp.Rational(1, 2)]]) * a.inv()
    step = discretize(nonlinear(), builtin("gauss2"), DT)
    assert same_pairs(step.z_weights, [(0, d[0]), (1, d[1])])
    assert same(d[0], -r3) and same(d[1], r3)


def test_lobatto_iiic2_is_stiffly_accurate_too():
    # Lobatto IIIC, 2 stages: a = [[1/2, -1/2], [1/2, 1/2]], b = [1/2, 1/2] (HW section IV.5,
    # from memory): invertible, stiffly accurate, d = (0, 1).
    assert same_pairs(discretize(nonlinear(), builtin("lobatto-iiic2"), DT).z_weights, [(1, 1)])


def test_ros2_carries_gamma_h_and_every_stage_coefficient():
    # ROS2 (Verwer, Spee, Blom & Hundsdorfer 1999, SIAM J. Sci. Comput. 20(4), from memory):
    # gamma = 1 + 1/sqrt(2); (I - gamma h J) k1 = f(y) + gamma h f_t,
    # (I - gamma h J) k2 = f(y + h k1) - 2 k1 - gamma h f_t; y+ = y + 3/2 h k1 + 1/2 h k2.
    gamma = 1 + 1 / sp.sqrt(2)
    step = discretize(time_dependent(), builtin("ros2"), DT)
    assert same(step.gamma_h, gamma * DT)
    assert len(step.solve.diagonals) == 1 and same(step.solve.diagonals[0], gamma * DT)
    first, second = step.stages
    assert isinstance(first, RosenbrockStage)
    assert first.terms == () and first.coupling == () and same(first.time_offset, 0)
    assert same(first.time_term, gamma * DT)
    assert same(second.time_offset, DT) and same_pairs(second.terms, [(0, DT)])
    assert same_pairs(second.coupling, [(0, -2)]) and same(second.time_term, -gamma * DT)
    assert same_pairs(step.weights, [(0, 3 * DT / 2), (1, DT / 2)])


def test_ros2_drops_the_time_terms_when_f_does_not_depend_on_t():
    step = discretize(nonlinear(), builtin("ros2"), DT)
    assert step.dfdt is None
    assert all(stage.time_term == 0 for stage in step.stages)


def test_substeps_divide_every_h_product():
    # Three substeps: h = dt / 3 in every product.
    step = discretize(nonlinear(), builtin("sdirk2"), DT, substeps=3)
    gamma = 1 - sp.sqrt(2) / 2
    assert same(step.stages[0].diagonal, gamma * DT / 3)
    assert same_pairs(step.weights, [(0, (1 - gamma) * DT / 3), (1, gamma * DT / 3)])


def test_rk4_step_program_holds_the_classical_products():
    # Classical RK4 (HNW I, section II.1, Table 1.2, from memory): c = (0, 1/2, 1/2, 1),
    # a21 = a32 = 1/2, a43 = 1, b = (1/6, 1/3, 1/3, 1/6).
    step = discretize(nonlinear(), builtin("rk4"), DT)
    offsets = [stage.time_offset for stage in step.stages]
    assert offsets == [0, DT / 2, DT / 2, DT]
    assert [stage.terms for stage in step.stages] == [(), ((0, DT / 2),), ((1, DT / 2),),
                                                      ((2, DT),)]
    assert step.weights == ((0, DT / 6), (1, DT / 3), (2, DT / 3), (3, DT / 6))


@pytest.mark.parametrize("a", [-2, sp.Rational(1, 2)])
def test_zoh_propagator_of_a_scalar_model_is_the_analytic_one(a):
    # x' = a x + u + 3 with u held over h: x+ = e^{a h} x + (e^{a h} - 1) / a (u + 3)
    # (common practice, no source).
    ad, bd, ed = zoh_propagator(lti(a, 3), DT)
    gain = (sp.exp(a * DT) - 1) / a
    assert abs(ad[0][0] - sp.exp(a * DT)) < sp.Float(10) ** -45
    assert abs(bd[0][0] - gain) < sp.Float(10) ** -45
    assert abs(ed[0] - 3 * gain) < sp.Float(10) ** -45
    step = discretize(lti(a, 3), builtin("zoh-exact"), DT)
    assert step.propagator == (ad, bd, ed) and step.stages == ()
