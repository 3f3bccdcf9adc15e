"""The reference steppers (codegen.reference): one per method kind, each against an outside answer.

HNW = Hairer, Norsett & Wanner, Solving ODEs I, 2nd ed., 1993; HW = Hairer & Wanner, Solving ODEs II,
2nd ed., 1996; "[mem]" marks a value recalled from that source, not read from the page.
"""

from __future__ import annotations

import numpy as np
import pytest
import sympy as sp
from scipy.integrate._ivp import rk as scipy_rk
from scipy.signal import cont2discrete

from codegen.methods import builtin, builtin_ids
from codegen.model import Input, Parameter, State, define
from codegen.reference import Trajectory, jacobian_function, rate_function, run, stepper
from codegen.reference.steppers import (FROZEN, FULL_NEWTON, SIMPLIFIED_NEWTON, Newton, Step,
                                        explicit_step)


def burden_faires_model():
    y, t = sp.Symbol("y", real=True), sp.Symbol("t", real=True)
    return define("bf", states=[State("y", initial=0.5, rate=y - t ** 2 + 1)])


# Burden & Faires, Numerical Analysis (9th ed.), chapter 5 (from memory): y' = y - t^2 + 1,
# y(0) = 0.5, h = 0.2; w_k after k steps, to 7 digits.
BURDEN_FAIRES = {"euler": {1: 0.8000000, 10: 4.8657845},
                 "rk4": {1: 0.8292933, 2: 1.2140762, 10: 5.3053630}}


@pytest.mark.parametrize("method_id", sorted(BURDEN_FAIRES))
@pytest.mark.parametrize("scalar", [False, True], ids=["vector", "scalar"])
def test_explicit_stepper_reproduces_the_burden_faires_worked_example(method_id, scalar):
    model = burden_faires_model()
    step = stepper(model, builtin(method_id), scalar=scalar)
    trajectory = run(model, builtin(method_id), 0.2, 1, np.zeros((10, 0)), stepper=step)
    assert trajectory.completed == 10
    for k, w in BURDEN_FAIRES[method_id].items():
        assert trajectory.xs[k, 0] == pytest.approx(w, abs=5e-8), (k, trajectory.xs[k, 0])


def decay_model(lam=-7.0):
    x = sp.Symbol("x", real=True)
    return define("decay", states=[State("x", initial=1.0, rate=lam * x)])


@pytest.mark.parametrize("newton", [FULL_NEWTON, SIMPLIFIED_NEWTON], ids=["full", "simplified"])
def test_backward_euler_on_the_test_equation_is_one_over_one_minus_z(newton):
    # One backward Euler step on y' = lambda y: y1 = y0 / (1 - h lambda) (HW IV.3 [mem]).
    lam, h = -7.0, 0.3
    result = stepper(decay_model(lam), builtin("backward-euler"), newton=newton)(0.0,
                                                                                np.array([1.0]),
                                                                                [], h)
    assert result.x[0] == pytest.approx(1 / (1 - h * lam), rel=1e-14)
    # On a linear problem the first Newton iteration is exact and the second confirms it.
    assert result.iterations == 2 and result.error is None


def test_full_and_simplified_newton_agree_and_simplified_needs_more_iterations():
    # Radau IIA (3 stages) on a nonlinear stiff model: both variants solve the same stage
    # equations; J frozen at the step's start converges linearly, J at every iterate faster.
    x, y = sp.Symbol("x", real=True), sp.Symbol("y", real=True)
    model = define("stiffnl", [State("x", initial=1.0, rate=-x ** 3 + y),
                               State("y", initial=0.0, rate=-500 * (y - sp.sin(x)))])
    x0, h = np.array([1.0, 0.0]), 0.05
    full = stepper(model, builtin("radau-iia3"))(0.0, x0, [], h)
    simplified = stepper(model, builtin("radau-iia3"), newton=SIMPLIFIED_NEWTON)(0.0, x0, [], h)
    np.testing.assert_allclose(simplified.x, full.x, rtol=1e-10, atol=1e-12)
    assert simplified.iterations > full.iterations >= 2


def test_newton_that_does_not_converge_ends_the_step_in_nan():
    x = sp.Symbol("x", real=True)
    # x' = -x^3 with a huge step: one frozen-J iteration is far off and two are not enough.
    model = define("cubic", [State("x", initial=3.0, rate=-x ** 3)])
    step = stepper(model, builtin("backward-euler"), newton=Newton(FROZEN, 1e-12, 2))
    result = step(0.0, np.array([3.0]), [], 10.0)
    assert np.all(np.isnan(result.x)) and result.iterations == 2
    assert run(model, builtin("backward-euler"), 10.0, 1, np.zeros((1, 0)),
               stepper=step).completed == 0


def test_ros2_one_step_on_a_linear_system_is_its_stability_function():
    # ROS2 written out (Verwer, Spee, Blom & Hundsdorfer 1999, SIAM J. Sci. Comput. 20(4)):
    # (I - g h A) k1 = A y, (I - g h A) k2 = A (y + h k1) - 2 k1, y1 = y + 3/2 h k1 + 1/2 h k2,
    # so y1 = R(hA) y with R(z) = (1 + (1 - 2g) z + (g^2 - 2g + 1/2) z^2) / (1 - g z)^2.
    q, v = sp.Symbol("q", real=True), sp.Symbol("v", real=True)
    model = define("osc", [State("q", initial=1.0, rate=v),
                           State("v", initial=0.0, rate=-400 * q - 3 * v)])
    A = np.array([[0.0, 1.0], [-400.0, -3.0]])
    g, h = 1 + 1 / np.sqrt(2), 0.07
    y0 = np.array([0.3, -2.0])
    hA, eye = h * A, np.eye(2)
    numerator = eye + (1 - 2 * g) * hA + (g * g - 2 * g + 0.5) * hA @ hA
    denominator = (eye - g * hA) @ (eye - g * hA)
    want = np.linalg.solve(denominator, numerator @ y0)
    got = stepper(model, builtin("ros2"))(0.0, y0, [], h)
    np.testing.assert_allclose(got.x, want, rtol=1e-13, atol=1e-13)
    # The embedded first-order solution is y + h k1 (same source, from memory), so the estimate
    # is y1 - (y + h k1) with k1 = (I - g h A)^-1 A y.
    k1 = np.linalg.solve(eye - g * hA, A @ y0)
    assert got.iterations == 0
    np.testing.assert_allclose(got.error, want - (y0 + h * k1), rtol=1e-12, atol=1e-13)


def linear_model_with_inputs():
    i, w, V, L = (sp.Symbol(n, real=True) for n in ("i", "w", "V", "L"))
    return define("lin", [State("i", initial=0.0, rate=(V - 2 * i - 0.5 * w) / L),
                          State("w", initial=0.0, rate=(0.5 * i - 0.1 * w) / 3 + 0.2)],
                  inputs=[Input("V", default=1.0)], parameters=[Parameter("L", value=0.01)])


def test_zoh_step_equals_scipy_cont2discrete():
    # scipy.signal.cont2discrete(method='zoh') discretizes x' = A x + B u exactly for held inputs;
    # the constant term 0.2 is one more input held at 1.
    A = np.array([[-200.0, -50.0], [0.5 / 3, -0.1 / 3]])
    B = np.array([[100.0, 0.0], [0.0, 1.0]])
    h = 2e-3
    ad, bd, *_ = cont2discrete((A, B, np.eye(2), np.zeros((2, 2))), h, method="zoh")
    x0, u = np.array([0.4, -3.0]), np.array([6.0])
    got = stepper(linear_model_with_inputs(), builtin("zoh-exact"))(0.0, x0, u, h)
    np.testing.assert_allclose(got.x, ad @ x0 + bd @ np.array([6.0, 0.2]), rtol=1e-12)


@pytest.mark.parametrize("method_id, scipy_method", [("bs3", scipy_rk.RK23),
                                                    ("dp5", scipy_rk.RK45)])
def test_embedded_error_estimate_equals_scipys(method_id, scipy_method):
    # scipy's RK23 and RK45 carry the Bogacki-Shampine and Dormand-Prince pairs and estimate the
    # local error as h K^T E (E the difference of the two weight vectors, FSAL stage last).
    model = burden_faires_model()
    f = rate_function(model)
    t, y, h = 0.3, np.array([0.9]), 0.2
    K = np.empty((scipy_method.n_stages + 1, 1))
    y_new, _ = scipy_rk.rk_step(lambda tt, yy: f(tt, yy, []), t, y, f(t, y, []), h,
                                scipy_method.A, scipy_method.B, scipy_method.C, K)
    scipy_error = K.T @ scipy_method.E * h
    result = stepper(model, builtin(method_id))(t, y, [], h)
    np.testing.assert_allclose(result.x, y_new, rtol=1e-14)
    np.testing.assert_allclose(np.abs(result.error), np.abs(scipy_error), rtol=1e-10)


def test_a_run_reports_the_largest_error_and_the_newton_iterations():
    model = burden_faires_model()
    method = builtin("bs3")
    step = stepper(model, method)
    trajectory = run(model, method, 0.2, 2, np.zeros((5, 0)), stepper=step)
    x, largest = np.array([0.5]), np.zeros(1)
    for k in range(10):
        result = step(0.1 * k, x, [], 0.1)
        x, largest = result.x, np.maximum(largest, np.abs(result.error))
    np.testing.assert_allclose(trajectory.largest_error, largest, rtol=1e-12)
    np.testing.assert_allclose(trajectory.xs[-1], x, rtol=1e-13)
    assert trajectory.newton_iterations == 0
    implicit = run(decay_model(), builtin("sdirk2"), 0.1, 1, np.zeros((4, 0)))
    # SDIRK2 on a linear model: two iterations per step (see the backward Euler test).
    assert implicit.largest_error is None and implicit.newton_iterations == 8


@pytest.mark.parametrize("method_id", builtin_ids())
def test_every_builtin_kind_has_a_stepper_close_to_the_solution(method_id):
    # x' = -7 x, x(0) = 1: exp(-7 t) (analytic). At h = 1e-3 a first-order method is off by about
    # t lambda^2 h exp(lambda t) / 2 = 1.2e-3 at t = 0.1 (leading error term; common practice, no
    # source), higher orders by far less: every method is within 2e-3 of it.
    trajectory = run(decay_model(), builtin(method_id), 1e-3, 1, np.zeros((100, 0)))
    assert isinstance(trajectory, Trajectory) and trajectory.completed == 100
    assert abs(trajectory.xs[-1, 0] - np.exp(-0.7)) < 2e-3


def test_scalar_and_vector_evaluation_agree():
    model = linear_model_with_inputs()
    for scalar in (False, True):
        f = rate_function(model, scalar=scalar)
        J = jacobian_function(model, {"L": 0.02}, scalar=scalar)
        np.testing.assert_allclose(f(0.0, [1.0, 2.0], [3.0]), [(3 - 2 - 1) / 0.01,
                                                               (0.5 - 0.2) / 3 + 0.2], rtol=1e-14)
        np.testing.assert_allclose(J(0.0, [1.0, 2.0], [3.0]),
                                   [[-100.0, -25.0], [0.5 / 3, -0.1 / 3]], rtol=1e-14)


def test_explicit_step_is_a_step():
    # One Euler step of x' = 2 on [1.0]: 1 + 2 h (common practice, no source).
    a, b, c = builtin("euler").floats()
    result = explicit_step(lambda t, x, u: np.array([2.0]), a, b, c, 0.0, np.array([1.0]), None,
                           0.25)
    assert isinstance(result, Step) and result.x[0] == 1.5 and result.error is None
