"""Running the reference over ticks, and the high-accuracy solution the accuracy checks use."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..model import Model
from .numeric import rate_function
from .steppers import stepper as method_stepper


@dataclass(frozen=True)
class Trajectory:
    """ts (n+1), xs (n+1, nx) and how many ticks completed before a non-finite value.

    A run of the reference also reports, over the steps it made, the largest |embedded error
    estimate| of each state (nx; None for a method without b_hat) and the Newton iterations
    (their sum; 0 for methods without Newton iterations).
    """

    ts: np.ndarray
    xs: np.ndarray
    completed: int
    largest_error: np.ndarray | None = None
    newton_iterations: int = 0


def run(model: Model, method, dt: float, substeps: int, inputs: np.ndarray,
        x0: np.ndarray | None = None, parameters: dict[str, float] | None = None,
        stepper=None) -> Trajectory:
    """Run len(inputs) ticks, inputs held constant over each tick (zero-order hold).

    inputs: (n, nu) array; returns the trajectory at every tick boundary. stepper: a step
    function from steppers.stepper (default: the reference's, full Newton, vector mode).
    """
    if stepper is None:
        stepper = method_stepper(model, method, parameters)
    n = len(inputs)
    x = np.array([s.initial for s in model.states] if x0 is None else x0, dtype=np.float64)
    h = dt / substeps
    ts = np.zeros(n + 1)
    xs = np.full((n + 1, model.nx), np.nan)
    xs[0] = x
    largest, iterations = None, 0
    completed = n
    with np.errstate(all="ignore"):
        for k in range(n):
            t0 = ts[k]
            for m in range(substeps):
                step = stepper(t0 + m * h, x, inputs[k], h)
                x, iterations = step.x, iterations + step.iterations
                if step.error is not None:
                    size = np.abs(step.error)
                    largest = size if largest is None else np.fmax(largest, size)
            if not np.all(np.isfinite(x)):
                completed = k
                break
            ts[k + 1] = t0 + dt
            xs[k + 1] = x
    return Trajectory(ts=ts, xs=xs, completed=completed, largest_error=largest,
                      newton_iterations=iterations)


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
