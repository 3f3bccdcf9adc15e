"""Operation counts: the count on the IR (advice/cost.py) against the operators of the generated C
(verify/opcount.py), for every built-in method on the examples.

Outside references: the operation counts of LU factorization and triangular solves (G. H. Golub and
C. F. Van Loan, Matrix Computations, 3rd ed., Johns Hopkins, 1996, sections 3.1-3.2, from memory)
and hand counts of small C sources written here.
"""

from __future__ import annotations

import pytest
import sympy as sp

from codegen.advice.cost import OperationCount, count_expr, factor_cost, solve_cost, step_cost
from codegen.discretize import DENSE_LU, discretize
from codegen.emit import CSource, emit
from codegen.errors import CheckError, ModelError
from codegen.methods import builtin, builtin_ids
from codegen.model import Input, Parameter, State, define, load_model
from codegen.simplify import simplify
from codegen.verify.opcount import count_c

from conftest import DEMO_MODELS

# Ticks per example: short enough for every explicit method to be stable (as in test_verify.py).
EXAMPLE_DT = {"heater": 0.5, "axis": 1e-4, "battery": 1.0}
# Method and model pairs the generator refuses on purpose: the exact hold needs a linear model
# without tunable parameters in its matrices.
REFUSED = {("axis", "zoh-exact"), ("heater", "zoh-exact")}


@pytest.mark.parametrize("precision", ["float", "double"])
@pytest.mark.parametrize("method_id", builtin_ids())
@pytest.mark.parametrize("model_path", DEMO_MODELS, ids=lambda p: p.stem)
def test_ir_count_equals_the_count_of_the_generated_c(model_path, method_id, precision):
    model = load_model(model_path)
    if (model.name, method_id) in REFUSED:
        with pytest.raises(ModelError):
            discretize(model, builtin(method_id), EXAMPLE_DT[model.name], 2)
        return
    # Two substeps, so the substep loop and the time update are counted too.
    step = simplify(discretize(model, builtin(method_id), EXAMPLE_DT[model.name], 2))
    csource = emit(step, precision)
    for iterations in (1, 4):  # the Newton iteration number is an assumption: both must follow it
        counted = step_cost(step, iterations)
        assert counted == count_c(csource, iterations), (iterations, counted)
        assert counted.total > 0


@pytest.mark.parametrize("solver", ["elimination", "dense-lu"])
@pytest.mark.parametrize("method_id", ["backward-euler", "sdirk3", "gauss2", "radau-iia3", "ros2"])
def test_counts_agree_for_both_run_time_linear_solves(axis, method_id, solver):
    step = simplify(discretize(axis, builtin(method_id), 1e-4, 1, solver=solver))
    assert step_cost(step, 2) == count_c(emit(step, "double"), 2)


@pytest.mark.parametrize("method_id", ["bs3", "dp5"])
def test_counts_agree_with_the_run_time_error_estimate(axis, method_id):
    step = simplify(discretize(axis, builtin(method_id), 1e-4, 3, error_estimate=True))
    plain = simplify(discretize(axis, builtin(method_id), 1e-4, 3))
    counted = step_cost(step)
    assert counted == count_c(emit(step, "float"))
    assert counted.mul > step_cost(plain).mul  # the estimate costs products of its own


def test_counts_agree_on_every_kind_of_expression_the_printer_writes():
    h, u, t, k = sp.symbols("h u t k", real=True)
    rate = (u - sp.sqrt(h) + 1 / sp.sqrt(h + 2) + h ** 3 - 2 / h ** 2 + h ** sp.Rational(5, 2)
            + sp.Piecewise((h, h > 1), (-h * u, True)) + sp.exp(-h) - u * sp.sign(h)
            + sp.Max(h, u, 1) + sp.cos(t) * sp.atan2(h, u) - k * h * u + sp.Abs(u) * h ** 7)
    model = define("mix", [State("h", initial=1.0, rate=rate)], inputs=[Input("u", default=0.5)],
                   parameters=[Parameter("k", value=3.0, tunable=True)])
    for method_id in ("rk4", "radau-iia2", "ros2", "sdirk2"):
        step = simplify(discretize(model, builtin(method_id), 0.1, 1))
        assert step_cost(step) == count_c(emit(step, "float")), method_id


def test_constant_coefficients_are_multiplications_not_divisions():
    # (V - R i - Ke w)/L with the parameters baked: the printer writes three products with
    # literals, (1666.66663F)*V - 3000.0F*i - ..., no division; a division by a symbol stays one.
    v, i, w, j = sp.symbols("V i w J", real=True)
    baked = (v - sp.Rational(9, 5) * i - sp.Rational(7, 200) * w) / sp.Rational(3, 5000)
    assert count_expr(baked) == OperationCount(add=2, mul=3)
    assert count_expr(i / j) == OperationCount(div=1)
    assert count_expr(i / 3) == OperationCount(mul=1)
    assert count_expr(-i * w) == OperationCount(add=1, mul=1)  # -i*w: a negation stays
    assert count_expr(-3 * i * w) == OperationCount(mul=2)  # -3.0F*i*w: the sign is the literal's
    assert count_expr(i * j - w) == OperationCount(add=1, mul=1)  # (J*i) - w: a subtraction
    # The printer orders w - J*i as -(J*i) + w: a negation and an addition, counted as written.
    assert count_expr(w - i * j) == OperationCount(add=2, mul=1)
    assert count_expr(i ** 3) == OperationCount(mul=2)
    assert count_expr(1 / i ** 2) == OperationCount(mul=1, div=1)
    assert count_expr(i ** 5) == OperationCount(call=1)  # beyond MAX_EXPANDED_POWER: powf
    assert count_expr(sp.tanh(2 * w) ** 2) == OperationCount(mul=3, call=2)  # base printed twice


def test_the_demo_tick_performs_four_divisions(axis):
    # RK4 on the axis: 4 rate evaluations, each with one division by the tunable J and one tanh;
    # per evaluation 8 products (3 + 4 + 1) and 4 additions; stage sums 3 x 3 x (1 mul, 1 add),
    # 3 stage times, update 3 x (4 mul, 4 add), the time update (1 mul, 1 add), the new time
    # (1 add).
    step = simplify(discretize(axis, builtin("rk4"), 2e-4))
    expected = OperationCount(add=4 * 4 + 9 + 3 + 12 + 2, mul=4 * 8 + 9 + 12 + 1, div=4, call=4)
    assert step_cost(step) == expected
    assert count_c(emit(step, "float")) == expected


@pytest.mark.parametrize("n", [2, 3, 5])
def test_dense_lu_counts_match_the_textbook(n):
    # Golub & Van Loan 3.2 (from memory): LU without the pivot search takes n(n-1)/2 divisions and
    # sum_{k=1}^{n-1} k^2 = (n-1)n(2n-1)/6 multiply-subtract pairs (2n^3/3 flops to leading
    # order); forward and back substitution (3.1) take n(n-1)/2 pairs each, plus n divisions.
    x = sp.symbols(f"x0:{n}", real=True)
    states = [State(f"x{i}", initial=1.0, rate=sum(x) * x[i] + 1) for i in range(n)]
    step = discretize(define("dense", states), builtin("backward-euler"), 0.1, solver="dense-lu")
    assert step.solve.kind == DENSE_LU and len(step.solve.entries) == n * n
    pairs = (n - 1) * n * (2 * n - 1) // 6
    # Assembly of I - g J: n*n products g*J_ij, one '1 -' or negation each.
    assembly = OperationCount(mul=n * n, add=n * n)
    assert factor_cost(step.solve) == assembly + OperationCount(div=n * (n - 1) // 2, mul=pairs,
                                                                add=pairs)
    assert solve_cost(step.solve) == OperationCount(mul=n * (n - 1), add=n * (n - 1), div=n)


TOY_HEADER = """#define TOY_NX 2U
#define TOY_SUBSTEPS 2U
typedef float toy_real_t;
typedef enum { TOY_OK = 0, TOY_BAD = 1 } toy_status_t;
typedef struct { toy_real_t t; toy_real_t a; toy_real_t b; } toy_ctx_t;
toy_status_t toy_advance(toy_ctx_t *tw_ctx);
"""
TOY_SOURCE = """#include "toy.h"
#define TOY_K (0.5F)
#define TOY_NEWTON_ITERATIONS 20U
static void toy_f(const toy_real_t *restrict tw_x, toy_real_t *restrict tw_dx)
{
    tw_dx[0] = -tw_x[1] * (2.0F * TOY_K);
    tw_dx[1] = (sqrtf(tw_x[0]) / tw_x[1]) - -3.0F;
}
toy_status_t toy_advance(toy_ctx_t *tw_ctx)
{
    toy_real_t tw_x[TOY_NX];
    toy_real_t tw_dx[TOY_NX];
    toy_status_t tw_status = TOY_OK;
    size_t tw_i;
    uint32_t tw_n;
    uint32_t tw_it;
    uint32_t tw_done;

    tw_x[0] = tw_ctx->a;
    tw_x[1] = tw_ctx->b;
    for (tw_n = 0U; (tw_n < TOY_SUBSTEPS) && (tw_status == TOY_OK); ++tw_n) {
        toy_f(tw_x, tw_dx);
        for (tw_i = 0U; tw_i < TOY_NX; ++tw_i) {
            tw_x[tw_i] = tw_x[tw_i] + (TOY_K * tw_dx[tw_i]);
        }
        tw_done = 0U;
        for (tw_it = 0U; (tw_it < TOY_NEWTON_ITERATIONS) && (tw_done == 0U); ++tw_it) {
            tw_x[0] = tw_x[0] / tw_x[1];
            if (fabsf(tw_x[0]) < 1.0F) {
                tw_done = 1U;
            } else {
                tw_x[1] = tw_x[1] * tw_x[1];
            }
        }
        for (tw_i = 0U; tw_i < tw_n; ++tw_i) {
            tw_x[0] = tw_x[0] + expf(tw_x[1]);
        }
    }
    if (tw_status == TOY_OK) {
        tw_ctx->a = tw_x[0];
        tw_ctx->t = tw_ctx->t + 1.0F;
    }
    return tw_status;
}
"""


def toy(source: str = TOY_SOURCE) -> CSource:
    return CSource(prefix="toy", precision="float",
                   files=(("toy.h", TOY_HEADER), ("toy.c", source)), cdef="")


@pytest.mark.parametrize("iterations", [1, 3])
def test_the_c_counter_matches_a_hand_count(iterations):
    # Per substep (2): toy_f inlined: a negation, one product (2.0F * TOY_K is folded), sqrtf, a
    # division, a subtraction of a literal; the loop over 2 states: 2 products, 2 additions; the
    # Newton loop: a division and (the costlier branch) a product per iteration. The last loop
    # runs tw_n times (0, then 1): one addition, one expf. After the loop: one addition.
    n = iterations
    expected = OperationCount(add=2 * (2 + 2) + 1 + 1, mul=2 * (1 + 2 + n), div=2 * (1 + n),
                              sqrt=2, call=1)
    assert count_c(toy(), n) == expected


def test_the_c_counter_sees_a_planted_operation_and_refuses_what_it_cannot_read(axis):
    step = simplify(discretize(axis, builtin("rk4"), 2e-4))
    csource = emit(step, "float")
    text = csource.text("axis.c")
    planted = text.replace("tw_dx[2] = (0.000318000006F)*w;", "tw_dx[2] = (0.000318000006F)*w*w;")
    assert planted != text
    changed = CSource(prefix="axis", precision="float",
                      files=(("axis.h", csource.text("axis.h")), ("axis.c", planted)), cdef="")
    assert count_c(changed) == step_cost(step) + OperationCount(mul=4)  # once per stage
    with pytest.raises(CheckError) as info:
        count_c(toy(TOY_SOURCE.replace("expf(", "erff(")))
    assert "unknown function erff()" in str(info.value) and "\n" not in str(info.value)
    with pytest.raises(CheckError) as info:
        count_c(toy(TOY_SOURCE.replace("tw_i < tw_n; ++tw_i", "tw_i < tw_n; ++tw_n")))
    assert "no bound" in str(info.value)
