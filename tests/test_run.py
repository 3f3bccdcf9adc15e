"""The library replay (codegen.run) and input logs (codegen.inputs): the compiled C over an input
array in one call, with labelled time, states, outputs and the status that stopped the run."""

from __future__ import annotations

import numpy as np
import pytest
import sympy as sp

from codegen import reference
from codegen.build import build
from codegen.emit import STATUS_CODES
from codegen.errors import CheckError
from codegen.inputs import held_defaults, read_input_log
from codegen.methods import builtin
from codegen.model import State, define
from codegen.pipeline import generate
from codegen.run import Replay, replay, run_c, status_name

# The heater's parameters (examples/heater.toml): P = 40 W, R_th = 2.5 K/W, C_th = 120 J/K,
# T_amb = 20 degC, T(0) = 20 degC; its output T_surface = T - 0.1*P*duty.
P, R_TH, C_TH, T_AMB, T0 = 40.0, 2.5, 120.0, 20.0, 20.0
DUTY = 0.5
TICK = 0.5
TICKS = 120


def heater_exact(t, duty):
    """Analytic solution of T' = (P duty - (T - T_amb)/R)/C for a held duty (first-order lag)."""
    settle = T_AMB + P * duty * R_TH
    return settle + (T0 - settle) * np.exp(-np.asarray(t) / (R_TH * C_TH))


def test_replay_labels_states_and_outputs_and_matches_the_analytic_solution(heater):
    inputs = np.full((TICKS, 1), DUTY)
    run = replay(heater, builtin("rk4"), TICK, inputs, precision="double")
    assert isinstance(run, Replay)
    assert run.columns == ("t", "T", "T_surface")
    assert (run.ticks, run.completed, run.status, run.status_name) == (TICKS, TICKS, 0, "OK")
    assert run.finished and run.table().shape == (TICKS + 1, 3)
    np.testing.assert_allclose(run.t, np.arange(TICKS + 1) * TICK, rtol=0, atol=1e-12)
    # RK4 at h/tau = 0.5/300 has a global error near (h/tau)^4 of the state's change (analytic).
    np.testing.assert_allclose(run.states[:, 0], heater_exact(run.t, DUTY), rtol=1e-10)
    # ...and it is the independent reference's RK4, to rounding.
    ref = reference.run(heater, builtin("rk4"), TICK, 1, inputs)
    np.testing.assert_allclose(run.states, ref.xs, rtol=1e-13)
    # Outputs come from the C's outputs function, with the inputs of the tick just taken (the
    # reset default, duty = 0, before the first tick).
    duty_held = np.concatenate([[0.0], inputs[:, 0]])
    np.testing.assert_allclose(run.outputs[:, 0], run.states[:, 0] - 0.1 * P * duty_held,
                               rtol=1e-15)


def test_float_replay_keeps_the_float_results(heater):
    run = replay(heater, builtin("rk4"), TICK, np.full((10, 1), DUTY), precision="float")
    assert np.all(run.states == run.states.astype(np.float32))
    assert np.all(run.outputs == run.outputs.astype(np.float32))
    np.testing.assert_allclose(run.states[:, 0], heater_exact(run.t, DUTY), rtol=1e-6)


def blowup_model():
    x = sp.Symbol("x", real=True)
    return define("blow", states=[State("x", initial=1.0, rate=x * x)])


def test_replay_stops_at_the_first_failed_tick_with_its_status():
    # Forward Euler on x' = x^2 from 1 with h = 1: x <- x + x^2 gives 2, 6, 42, 1806, 3263442,
    # 1.07e13, 1.13e26, then 1.29e52 overflows float32 (max 3.4e38): tick 8 fails.
    run = replay(blowup_model(), builtin("euler"), 1.0, np.zeros((50, 0)), precision="float")
    assert (run.ticks, run.completed, run.status_name) == (50, 7, "NONFINITE")
    assert not run.finished and run.states.shape == (8, 1) and run.outputs.shape == (8, 0)
    x, expected = 1.0, [1.0]
    for _ in range(7):
        x = x + x * x
        expected.append(x)
    np.testing.assert_allclose(run.states[:, 0], expected, rtol=1e-6)


def test_replay_reports_no_convergence():
    # Backward Euler x1 = x0 + h (x1^2 + 1) for x' = x^2 + 1, x0 = h = 1 has no real solution
    # (discriminant 1 - 4 h (x0 + h) < 0, analytic): the first tick fails, the start row stays.
    x = sp.Symbol("x", real=True)
    model = define("quad", states=[State("x", initial=1.0, rate=x ** 2 + 1)])
    run = replay(model, builtin("backward-euler"), 1.0, np.zeros((5, 0)), precision="double")
    assert (run.completed, run.status_name) == (0, "NO_CONVERGENCE")
    assert run.states.tolist() == [[1.0]] and run.t.tolist() == [0.0]


def test_status_names_are_the_generated_header_s(heater):
    built = build(generate(heater, builtin("rk4"), TICK, precision="float"), heater)
    for name, value, _ in STATUS_CODES:
        assert getattr(built.lib, f"HEATER_{name}") == value
        assert status_name(value) == name
    assert status_name(9) == "9 (unknown)"


def test_run_c_keeps_the_trajectory_shape_after_a_failure():
    model = blowup_model()
    built = build(generate(model, builtin("euler"), 1.0, precision="float"), model)
    trajectory = run_c(built, model, np.zeros((20, 0)))
    assert trajectory.completed == 7 and trajectory.xs.shape == (21, 1)
    assert np.all(np.isfinite(trajectory.xs[:8])) and np.all(np.isnan(trajectory.xs[8:]))


def test_inputs_of_the_wrong_shape_are_one_line(heater):
    with pytest.raises(CheckError, match=r"expected \(ticks, 1\) with the columns duty") as info:
        replay(heater, builtin("rk4"), TICK, np.zeros((4, 2)))
    assert "\n" not in str(info.value)


def test_csv_text_round_trips_every_value(heater, tmp_path):
    run = replay(heater, builtin("rk4"), TICK, np.full((3, 1), DUTY), precision="float")
    path = run.save_csv(tmp_path / "sub" / "r.csv")
    lines = path.read_text().splitlines()
    assert lines[0] == "t,T,T_surface" and len(lines) == 1 + 4
    assert lines[1] == "0.0,20.0,20.0"
    values = np.array([[float(v) for v in line.split(",")] for line in lines[1:]])
    assert np.array_equal(values, run.table())
    assert not (tmp_path / "sub" / "r.csv.tmp").exists()


# ---- input logs -----------------------------------------------------------------------------------

def test_input_log_columns_in_any_order_come_back_in_model_order(write_model, tmp_path):
    model_path = write_model('name = "two"\n[states]\nx = { initial = 0.0, rate = "a - b" }\n'
                             '[inputs]\na = { default = 1.0 }\nb = { default = 2.0 }\n')
    from codegen.model import load_model

    model = load_model(model_path)
    log = tmp_path / "log.csv"
    log.write_text("t, b, a\n0,20,10\n\n1,21,11\n2,22,12\n")
    assert read_input_log(log, model).tolist() == [[10, 20], [11, 21], [12, 22]]
    assert read_input_log(log, model, ticks=2).tolist() == [[10, 20], [11, 21]]
    assert held_defaults(model, 3).tolist() == [[1.0, 2.0]] * 3


def test_input_log_errors_name_the_line_of_the_file(heater, tmp_path):
    # Blank lines count: the line number is the one an editor shows.
    log = tmp_path / "log.csv"
    log.write_text("t,duty\n\n0,0.5\n\n0.5,abc\n")
    with pytest.raises(CheckError, match=r"log\.csv: line 5: column 'duty': 'abc' is not a "
                                         r"number"):
        read_input_log(log, heater)


def test_held_defaults_without_inputs_has_no_columns():
    assert held_defaults(blowup_model(), 4).shape == (4, 0)
