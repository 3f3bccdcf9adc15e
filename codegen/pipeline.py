"""The driver: the pipeline read top to bottom, one stage per line."""

from __future__ import annotations

from .discretize import discretize
from .emit import CSource, emit
from .methods import Method
from .model import Model
from .simplify import simplify


def generate(model: Model, method: Method, dt, substeps: int = 1, precision: str = "float",
             error_estimate: bool = False, **options) -> CSource:
    """Model + method + tick -> generated C files (not yet written to disk).

    options: retry_depth, accept_error and clamp_states (the tick's safeguards, any method);
    newton_iterations, newton_tol, solver, newton_refreshes and full_newton (implicit
    Runge-Kutta and Rosenbrock methods only).
    """
    step = discretize(model, method, dt, substeps, error_estimate,
                      **options)                     # Model -> StepProgram | ImplicitStep
    step = simplify(step)                            # step -> step with CSE inside each block
    return emit(step, precision)                     # step -> CSource (C text)
