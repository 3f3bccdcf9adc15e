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
from ..methods import EXACT, EXPLICIT, Method
from ..model import Model
from .exact import discretize_exact, linear_parts, zoh_propagator
from .explicit import discretize_explicit, exact_dt, needed_stages, output_block, rate_block
from .implicit import discretize_implicit, state_scales
from .ir import (DEFAULT_NEWTON_ITERATIONS, DEFAULT_NEWTON_TOLERANCE, DENSE_LU, ELIMINATION,
                 INVERSE, SOLVERS, Assign, Block, CoupledStage, DiagonalStage, ImplicitStep,
                 Jacobian, NewtonSpec, RosenbrockStage, Stage, StepProgram)
from .derivatives import jacobian, time_derivative
from .linear_solve import G, LinearSolve, MatrixEntry, plan_solve

__all__ = ["DEFAULT_NEWTON_ITERATIONS", "DEFAULT_NEWTON_TOLERANCE", "DENSE_LU", "ELIMINATION",
           "G", "INVERSE", "SOLVERS", "Assign", "Block", "CoupledStage", "DiagonalStage",
           "ImplicitStep", "Jacobian", "LinearSolve", "MatrixEntry", "NewtonSpec",
           "RosenbrockStage", "Stage", "StepProgram", "discretize",
           "discretize_exact", "discretize_explicit", "discretize_implicit", "exact_dt",
           "jacobian", "linear_parts", "needed_stages", "output_block", "plan_solve",
           "rate_block", "state_scales", "time_derivative", "zoh_propagator"]


def discretize(model: Model, method: Method, dt, substeps: int = 1, error_estimate: bool = False,
               **implicit_options) -> StepProgram | ImplicitStep:
    """The step of one method kind for one substep h = dt / substeps.

    error_estimate: also carry the embedded pair's weights (explicit methods with b_hat);
    implicit_options (newton_iterations, newton_tol, solver): implicit Runge-Kutta and
    Rosenbrock methods only.
    """
    if method.kind == EXPLICIT:
        return discretize_explicit(model, method, dt, substeps, error_estimate)
    if error_estimate:
        raise MethodError(f"{method.id}: --error-estimate needs an explicit embedded pair such "
                          "as bs3 or dp5")
    if method.kind == EXACT:
        return discretize_exact(model, method, dt, substeps)
    return discretize_implicit(model, method, dt, substeps, **implicit_options)
