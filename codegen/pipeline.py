"""The driver: the pipeline read top to bottom, one stage per line."""

from __future__ import annotations

from .discretize import discretize
from .emit import CSource, emit
from .method import Tableau
from .model import Model
from .simplify import simplify


def generate(model: Model, method: Tableau, dt, substeps: int = 1, precision: str = "float",
             error_estimate: bool = False) -> CSource:
    """Model + method + tick -> generated C files (not yet written to disk)."""
    step = discretize(model, method, dt, substeps, error_estimate)  # Model -> StepProgram
    step = simplify(step)                                            # StepProgram -> StepProgram (CSE)
    return emit(step, precision)                                     # StepProgram -> CSource (C text)
