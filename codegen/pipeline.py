"""The driver: the pipeline read top to bottom, one stage per line."""

from __future__ import annotations

from .discretize import discretize
from .emit import CSource, emit
from .errors import MethodError
from .method import Tableau
from .model import Model
from .simplify import simplify


def generate(model: Model, method: Tableau, dt, substeps: int = 1, precision: str = "float",
             error_estimate: bool = False, **implicit_options) -> CSource:
    """Model + method + tick -> generated C files (not yet written to disk).

    implicit_options (newton_iterations, newton_tol, solver) apply to implicit methods only.
    """
    if not method.is_explicit:
        if error_estimate:
            raise MethodError(f"{method.id}: --error-estimate needs an explicit embedded pair such "
                              "as bs3 or dp5")
        return generate_implicit(model, method, dt, substeps, precision, **implicit_options)
    step = discretize(model, method, dt, substeps, error_estimate)  # Model -> StepProgram
    step = simplify(step)                                            # StepProgram -> StepProgram (CSE)
    return emit(step, precision)                                     # StepProgram -> CSource (C text)


def generate_implicit(model: Model, method, dt, substeps: int = 1, precision: str = "float",
                      **options) -> CSource:
    """The same pipeline for implicit, linearly implicit and exact methods."""
    from .emit_implicit import emit_implicit
    from .implicit import discretize_implicit, simplify_implicit

    step = discretize_implicit(model, method, dt, substeps, **options)  # Model -> ImplicitStep
    step = simplify_implicit(step)                                       # ImplicitStep -> ImplicitStep (CSE)
    return emit_implicit(step, precision)                                # ImplicitStep -> CSource (C text)
