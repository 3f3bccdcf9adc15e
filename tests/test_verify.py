"""Compile-and-compare: the generated C against the reference and against outside solutions."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
import sympy as sp
from click.testing import CliRunner

from codegen.build import build
from codegen.cli import main
from codegen.methods import EXPLICIT, builtin, builtin_ids
from codegen.model import Parameter, State, define, load_model
from codegen.pipeline import generate
from codegen.resources import examples_dir
from codegen.run import run_c
from codegen.verify import ORDER_TOLERANCE, check
from codegen.verify import estimate as estimate_mod

from conftest import DEMO_MODELS

EXPLICIT_IDS = [i for i in builtin_ids() if builtin(i).kind == EXPLICIT]
# Ticks per demo model: fast enough to see the dynamics, stable for every explicit method.
DEMO_DT = {"heater": 0.5, "axis": 1e-4, "battery": 1.0}


@pytest.mark.parametrize("method_id", EXPLICIT_IDS)
@pytest.mark.parametrize("model_path", DEMO_MODELS, ids=lambda p: p.stem)
def test_check_passes_for_every_explicit_method(model_path, method_id):
    model = load_model(model_path)
    method = builtin(method_id)
    report = check(model, method, DEMO_DT[model.name], ticks=300)
    assert [c.precision for c in report.cross_checks] == ["float", "double"]
    for c in report.cross_checks:
        assert c.passed and c.completed == 300, c
        assert c.max_difference <= c.tolerance
    # The measured order matches the tableau's (within the project's acceptance bound).
    assert report.order.passed, report.order
    assert abs(report.order.measured - method.order) <= ORDER_TOLERANCE
    assert report.passed


# Burden & Faires, Numerical Analysis, 9th ed., chapter 5 (from memory; the table numbers differ by
# edition): y' = y - t^2 + 1, y(0) = 0.5, h = 0.2; reproduced here to 7 digits.
BURDEN_FAIRES = {
    "euler": {1: 0.8000000, 10: 4.8657845},
    "midpoint": {10: 5.2903695},
    "heun": {10: 5.2330546},
    "rk4": {1: 0.8292933, 2: 1.2140762, 10: 5.3053630},
}


def worked_example_model():
    y, t = sp.Symbol("y", real=True), sp.Symbol("t", real=True)
    return define("bf", states=[State("y", initial=0.5, rate=y - t ** 2 + 1)])


@pytest.mark.parametrize("method_id", sorted(BURDEN_FAIRES))
def test_generated_c_reproduces_the_burden_faires_worked_example(method_id):
    model = worked_example_model()
    built = build(generate(model, builtin(method_id), 0.2, precision="double"), model)
    run = run_c(built, model, np.zeros((10, 0)))
    assert run.completed == 10
    for k, w in BURDEN_FAIRES[method_id].items():
        assert run.xs[k, 0] == pytest.approx(w, abs=5e-8), (k, run.xs[k, 0])
    # The exact solution (t + 1)^2 - 0.5 e^t at the C's own tick times reaches y(2) = 5.3054720
    # (same source), and the C's global error there is the book's error of the method.
    exact = (run.ts + 1) ** 2 - 0.5 * np.exp(run.ts)
    assert run.ts[10] == pytest.approx(2.0, abs=1e-12)
    assert exact[10] == pytest.approx(5.3054720, abs=5e-8)
    book_error = abs(BURDEN_FAIRES[method_id][10] - 5.3054720)
    assert abs(run.xs[10, 0] - exact[10]) == pytest.approx(book_error, abs=1e-7)


def test_float_build_reproduces_the_worked_example_to_float_accuracy():
    model = worked_example_model()
    built = build(generate(model, builtin("rk4"), 0.2, precision="float"), model)
    run = run_c(built, model, np.zeros((10, 0)))
    # Burden & Faires RK4 w10 = 5.3053630 (from memory); float32 holds about 7 digits.
    assert run.xs[10, 0] == pytest.approx(5.3053630, rel=2e-6)


def decay_model():
    x, a = sp.Symbol("x", real=True), sp.Symbol("a", real=True)
    return define("decay", states=[State("x", initial=1.0, rate=-a * x)],
                  parameters=[Parameter("a", value=3.0)])


@pytest.mark.parametrize("method_id", EXPLICIT_IDS)
def test_linear_decay_matches_the_stability_polynomial(method_id):
    # Analytic: one step of any RK method on x' = lambda x multiplies x by R(h lambda), with
    # R(z) = 1 + z b^T (I - zA)^{-1} 1 (Dahlquist test; Hairer & Wanner, Solving ODEs II, 2nd ed.,
    # section IV.3, formula (3.3), from memory). Computed exactly here.
    method = builtin(method_id)
    model = decay_model()
    h, lam = 0.05, -3.0
    A = sp.Matrix(method.a)
    z = sp.Rational(h) * lam
    R = 1 + z * (sp.Matrix([method.b]) * (sp.eye(method.stages) - z * A).inv()
                 * sp.ones(method.stages, 1))[0]
    built = build(generate(model, method, h, precision="double"), model)
    run = run_c(built, model, np.zeros((20, 0)))
    expected = [float(R) ** k for k in range(21)]
    np.testing.assert_allclose(run.xs[:, 0], expected, rtol=1e-13)
    # And close to the analytic solution e^{lambda t} to the method's accuracy.
    assert abs(run.xs[-1, 0] - math.exp(lam * 1.0)) < 0.05


def test_nan_input_returns_nonfinite_and_leaves_the_state_unchanged(heater):
    built = build(generate(heater, builtin("rk4"), 0.1, precision="float"), heater)
    ffi, lib = built.ffi, built.lib
    ctx = ffi.new("heater_ctx_t *")
    lib.heater_reset(ctx)
    ctx.duty = 0.5
    assert lib.heater_advance(ctx) == lib.HEATER_OK
    before = (ctx.t, ctx.T, ctx.duty, ctx.C_th)
    ctx.duty = float("nan")
    assert lib.heater_advance(ctx) == lib.HEATER_NONFINITE
    assert math.isnan(ctx.duty)
    assert (ctx.t, ctx.T, ctx.C_th) == (before[0], before[1], before[3])


def test_overflow_returns_nonfinite_and_leaves_the_state_unchanged():
    x = sp.Symbol("x", real=True)
    model = define("blowup", states=[State("x", initial=1e30, rate=x * x)])
    built = build(generate(model, builtin("euler"), 1.0, precision="float"), model)
    ctx = built.ffi.new("blowup_ctx_t *")
    built.lib.blowup_reset(ctx)
    assert built.lib.blowup_advance(ctx) == built.lib.BLOWUP_NONFINITE
    assert ctx.x == pytest.approx(1e30, rel=1e-7) and ctx.t == 0.0


def test_cross_check_catches_a_wrong_coefficient(heater):
    # The check must be able to fail: a tableau off by 1e-3 in one weight still sums to 1 but
    # the C (built from it) no longer matches the reference of the true method.
    from dataclasses import replace

    good = builtin("rk4")
    bad = replace(good, b=(sp.Rational(1, 6) + sp.Rational(1, 1000), sp.Rational(1, 3) -
                           sp.Rational(1, 1000), sp.Rational(1, 3), sp.Rational(1, 6)))
    from codegen import reference
    from codegen.verify import excitation

    model = heater
    u = excitation(model, 100)
    c_run = run_c(build(generate(model, bad, 0.5, precision="double"), model), model, u)
    ref = reference.run(model, good, 0.5, 1, u)
    assert np.max(np.abs(c_run.xs - ref.xs)) > 1e-6
    # ...and the order study of the wrong method measures order 1 or 2, not 4.
    from codegen.verify import measure_order

    study = measure_order(model, bad, expected=4)
    assert not study.passed and study.measured < 3


def test_time_dependent_model_uses_stage_times():
    # x' = cos(t): the exact solution is sin(t) (analytic); RK4 integrates it with error O(h^4).
    t = sp.Symbol("t", real=True)
    model = define("clock", states=[State("x", initial=0.0, rate=sp.cos(t))])
    built = build(generate(model, builtin("rk4"), 0.01, precision="double"), model)
    run = run_c(built, model, np.zeros((300, 0)))
    np.testing.assert_allclose(run.xs[:, 0], np.sin(run.ts), atol=1e-10)


# ---------------------------------------------------------------------------------------------
# Run-time error estimate in the generated C
# ---------------------------------------------------------------------------------------------

def test_default_output_has_no_error_estimate_and_is_unchanged_by_the_option_off():
    model = load_model(examples_dir() / "axis.toml")
    plain = generate(model, builtin("dp5"), 1e-3, 1, "float")
    off = generate(model, builtin("dp5"), 1e-3, 1, "float", error_estimate=False)
    on = generate(model, builtin("dp5"), 1e-3, 1, "float", error_estimate=True)
    assert plain.files == off.files
    assert "advance_with_error" not in "".join(t for _, t in plain.files)
    assert "axis_advance_with_error(axis_ctx_t *tw_ctx, axis_real_t *tw_err);" in on.text("axis.h")
    assert "fabsf(" in on.text("axis.c") and "fabs(" not in on.text("axis.c").replace("fabsf(", "")


@pytest.mark.parametrize("method_id", ["bs3", "dp5", "ros2"])
@pytest.mark.parametrize("precision", ["float", "double"])
def test_c_error_estimate_equals_the_reference_embedded_difference(method_id, precision):
    model = load_model(examples_dir() / "axis.toml")
    result = estimate_mod.check_error_estimate(model, builtin(method_id), 2e-4, 2, precision, 60)
    assert result.passed, result
    assert result.largest_estimate > 0


@pytest.mark.parametrize("method_id, embedded, steps", [
    ("bs3", 2, (4e-5, 2e-5, 1e-5)), ("dp5", 4, (4e-5, 2e-5, 1e-5)),
    # ROS2 is linearly implicit: the asymptotic rate shows once h lambda is small for the axis's
    # electrical pole (-3000/s), here below 0.01.
    ("ros2", 1, (2.5e-6, 1.25e-6, 6.25e-7))])
def test_c_error_estimate_scales_like_h_to_the_embedded_order_plus_one(method_id, embedded,
                                                                       steps):
    # The embedded solution has order p_hat, so its local error is C h^(p_hat + 1) (HNW I II.4
    # [mem]); halving h divides the estimate by about 2^(p_hat + 1). Embedded orders: Bogacki &
    # Shampine 1989, Dormand & Prince 1980 [mem]; ROS2's y + h k1 is first order (Verwer, Spee,
    # Blom & Hundsdorfer 1999 [mem]).
    model = load_model(examples_dir() / "axis.toml")
    method = builtin(method_id)
    x0 = (3.0, 120.0, 0.1)
    estimates = []
    for h in steps:
        built = build(generate(model, method, h, 1, "double", error_estimate=True), model)
        ffi, lib = built.ffi, built.lib
        ctx = ffi.new("axis_ctx_t *")
        lib.axis_reset(ctx)
        ctx.i, ctx.w, ctx.x, ctx.V = *x0, 6.0
        err = ffi.new("axis_real_t *")
        assert lib.axis_advance_with_error(ctx, err) == lib.AXIS_OK
        _, expected = estimate_mod.embedded_estimate(model, method, 0.0, np.array(x0), np.array([6.0]), h)
        assert math.isclose(err[0], expected, rel_tol=1e-6)
        estimates.append(err[0])
    slopes = np.log2(np.array(estimates[:-1]) / np.array(estimates[1:]))
    assert np.all(np.abs(slopes - (embedded + 1)) < 0.2), slopes


def test_error_estimate_needs_an_embedded_pair():
    runner = CliRunner()
    model = str(examples_dir() / "heater.toml")
    result = runner.invoke(main, ["emit", model, "--method", "rk4", "--dt", "0.1",
                                  "--out", "unused", "--error-estimate"])
    assert result.exit_code == 1
    assert "b_hat" in result.output and result.output.strip().count("\n") == 0


# A Rosenbrock method built for the tests in the form of a method file (see test_analysis.py,
# ORDER3_ROSENBROCK): order 3, with stage times (0, 1/2, 1) that differ from the row sums of its
# alpha (0, 1/2, -1).
ORDER3_ROSENBROCK_TOML = """kind = "rosenbrock"
name = "3 stages, order 3 (test)"
order = 3
gamma = "1/2"
alpha = [[0, 0, 0], ["1/2", 0, 0], [-2, 1, 0]]
coupling = [[0, 0, 0], [2, 0, 0], ["164/35", "-82/35", 0]]
b = ["-103/108", "43/54", "35/108"]
"""


def test_a_rosenbrock_method_file_checks_at_its_order_on_a_time_dependent_model(tmp_path):
    # x' = -x + x^2/4 + cos(2t) uses time, so the C needs the derived stage times and time
    # weights to reach order 3 (with the row sums of alpha as stage times it is order 1).
    from codegen.methods import load_method_file

    path = tmp_path / "ros3.toml"
    path.write_text(ORDER3_ROSENBROCK_TOML, encoding="utf-8")
    x, t = sp.Symbol("x", real=True), sp.Symbol("t", real=True)
    model = define("td", [State("x", initial=1.0, rate=-x + x ** 2 / 4 + sp.cos(2 * t))])
    report = check(model, load_method_file(path), 0.05, precisions=("double",), ticks=50)
    assert report.passed, report
    assert abs(report.order.measured - 3) <= ORDER_TOLERANCE


def test_the_order_study_measures_a_stiff_model_at_rest_from_the_centre_of_its_ranges():
    # The kiln (tests/data) starts at rest: over two filter time constants from its initial point
    # the states barely move, every error is at the rounding floor and fewer than three levels
    # fitted (the study failed). From the centre of the declared state ranges every mode moves,
    # and implicit midpoint shows its published order 2 (Hairer & Wanner, Solving ODEs II,
    # section IV.5, from memory).
    from codegen.verify import measure_order

    kiln = load_model(Path(__file__).resolve().parent / "data" / "kiln.toml")
    study = measure_order(kiln, builtin("implicit-midpoint"))
    assert study.passed and abs(study.measured - 2) <= ORDER_TOLERANCE, study


def test_the_order_study_lengthens_the_horizon_until_the_levels_settle():
    # Radau IIA with three stages on the kiln: over the first horizon the filter's transient
    # decays faster than order 5 (local orders about 11, 6.4, 5.0, 4.9) and the levels reach the
    # rounding floor before three of them settle; a fit of the first three gave 8.96. Over a
    # horizon 8^k times longer the slow modes' error dominates and the study measures the
    # published order 5 (Hairer & Wanner, Solving ODEs II, section IV.5, Table 5.6).
    from codegen.verify import measure_order
    from codegen.verify.order import ORDER_HORIZON_STRETCH, order_horizon

    kiln = load_model(Path(__file__).resolve().parent / "data" / "kiln.toml")
    study = measure_order(kiln, builtin("radau-iia3"))
    assert study.passed and abs(study.measured - 5) <= ORDER_TOLERANCE, study
    centre = [0.5 * (s.range[0] + s.range[1]) for s in kiln.states]
    first = order_horizon(kiln, np.array([0.75]), centre)
    assert study.horizon > 2 * ORDER_HORIZON_STRETCH * first, (study.horizon, first)
