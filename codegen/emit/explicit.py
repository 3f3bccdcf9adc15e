"""The emitter of explicit Runge-Kutta steps: simplified StepProgram -> template context.

Stages are kept as arrays: one call of the rates function per stage, the stage sums and the
update as loops over the states.
"""

from __future__ import annotations

import sympy as sp

from ..discretize import StepProgram
from .common import (Names, advance_body, base_context, coefficient, error_scale, grouped,
                     outputs_function, rates_function, reset_function, sum_of_products)
from .printer import Printer
from .statements import Comment, If, Line, Sections, VectorLoop

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
    for n, stage in enumerate(step.stages):
        i = stage.index
        inner.add(Comment(f"stage {i + 1}: c = {stage.c}"))
        time = "tw_t" if stage.time_offset == 0 else \
            f"tw_t + {coefficient(constants, f'{up}_C{i + 1}H', stage.time_offset, printer, f'c{i + 1}*h')}"
        if not stage.terms:
            inner.add(Line(f"{model.name}_rates({time}, tw_x, tw_ctx, tw_k[{n}]);"))
            continue
        terms = grouped(
            f"{coefficient(constants, f'{up}_A{i + 1}{j + 1}H', v, printer, f'a{i + 1}{j + 1}*h')}"
            f" * tw_k[{slot[j]}][tw_i]" for j, v in stage.terms)
        inner.add(VectorLoop(nx, (Line(f"tw_y[tw_i] = tw_x[tw_i] + {terms};"),)),
                  Line(f"{model.name}_rates({time}, tw_y, tw_ctx, tw_k[{n}]);"))
    estimate, estimate_decl = [], []
    if step.error_weights:
        estimate, estimate_decl = error_estimate_lines(step, names, printer, constants, slot)
    terms = grouped(
        f"{coefficient(constants, f'{up}_B{j + 1}H', v, printer, f'b{j + 1}*h')}"
        f" * tw_k[{slot[j]}][tw_i]" for j, v in step.weights)
    inner.add(*estimate, Comment("update"),
              VectorLoop(nx, (Line(f"tw_x[tw_i] = tw_x[tw_i] + {terms};"),)))
    step_name = coefficient(constants, f"{up}_STEP", step.h, printer, "h")
    doc = f"One tick: {step.substeps} step(s) of {step.method.name}, stages kept as arrays."
    signature = f"{names.status_t} {model.name}_advance({names.ctx_t} *tw_ctx)"
    if step.error_weights:
        body = advance_body(step, names, decl + estimate_decl, inner, step_name,
                            on_success=("*tw_err = tw_err_max;",))
        advance = error_estimate_functions(step, names, body, ctx)
    else:
        advance = [dict(doc=doc, signature=signature,
                        body=advance_body(step, names, decl, inner, step_name))]
    ctx["constants"] = constants
    ctx["functions"] = [
        reset_function(step, names, printer),
        rates_function(step, names, printer),
        *advance,
    ]
    if model.outputs:
        ctx["functions"].append(outputs_function(step, names, printer))
    return ctx


def error_estimate_lines(step: StepProgram, names: Names, printer: Printer, constants: list,
                         slot: dict) -> tuple[list, list[str]]:
    """Statements of one substep that update the embedded error estimate, and their declarations.

    The estimate of one step is e_i = h sum_j (b_j - b_hat_j) k_j[i], the difference between the
    solution and its embedded lower-order companion (HNW I, section II.4, from memory); err is
    the largest |e_i| / S_i over the states and the substeps of the tick, with S_i the state's
    full scale (max |range bound|, or 1 in the state's unit without a range).
    """
    model, up, nx = step.model, names.upper, names.macro("NX")
    weights = [coefficient(constants, f"{up}_ERR_W{i + 1}", 1 / error_scale(s), printer,
                           f"1/full scale of {s.name}") for i, s in enumerate(model.states)]
    terms = sum_of_products(
        f"{coefficient(constants, f'{up}_E{j + 1}H', v, printer, f'(b{j + 1} - b_hat{j + 1})*h')}"
        f" * tw_k[{slot[j]}][tw_i]" for j, v in step.error_weights)
    fabs = printer.expr(sp.Abs(sp.Symbol("tw_e"))).replace("(tw_e)", "")
    estimate = [Comment("embedded error estimate, as a fraction of each state's full scale"),
                VectorLoop(nx, (
                    Line(f"const {names.real_t} tw_e = {fabs}({terms}) * tw_err_weight[tw_i];"),
                    If((("tw_e > tw_err_max", (Line("tw_err_max = tw_e;"),)),))))]
    decl = [f"const {names.real_t} tw_err_weight[{nx}] = {{{', '.join(weights)}}};",
            f"{names.real_t} tw_err_max = {printer.literal(0)};"]
    return estimate, decl


def error_estimate_functions(step: StepProgram, names: Names, body: list,
                             ctx: dict) -> list[dict]:
    """The step with its error estimate as a static function, and the two public entries."""
    model = step.model
    signature = (f"{names.status_t} {model.name}_advance_with_error({names.ctx_t} *tw_ctx, "
                 f"{names.real_t} *tw_err)")
    ctx["prototypes"].append(dict(
        doc=f"As {model.name}_advance, and on {names.status('OK')} also set *tw_err to the local "
            "error estimate of the tick: max over states and substeps of |h sum_j (b_j - b_hat_j) "
            "k_j| divided by the state's full scale (max |range bound|, or 1 without a range). "
            "It scales like h^(embedded order + 1).",
        signature=signature))
    tick = f"{model.name}_tick"
    return [
        dict(doc=f"One tick: {step.substeps} step(s) of {step.method.name} with the embedded "
                 "error estimate.",
             signature=f"static {names.status_t} {tick}({names.ctx_t} *tw_ctx, "
                       f"{names.real_t} *tw_err)",
             body=body),
        dict(doc="See the header.", signature=signature,
             body=[Line(f"return {tick}(tw_ctx, tw_err);")]),
        dict(doc="See the header; the error estimate is computed and dropped.",
             signature=f"{names.status_t} {model.name}_advance({names.ctx_t} *tw_ctx)",
             body=[Line(f"{names.real_t} tw_err;"), Line(f"return {tick}(tw_ctx, &tw_err);")]),
    ]
