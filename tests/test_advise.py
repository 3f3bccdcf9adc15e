"""Step-size advice (codegen.advice): envelope, stability limits over it, error and cost estimates.

Outside references: published stability limits (HNW = Hairer, Norsett & Wanner, Solving ODEs I,
2nd ed., 1993; HW = Hairer & Wanner, Solving ODEs II, 2nd ed., 1996; Lambert, Numerical Methods for
Ordinary Differential Systems, 1991; "[mem]" = from memory), closed-form eigenvalues of linear
models, scipy's brentq and solve_ivp, and the generated C itself.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
import sympy as sp
from click.testing import CliRunner
from scipy.optimize import brentq

from codegen.advice import cost as cost_mod
from codegen.advice import envelope as envelope_mod
from codegen.advice import recommend as advice_mod
from codegen.build import build
from codegen.cli import main
from codegen.methods import analysis, builtin, builtin_ids
from codegen.model import Input, State, define, load_model
from codegen.pipeline import generate
from codegen.reference import high_accuracy
from codegen.resources import examples_dir
from codegen.run import run_c
from codegen.verify import excitation, state_scales

IMPLICIT_KINDS = ("diagonally implicit", "fully implicit", "linearly implicit")

# A linear model with eigenvalues -1000 and a lightly damped pair (zeta = 0.05, omega = 100 rad/s):
# lambda = -zeta*omega +- i*omega*sqrt(1 - zeta^2) (common practice, no source).
ZETA, OMEGA, FAST = 0.05, 100.0, 1000.0


def linear_model():
    s = sp.Symbol
    q, v, y = s("q", real=True), s("v", real=True), s("y", real=True)
    return define("linear", [
        State("q", initial=1.0, rate=v),
        State("v", initial=0.0, rate=-OMEGA ** 2 * q - 2 * ZETA * OMEGA * v),
        State("y", initial=1.0, rate=-FAST * y)])


def pair():
    return complex(-ZETA * OMEGA, OMEGA * math.sqrt(1 - ZETA ** 2))


def ray_limit(R, lam):
    """First h > 0 with |R(h lambda)| = 1, by a fine scan and brentq (independent of analysis)."""
    g = lambda h: abs(R(h * lam)) - 1.0
    hs = np.linspace(1e-9, 10.0 / abs(lam), 200001)
    values = np.array([g(h) for h in hs[1:]])
    k = int(np.argmax(values > 0))
    return brentq(g, hs[k], hs[k + 1], xtol=1e-15)


def taylor(p):
    return lambda z: sum(z ** k / math.factorial(k) for k in range(p + 1))


def dp5(z):
    # Dormand-Prince 5: R = T5 + z^6/600 (HNW I IV.2 [mem]).
    return taylor(5)(z) + z ** 6 / 600


def test_linear_model_eigenvalues_are_the_closed_form_ones():
    values, warnings = envelope_mod.eigenvalues(linear_model())
    expected = sorted([-FAST + 0j, pair(), pair().conjugate()], key=lambda v: (v.real, v.imag))
    assert warnings == []
    assert np.allclose(values, expected, rtol=1e-12)


@pytest.mark.parametrize("method_id, R", [("euler", taylor(1)), ("rk4", taylor(4)), ("dp5", dp5)])
def test_max_stable_dt_over_the_envelope_matches_the_analytic_value(method_id, R):
    values, _ = envelope_mod.eigenvalues(linear_model())
    got = analysis.max_stable_dt(builtin(method_id), values)
    # Euler on the real axis: h = 2/1000 (HNW I IV.2 [mem]); on the pair |1 + h lambda| = 1 gives
    # h = -2 Re(lambda)/|lambda|^2 in closed form (common practice, no source).
    expected = min(ray_limit(R, -FAST), ray_limit(R, pair()))
    if method_id == "euler":
        assert math.isclose(expected, min(2 / FAST, 2 * ZETA * OMEGA / OMEGA ** 2), rel_tol=1e-9)
    # Real-axis limits -2.785293563 (RK4; Lambert 1991, section 5.12 [mem]) and -3.306567893 (DP5;
    # HNW I IV.2 [mem]), to the digits of the root of |R(x)| = 1.
    if method_id == "rk4":
        assert math.isclose(ray_limit(R, -FAST), 2.785293563e-3, rel_tol=1e-8)
    if method_id == "dp5":
        assert math.isclose(ray_limit(R, -FAST), 3.306567893e-3, rel_tol=1e-8)
    assert abs(got - expected) <= 0.01 * expected


@pytest.mark.parametrize("method_id", ["backward-euler", "sdirk2", "radau-iia3", "ros2",
                                       "zoh-exact"])
def test_a_stable_methods_are_unbounded_and_growing_modes_are_left_out(method_id):
    values = np.array([-1e6, -3 + 40j, -3 - 40j, 0.0])
    # A-stable: |R| <= 1 on the whole left half plane (HW IV.3 [mem]; Verwer, Spee, Blom &
    # Hundsdorfer 1999 for ROS2; |exp(z)| <= 1 there for the exact step, common practice, no source).
    assert method_id in builtin_ids()
    assert analysis.max_stable_dt(builtin(method_id), values) == math.inf
    assert list(envelope_mod.decaying(np.array([2.0, -1.0]))) == [-1.0]


def test_envelope_of_the_heater_spans_its_time_constants():
    model = load_model(examples_dir() / "heater.toml")
    points, ranged = envelope_mod.envelope(model)
    values, _ = envelope_mod.eigenvalues(model, points)
    # One state: lambda = -1/(R_th C_th) with C_th over its range 80..200 J/K and R_th = 2.5 K/W.
    assert ranged == ["states.T", "inputs.duty", "parameters.C_th"]
    assert math.isclose(values.real.min(), -1 / (2.5 * 80), rel_tol=1e-12)
    assert math.isclose(values.real.max(), -1 / (2.5 * 200), rel_tol=1e-12)
    assert np.all(values.imag == 0)


def test_nice_floor_rounds_down_to_timer_friendly_ticks():
    assert advice_mod.nice_floor(0.93e-3) == 8e-4
    assert advice_mod.nice_floor(1e-3) == 1e-3
    assert advice_mod.nice_floor(0.0149) == 0.0125


def nonlinear_stiff_model():
    """A slow nonlinear plant read through a fast first-order sensor: eigenvalues ~ -1e4 and ~ -1."""
    s = sp.Symbol
    x, y, u = s("x", real=True), s("y", real=True), s("u", real=True)
    return define("stiff", [
        State("x", initial=0.0, rate=(u - x - sp.Rational(1, 5) * x ** 3), range=(-2.0, 2.0)),
        State("y", initial=0.0, rate=10000 * (x - y), range=(-2.0, 2.0))],
        inputs=[Input("u", default=0.0, range=(-1.0, 1.0))])


def c_error(model, method_id, dt, precision, horizon):
    """Max |C - solve_ivp| / full scale over the advice run (same excitation as the advice)."""
    method = builtin(method_id)
    n = int(round(horizon / dt))
    u = excitation(model, n)
    built = build(generate(model, method, dt, 1, precision), model)
    run = run_c(built, model, u)
    exact = high_accuracy(model, dt, u)
    scales = state_scales(model, exact.xs)
    return run.completed == n, float(np.nanmax(np.abs(run.xs - exact.xs) / scales))


def test_stiff_model_recommends_an_implicit_method_with_implicit_candidates():
    from codegen.methods.data import IMPLICIT_TABLEAUX
    from codegen.methods import tableau_from_data

    model = nonlinear_stiff_model()
    pool = [builtin(i) for i in ("euler", "rk4", "dp5")] + [
        tableau_from_data(IMPLICIT_TABLEAUX[i], "test", i) for i in ("backward-euler", "sdirk2")]
    advice = advice_mod.advise(model, methods=pool, tolerance=1e-3)
    kinds = {r.id: r.kind for r in advice.methods}
    assert kinds[advice.recommended["method"]] in IMPLICIT_KINDS
    # The explicit ones are held to the fast sensor's limit, about 2.8/1e4 s for RK4 (Lambert 1991,
    # section 5.12 [mem]).
    assert advice.row("rk4").max_stable_dt < 3e-4
    assert advice.recommended["dt"] > 10 * advice.row("rk4").max_stable_dt


def test_stiff_model_recommends_an_implicit_method_and_its_c_meets_the_tolerance():
    model = nonlinear_stiff_model()
    tolerance = 1e-3
    advice = advice_mod.advise(model, tolerance=tolerance)
    rec = advice.recommended
    assert advice.row(rec["method"]).kind in IMPLICIT_KINDS
    completed, error = c_error(model, rec["method"], rec["dt"], rec["precision"], advice.horizon)
    assert completed and error <= tolerance


def test_heater_recommendation_runs_stable_in_c_and_meets_the_tolerance():
    model = load_model(examples_dir() / "heater.toml")
    tolerance = 1e-3
    explicit = [builtin(i) for i in ("euler", "heun", "rk4", "bs3")]
    advice = advice_mod.advise(model, tolerance=tolerance, methods=explicit)
    rec = advice.recommended
    assert rec["dt"] <= advice.margin * advice.row(rec["method"]).max_stable_dt
    completed, error = c_error(model, rec["method"], rec["dt"], rec["precision"], advice.horizon)
    assert completed and error <= tolerance
    # The long run covers the whole horizon here (no cap) and estimates this very error: same
    # order of magnitude.
    long = advice.row(rec["method"]).estimate.long
    assert not advice.row(rec["method"]).estimate.long_capped
    assert long.steps == int(round(advice.horizon / rec["dt"]))
    assert 0.1 * error <= long.global_error <= 10 * error + 1e-6


def test_float_roundoff_estimate_bounds_the_measured_float_error_and_picks_double_when_tight():
    model = load_model(examples_dir() / "heater.toml")
    method = builtin("rk4")
    dt, horizon = 10.0, 1000.0
    n = int(horizon / dt)
    u = excitation(model, n)
    runs = {p: run_c(build(generate(model, method, dt, 1, p), model), model, u) for p in
            ("float", "double")}
    scales = state_scales(model)
    measured = float(np.max(np.abs(runs["float"].xs - runs["double"].xs) / scales))
    bound = advice_mod.roundoff(method, n, "float", bound=True)
    # float32 unit roundoff 2^-24 per rounding (IEEE 754; common practice, no source).
    # The float build really rounds, and even the sqrt(N) estimate covers what it lost here.
    assert 0 < measured <= advice_mod.roundoff(method, n, "float") <= bound
    assert advice_mod.precision_for(method, n, 1e-3) == "float"
    assert advice_mod.precision_for(method, n, 1e-7) == "double"


def test_requested_dt_beyond_the_limit_warns_how_far():
    model = load_model(examples_dir() / "axis.toml")
    rk4 = builtin("rk4")
    advice = advice_mod.advise(model, rk4, dt=2e-3, methods=[rk4])
    # RK4's real-axis limit 2.785293563 (Lambert 1991, section 5.12 [mem]) over the fastest
    # eigenvalue.
    fastest = float(np.max(np.abs(advice.eigenvalues)))
    assert math.isclose(advice.chosen_max_stable_dt, 2.785293563 / fastest, rel_tol=1e-6)
    assert advice.requested["stable"] is False
    assert math.isclose(advice.requested["ratio_to_limit"], 2e-3 / advice.chosen_max_stable_dt)
    assert any("unstable for rk4" in w and "times its stability limit" in w
               for w in advice.warnings)


def test_advise_cli_json_has_the_promised_keys_and_exits_1_on_an_unstable_dt():
    runner = CliRunner()
    model = str(examples_dir() / "heater.toml")
    result = runner.invoke(main, ["advise", model, "--method", "euler", "--dt", "500", "--json"])
    assert result.exit_code == 1, result.output
    data = json.loads(result.stdout)
    # Euler's limit is 2/|lambda| (|1 + z| <= 1; common practice, no source), |lambda| largest at
    # C_th = 80: 2 * 2.5 * 80 s.
    assert math.isclose(data["max_stable_dt"], 400.0, rel_tol=1e-9)
    assert data["eigenvalues"] and all(len(v) == 2 for v in data["eigenvalues"])
    assert set(data["recommended"]) == {"method", "dt", "precision"}
    # The rule the advice applied, as data: half the tolerance for truncation.
    assert data["rule"]["truncation_target"] == 0.5 * data["tolerance"]
    assert data["rule"]["long_run_ticks"] == advice_mod.LONG_RUN_TICKS
    assert data["recommended"]["precision"] in ("float", "double")
    assert data["requested"]["stable"] is False


def test_advise_help_names_the_long_run_cap_the_advice_uses():
    result = CliRunner().invoke(main, ["advise", "--help"])
    assert f"most {advice_mod.LONG_RUN_TICKS} ticks" in " ".join(result.output.split())


def test_advise_cli_error_is_one_line():
    result = CliRunner().invoke(main, ["advise", "nowhere.toml"])
    assert result.exit_code == 1
    assert result.output.strip().count("\n") == 0 and "nowhere.toml" in result.output


@pytest.mark.parametrize("name", ["heater", "battery"])
def test_the_recommendation_can_always_be_generated(name):
    # Regression: zoh-exact was once recommended for the heater, whose tunable C_th sits in the
    # matrix the exact method must exponentiate at generation time, so emit refused it.
    from codegen.pipeline import generate

    model = load_model(examples_dir() / f"{name}.toml")
    advice = advice_mod.advise(model, tolerance=1e-3)
    rec = advice.to_dict()["recommended"]
    csource = generate(model, builtin(rec["method"]), rec["dt"], precision=rec["precision"])
    assert csource.files
    if name == "heater":
        row = advice.row("zoh-exact")
        assert "tunable" in row.to_dict()["note"]


# ---------------------------------------------------------------------------------------------
# The estimates run the reference's steppers
# ---------------------------------------------------------------------------------------------

def test_accuracy_takes_iterations_and_the_embedded_error_from_the_reference_stepper():
    from codegen import reference
    from codegen.reference.steppers import SIMPLIFIED_NEWTON

    model = nonlinear_stiff_model()
    dt, horizon = 0.01, 0.5
    n = int(round(horizon / dt))
    u = excitation(model, n)
    acc = advice_mod.accuracy(model, builtin("sdirk2"), dt, horizon)
    step = reference.stepper(model, builtin("sdirk2"), newton=SIMPLIFIED_NEWTON, scalar=True)
    run = reference.run(model, builtin("sdirk2"), dt, 1, u, stepper=step)
    # Simplified Newton with J frozen (as in the C) on a nonlinear model: more than the two
    # iterations a linear model takes, and what the reference's stepper counted.
    assert acc.completed and acc.newton_iterations == run.newton_iterations / n > 2
    ops, note = cost_mod.operations_per_step(model, builtin("sdirk2"), acc.newton_iterations)
    assert f"{math.ceil(acc.newton_iterations)} Newton iteration(s)" in note and ops > 0
    bs3 = advice_mod.accuracy(model, builtin("bs3"), 5e-5, 5e-3)
    assert bs3.local_by == "embedded pair" and 0 < bs3.local_error < bs3.global_error + 1e-3


def test_accuracy_of_the_exact_method_refuses_a_nonlinear_model_in_one_line():
    from codegen.errors import CheckError

    with pytest.raises(CheckError) as info:
        advice_mod.accuracy(load_model(examples_dir() / "axis.toml"), builtin("zoh-exact"),
                            1e-3, 0.1)
    assert "is nonlinear in 'w'" in str(info.value) and "\n" not in str(info.value)


# ---------------------------------------------------------------------------------------------
# Operation counts
# ---------------------------------------------------------------------------------------------

def test_square_roots_are_counted_as_square_roots_like_the_c_writes_them():
    # A tank drained through an orifice (Torricelli: outflow ~ sqrt(level); common practice, no
    # source) with a made-up 1/sqrt term: rate = u - sqrt(h) + 1/sqrt(h + 2).
    h, u = sp.Symbol("h", real=True), sp.Symbol("u", real=True)
    model = define("tank", [State("h", initial=1.0, rate=u - sp.sqrt(h) + 1 / sp.sqrt(h + 2))],
                   inputs=[Input("u", default=0.5)])
    rate = model.f[0]
    # Two square roots and one division (1/sqrt). The printer writes -sqrtf(h) + u + (1/...): a
    # negation, two additions and h + 2.
    assert cost_mod.count_expr(rate) == cost_mod.OperationCount(add=4, div=1, sqrt=2)
    assert cost_mod.count_expr(sp.sqrt(h)) == cost_mod.OperationCount(sqrt=1)
    assert cost_mod.count_expr(1 / sp.sqrt(h)) == cost_mod.OperationCount(div=1, sqrt=1)
    # The generated C agrees: its rate function calls sqrt twice and divides once.
    c_text = generate(model, builtin("euler"), 0.1, 1, "double").text("tank.c")
    rates = c_text[c_text.index("static void tank_rates("):]
    rates = rates[:rates.index("\n}\n")]
    assert rates.count("sqrt(") == 2 and rates.count("/") == 1
    # Per Euler step: one rate evaluation, then x + h * k (one multiply, one add).
    from codegen.discretize import discretize
    from codegen.simplify import simplify

    cost = cost_mod.step_cost(simplify(discretize(model, builtin("euler"), 1)))
    assert cost.sqrt == 2 and cost.div == 1
