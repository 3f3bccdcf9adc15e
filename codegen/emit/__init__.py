"""Stage 5 of the pipeline: the simplified step -> C text (header and source) in one precision.

- ``printer``: sympy expressions and exact values -> C99 text in float or double;
- ``common``: the generated files (``CSource``), names, and what every step kind shares;
- ``statements``: function bodies as trees of C statements, laid out by templates/macros.j2;
- ``explicit`` and ``implicit``: the context of each step kind for the templates in templates/.
"""

from __future__ import annotations

from ..discretize import ImplicitStep, StepProgram
from ..errors import EmitError
from .common import (GENERATED_MARKER, MISRA_DEVIATIONS, STATUS_CODES, CSource, FileDifference,
                     comment_text, error_scale, file_note, finish, render, render_body)
from .explicit import explicit_context
from .implicit import implicit_context
from .printer import DOUBLE, FLOAT, PRECISIONS, Printer

__all__ = ["DOUBLE", "FLOAT", "GENERATED_MARKER", "MISRA_DEVIATIONS", "PRECISIONS",
           "STATUS_CODES", "CSource", "FileDifference", "Printer", "comment_text", "emit",
           "error_scale", "file_note", "render", "render_body"]


def emit(step: StepProgram | ImplicitStep, precision: str = FLOAT) -> CSource:
    """Render the header and source of a simplified step of any kind."""
    if precision not in PRECISIONS:
        raise EmitError(f"--precision: must be one of {', '.join(PRECISIONS)}, got {precision!r}")
    if isinstance(step, ImplicitStep):
        return finish(step, precision, implicit_context(step, precision))
    return finish(step, precision, explicit_context(step, precision))
