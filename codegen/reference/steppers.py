"""The steppers: one step of a method on the model in float64, one implementation per kind.

Every user of a numerical step (the cross-check's reference, the order study, the advice's error
and cost estimates, the check of the C's error estimate) calls ``stepper``; each step returns a
Step with the new state, the embedded error estimate (methods with b_hat) and the Newton
iterations it used.

Nothing is shared with the generated code path: f, df/dx and df/dt come from sympy's lambdify of
the model's own expressions (numeric.py); explicit tableaux run a generic tableau loop; every
implicit Runge-Kutta tableau (diagonally implicit ones included) is solved as one coupled system
in Z = Y - y0 by Newton's method, the step ends with y1 = y0 + h sum b_i f(Y_i) (the C solves
stage by stage for diagonally implicit methods and uses d = b^T A^-1); Rosenbrock methods run
their stages with numpy's dense solve; the exact zero-order hold uses scipy.linalg.expm on float64
matrices linearized numerically (the C uses 50-digit expm of the exact matrices).

Newton's method comes in two variants of the one implementation (Newton options):
FULL_NEWTON re-evaluates J at every iterate and converges quadratically to a few units of
roundoff (the reference the C is checked against); SIMPLIFIED_NEWTON freezes J at the start of
the step, as the C does, so its iteration counts estimate the C's (the advice's cost estimate).
With refreshes, the frozen J is re-evaluated (one block per stage) when a correction is larger
than a set share of the one before, as the generated C does by default: written here from the
rule, not from the C.

References
----------
HNW: Hairer, Norsett & Wanner, Solving Ordinary Differential Equations I, 2nd ed., 1993, section
II.1 (explicit Runge-Kutta step), II.4 (embedded error estimate). HW: Hairer & Wanner, Solving
Ordinary Differential Equations II, 2nd ed., 1996, sections IV.7 (Rosenbrock methods) and IV.8
(Newton iterations for implicit Runge-Kutta methods, the formulation in Z) (from memory).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..discretize.ir import DEFAULT_NEWTON_REFRESHES, NEWTON_REFRESH_RATE
from ..errors import MethodError
from ..methods import EXACT, EXPLICIT, LINEARLY_IMPLICIT, NEWTON_KINDS, LinearlyImplicit, Tableau
from ..model import Model
from .numeric import jacobian_function, numeric, rate_function, time_derivative_function

# How Newton's method treats the Jacobian: re-evaluated at every iterate, or frozen at (t, y0).
EVERY_ITERATE = "every iterate"
FROZEN = "frozen"


@dataclass(frozen=True)
class Newton:
    """Options of the Newton iteration on the stage equations of implicit Runge-Kutta methods.

    Converged when max |correction of Z| <= tolerance * max(|y0|, |Z|); with scale (one floor
    per state, in the state's unit) the test is the generated C's instead: max over stages and
    states of |correction_i| / (scale_i + |y0_i|) <= tolerance. A step that does not converge
    within max_iterations ends in NaN (the run then reports it as not completed). refreshes
    (FROZEN only): at most this many re-evaluations of J per step, each when a correction is
    larger than rate times the one before (after stepping back to the iterate before when it
    grew and J was not just evaluated there).
    """

    jacobian: str
    tolerance: float
    max_iterations: int
    scale: tuple[float, ...] = ()
    refreshes: int = 0
    rate: float = NEWTON_REFRESH_RATE

    def __post_init__(self) -> None:
        if self.jacobian not in (EVERY_ITERATE, FROZEN):
            raise ValueError(f"Newton jacobian must be {EVERY_ITERATE!r} or {FROZEN!r}")


# The reference: a few units of double roundoff, reachable because full Newton converges
# quadratically; 50 iterations before it gives up (the tick then counts as not completed).
FULL_NEWTON = Newton(EVERY_ITERATE, tolerance=1e-14, max_iterations=50)
# The C's iteration: J frozen (refreshed when it contracts too slowly, as the C does by
# default), linear convergence, so stop near the C's own double tolerance (2^-40 = 9.1e-13)
# instead of at roundoff, which would count iterations the C never makes.
SIMPLIFIED_NEWTON = Newton(FROZEN, tolerance=1e-12, max_iterations=50,
                           refreshes=DEFAULT_NEWTON_REFRESHES)


@dataclass(frozen=True)
class Step:
    """One step's result: the new state x (nx), the embedded error estimate
    h sum_j (b_j - b_hat_j) k_j (nx, None without b_hat), the Newton iterations used and the
    Jacobian refreshes made."""

    x: np.ndarray
    error: np.ndarray | None = None
    iterations: int = 0
    refreshes: int = 0


def _floats(values) -> np.ndarray | None:
    return None if values is None else np.array([float(v) for v in values])


def _matrix(rows) -> np.ndarray:
    return np.array([[float(v) for v in row] for row in rows])


def _failed(n: int, iterations: int = 0, refreshes: int = 0) -> Step:
    return Step(np.full(n, np.nan), None, iterations, refreshes)


def explicit_step(f, a, b, c, t, x, u, h, b_hat=None) -> Step:
    """One explicit Runge-Kutta step with a generic tableau loop (a, b, c, b_hat float arrays)."""
    s = len(b)
    k = np.zeros((s, len(x)))
    for i in range(s):
        y = x + h * (a[i, :i] @ k[:i]) if i else x
        k[i] = f(t + c[i] * h, y, u)
    error = None if b_hat is None else h * ((b - b_hat) @ k)
    return Step(x + h * (b @ k), error)


def explicit_stepper(model: Model, tableau: Tableau, parameters=None, scalar: bool = False):
    """The explicit Runge-Kutta step function (t, x, u, h) -> Step."""
    f = rate_function(model, parameters, scalar)
    a, b, c = tableau.floats()
    b_hat = _floats(tableau.b_hat)

    def step(t, x, u, h):
        return explicit_step(f, a, b, c, t, x, u, h, b_hat)

    return step


def implicit_stepper(model: Model, tableau: Tableau, parameters=None,
                     newton: Newton = FULL_NEWTON, scalar: bool = False):
    """The implicit Runge-Kutta step function: Newton on Z - h (A x I) F(y0 + Z) = 0.

    newton.jacobian EVERY_ITERATE builds I - h [a_ij J(Y_j)] at every iterate; FROZEN inverts
    I - h A (x) J(t, y0) once per step (small systems: one inverse is cheaper than repeated
    solves), and again with J at the iterate's stages on each of newton.refreshes.
    """
    f = rate_function(model, parameters, scalar)
    jac = jacobian_function(model, parameters, scalar)
    a, b, c = tableau.floats()
    b_hat = _floats(tableau.b_hat)
    s, n = len(b), model.nx
    eye = np.eye(s * n)
    frozen = newton.jacobian == FROZEN
    tiny = np.finfo(float).tiny
    if newton.scale and len(newton.scale) != n:
        raise ValueError(f"Newton scale has {len(newton.scale)} entries for {n} states")
    floors = np.array(newton.scale, dtype=float)

    def kron(left, right):
        # np.kron for these small 2-D blocks, without its generic reshaping (the advice makes
        # tens of thousands of steps).
        rows, cols = left.shape
        return (left[:, None, :, None] * right[None, :, None, :]).reshape(rows * n, cols * n)

    def rates(t, x, u, z, h):
        return np.array([f(t + c[i] * h, x + z[i], u) for i in range(s)])

    def newton_matrix(t, x, u, z, h):
        """I - h [a_ij J(Y_j)]: one J per stage, at the stage values x + z_j."""
        big = eye.copy()
        for j in range(s):
            big[:, j * n:(j + 1) * n] -= h * kron(a[:, j:j + 1], jac(t + c[j] * h, x + z[j], u))
        return big

    def step(t, x, u, h):
        z = np.zeros((s, n))
        # The C's test divides each correction by its state's floor plus |y0| (every stage).
        weights = np.tile(1.0 / (floors + np.abs(x)), s) if floors.size else None
        x_size = 0.0 if weights is not None else float(np.abs(x).max())
        refreshes, left, previous, fresh = 0, newton.refreshes, 0.0, False
        if frozen:
            j0 = jac(t, x, u)
            if not np.all(np.isfinite(j0)):
                return _failed(n)
            try:
                w = np.linalg.inv(eye - h * kron(a, j0))
            except np.linalg.LinAlgError:
                return _failed(n)
        for iteration in range(1, newton.max_iterations + 1):
            fs = rates(t, x, u, z, h)
            g = (z - h * (a @ fs)).reshape(-1)
            if frozen:
                dz = -(w @ g)
            else:
                try:
                    dz = np.linalg.solve(newton_matrix(t, x, u, z, h), -g)
                except np.linalg.LinAlgError:
                    return _failed(n, iteration, refreshes)
            size = np.abs(dz)
            correction = float(size.max())
            if not math.isfinite(correction):
                return _failed(n, iteration, refreshes)
            z = z + dz.reshape(s, n)
            if weights is not None:
                measure = float((size * weights).max())
                converged = measure <= newton.tolerance
            else:
                measure = correction
                converged = correction <= newton.tolerance * max(
                    x_size, float(np.abs(z).max()), tiny)
            if converged:
                fs = rates(t, x, u, z, h)
                error = None if b_hat is None else h * ((b - b_hat) @ fs)
                return Step(x + h * (b @ fs), error, iteration, refreshes)
            if frozen and left > 0 and previous > 0.0 and measure > newton.rate * previous:
                if measure >= previous and not fresh:  # grew from a stale J: step back first
                    z = z - dz.reshape(s, n)
                    measure = previous
                try:
                    w = np.linalg.inv(newton_matrix(t, x, u, z, h))
                except np.linalg.LinAlgError:
                    return _failed(n, iteration, refreshes)
                left, refreshes, fresh = left - 1, refreshes + 1, True
            else:
                fresh = False
            previous = measure
        return _failed(n, newton.max_iterations, refreshes)

    return step


def rosenbrock_stepper(model: Model, method: LinearlyImplicit, parameters=None,
                       scalar: bool = False):
    """One Rosenbrock step in the form of methods.LinearlyImplicit, with numpy's dense solve."""
    f = rate_function(model, parameters, scalar)
    jac = jacobian_function(model, parameters, scalar)
    ft = time_derivative_function(model, parameters, scalar)
    gamma = float(method.gamma)
    alpha, coupling = _matrix(method.alpha), _matrix(method.coupling)
    b, b_hat = _floats(method.b), _floats(method.b_hat)
    time, c = _floats(method.time), _floats(method.c)
    s, n = len(b), model.nx
    eye = np.eye(n)

    def step(t, x, u, h):
        m = eye - gamma * h * jac(t, x, u)
        dfdt = ft(t, x, u)
        k = np.zeros((s, n))
        for i in range(s):
            rhs = f(t + c[i] * h, x + h * (alpha[i, :i] @ k[:i]), u) + coupling[i, :i] @ k[:i] \
                + time[i] * h * dfdt
            try:
                k[i] = np.linalg.solve(m, rhs)
            except np.linalg.LinAlgError:
                return _failed(n)
        error = None if b_hat is None else h * ((b - b_hat) @ k)
        return Step(x + h * (b @ k), error)

    return step


def linear_matrices(model: Model, parameters=None):
    """(A, B, e) of f = A x + B u + e, evaluated numerically at x = 0, u = 0, t = 0."""
    import sympy as sp

    jac = jacobian_function(model, parameters)
    f = rate_function(model, parameters)
    x0, u0 = np.zeros(model.nx), np.zeros(len(model.inputs))
    a = jac(0.0, x0, u0).reshape(model.nx, model.nx)
    if model.inputs:
        bfun = numeric(model, sp.Matrix(model.f).jacobian(sp.Matrix(model.u)), parameters)
        bmat = bfun(0.0, x0, u0).reshape(model.nx, len(model.inputs))
    else:
        bmat = np.zeros((model.nx, 0))
    return a, bmat, f(0.0, x0, u0)


def zoh_stepper(model: Model, parameters=None):
    """The exact step for inputs held over h, from scipy.linalg.expm of the augmented matrix.

    Valid for a model linear in states and inputs (the caller checks; the generator refuses
    other models).
    """
    from scipy.linalg import expm

    a, bmat, e = linear_matrices(model, parameters)
    n, m = a.shape[0], bmat.shape[1]
    cache: dict[float, tuple] = {}

    def step(t, x, u, h):
        if h not in cache:
            aug = np.zeros((n + m + 1, n + m + 1))
            aug[:n, :n], aug[:n, n:n + m], aug[:n, n + m] = a, bmat, e
            phi = expm(aug * h)
            cache[h] = (phi[:n, :n], phi[:n, n:n + m], phi[:n, n + m])
        ad, bd, ed = cache[h]
        return Step(ad @ x + bd @ np.asarray(u, dtype=float).reshape(-1) + ed)

    return step


def stepper(model: Model, method, parameters=None, newton: Newton = FULL_NEWTON,
            scalar: bool = False):
    """The step function (t, x, u, h) -> Step for a method of any kind.

    parameters override the model's values; newton applies to implicit Runge-Kutta methods;
    scalar evaluates the model with the math module (numeric.py), for many small steps.
    """
    kind = method.kind
    if kind == EXPLICIT:
        return explicit_stepper(model, method, parameters, scalar)
    if kind in NEWTON_KINDS:
        return implicit_stepper(model, method, parameters, newton, scalar)
    if kind == LINEARLY_IMPLICIT:
        return rosenbrock_stepper(model, method, parameters, scalar)
    if kind == EXACT:
        return zoh_stepper(model, parameters)
    raise MethodError(f"{method.id}: no reference stepper for the kind '{kind}'")
