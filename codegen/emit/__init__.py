"""Stage 5 of the pipeline: the simplified step -> C text (header and source) in one precision.

- ``printer``: sympy expressions and exact values -> C99 text in float or double;
- ``common``: the generated files (``CSource``), names, and what every step kind shares;
- ``statements``: function bodies as trees of C statements, laid out by templates/macros.j2;
- ``explicit`` and ``implicit``: the context of each step kind for the templates in templates/.
"""

from __future__ import annotations

import sympy as sp

from ..discretize import ImplicitStep, StepProgram
from ..errors import EmitError, located
from .common import (GENERATED_MARKER, MISRA_DEVIATIONS, STATUS_CODES, CSource, FileDifference,
                     comment_text, error_scale, file_note, finish, render, render_body)
from .explicit import explicit_context
from .implicit import implicit_context
from .printer import DOUBLE, FLOAT, LARGEST, PRECISIONS, SMALLEST_NORMAL, Printer, rounded

__all__ = ["DOUBLE", "FLOAT", "GENERATED_MARKER", "MISRA_DEVIATIONS", "PRECISIONS",
           "STATUS_CODES", "CSource", "FileDifference", "Printer", "comment_text", "emit",
           "error_scale", "file_note", "render", "render_body"]


def emit(step: StepProgram | ImplicitStep, precision: str = FLOAT) -> CSource:
    """Render the header and source of a simplified step of any kind."""
    if precision not in PRECISIONS:
        raise EmitError(f"--precision: must be one of {', '.join(PRECISIONS)}, got {precision!r}")
    check_representable(step, precision)
    try:
        if isinstance(step, ImplicitStep):
            return finish(step, precision, implicit_context(step, precision))
        return finish(step, precision, explicit_context(step, precision))
    except EmitError as exc:
        message = str(exc)
        where = step.model.source
        raise EmitError(message if message.startswith(where) else f"{where}: {message}") from None


def _fits(value, precision: str) -> str:
    """'' when a non-zero value keeps its precision in the format, else what goes wrong."""
    if value == 0:
        return ""
    v = abs(rounded(value, precision))
    if not v <= LARGEST[precision]:
        return f"is beyond the range of {precision} (largest {LARGEST[precision]:.3g})"
    if v < SMALLEST_NORMAL[precision]:
        return (f"rounds to {'0' if v == 0 else 'a subnormal number'} in {precision} (smallest "
                f"normal {SMALLEST_NORMAL[precision]:.3g})")
    return ""


def check_representable(step: StepProgram | ImplicitStep, precision: str) -> None:
    """Refuse a tick, a model value or a constant that the precision cannot hold.

    A tick that rounds to zero or to a subnormal would freeze the time or lose every digit of
    h*k; a constant beyond the range would print as infinity. Each message names the option or
    the model item and the fix.
    """
    model = step.model
    fix = "use --precision double" if precision == FLOAT else "rescale the model"
    for what, value in (("--dt", step.dt), ("the substep h = --dt / --substeps", step.h)):
        problem = _fits(value, precision)
        if problem:
            tick = "a shorter tick" if "beyond" in problem else "a longer tick"
            also = ", or --precision double" if precision == FLOAT else ""
            raise EmitError(f"{what} = {float(value):.3g} s: {problem}; use {tick}{also}")
    values = [(f"states.{s.name}.initial", s.initial) for s in model.states] + \
        [(f"inputs.{u.name}.default", u.default) for u in model.inputs] + \
        [(f"parameters.{p.name}.value", p.value) for p in model.parameters]
    for item, value in values:
        problem = _fits(sp.Rational(repr(float(value))), precision)
        if problem and "beyond" in problem:
            raise EmitError(located(model.source, item, f"{value:g} {problem}; {fix}"))
    baked = model.baked
    exprs = [(f"states.{s.name}.rate", s.rate) for s in model.states] + \
        [(f"outputs.{o.name}", o.resolved) for o in model.outputs]
    for item, expr in exprs:
        numbers = (expr.xreplace(baked) if baked else expr).atoms(sp.Number)
        for number in sorted(numbers, key=abs, reverse=True)[:1]:
            problem = _fits(number, precision)
            if problem and "beyond" in problem:
                raise EmitError(located(model.source, item, f"the constant "
                                        f"{float(number):.6g} {problem}; {fix}"))
