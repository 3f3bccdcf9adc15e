"""Advice that holds up: what `advise` recommends passes `check` on the same model, and what it
prints is true.

The invented model set (tests/data): drive.toml (11 states, multi-rate: an LC input filter near
6.3 kHz and 1.2 kHz, a shaft near 200 Hz, winding temperature over minutes), copter.toml
(3 states, Piecewise current fold-back and abs), kiln.toml (4 states, stiff: a 5 ms filter and a
wall of hours, radiation T^4).

Outside references: the published stability functions of RK4, backward Euler, the trapezoidal
rule and Radau IIA (HW = Hairer & Wanner, Solving ODEs II, 2nd ed., 1996; "[mem]" = from
memory), the closed-form step response of first- and second-order systems, scipy's solve_ivp
(inside check) and the generated C itself.
"""

from __future__ import annotations

import inspect
import math
from pathlib import Path

import numpy as np
import pytest
import sympy as sp

from codegen import reference
from codegen.advice import convergence as convergence_mod
from codegen.advice import envelope as envelope_mod
from codegen.advice import modes as modes_mod
from codegen.advice import recommend as advice_mod
from codegen.advice.recommend import Accuracy, Estimate
from codegen.methods import builtin
from codegen.model import Input, State, define, load_model
from codegen.report.text import advice_lines
from codegen.run import replay
from codegen.verify import check, excitation, state_scales

DATA = Path(__file__).resolve().parent / "data"
MODELS = ("drive", "copter", "kiln")
# The accuracy target of advise and of check: both are fractions of each state's full scale (the
# largest magnitude of its declared range; every state of these models has one), advise over its
# estimates, check as max |C - solve_ivp| over check's run, so one number means the same in both.
TOLERANCE = 1e-3
_ADVICE: dict = {}


def model(name):
    return load_model(DATA / f"{name}.toml")


def advice_for(name):
    """advise(model, tolerance=TOLERANCE), once per model for the whole module."""
    if name not in _ADVICE:
        _ADVICE[name] = advice_mod.advise(model(name), tolerance=TOLERANCE)
    return _ADVICE[name]


# ---------------------------------------------------------------------------------------------
# advise, then check
# ---------------------------------------------------------------------------------------------

@pytest.mark.parametrize("name", MODELS)
def test_the_recommendation_passes_check_on_the_same_model(name):
    # The order study runs too: on the copter (Piecewise and abs) a study that cannot measure says
    # "order not measurable (non-smooth model)" and does not fail; the kiln, at rest at its
    # initial point, is measured from the centre of its declared ranges.
    m = model(name)
    rec = advice_for(name).recommended
    report = check(m, builtin(rec["method"]), rec["dt"], 1, (rec["precision"],),
                   accuracy=TOLERANCE, order=True)
    c = report.cross_checks[0]
    assert report.passed, (rec, c, report.order)
    assert c.completed == c.ticks and c.error_vs_high_accuracy <= TOLERANCE


def test_the_stiff_model_gets_an_implicit_method_far_beyond_the_explicit_limit():
    advice = advice_for("kiln")
    rec = advice.recommended
    assert advice.row(rec["method"]).kind != "explicit"
    explicit = max(r.max_stable_dt for r in advice.methods if r.kind == "explicit")
    assert rec["dt"] > 10 * explicit


def test_the_multi_rate_drive_is_advised_at_a_tick_that_resolves_its_filter():
    # The issue: lobatto-iiic2 at 1.5 s, from a horizon of the thermal mode alone. The filter's
    # ringing at about 6.3 kHz (period 0.16 ms) must now set the tick.
    advice = advice_for("drive")
    period = 2 * math.pi / abs(advice.fastest.imag)
    assert 6e3 < 1 / period < 6.6e3
    assert advice.recommended["dt"] < period / 4


# ---------------------------------------------------------------------------------------------
# What the advice says is true
# ---------------------------------------------------------------------------------------------

@pytest.mark.parametrize("name", MODELS)
def test_the_recommended_row_meets_the_rule_it_states(name):
    advice = advice_for(name)
    rec = advice.recommended
    e = advice.row(rec["method"]).estimate
    assert advice.target == TOLERANCE / 2
    assert e.dt == rec["dt"] and e.meets(advice.target) and e.truncation <= TOLERANCE / 2
    # The short run is check's default run.
    assert e.short.steps == advice_mod.SHORT_RUN_TICKS == \
        inspect.signature(check).parameters["ticks"].default
    # It covers at least one time constant of the fastest excited mode.
    assert e.short.steps * e.dt * abs(advice.fastest.real) >= 1
    # The horizon is two of the slowest time constants; the long run goes toward it and stops
    # at the cap only when the horizon needs more ticks, and says so.
    assert math.isclose(advice.horizon, 2 / abs(advice.slowest.real), rel_tol=1e-9)
    wanted = math.ceil(advice.horizon / e.dt - 1e-9)
    assert e.long.steps == min(wanted, advice_mod.LONG_RUN_TICKS)
    assert e.long_capped == (wanted > advice_mod.LONG_RUN_TICKS)
    text = "\n".join(advice_lines(advice))
    assert (f"long {e.long.steps} ticks = {e.long.steps * e.dt:.3g} s of the "
            f"{advice.horizon:.4g} s horizon" + (" (stopped at the cap)" if e.long_capped
                                                  else "")) in text
    assert f"short {e.short.steps} ticks = {e.short.steps * e.dt:.3g} s" in text


def test_the_drive_reports_the_capped_long_runs():
    advice = advice_for("drive")
    lines = advice_lines(advice)
    rows = [r for r in advice.methods if r.dt]
    # Thermal minutes against a microsecond tick: every long run stops at the cap, and each row
    # marks it, as the legend explains.
    assert rows and all(r.estimate.long_capped for r in rows)
    for r in rows:
        row = next(line for line in lines if line.startswith(f"  {r.id} "))
        assert f"{r.estimate.long.steps * r.dt:.3g} s*" in row
    assert any("'*' marks a run stopped there" in line for line in lines)


def test_the_output_states_the_rule_and_explains_its_abbreviations():
    text = "\n".join(advice_lines(advice_for("kiln")))
    assert "at most 0.0005 = tolerance/2 of full scale (the other tolerance/2 is for round-off)" \
        in text
    assert "the same holds at the 2 next finer ticks" in text
    assert "ops/tick = floating-point operations per tick" in text
    assert "ops/s = floating-point operations per simulated second" in text
    # A number of seconds has its unit; 'unbounded' has none.
    assert "unbounded s" not in text and "max stable dt unbounded" in text


def test_a_tick_that_misses_the_rule_says_the_rule():
    note = advice_mod.failure_note(Estimate(3e-5, 7e-4), 5e-4)
    assert note == ("dt = 3e-05 s does not meet the tolerance: per-mode estimate 0.0007 > "
                    "0.0005 = tolerance/2 (the other half is for round-off)")


# ---------------------------------------------------------------------------------------------
# The per-mode estimate against published stability functions and closed-form responses
# ---------------------------------------------------------------------------------------------

STABILITY_FUNCTIONS = {
    # Explicit RK of order p = s <= 4: R is the Taylor polynomial of exp (HW IV.2 [mem]).
    "rk4": lambda z: 1 + z + z ** 2 / 2 + z ** 3 / 6 + z ** 4 / 24,
    # Backward Euler 1/(1 - z); trapezoidal rule (1 + z/2)/(1 - z/2) (HW IV.3 [mem]).
    "backward-euler": lambda z: 1 / (1 - z),
    "trapezoidal": lambda z: (1 + z / 2) / (1 - z / 2),
    # Radau IIA, 3 stages: the (2,3) Pade approximation of exp (HW IV.5, Table 5.? [mem]).
    "radau-iia3": lambda z: (1 + 2 * z / 5 + z ** 2 / 20) / (1 - 3 * z / 5 + 3 * z ** 2 / 20
                                                             - z ** 3 / 60),
}


@pytest.mark.parametrize("method_id", sorted(STABILITY_FUNCTIONS))
def test_mode_errors_are_the_largest_difference_of_powers(method_id):
    R = STABILITY_FUNCTIONS[method_id]
    values = np.array([-0.01, -0.3, -2.0, -80.0, -0.05 + 1.0j, -1.0 + 2.0j, -1e4])
    got = modes_mod.mode_errors(builtin(method_id), values, 1.0, 1e6)
    for lam, e in zip(values, got):
        ratio = R(complex(lam))
        if abs(ratio) > 1:
            assert e == math.inf
            continue
        n = np.arange(1, 4001)
        brute = float(np.max(np.abs(ratio ** n - np.exp(n * lam))))
        # The estimate samples n on a logarithmic grid: never above the largest difference, and
        # within a few per cent of it (to 1e-14: both sides round R(z) in double).
        assert 0.95 * brute - 1e-14 <= e <= brute * (1 + 1e-9) + 1e-14, (lam, e, brute)


def test_first_order_step_response_weights():
    # x' = -a x + b u: a step of u by U moves the equilibrium by b U / a (common practice).
    a, b, U, X = 50.0, 2.0, 10.0, 4.0
    x, u = sp.Symbol("x", real=True), sp.Symbol("u", real=True)
    m = define("lag", [State("x", initial=0.0, rate=-a * x + b * u, range=(-X, X))],
               inputs=[Input("u", default=0.0, range=(0.0, U))])
    points, _ = envelope_mod.envelope(m)
    found = modes_mod.excited_modes(m, points, state_scales(m))
    assert np.allclose(found.values, -a)
    assert np.allclose(found.weights, b * U / (a * X), rtol=1e-12)


def test_second_order_step_response_weights():
    # x'' + 2 zeta w x' + w^2 x = w^2 u: a step of U gives x = U (1 - e^(-zeta w t) (cos +
    # zeta/sqrt(1 - zeta^2) sin)(w_d t)), the two modes of amplitude U / (2 sqrt(1 - zeta^2))
    # each in x (Ogata, Modern Control Engineering, 5th ed., section 5-3 [mem]).
    zeta, w, U, X = 0.1, 30.0, 2.0, 5.0
    x, v, u = sp.Symbol("x", real=True), sp.Symbol("v", real=True), sp.Symbol("u", real=True)
    m = define("spring", [State("x", initial=0.0, rate=v, range=(-X, X)),
                          State("v", initial=0.0, rate=w ** 2 * (u - x) - 2 * zeta * w * v,
                                range=(-200.0, 200.0))],
               inputs=[Input("u", default=0.0, range=(0.0, U))])
    points, _ = envelope_mod.envelope(m)
    found = modes_mod.excited_modes(m, points, state_scales(m))
    first = found.point == 0
    assert np.allclose(np.sort(found.values[first].imag), [-w * math.sqrt(1 - zeta ** 2),
                                                          w * math.sqrt(1 - zeta ** 2)])
    assert np.allclose(found.weights[first, 0], U / (2 * math.sqrt(1 - zeta ** 2)) / X)


# ---------------------------------------------------------------------------------------------
# Newton's convergence, in the C's mode
# ---------------------------------------------------------------------------------------------

@pytest.mark.parametrize("method_id, dt, precision", [
    ("sdirk2", 1e-4, "double"), ("sdirk2", 1e-4, "float"), ("radau-iia3", 1e-5, "double"),
    ("lobatto-iiic2", 1e-4, "float")])
def test_the_reference_in_the_c_mode_predicts_the_c_status(method_id, dt, precision):
    # On the copter the frozen Jacobian goes stale when the current crosses the fold-back: the
    # generated C stops with NO_CONVERGENCE at some of these ticks and precisions. The advice's
    # prediction, made without the C, must agree with the C on check's run.
    m = model("copter")
    ticks = advice_mod.SHORT_RUN_TICKS
    predicted = convergence_mod.newton_converges(m, builtin(method_id), dt, precision,
                                                 envelope_mod.envelope(m)[0][:1], ticks)
    c = replay(m, builtin(method_id), dt, excitation(m, ticks), precision=precision)
    assert predicted.check_run_failed == (c.status_name == "NO_CONVERGENCE")
    assert c.status_name in ("OK", "NO_CONVERGENCE")


def test_the_issue_tick_is_rejected_and_the_advised_one_runs():
    # The issue: lobatto-iiic2 at dt = 1.5 s on the drive; replay stopped at tick 2 with
    # NO_CONVERGENCE. The advice now says why it rejects such a tick, and its own tick runs.
    m = model("drive")
    lobatto = builtin("lobatto-iiic2")
    points = envelope_mod.envelope(m)[0]
    rejected = convergence_mod.newton_converges(m, lobatto, 1.5, "float", points, 200)
    assert not rejected.converged
    assert "does not converge at dt = 1.5 s" in rejected.note()
    # The first failing point is named by what differs from the initial point, with units.
    items = [item.split(" = ") for item in rejected.first_failure.split(", ")]
    known = {q.name: q.unit for q in (*m.states, *m.inputs)}
    assert items and all(name in known for name, _ in items)
    assert ["i_d", "20 A"] in items or ["i_d", "-20 A"] in items
    c = replay(m, lobatto, 1.5, excitation(m, 200), precision="float")
    assert c.status_name == "NO_CONVERGENCE"
    row = advice_for("drive").row("lobatto-iiic2")
    assert row.dt is not None and row.estimate.converged
    runs = replay(m, lobatto, row.dt, excitation(m, 200), precision="double")
    assert runs.status_name == "OK" and runs.completed == 200


# ---------------------------------------------------------------------------------------------
# Monotone in dt
# ---------------------------------------------------------------------------------------------

def _fake_estimate(errors, seen):
    """An estimate function that reports the given errors per tick (both runs, converged)."""

    def fake(setting, method, dt, full=True):
        seen.append(dt)
        err = errors(dt)
        run = Accuracy(dt, 200, err, 0.0, "none", True)
        return Estimate(dt, 0.0, None, run, run if full else None, False)

    return fake


def _search(monkeypatch, errors):
    seen = []
    monkeypatch.setattr(advice_mod, "per_mode_error", lambda *args: 0.0)
    monkeypatch.setattr(advice_mod, "estimate", _fake_estimate(errors, seen))
    m = load_model(DATA.parent.parent / "examples" / "heater.toml")
    setting = advice_mod.Setting(m, (), None, 10.0, 1e-3, True)
    found, _, held = advice_mod._search_dt(setting, builtin("rk4"), 1e-3)
    return found, held, seen


def test_a_lucky_coarse_tick_is_not_advised(monkeypatch):
    # 1 ms meets the rule, 0.8 ms does not (a switch the coarse tick happens to step over).
    def errors(dt):
        return 1e-3 if math.isclose(dt, 8e-4) else 4e-4 * (dt / 1e-3) ** 4

    found, held, seen = _search(monkeypatch, errors)
    assert seen[:2] == [1e-3, 8e-4]
    assert found is not None and found.dt < 8e-4 and held.dt == 8e-4
    # The advised tick and the two ladder ticks below it were all checked and all pass.
    below = [advice_mod.finer(found.dt), advice_mod.finer(advice_mod.finer(found.dt))]
    assert all(dt in seen and errors(dt) <= 5e-4 for dt in below)


def test_a_monotone_error_is_advised_at_the_first_tick(monkeypatch):
    found, held, seen = _search(monkeypatch, lambda dt: 4e-4 * (dt / 1e-3) ** 4)
    assert found.dt == 1e-3 and held is None and seen == [1e-3, 8e-4, 6e-4]


def test_the_piecewise_advice_holds_at_the_finer_ticks_too():
    # Against the truth (solve_ivp): the advised tick and the ticks below it on the ladder.
    m = model("copter")
    row = advice_for("copter").row("rk4")
    u = excitation(m, advice_mod.SHORT_RUN_TICKS)
    dt = row.dt
    for _ in range(3):
        run = reference.run(m, builtin("rk4"), dt, 1, u)
        exact = reference.high_accuracy(m, dt, u)
        error = float(np.max(np.abs(run.xs - exact.xs) / state_scales(m)))
        assert run.completed == len(u) and error <= TOLERANCE / 2, (dt, error)
        dt = advice_mod.finer(dt)


def test_a_search_that_gives_up_says_so(monkeypatch):
    found, held, seen = _search(monkeypatch, lambda dt: 1.0)
    assert found is None and len(seen) == advice_mod.MAX_ATTEMPTS
    m = load_model(DATA.parent.parent / "examples" / "heater.toml")
    setting = advice_mod.Setting(m, (), None, 10.0, 1e-3, True)
    row = advice_mod._advise_method(setting, builtin("rk4"), np.array([-0.005]), 0.8)
    assert row.dt is None
    assert row.note.endswith(f"; the search stops after {advice_mod.MAX_ATTEMPTS} simulated "
                             "ticks")
    assert "short run estimate 1 > 0.0005 = tolerance/2" in row.note
