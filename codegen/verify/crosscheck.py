"""The cross-check: the C build against the independent Python reference of the same method.

Both run the same ticks with the same inputs; each state's difference must stay within what
rounding alone explains. The same run is also compared with scipy's solve_ivp (accuracy).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .. import reference
from ..build import build
from ..discretize import Safeguards
from ..methods import NEWTON_KINDS, Method
from ..model import Model
from ..pipeline import generate
from ..rounding import rounding_per_step
from ..run import as_precision, run_c
from .scenario import DEFAULT_ACCURACY, excitation, state_scales


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


def safeguards_of(options: dict | None) -> Safeguards:
    """The tick's safeguards among generation options (retry_depth, accept_error, clamp_states)."""
    options = options or {}
    return Safeguards(retry_depth=options.get("retry_depth", 0),
                      accept_error=options.get("accept_error"),
                      clamp_states=options.get("clamp_states", False))


def generated_newton(model: Model, precision: str, options: dict | None = None):
    """The generated C's Newton iteration as reference Newton options: its tolerance, scale,
    iteration limit and refreshes (or full Newton), from the generation options."""
    from ..discretize import DEFAULT_NEWTON_ITERATIONS, DEFAULT_NEWTON_REFRESHES, NewtonSpec
    from ..discretize import state_scales as newton_scales
    from ..reference.steppers import EVERY_ITERATE, FROZEN, Newton

    options = options or {}
    tol = NewtonSpec(tolerance=options.get("newton_tol")).tolerance_for(precision)
    return Newton(EVERY_ITERATE if options.get("full_newton") else FROZEN, tolerance=tol,
                  max_iterations=options.get("newton_iterations", DEFAULT_NEWTON_ITERATIONS),
                  scale=tuple(newton_scales(model)),
                  refreshes=options.get("newton_refreshes", DEFAULT_NEWTON_REFRESHES))


def cross_check(model: Model, method: Method, dt: float, substeps: int, precision: str,
                ticks: int, inputs: np.ndarray | None = None,
                accuracy: float = DEFAULT_ACCURACY, options: dict | None = None,
                csource=None) -> CrossCheck:
    """Build the C and compare it tick by tick with the independent reference.

    options: generation options (newton_iterations, newton_tol, solver, newton_refreshes,
    full_newton for implicit methods; retry_depth, accept_error, clamp_states for any): the
    reference retries, accepts and clamps as the C does; csource: the already generated C for
    these arguments, if the caller has it.
    """
    if csource is None:
        csource = generate(model, method, dt, substeps, precision, **(options or {}))
    built = build(csource, model)
    u = excitation(model, ticks) if inputs is None else inputs
    u = as_precision(u, precision)
    c_run = run_c(built, model, u)
    params = {p.name: float(as_precision(p.value, precision)) for p in model.parameters}
    x0 = as_precision([s.initial for s in model.states], precision)
    guards = safeguards_of(options)
    stepper = None
    if guards.retry_depth and method.kind in NEWTON_KINDS:
        # Retries follow failures, so the reference fails where the C does: its Newton, not
        # the reference's full Newton to roundoff (the difference stays within the allowance).
        stepper = reference.stepper(model, method, params,
                                    newton=generated_newton(model, precision, options))
    ref = reference.run(model, method, dt, substeps, u, x0=x0, parameters=params,
                        stepper=stepper, safeguards=guards)
    exact = reference.high_accuracy(model, dt, u, x0=x0, parameters=params)
    n = min(c_run.completed, ref.completed)
    # Per state: the largest difference against that state's own bound (rounding of numbers of
    # the state's full scale, plus the Newton allowance); the worst state is reported.
    diff = np.nanmax(np.abs(c_run.xs[: n + 1] - ref.xs[: n + 1]), axis=0)
    growth = growth_factor(model, ticks * dt, u)
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
    accurate = bool(finished and np.isfinite(acc) and acc <= accuracy)
    passed = bool(finished and np.all(np.isfinite(diff)) and np.all(diff <= tols) and accurate)
    return CrossCheck(precision=precision, ticks=ticks, completed=c_run.completed,
                      max_difference=max_diff, tolerance=tol,
                      worst_state=model.states[worst].name, error_vs_high_accuracy=acc,
                      accuracy_tolerance=accuracy, accurate=accurate, passed=passed)
