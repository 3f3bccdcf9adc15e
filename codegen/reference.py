"""The independent Python reference: the same method, run with numpy straight from the model.

It shares nothing with the generated code path: f comes from sympy's lambdify of the model's own
expressions (no CSE, no C printer), and the step is a generic tableau loop in float64.

References
----------
HNW I, section II.1 (explicit Runge-Kutta step).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .model import Model
from .numeric import jacobian_function, output_function, rate_function  # noqa: F401 (API)
from .reference_implicit import stepper as implicit_stepper


@dataclass(frozen=True)
class Trajectory:
    """ts (n+1), xs (n+1, nx) and how many ticks completed before a non-finite value."""

    ts: np.ndarray
    xs: np.ndarray
    completed: int


def explicit_step(f, a, b, c, t, x, u, h):
    """One explicit Runge-Kutta step with a generic tableau loop."""
    s = len(b)
    k = np.zeros((s, len(x)))
    for i in range(s):
        y = x + h * (a[i, :i] @ k[:i]) if i else x
        k[i] = f(t + c[i] * h, y, u)
    return x + h * (b @ k)


def run(model: Model, method, dt: float, substeps: int, inputs: np.ndarray,
        x0: np.ndarray | None = None, parameters: dict[str, float] | None = None,
        stepper=None) -> Trajectory:
    """Run len(inputs) ticks, inputs held constant over each tick (zero-order hold).

    inputs: (n, nu) array; returns the trajectory at every tick boundary.
    """
    f = rate_function(model, parameters)
    if stepper is None and not method.is_explicit:  # implicit, Rosenbrock, exact: own module
        stepper = implicit_stepper(model, method, parameters)
    if stepper is None:
        a, b, c = method.floats()

        def stepper(t, x, u, h):
            return explicit_step(f, a, b, c, t, x, u, h)

    n = len(inputs)
    x = np.array([s.initial for s in model.states] if x0 is None else x0, dtype=np.float64)
    h = dt / substeps
    ts = np.zeros(n + 1)
    xs = np.full((n + 1, model.nx), np.nan)
    xs[0] = x
    with np.errstate(all="ignore"):
        for k in range(n):
            t0 = ts[k]
            for m in range(substeps):
                x = stepper(t0 + m * h, x, inputs[k], h)
            if not np.all(np.isfinite(x)):
                return Trajectory(ts=ts, xs=xs, completed=k)
            ts[k + 1] = t0 + dt
            xs[k + 1] = x
    return Trajectory(ts=ts, xs=xs, completed=n)


def high_accuracy(model: Model, dt: float, inputs: np.ndarray, x0=None, parameters=None,
                  rtol: float = 1e-12) -> Trajectory:
    """scipy solve_ivp (DOP853, tight tolerance), restarted at every tick for the held inputs."""
    from scipy.integrate import solve_ivp

    f = rate_function(model, parameters)
    n = len(inputs)
    x = np.array([s.initial for s in model.states] if x0 is None else x0, dtype=np.float64)
    ts = np.arange(n + 1) * dt
    xs = np.full((n + 1, model.nx), np.nan)
    xs[0] = x
    scale = np.maximum(np.abs(x), 1.0)
    for k in range(n):
        sol = solve_ivp(lambda t, y, u=inputs[k]: f(t, y, u), (ts[k], ts[k + 1]), x,
                        method="DOP853", rtol=rtol, atol=rtol * scale)
        if not sol.success or not np.all(np.isfinite(sol.y[:, -1])):
            return Trajectory(ts=ts, xs=xs, completed=k)
        x = sol.y[:, -1]
        xs[k + 1] = x
    return Trajectory(ts=ts, xs=xs, completed=n)


