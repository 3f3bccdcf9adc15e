"""Stage 3 of the pipeline: Model + method + dt -> the step's intermediate representation.

- ``ir``: the representation (``StepProgram`` for explicit methods, ``ImplicitStep`` for the
  others), with every coefficient multiplied out as an exact value;
- ``explicit``: explicit Runge-Kutta; ``implicit``: implicit Runge-Kutta and Rosenbrock;
  ``exact``: the exact zero-order hold of a linear model;
- ``derivatives``: df/dx and df/dt by their structural non-zeros; ``linear_solve``: the plan of the
  linear solves inside implicit steps.
"""

from __future__ import annotations

from ..errors import MethodError
from ..methods import EXACT, EXPLICIT, LINEARLY_IMPLICIT, Method
from ..model import Model
from .exact import discretize_exact, linear_parts, zoh_propagator
from .explicit import discretize_explicit, exact_dt, needed_stages, output_block, rate_block
from .implicit import discretize_implicit, state_scales
from .ir import (DEFAULT_NEWTON_ITERATIONS, DEFAULT_NEWTON_REFRESHES, DEFAULT_NEWTON_TOLERANCE,
                 DENSE_LU, ELIMINATION, INVERSE, MAX_RETRY_DEPTH, NEWTON_REFRESH_RATE, SOLVERS,
                 Assign, Block, CoupledStage, DiagonalStage, ImplicitStep, Jacobian, NewtonSpec,
                 RosenbrockStage, Safeguards, Stage, StepProgram, Work, worst_case_work)
from .derivatives import jacobian, time_derivative
from .linear_solve import G, LinearSolve, MatrixEntry, plan_solve

__all__ = ["DEFAULT_NEWTON_ITERATIONS", "DEFAULT_NEWTON_REFRESHES", "DEFAULT_NEWTON_TOLERANCE",
           "DENSE_LU", "ELIMINATION", "ESTIMATING_KINDS", "G", "INVERSE", "MAX_RETRY_DEPTH",
           "NEWTON_REFRESH_RATE", "SOLVERS", "Assign", "Block", "CoupledStage", "DiagonalStage",
           "ImplicitStep", "Jacobian", "LinearSolve", "MatrixEntry", "NewtonSpec",
           "RosenbrockStage", "Safeguards", "Stage", "StepProgram", "Work", "discretize",
           "estimating_methods", "worst_case_work",
           "discretize_exact", "discretize_explicit", "discretize_implicit", "exact_dt",
           "jacobian", "linear_parts", "needed_stages", "output_block", "plan_solve",
           "rate_block", "state_scales", "time_derivative", "zoh_propagator"]


def discretize(model: Model, method: Method, dt, substeps: int = 1, error_estimate: bool = False,
               retry_depth: int = 0, accept_error: float | None = None,
               clamp_states: bool = False, **implicit_options) -> StepProgram | ImplicitStep:
    """The step of one method kind for one substep h = dt / substeps.

    error_estimate: also carry the embedded pair's weights (explicit and Rosenbrock methods with
    b_hat); retry_depth, accept_error, clamp_states: the tick's Safeguards (any kind);
    implicit_options (newton_iterations, newton_tol, solver, newton_refreshes, full_newton):
    implicit Runge-Kutta and Rosenbrock methods only.
    """
    guards = Safeguards(retry_depth=retry_depth, accept_error=accept_error,
                        clamp_states=clamp_states)
    estimated = error_estimate or accept_error is not None
    if estimated and (method.b_hat is None or method.kind not in ESTIMATING_KINDS):
        option = "--accept-error" if accept_error is not None else "--error-estimate"
        raise MethodError(f"{method.id}: {option} needs embedded weights (b_hat), which this "
                          f"method has not; methods that estimate their own error: "
                          f"{', '.join(estimating_methods())} (or a method file with b_hat)")
    if method.kind == EXPLICIT:
        return discretize_explicit(model, method, dt, substeps, error_estimate, guards)
    if method.kind == EXACT:
        if guards.retry_depth:
            raise MethodError(f"{method.id}: --max-retry-depth: the exact step has nothing to "
                              "halve (it fails only on a non-finite input); leave retries off")
        return discretize_exact(model, method, dt, substeps, guards)
    return discretize_implicit(model, method, dt, substeps, error_estimate=error_estimate,
                               safeguards=guards, **implicit_options)


# The method kinds whose steps can carry an embedded error estimate (with b_hat).
ESTIMATING_KINDS = (EXPLICIT, LINEARLY_IMPLICIT)


def estimating_methods() -> list[str]:
    """The built-in methods that can estimate their own error (embedded weights, a kind above)."""
    from ..methods import builtin, builtin_ids

    return [i for i in builtin_ids()
            if builtin(i).b_hat is not None and builtin(i).kind in ESTIMATING_KINDS]
