"""Running the reference over ticks, and the high-accuracy solution the accuracy checks use."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..discretize.ir import Safeguards
from ..model import Model
from .numeric import rate_function
from .steppers import stepper as method_stepper


@dataclass(frozen=True)
class Trajectory:
    """ts (n+1), xs (n+1, nx) and how many ticks completed before a non-finite value.

    A run of the reference also reports, over the steps it made, the largest |embedded error
    estimate| of each state (nx; None for a method without b_hat), the Newton iterations and
    Jacobian refreshes (their sums; 0 for methods without Newton iterations), and with retries
    the method steps taken and the failed attempts that were retried as halves.
    """

    ts: np.ndarray
    xs: np.ndarray
    completed: int
    largest_error: np.ndarray | None = None
    newton_iterations: int = 0
    refreshes: int = 0
    steps: int = 0
    retried: int = 0


class _Tally:
    """What the steps of a run add up to (see Trajectory)."""

    def __init__(self) -> None:
        self.largest, self.iterations, self.refreshes = None, 0, 0
        self.steps, self.retried = 0, 0

    def add(self, step) -> None:
        self.steps += 1
        self.iterations += step.iterations
        self.refreshes += step.refreshes
        if step.error is not None:
            size = np.abs(step.error)
            self.largest = size if self.largest is None else np.fmax(self.largest, size)


def _piece(stepper, t, x, u, h, depth, guards, scales, tally):
    """One step of length h, retried as two halves while depth allows (recursion is fine here:
    the depth is at most the C's RETRY_DEPTH); the new state, or None when it failed."""
    step = stepper(t, x, u, h)
    ok = bool(np.all(np.isfinite(step.x)))
    if ok and guards.accept_error is not None and step.error is not None:
        ok = float(np.max(np.abs(step.error) / scales)) <= guards.accept_error
    if ok:
        tally.add(step)
        return step.x
    if depth >= guards.retry_depth:
        return None
    tally.retried += 1
    half = _piece(stepper, t, x, u, h / 2, depth + 1, guards, scales, tally)
    if half is None:
        return None
    return _piece(stepper, t + h / 2, half, u, h / 2, depth + 1, guards, scales, tally)


class TickTaker:
    """One tick of the reference from any state: the substeps with the C's safeguards (retries
    of failed or inaccurate steps as halves, and clamping), as run() and the cross-check take it."""

    def __init__(self, model: Model, stepper, dt: float, substeps: int, guards: Safeguards):
        self.stepper, self.dt, self.substeps, self.guards = stepper, dt, substeps, guards
        self.scales = np.array([s.full_scale or 1.0 for s in model.states])
        self.low = np.array([s.range[0] if s.range else -np.inf for s in model.states])
        self.high = np.array([s.range[1] if s.range else np.inf for s in model.states])
        self.tally = _Tally()

    def tick(self, t0: float, x, u):
        """The state after one tick from x at time t0 with inputs u, or None when it failed."""
        h = self.dt / self.substeps
        with np.errstate(all="ignore"):
            for m in range(self.substeps):
                x = _piece(self.stepper, t0 + m * h, x, u, h, 0, self.guards, self.scales,
                           self.tally)
                if x is None:
                    return None
            if not np.all(np.isfinite(x)):
                return None
            return np.clip(x, self.low, self.high) if self.guards.clamp_states else x


def run(model: Model, method, dt: float, substeps: int, inputs: np.ndarray,
        x0: np.ndarray | None = None, parameters: dict[str, float] | None = None,
        stepper=None, safeguards: Safeguards | None = None) -> Trajectory:
    """Run len(inputs) ticks, inputs held constant over each tick (zero-order hold).

    inputs: (n, nu) array; returns the trajectory at every tick boundary, at the times k * dt.
    stepper: a step function from steppers.stepper (default: the reference's, full Newton,
    vector mode). safeguards: the generated C's retries (a failed step, or one whose error
    estimate exceeds accept_error of the state's full scale, is retried as two halves), and
    clamp_states (each state with a range saturated to it after the tick).
    """
    if stepper is None:
        stepper = method_stepper(model, method, parameters)
    taker = TickTaker(model, stepper, dt, substeps, safeguards or Safeguards())
    n = len(inputs)
    x = np.array([s.initial for s in model.states] if x0 is None else x0, dtype=np.float64)
    ts = np.arange(n + 1) * dt
    xs = np.full((n + 1, model.nx), np.nan)
    xs[0] = x
    completed = n
    for k in range(n):
        x = taker.tick(ts[k], x, inputs[k])
        if x is None:
            completed = k
            break
        xs[k + 1] = x
    tally = taker.tally
    return Trajectory(ts=ts, xs=xs, completed=completed, largest_error=tally.largest,
                      newton_iterations=tally.iterations, refreshes=tally.refreshes,
                      steps=tally.steps, retried=tally.retried)


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
