"""Operation counts: the count on the IR (advice/cost.py) against the operators of the generated C
(verify/opcount.py), for every built-in method on the examples.

Outside references: the operation counts of LU factorization and triangular solves (G. H. Golub and
C. F. Van Loan, Matrix Computations, 3rd ed., Johns Hopkins, 1996, sections 3.1-3.2, from memory)
and hand counts of small C sources written here.
"""

from __future__ import annotations

import pytest
import sympy as sp

from codegen.advice.cost import (OperationCount, count_block, count_expr, factor_cost, solve_cost,
                                 step_cost)
from codegen.discretize import DENSE_LU, discretize
from codegen.emit import CSource, emit
from codegen.errors import CheckError, ModelError
from codegen.methods import builtin, builtin_ids
from codegen.model import Input, Parameter, State, define, load_model
from codegen.simplify import simplify
from codegen.verify.opcount import count_c

from conftest import DEMO_MODELS, EXAMPLES

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


# One method of every kind with each safeguard and Newton option; the count is that of the
# nominal tick (no retry, no clamp, every estimate accepted, no refresh asked for by the monitor).
OPTION_CASES = [
    ("rk4", dict(retry_depth=3)), ("euler", dict(clamp_states=True)),
    ("bs3", dict(accept_error=1e-3)), ("dp5", dict(accept_error=1e-4, retry_depth=2)),
    ("bs3", dict(error_estimate=True, retry_depth=1)),
    ("sdirk2", dict(retry_depth=2)), ("sdirk3", dict(full_newton=True)),
    ("backward-euler", dict(clamp_states=True, newton_refreshes=0)),
    ("sdirk2", dict(full_newton=True, retry_depth=1, solver="dense-lu")),
    ("radau-iia3", dict(retry_depth=3)), ("gauss2", dict(full_newton=True)),
    ("radau-iia2", dict(clamp_states=True, retry_depth=1, full_newton=True)),
    ("lobatto-iiic2", dict(newton_refreshes=0)),
    ("ros2", dict(accept_error=5e-2)), ("ros2", dict(retry_depth=4, clamp_states=True)),
    ("ros2", dict(error_estimate=True, accept_error=1e-2, retry_depth=2)),
]


@pytest.mark.parametrize("precision", ["float", "double"])
@pytest.mark.parametrize("method_id, options", OPTION_CASES,
                         ids=[f"{m}-{'-'.join(o)}" for m, o in OPTION_CASES])
@pytest.mark.parametrize("model_path", DEMO_MODELS, ids=lambda p: p.stem)
def test_counts_agree_with_every_safeguard_and_newton_option(model_path, method_id, options,
                                                             precision):
    model = load_model(model_path)
    step = simplify(discretize(model, builtin(method_id), EXAMPLE_DT[model.name], 2, **options))
    csource = emit(step, precision)
    for iterations in (1, 2, 5):
        counted = step_cost(step, iterations)
        assert counted == count_c(csource, iterations), (iterations, counted)


def test_the_exact_step_with_clamped_states_counts_the_same(tmp_path):
    battery = load_model(EXAMPLES / "battery.toml")
    plain = simplify(discretize(battery, builtin("zoh-exact"), 1.0, 2))
    clamped = simplify(discretize(battery, builtin("zoh-exact"), 1.0, 2, clamp_states=True))
    # Saturating a state compares and assigns: no floating operation on either path.
    assert step_cost(clamped) == count_c(emit(clamped, "float")) == step_cost(plain)


def test_retries_scale_every_h_product_by_the_piece(axis):
    # RK4 on the axis with retries: every coefficient proportional to h is multiplied by the
    # piece's scale where it is used: 3 stage coefficients and 4 weights for each of the 3
    # states, and 3 stage times: 24 products more per substep (hand count of the C below); the
    # time of a piece, t0 + (position * shortest piece), costs what t0 + (steps * h) did.
    plain = simplify(discretize(axis, builtin("rk4"), 2e-4, 2))
    pieces = simplify(discretize(axis, builtin("rk4"), 2e-4, 2, retry_depth=3))
    text = emit(pieces, "float").text("axis.c")
    assert text.count(" * tw_hs)") == 3 + 3 + 4  # stage sums, stage times, weights
    extra = OperationCount(mul=2 * 24)
    assert count_c(emit(pieces, "float")) == count_c(emit(plain, "float")) + extra
    assert step_cost(pieces) == step_cost(plain) + extra


@pytest.mark.parametrize("iterations", [1, 2, 3, 6])
def test_the_newton_monitor_and_full_newton_cost_what_the_c_says(axis, iterations):
    # Backward Euler on the axis, 2 substeps of one Newton solve each. The monitor compares each
    # correction with REFRESH_AT times the one before from the second iteration on, but not on
    # the iteration that converges: max(n - 2, 0) products per solve. Full Newton evaluates J at
    # the iterate (its stage time t + c h one addition) and refactors after every iteration but
    # the last: n - 1 times per solve.
    def built(**options):
        step = simplify(discretize(axis, builtin("backward-euler"), 1e-3, 2, **options))
        return step, count_c(emit(step, "double"), iterations)

    frozen_step, frozen = built(newton_refreshes=0)
    _, monitored = built()
    full_step, full = built(full_newton=True)
    n = iterations
    assert monitored == frozen + OperationCount(mul=2 * max(n - 2, 0))
    jacobian = count_block(full_step.jacobian.block)
    refresh = jacobian + OperationCount(add=1) + factor_cost(full_step.solve)
    assert full == frozen + refresh.scaled(2 * (n - 1))
    assert step_cost(full_step, n) == full and step_cost(frozen_step, n) == frozen


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
    # 3 stage times, update 3 x (4 mul, 4 add), the substep's time t0 + (1 * h) (1 mul, 1 add);
    # the tick's start time and its new time, each origin + (ticks * DT) with the counter
    # converted as (high * 2^32) + low (2 mul, 2 add each).
    step = simplify(discretize(axis, builtin("rk4"), 2e-4))
    expected = OperationCount(add=4 * 4 + 9 + 3 + 12 + 1 + 2 * 2, mul=4 * 8 + 9 + 12 + 1 + 2 * 2,
                              div=4, call=4)
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
    # Newton loop: a division and a product per iteration (its test compares floating values:
    # undecided, so false, the nominal path). The last loop runs tw_n times (0, then 1): one
    # addition, one expf. After the loop: one addition.
    n = iterations
    expected = OperationCount(add=2 * (2 + 2) + 1 + 1, mul=2 * (1 + 2 + n), div=2 * (1 + n),
                              sqrt=2, call=1)
    assert count_c(toy(), n) == expected


NOMINAL_SOURCE = """#include "toy.h"
#define TOY_NEWTON_ITERATIONS 20U
#define TOY_NEWTON_TOL (1e-06F)
static toy_real_t toy_ticks(const uint64_t tw_n)
{
    const uint32_t tw_high = (uint32_t)(tw_n >> 32U);
    const uint32_t tw_low = (uint32_t)(tw_n & 0xFFFFFFFFU);
    return ((toy_real_t)tw_high * 4.2949673e+09F) + (toy_real_t)tw_low;
}
toy_status_t toy_advance(toy_ctx_t *tw_ctx)
{
    toy_real_t tw_x = tw_ctx->a;
    toy_real_t tw_err;
    toy_real_t tw_prev;
    toy_status_t tw_status = TOY_OK;
    uint32_t tw_pos = 0U;
    uint32_t tw_try;
    uint32_t tw_it;
    uint32_t tw_done;

    for (tw_try = 0U; (tw_try < 7U) && (tw_pos < 2U) && (tw_status == TOY_OK); ++tw_try) {
        tw_done = 0U;
        tw_prev = 0.0F;
        for (tw_it = 0U; (tw_it < TOY_NEWTON_ITERATIONS) && (tw_done == 0U); ++tw_it) {
            tw_err = fabsf(tw_x - tw_ctx->b);
            tw_x = tw_x * 0.5F;
            if (tw_err <= TOY_NEWTON_TOL) {
                tw_done = 1U;
            } else if ((tw_prev > 0.0F) && (tw_err > (0.25F * tw_prev))) {
                tw_x = expf(tw_x);
            } else {
                tw_prev = tw_err;
            }
        }
        if (tw_done != 1U) {
            tw_status = TOY_BAD;
        }
        if (tw_status == TOY_OK) {
            tw_pos = tw_pos + 1U;
        }
    }
    if (tw_status == TOY_OK) {
        tw_ctx->a = tw_x;
        tw_ctx->t = toy_ticks(5U) * 2.0F;
    }
    return tw_status;
}
"""


@pytest.mark.parametrize("iterations", [1, 2, 3, 7])
def test_the_c_counter_follows_the_nominal_path(iterations):
    # Two attempts (the position advances once per attempt that ends OK, the status stays OK),
    # each a Newton loop that converges on its n-th iteration: per iteration one subtraction
    # and one product; the second test reads tw_prev, 0 on the first iteration (no product),
    # then the last correction: one product more on iterations 2 .. n-1, and the contraction
    # test is undecided, so false (no expf). After: the counter's conversion (one product, one
    # addition) and the product with 2.
    n = iterations
    expected = OperationCount(add=2 * n + 1, mul=2 * (n + max(n - 2, 0)) + 2)
    assert count_c(toy(NOMINAL_SOURCE), n) == expected
    # The tolerance read anywhere but in the test of a Newton loop is refused.
    outside = NOMINAL_SOURCE.replace("tw_status == TOY_OK) {\n        tw_ctx->a",
                                     "tw_x <= TOY_NEWTON_TOL) {\n        tw_ctx->a")
    assert outside != NOMINAL_SOURCE
    with pytest.raises(CheckError) as info:
        count_c(toy(outside), n)
    assert "Newton tolerance" in str(info.value) and "\n" not in str(info.value)


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
