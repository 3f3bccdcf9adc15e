"""The emitter of explicit Runge-Kutta steps: simplified StepProgram -> template context.

Stages are kept as arrays: one call of the rates function per stage, the stage sums and the
update as loops over the states.
"""

from __future__ import annotations

from ..discretize import StepProgram
from .common import (accept_check, advance_body, base_context, coefficient,
                     error_estimate_functions, error_estimate_lines, grouped, outputs_function,
                     per_h, rates_function, reset_function, set_time_function,
                     step_error_variable, ticks_function)
from .statements import Comment, Line, Sections, VectorLoop


def explicit_context(step: StepProgram, precision: str) -> dict:
    """Context for an explicit Runge-Kutta step with stages kept as arrays."""
    ctx = base_context(step, precision, "explicit Runge-Kutta")
    names, printer, model = ctx["names"], ctx["printer"], step.model
    up = names.upper
    constants: list = []
    nx = names.macro("NX")
    needs_y = any(stage.terms for stage in step.stages)
    decl = ([f"{names.real_t} tw_y[{nx}];"] if needs_y else []) + \
        [f"{names.real_t} tw_k[{len(step.stages)}][{nx}];"]
    slot = {stage.index: n for n, stage in enumerate(step.stages)}
    inner = Sections()

    def h_const(name: str, value, note: str) -> str:
        return per_h(coefficient(constants, f"{up}_{name}", value, printer, note), step)

    for n, stage in enumerate(step.stages):
        i = stage.index
        inner.add(Comment(f"stage {i + 1}: c = {stage.c}"))
        time = "tw_t" if stage.time_offset == 0 else \
            f"tw_t + {h_const(f'C{i + 1}H', stage.time_offset, f'c{i + 1}*h')}"
        if not stage.terms:
            inner.add(Line(f"{model.name}_rates({time}, tw_x, tw_ctx, tw_k[{n}]);"))
            continue
        terms = grouped(f"{h_const(f'A{i + 1}{j + 1}H', v, f'a{i + 1}{j + 1}*h')}"
                        f" * tw_k[{slot[j]}][tw_i]" for j, v in stage.terms)
        inner.add(VectorLoop(nx, (Line(f"tw_y[tw_i] = tw_x[tw_i] + {terms};"),)),
                  Line(f"{model.name}_rates({time}, tw_y, tw_ctx, tw_k[{n}]);"))
    estimate, estimate_decl, per_step = [], [], step_error_variable(step)
    if step.error_weights:
        estimate, estimate_decl = error_estimate_lines(step, names, printer, constants, slot,
                                                       per_step)
    terms = grouped(f"{h_const(f'B{j + 1}H', v, f'b{j + 1}*h')}"
                    f" * tw_k[{slot[j]}][tw_i]" for j, v in step.weights)
    inner.add(*estimate)
    if step.safeguards.accept_error is not None:
        accept_check(inner, step, names, printer, constants, per_step)
    inner.add(Comment("update"), VectorLoop(nx, (Line(f"tw_x[tw_i] = tw_x[tw_i] + {terms};"),)))
    step_name = None if step.safeguards.pieces else \
        coefficient(constants, f"{up}_STEP", step.h, printer, "h")
    doc = f"One tick: {step.substeps} step(s) of {step.method.name}, stages kept as arrays."
    signature = f"{names.status_t} {model.name}_advance({names.ctx_t} *tw_ctx)"
    largest = (per_step, "tw_err_max") if per_step and step.error_function and \
        step.safeguards.pieces else None
    if step.error_function:
        body = advance_body(step, names, printer, constants, decl + estimate_decl, inner,
                            step_name, on_success=("*tw_err = tw_err_max;",), estimate=largest)
        advance = error_estimate_functions(step, names, body, ctx)
    else:
        advance = [dict(doc=doc, signature=signature,
                        body=advance_body(step, names, printer, constants, decl + estimate_decl,
                                          inner, step_name))]
    ctx["constants"] = constants
    ctx["functions"] = [
        reset_function(step, names, printer),
        set_time_function(step, names),
        ticks_function(step, names, printer, constants),
        rates_function(step, names, printer),
        *advance,
    ]
    if model.outputs:
        ctx["functions"].append(outputs_function(step, names, printer))
    return ctx
