"""The reference steppers: one step of a method on the model in float64, one function per kind.

Nothing is shared with the generated code path: f and df/dx come from sympy's lambdify of the
model's own expressions; explicit tableaux run a generic tableau loop; every implicit Runge-Kutta
tableau (diagonally implicit ones included) is solved as one coupled system in Z = Y - y0 by a
full Newton iteration that re-evaluates the Jacobian at every iterate (the C uses a simplified
Newton with J frozen, stage by stage for diagonally implicit methods), the step ends with
y1 = y0 + h sum b_i f(Y_i) (the C uses d = b^T A^-1), and the exact zero-order hold uses
scipy.linalg.expm on float64 matrices (the C uses 50-digit expm at generation time).

References
----------
HNW: Hairer, Norsett & Wanner, Solving Ordinary Differential Equations I, 2nd ed., 1993, section
II.1 (explicit Runge-Kutta step). HW: Hairer & Wanner, Solving Ordinary Differential Equations II,
2nd ed., 1996, sections IV.7 (Rosenbrock methods) and IV.8 (Newton iterations for implicit
Runge-Kutta methods) (from memory).
"""

from __future__ import annotations

import numpy as np
import sympy as sp

from ..methods import EXACT, EXPLICIT, LINEARLY_IMPLICIT, LinearlyImplicit
from ..model import Model
from .numeric import jacobian_function, numeric, rate_function

# Full Newton stops when the correction is below this fraction of the iterate's size: a few units
# of double roundoff, reachable because full Newton converges quadratically.
REFERENCE_NEWTON_TOL = 1e-14
# Iterations before the reference gives up (it then reports the tick as not completed).
REFERENCE_NEWTON_ITERATIONS = 50


def explicit_step(f, a, b, c, t, x, u, h):
    """One explicit Runge-Kutta step with a generic tableau loop."""
    s = len(b)
    k = np.zeros((s, len(x)))
    for i in range(s):
        y = x + h * (a[i, :i] @ k[:i]) if i else x
        k[i] = f(t + c[i] * h, y, u)
    return x + h * (b @ k)


def rk_stepper(model: Model, tableau, parameters=None):
    """One implicit Runge-Kutta step by full Newton on the coupled stage system."""
    f = rate_function(model, parameters)
    jac = jacobian_function(model, parameters)
    a, b, c = tableau.floats()
    s, n = len(b), model.nx
    eye = np.eye(s * n)

    def step(t, x, u, h):
        z = np.zeros((s, n))
        for _ in range(REFERENCE_NEWTON_ITERATIONS):
            fs = np.array([f(t + c[i] * h, x + z[i], u) for i in range(s)])
            g = (z - h * a @ fs).reshape(-1)
            big = np.zeros((s * n, s * n))
            for j in range(s):
                jj = jac(t + c[j] * h, x + z[j], u)
                for i in range(s):
                    big[i * n:(i + 1) * n, j * n:(j + 1) * n] = h * a[i, j] * jj
            try:
                dz = np.linalg.solve(eye - big, -g)
            except np.linalg.LinAlgError:
                return np.full(n, np.nan)
            z = z + dz.reshape(s, n)
            if not np.all(np.isfinite(z)):
                return np.full(n, np.nan)
            size = max(np.max(np.abs(x)), np.max(np.abs(z)), np.finfo(float).tiny)
            if np.max(np.abs(dz)) <= REFERENCE_NEWTON_TOL * size:
                fs = np.array([f(t + c[i] * h, x + z[i], u) for i in range(s)])
                return x + h * (b @ fs)
        return np.full(n, np.nan)

    return step


def rosenbrock_stepper(model: Model, method: LinearlyImplicit, parameters=None):
    """One Rosenbrock step in the form of method.LinearlyImplicit, with numpy's dense solve."""
    f = rate_function(model, parameters)
    jac = jacobian_function(model, parameters)
    ft = numeric(model, [sp.diff(r, model.t) for r in model.f], parameters)
    gamma = float(method.gamma)
    alpha = np.array([[float(v) for v in row] for row in method.alpha])
    coupling = np.array([[float(v) for v in row] for row in method.coupling])
    b = np.array([float(v) for v in method.b])
    time = np.array([float(v) for v in method.time])
    c = alpha.sum(axis=1)
    s, n = len(b), model.nx

    def step(t, x, u, h):
        m = np.eye(n) - gamma * h * jac(t, x, u)
        dfdt = ft(t, x, u).reshape(-1)
        k = np.zeros((s, n))
        for i in range(s):
            rhs = f(t + c[i] * h, x + h * (alpha[i, :i] @ k[:i]), u) + coupling[i, :i] @ k[:i] \
                + time[i] * h * dfdt
            try:
                k[i] = np.linalg.solve(m, rhs)
            except np.linalg.LinAlgError:
                return np.full(n, np.nan)
        return x + h * (b @ k)

    return step


def linear_matrices(model: Model, parameters=None):
    """(A, B, e) of f = A x + B u + e, evaluated numerically at x = 0, u = 0, t = 0."""
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
    """The exact step for inputs held over h, from scipy.linalg.expm of the augmented matrix."""
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
        return ad @ x + bd @ np.asarray(u, dtype=float).reshape(-1) + ed

    return step


def stepper(model: Model, method, parameters=None):
    """The reference step function (t, x, u, h) -> x_next for a method of any kind."""
    if method.kind == EXPLICIT:
        f = rate_function(model, parameters)
        a, b, c = method.floats()

        def step(t, x, u, h):
            return explicit_step(f, a, b, c, t, x, u, h)

        return step
    if method.kind == EXACT:
        return zoh_stepper(model, parameters)
    if method.kind == LINEARLY_IMPLICIT:
        return rosenbrock_stepper(model, method, parameters)
    return rk_stepper(model, method, parameters)
