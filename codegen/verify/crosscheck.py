"""The cross-check: the C build against the independent Python reference of the same method.

Both run the same ticks with the same inputs; each state's difference must stay within what
rounding alone explains. The same run is also compared with scipy's solve_ivp (accuracy).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .. import reference
from ..build import build
from ..methods import NEWTON_KINDS, Method
from ..model import Model
from ..pipeline import generate
from ..rounding import rounding_per_step
from ..run import as_precision, run_built, status_name, trajectory
from .scenario import DEFAULT_ACCURACY, excitation, state_scales, tunable_as_inputs


@dataclass(frozen=True)
class CrossCheck:
    """C build vs the Python reference of the same method over the same ticks."""

    precision: str
    ticks: int
    completed: int
    max_difference: float
    tolerance: float
    worst_state: str
    error_vs_high_accuracy: float
    accuracy_tolerance: float
    accurate: bool
    passed: bool
    # Where the run stopped and where the worst errors are (ticks count from 0, the start).
    # status: the C's status on the tick that stopped it ('OK' when it took every tick);
    # compared: ticks that both the C and the reference took; worst_tick: the tick of
    # max_difference; accuracy_state, accuracy_tick: where error_vs_high_accuracy is, over the
    # accuracy_compared ticks that both the C and solve_ivp took.
    status: str
    compared: int
    accuracy_compared: int
    worst_tick: int
    accuracy_state: str
    accuracy_tick: int



def rounding_tolerance(model: Model, method: Method, precision: str, ticks: int, substeps: int,
                       scale: float, growth: float) -> float:
    """Bound on |C - reference| from rounding alone.

    Each of the ticks*substeps steps adds at most rounding.rounding_per_step of the state's
    scale; errors are carried forward with at most the growth factor of the model over the run
    (exp of the largest positive real part of the Jacobian's eigenvalues times T).
    """
    steps = ticks * substeps
    return rounding_per_step(method.stages, precision) * steps * scale * growth


def growth_factor(model: Model, horizon: float, inputs: np.ndarray) -> float:
    x0 = np.array([s.initial for s in model.states])
    jac = reference.jacobian_function(model)
    u = inputs[0] if len(inputs) else np.zeros(0)
    with np.errstate(all="ignore"):
        eig = np.linalg.eigvals(jac(0.0, x0, u))
    rate = max(0.0, float(np.max(eig.real))) if np.all(np.isfinite(eig)) else 0.0
    return float(np.exp(min(rate * horizon, 50.0)))



def newton_allowance(model: Model, method, precision: str, steps: int, xs: np.ndarray,
                     options: dict | None = None) -> np.ndarray | float:
    """Extra |C - reference| allowed per state for the C's Newton stopping rule (0 without one).

    The C accepts an iterate once max_i |correction_i| / scale_i <= tol, with scale_i = the state's
    range bound + |x_i|; the reference iterates to rounding. Each step may then differ by about one
    last correction, tol * scale_i in state i, carried forward like rounding errors.
    """
    from ..discretize import NewtonSpec, jacobian
    from ..discretize import state_scales as newton_scales

    if method.kind not in NEWTON_KINDS:
        return 0.0
    if jacobian(model).linear:
        return 0.0
    tol = NewtonSpec(tolerance=(options or {}).get("newton_tol")).tolerance_for(precision)
    reach = np.nanmax(np.abs(xs), axis=0) if xs.size else np.zeros(model.nx)
    return steps * tol * (np.asarray(newton_scales(model)) + reach)


def cross_check(model: Model, method: Method, dt: float, substeps: int, precision: str,
                ticks: int, inputs: np.ndarray | None = None,
                accuracy: float = DEFAULT_ACCURACY, options: dict | None = None,
                csource=None, parameters: np.ndarray | None = None) -> CrossCheck:
    """Build the C and compare it tick by tick with the independent reference.

    options: generation options of implicit methods (newton_iterations, newton_tol, solver);
    csource: the already generated C for these arguments, if the caller has it; parameters:
    (ticks, len(model.tunable)) values of the tunable parameters per tick, or None.
    """
    if csource is None:
        csource = generate(model, method, dt, substeps, precision, **(options or {}))
    built = build(csource, model)
    u = excitation(model, ticks) if inputs is None else inputs
    u = as_precision(u, precision)
    c_replay = run_built(built, model, u, parameters=None if parameters is None
                         else as_precision(parameters, precision))
    c_run = trajectory(c_replay, model)
    params = {p.name: float(as_precision(p.value, precision)) for p in model.parameters}
    x0 = as_precision([s.initial for s in model.states], precision)
    # The reference takes per-tick parameters as extra inputs; both stop with the C (the tick
    # the C failed on is still run by the reference, to see whether it fails there too).
    ref_model, ref_u = model, u
    if parameters is not None:
        ref_model = tunable_as_inputs(model)
        ref_u = np.hstack([u, as_precision(parameters, precision)])
        params = {p.name: params[p.name] for p in ref_model.parameters}
    ref = reference.run(ref_model, method, dt, substeps, ref_u[: c_run.completed + 1], x0=x0,
                        parameters=params)
    exact = reference.high_accuracy(ref_model, dt, ref_u[: c_run.completed], x0=x0,
                                    parameters=params)
    n = min(c_run.completed, ref.completed)
    # Per state: the largest difference against that state's own bound (rounding of numbers of
    # the state's full scale, plus the Newton allowance); the worst state is reported.
    diff = np.nanmax(np.abs(c_run.xs[: n + 1] - ref.xs[: n + 1]), axis=0)
    growth = growth_factor(ref_model, ticks * dt, ref_u)
    scales = state_scales(model, ref.xs[: n + 1])
    tols = rounding_tolerance(model, method, precision, ticks, substeps, scales, growth)
    tols = tols + newton_allowance(model, method, precision, ticks * substeps, ref.xs[: n + 1],
                                   options) * growth
    worst = int(np.nanargmax(diff / tols)) if np.all(np.isfinite(diff)) else \
        int(np.argmax(~np.isfinite(diff)))
    max_diff, tol = float(diff[worst]), float(tols[worst])
    m = min(c_run.completed, exact.completed)
    scales = state_scales(model, exact.xs[: m + 1])
    rel = np.abs(c_run.xs[: m + 1] - exact.xs[: m + 1]) / scales
    acc = float(np.max(rel)) if rel.size else float("nan")
    finished = c_run.completed == ticks == ref.completed
    # Each verdict is for the figure it states: the ticks compared; a run that stopped early
    # fails the check by itself (passed), not through these figures.
    accurate = bool(m > 0 and np.isfinite(acc) and acc <= accuracy)
    passed = bool(finished and exact.completed == ticks and np.all(np.isfinite(diff))
                  and np.all(diff <= tols) and accurate)
    worst_tick = int(np.nanargmax(np.abs(c_run.xs[: n + 1, worst] - ref.xs[: n + 1, worst]))) \
        if np.any(np.isfinite(c_run.xs[: n + 1, worst] - ref.xs[: n + 1, worst])) else 0
    acc_tick, acc_state = np.unravel_index(int(np.argmax(rel)), rel.shape) if rel.size else (0, 0)
    return CrossCheck(precision=precision, ticks=ticks, completed=c_run.completed,
                      max_difference=max_diff, tolerance=tol,
                      worst_state=model.states[worst].name, error_vs_high_accuracy=acc,
                      accuracy_tolerance=accuracy, accurate=accurate, passed=passed,
                      status=status_name(c_replay.status), compared=n, accuracy_compared=m,
                      worst_tick=worst_tick,
                      accuracy_state=model.states[int(acc_state)].name,
                      accuracy_tick=int(acc_tick))
