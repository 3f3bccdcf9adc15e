"""Newton convergence of an implicit Runge-Kutta method at a tick, over the envelope.

The generated C of an implicit Runge-Kutta method solves its stage equations by simplified
Newton (the Jacobian frozen at the start of the step, refreshed at most
discretize.DEFAULT_NEWTON_REFRESHES times when it contracts too slowly), stops after at most
discretize.DEFAULT_NEWTON_ITERATIONS iterations and returns NO_CONVERGENCE when the last
correction is still above the precision's tolerance (discretize.DEFAULT_NEWTON_TOLERANCE,
relative to each state's Newton scale: its full scale plus |x|). A tick at which that happens
somewhere in the envelope is no advice: the controller would stop.

The check runs the reference stepper with the C's test (reference.steppers.Newton with the C's
scale, limit and tolerance) for NEWTON_TICKS ticks from every operating point of the envelope
(the initial point, the centre, the corners, the interior points), with the inputs held at that
point's values, and along the run the check makes (verify.excitation from the initial state).
The reference works in double and solves the stages of a diagonally implicit method as one
coupled system (the C solves them one after the other), so it stands for the C's convergence,
not for its iteration counts to the last one.

References
----------
HW: Hairer & Wanner, Solving ODEs II, 2nd ed., 1996, IV.8 (simplified Newton iterations for
implicit Runge-Kutta methods, convergence when the step is small against the nonlinearity)
(from memory).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .. import reference
from ..discretize import (DEFAULT_NEWTON_ITERATIONS, DEFAULT_NEWTON_REFRESHES,
                          DEFAULT_NEWTON_TOLERANCE)
from ..discretize.implicit import state_scales as newton_scales
from ..methods import NEWTON_KINDS
from ..model import Model
from ..reference.steppers import FROZEN, Newton
from ..verify.scenario import excitation

# Ticks run from each operating point: the first tick starts farthest from the trajectory the
# frozen Jacobian was taken on; two more show that the iteration keeps converging.
NEWTON_TICKS = 3


def c_newton(model: Model, precision: str) -> Newton:
    """The generated C's Newton test as reference Newton options (simplified with the default
    Jacobian refreshes, C's scale)."""
    return Newton(FROZEN, tolerance=DEFAULT_NEWTON_TOLERANCE[precision],
                  max_iterations=DEFAULT_NEWTON_ITERATIONS, scale=tuple(newton_scales(model)),
                  refreshes=DEFAULT_NEWTON_REFRESHES)


@dataclass(frozen=True)
class Convergence:
    """Whether Newton converged at one tick: from how many of the operating points it failed,
    the first of them in words (what differs from the initial point), and whether the run of
    check (of run_ticks ticks) failed."""

    dt: float
    precision: str
    points: int
    failed_points: int
    first_failure: str
    run_ticks: int
    check_run_failed: bool

    @property
    def converged(self) -> bool:
        return self.failed_points == 0 and not self.check_run_failed

    def note(self) -> str:
        """Why the tick was rejected, in one clause (empty when it was not)."""
        if self.converged:
            return ""
        where = []
        if self.failed_points:
            where.append(f"from {self.failed_points} of {self.points} operating points "
                         f"(first: {self.first_failure})")
        if self.check_run_failed:
            where.append(f"along the {self.run_ticks}-tick run of check")
        return (f"Newton's method (simplified, at most {DEFAULT_NEWTON_ITERATIONS} iterations, "
                f"{self.precision} tolerance) does not converge at dt = {self.dt:g} s "
                + " and ".join(where))


def describe(model: Model, point, initial) -> str:
    """An operating point in words: the values that differ from the initial point."""
    quantities = list(model.states) + list(model.inputs) + list(model.parameters)
    values = list(point.x + point.u) + [value for _, value in point.parameters]
    starts = list(initial.x + initial.u) + [value for _, value in initial.parameters]
    by_name = {q.name: q for q in quantities}
    names = [q.name for q in model.states] + [q.name for q in model.inputs] + \
        [name for name, _ in point.parameters]
    changed = [f"{name} = {value:g}" + (f" {by_name[name].unit}" if by_name[name].unit and
                                          by_name[name].unit != "1" else "")
               for name, value, start in zip(names, values, starts) if value != start]
    return ", ".join(changed) if changed else "the initial point"


def newton_converges(model: Model, method, dt: float, precision: str, points,
                     run_ticks: int) -> Convergence:
    """Run the C's Newton iteration from every operating point and along the check's run.

    points: envelope.OperatingPoint list (the initial point first); run_ticks: the length of the
    check's run. Methods without Newton iterations (explicit, Rosenbrock, exact) always converge.
    """
    if method.kind not in NEWTON_KINDS:
        return Convergence(dt, precision, len(points), 0, "", run_ticks, False)
    newton = c_newton(model, precision)
    steppers = {}
    failed, first = 0, ""
    with np.errstate(all="ignore"):
        for index, pt in enumerate(points):
            key = pt.parameters
            if key not in steppers:
                steppers[key] = reference.stepper(model, method, dict(key), newton=newton,
                                                  scalar=True)
            step = steppers[key]
            x, u = np.array(pt.x, float), np.array(pt.u, float)
            for k in range(NEWTON_TICKS):
                x = step(k * dt, x, u, dt).x
                if not np.all(np.isfinite(x)):
                    failed += 1
                    first = first or describe(model, pt, points[0])
                    break
        run = reference.run(model, method, dt, 1, excitation(model, run_ticks),
                            stepper=reference.stepper(model, method, newton=newton, scalar=True))
    return Convergence(dt, precision, len(points), failed, first, run_ticks,
                       run.completed < run_ticks)
