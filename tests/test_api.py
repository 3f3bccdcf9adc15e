"""The Python API (codegen.compile_model): the compiled C and the reference over numpy arrays,
labelled results, tunable parameters per run, committed files, and the README's example."""

from __future__ import annotations

import shutil

import numpy as np
import pytest
import sympy as sp

import codegen
from codegen.errors import CheckError, EmitError
from codegen.model import State, define
from codegen.run import NOT_RUN, Replay

from conftest import EXAMPLES, ROOT, readme_block

HEATER = EXAMPLES / "heater.toml"
# The heater's numbers (examples/heater.toml): P = 40 W, R_th = 2.5 K/W, C_th = 120 J/K (tunable),
# T_amb = 20 degC, R_s = 0.1 K/W, T(0) = 20 degC.
P, R_TH, C_TH, T_AMB, R_S, T0 = 40.0, 2.5, 120.0, 20.0, 0.1, 20.0
TICK = 0.5


def lag(t, duty, capacity=C_TH):
    """T(t) of the heater for a held duty: a first-order lag toward T_amb + P duty R_th with time
    constant R_th C_th (the analytic solution of T' = (P duty - (T - T_amb)/R_th)/C_th)."""
    settle = T_AMB + P * duty * R_TH
    return settle + (T0 - settle) * np.exp(-np.asarray(t) / (R_TH * capacity))


@pytest.fixture(scope="module")
def heater_double():
    return codegen.compile_model(HEATER, "rk4", TICK, precision="double")


def test_simulate_returns_labelled_arrays_that_follow_the_analytic_lag(heater_double):
    run = heater_double.simulate({"duty": 0.5}, ticks=400, parameters={"C_th": 150.0})
    assert isinstance(run, Replay) and run.columns == ("t", "T", "T_surface")
    assert run.t.shape == (401,) and run.states.shape == (401, 1) and run.outputs.shape == (401, 1)
    np.testing.assert_allclose(run["t"], np.arange(401) * TICK, rtol=0, atol=1e-12)
    # RK4 at h/tau = 0.5/375: its global error is about (h/tau)^4 of the change (analytic lag).
    np.testing.assert_allclose(run["T"], lag(run.t, 0.5, capacity=150.0), rtol=1e-10)
    # The outputs come from the C's outputs function: T_surface = T - R_s P duty, with the duty of
    # the tick just taken (the reset default 0 in the first row).
    duty = np.r_[0.0, np.full(400, 0.5)]
    np.testing.assert_allclose(run["T_surface"], run["T"] - R_S * P * duty, rtol=1e-15)
    assert run.tick_status.tolist() == [0] * 400


def test_the_reference_runs_the_same_arguments_and_agrees_to_rounding(heater_double):
    duty = np.linspace(0.0, 1.0, 300)
    capacity = np.linspace(100.0, 200.0, 300)  # recalibrated every tick, as firmware may
    run = heater_double.simulate(duty, parameters={"C_th": capacity})
    ref = heater_double.reference(duty, parameters={"C_th": capacity})
    assert ref.columns == run.columns and ref.completed == run.completed == 300
    np.testing.assert_allclose(run.states, ref.states, rtol=1e-13)
    np.testing.assert_allclose(run.outputs, ref.outputs, rtol=1e-13)
    # Held at one value, C_th = 200 J/K gives the slower lag of the analytic solution.
    held = heater_double.reference({"duty": 1.0}, ticks=50, parameters={"C_th": 200.0})
    np.testing.assert_allclose(held["T"], lag(held.t, 1.0, capacity=200.0), rtol=1e-10)


def test_float_runs_stay_in_float_and_cross_check_passes():
    heater = codegen.compile_model(HEATER, "heun", TICK)  # float by default
    run = heater.simulate({"duty": 1.0}, ticks=100)
    assert np.all(run.states == run.states.astype(np.float32))
    # Heun's method is second order: at h/tau = 1/600 its error is far below 1e-4 of the change.
    np.testing.assert_allclose(run["T"], lag(run.t, 1.0), rtol=1e-5)
    check = heater.cross_check(ticks=150)
    assert check.passed and check.ticks == 150 and check.precision == "float"
    assert heater.assert_matches({"duty": 0.25}, ticks=40).passed


def test_initial_state_and_input_mappings(heater_double):
    run = heater_double.simulate(ticks=3, x0={"T": 80.0})
    assert run["T"][0] == 80.0 and run["T"][1] < 80.0  # no duty: cools toward T_amb
    same = heater_double.simulate(np.zeros((3, 1)), x0=[80.0])
    assert np.array_equal(run.table(), same.table())


@pytest.mark.parametrize("call, fragment", [
    (lambda m: m.simulate({"dutty": 0.5}, ticks=3), "no input 'dutty' (did you mean 'duty'?)"),
    (lambda m: m.simulate({"duty": np.zeros(4)}, ticks=3), "different numbers of ticks (3, 4)"),
    (lambda m: m.simulate({"duty": 0.5}), "how many ticks?"),
    (lambda m: m.simulate(np.zeros((3, 2))), r"expected (ticks, 1) with the columns duty"),
    (lambda m: m.simulate(ticks=3, parameters={"P": 50.0}), "parameter 'P' is not tunable"),
    (lambda m: m.simulate(ticks=3, parameters={"C_t": 50.0}), "did you mean 'C_th'?"),
    (lambda m: m.simulate(ticks=3, parameters={"C_th": np.ones(2)}), "one value per tick (3,)"),
    (lambda m: m.simulate(ticks=3, x0={"Temp": 1.0}), "no state 'Temp' (the states are T)"),
    (lambda m: m.simulate(ticks=3)["Tsurface"], "no column 'Tsurface' (did you mean"),
])
def test_mistakes_are_one_line(heater_double, call, fragment):
    with pytest.raises(CheckError) as info:
        call(heater_double)
    assert fragment in str(info.value) and "\n" not in str(info.value)


def test_every_tick_has_a_status_up_to_the_one_that_failed():
    # Forward Euler on x' = x^2 from 1 with h = 1 overflows float32 on tick 8 (see test_run.py).
    x = sp.Symbol("x", real=True)
    model = define("blow", states=[State("x", initial=1.0, rate=x * x)])
    blow = codegen.compile_model(model, "euler", 1.0)
    run = blow.simulate(ticks=12)
    assert run.tick_status.tolist() == [0] * 7 + [1] + [NOT_RUN] * 4
    assert run.status_name == "NONFINITE" and run.states.shape == (8, 1)
    # The reference stops on the same tick (float64 overflows later: x = 1.8e308 is past tick 9).
    ref = blow.reference(ticks=12)
    assert ref.completed >= run.completed and ref.status_name in ("OK", "NONFINITE")


def test_to_csv_gives_text_or_writes_the_file(heater_double, tmp_path):
    run = heater_double.simulate({"duty": 0.5}, ticks=2)
    text = run.to_csv()
    assert text.splitlines()[0] == "t,T,T_surface" and len(text.splitlines()) == 4
    path = run.to_csv(tmp_path / "out" / "heater.csv")
    assert path.read_text() == text


def test_committed_files_are_built_as_they_are_and_staleness_is_found(tmp_path):
    gen = tmp_path / "gen"
    fresh = codegen.compile_model(HEATER, "rk4", TICK)
    written = fresh.write(gen, build_files=True)
    assert sorted(p.name for p in written) == ["CMakeLists.txt", "heater.c", "heater.h",
                                               "heater.mk"]
    shipped = codegen.compile_model(HEATER, "rk4", TICK, sources=gen)
    assert shipped.sources == gen and shipped.stale_files(gen, build_files=True) == []
    u = {"duty": np.linspace(0, 1, 50)}
    assert np.array_equal(shipped.simulate(u).table(), fresh.simulate(u).table())
    shipped.assert_matches()
    # A model whose heater power changed, while the C on disk still has the old number baked in.
    changed = tmp_path / "heater.toml"
    changed.write_text(HEATER.read_text().replace("P = { value = 40.0", "P = { value = 44.0"))
    stale = codegen.compile_model(changed, "rk4", TICK, sources=gen)
    differences = stale.stale_files(gen)
    assert [d.path.name for d in differences] == ["heater.h", "heater.c"]
    assert all("SHA-256" in d.expected for d in differences)  # the model's hash comes first
    with pytest.raises(AssertionError) as info:
        stale.assert_matches({"duty": 1.0}, ticks=100)
    message = str(info.value)
    assert "does not match the model" in message and "cross-check float" in message
    assert "heater.c: line" in message


def test_missing_committed_files_are_one_line(tmp_path):
    with pytest.raises(EmitError, match=r"heater\.h: cannot read the generated file .* emit "
                                        r"--out"):
        codegen.compile_model(HEATER, "rk4", TICK, sources=tmp_path)


def test_import_codegen_is_light_and_names_the_api():
    import subprocess
    import sys

    code = ("import sys, codegen; heavy = [m for m in ('sympy', 'numpy', 'cffi') if m in "
            "sys.modules]; print(heavy, sorted(codegen.__all__))")
    out = subprocess.run([sys.executable, "-c", code], cwd=ROOT, capture_output=True, text=True,
                         check=True).stdout
    assert out.startswith("[] ") and "'compile_model'" in out
    assert codegen.compile_model.__module__ == "codegen.api"
    with pytest.raises(AttributeError):
        codegen.no_such_name  # noqa: B018


def test_the_readme_example_runs_verbatim(tmp_path, monkeypatch):
    shutil.copytree(EXAMPLES, tmp_path / "examples")
    monkeypatch.chdir(tmp_path)
    code = readme_block("### Python API", "python")
    assert len([line for line in code.splitlines() if line.strip()]) <= 9
    namespace: dict = {}
    exec(compile(code, "README.md", "exec"), namespace)  # noqa: S102 - the README's own code
    run = namespace["run"]
    assert isinstance(run, Replay) and (tmp_path / "heater.csv").exists()
    assert run.columns == ("t", "T", "T_surface")


def test_committed_files_with_an_error_estimate_are_up_to_date(tmp_path):
    # bs3's embedded pair adds heater_advance_with_error(); the staleness check regenerates with it.
    fresh = codegen.compile_model(HEATER, "bs3", TICK, error_estimate=True)
    fresh.write(tmp_path)
    assert "heater_advance_with_error" in (tmp_path / "heater.h").read_text()
    shipped = codegen.compile_model(HEATER, "bs3", TICK, sources=tmp_path, error_estimate=True)
    assert shipped.stale_files(tmp_path) == []
    assert codegen.compile_model(HEATER, "bs3", TICK).stale_files(tmp_path) != []
