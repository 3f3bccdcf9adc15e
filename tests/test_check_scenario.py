"""Evidence a team can trust: the check on the user's own inputs and parameters, the stability
gate before anything is built, stops named by their status, and non-smooth models."""

from __future__ import annotations

import csv
import json
import math

import numpy as np
import pytest
import sympy as sp
from click.testing import CliRunner

from codegen.advice.gate import DENSE_STATES, stability_gate
from codegen.cli import main
from codegen.errors import CheckError
from codegen.inputs import parameter_settings, parameter_table, read_log
from codegen.methods import builtin
from codegen.model import Parameter, State, define, load_model
from codegen.verify import check, cross_check, non_smooth

from conftest import EXAMPLES, ROOT

HEATER = EXAMPLES / "heater.toml"
AXIS = EXAMPLES / "axis.toml"
DRIVE = ROOT / "tests" / "data" / "drive.toml"
# V_s dips from 48 V to 36 V between 2 ms and 5 ms of a 9 ms log at 30 us per tick.
SUPPLY_DIP = ROOT / "tests" / "data" / "drive_supply_dip.csv"

# A rain-water tank with an overflow weir: above the crest the level drains much faster, so the
# rate has a kink (Piecewise) that the order study's runs cross. Invented numbers.
TANK = """
name = "tank"
[states]
h = { initial = 0.2, rate = "(q_in - k_out*h - Piecewise((k_weir*(h - h_weir), h > h_weir), (0, True)))/A", unit = "m", range = [0, 2] }
[inputs]
q_in = { default = 0.0, unit = "m^3/s", range = [0, 0.02] }
[parameters]
A = { value = 0.5, unit = "m^2" }
k_out = { value = 0.01, unit = "m^2/s" }
k_weir = { value = 0.2, unit = "m^2/s" }
h_weir = { value = 1.0, unit = "m" }
"""


def run(*args):
    return CliRunner().invoke(main, [str(a) for a in args])


def error_lines(result) -> list[str]:
    return [line for line in result.output.splitlines() if line.startswith("tickwright: ")]


@pytest.fixture
def nothing_built(monkeypatch):
    """Make any C generation or build fail the test: the gate must stop before them."""
    calls = []

    def refuse(*args, **kwargs):
        calls.append(args)
        raise AssertionError("the gate let a run through")

    monkeypatch.setattr("codegen.verify.generate", refuse)
    monkeypatch.setattr("codegen.build.build", refuse)
    return calls


# ---- the stability gate --------------------------------------------------------------------------

def axis_euler_limit() -> float:
    # Forward Euler is stable for h*lambda in |1 + z| <= 1: on the negative real axis h <= 2/|l|
    # (common practice, no source). The axis' fastest mode is real.
    from codegen.advice.envelope import decaying, eigenvalues

    lam = decaying(eigenvalues(load_model(AXIS))[0])
    fastest = lam[np.argmax(np.abs(lam))]
    assert fastest.imag == 0
    return 2 / abs(fastest)


def test_check_beyond_the_stability_limit_stops_before_building(nothing_built):
    limit = axis_euler_limit()
    result = run("check", AXIS, "--method", "euler", "--dt", 1e-3, "--no-order")
    assert result.exit_code == 1 and not nothing_built
    [line] = error_lines(result)
    assert f"beyond euler's stability limit {limit:.3g} s" in line
    assert f"eigenvalue {-2 / limit:.4g} 1/s" in line and "--force-run" in line
    assert "verdict" not in result.output


def test_replay_beyond_the_stability_limit_stops_before_building(nothing_built, tmp_path):
    out = tmp_path / "r.csv"
    result = run("replay", AXIS, "--method", "euler", "--dt", 1e-3, "--steps", 10, "--out", out)
    assert result.exit_code == 1 and not nothing_built and not out.exists()
    [line] = error_lines(result)
    assert f"stability limit {axis_euler_limit():.3g} s" in line


def test_emit_beyond_the_stability_limit_warns_and_writes(tmp_path):
    result = run("emit", AXIS, "--method", "euler", "--dt", 1e-3, "--out", tmp_path / "gen")
    assert result.exit_code == 0
    [line] = error_lines(result)
    assert line.startswith("tickwright: warning: ") and \
        f"stability limit {axis_euler_limit():.3g} s" in line
    assert sorted(p.name for p in (tmp_path / "gen").iterdir()) == ["axis.c", "axis.h"]
    quiet = run("emit", AXIS, "--method", "euler", "--dt", 1e-4, "--out", tmp_path / "ok")
    assert quiet.exit_code == 0 and not error_lines(quiet)


def test_force_run_runs_and_the_stability_line_fails():
    # h*lambda = -2.98 at 1 ms: the error grows by |1 + z| = 1.98 per tick and overflows double
    # within 2000 ticks.
    result = run("check", AXIS, "--method", "euler", "--dt", 1e-3, "--precision", "double",
                 "--ticks", 2000, "--no-order", "--force-run")
    assert result.exit_code == 1
    lines = result.stdout.splitlines()
    assert [line.split()[:2] for line in lines if " FAIL " in line][0] == ["stability", "FAIL"]
    assert any(line.split()[:3] == ["run", "double", "FAIL"] and "status NONFINITE" in line
               for line in lines)


def test_a_stable_method_passes_the_gate_at_once():
    gate = stability_gate(load_model(AXIS), builtin("backward-euler"), 10.0)
    assert gate.passed and gate.basis == "A-stable method"


def chain(n: int, k: float = 100.0):
    """n masses in a row joined by springs to each other and to two walls, first order:
    x_i' = k (x_{i-1} - 2 x_i + x_{i+1})."""
    x = [sp.Symbol(f"x{i}", real=True) for i in range(n)]
    ks = sp.Symbol("k", real=True)
    states = [State(f"x{i}", initial=0.0, range=(-1, 1),
                    rate=ks * ((x[i - 1] if i else 0) - 2 * x[i] + (x[i + 1] if i < n - 1 else 0)))
              for i in range(n)]
    return define("chain", states, parameters=[Parameter("k", value=k)])


def ladder(n: int, k: float = 100.0):
    """The same springs with masses: q_i' = v_i, v_i' = k (q_{i-1} - 2 q_i + q_{i+1})."""
    q = [sp.Symbol(f"q{i}", real=True) for i in range(n)]
    states = []
    for i in range(n):
        spring = (q[i - 1] if i else 0) - 2 * q[i] + (q[i + 1] if i < n - 1 else 0)
        states.append(State(f"q{i}", initial=0.0, range=(-1, 1),
                            rate=sp.Symbol(f"v{i}", real=True)))
        states.append(State(f"v{i}", initial=0.0, range=(-1, 1), rate=k * spring))
    return define("ladder", states)


def test_the_gate_uses_the_sparse_bound_on_a_large_model():
    # The tridiagonal matrix k*(1, -2, 1) has eigenvalues -2k (1 - cos(j pi / (n + 1))), j = 1..n
    # (Smith, Numerical Solution of Partial Differential Equations, 3rd ed. 1985, section 2.11;
    # from memory); forward Euler needs h <= 2 / max |lambda| (common practice, no source).
    n, k = 300, 100.0
    assert n > DENSE_STATES
    limit = 2 / (2 * k * (1 + math.cos(math.pi / (n + 1))))
    model = chain(n, k)
    below = stability_gate(model, builtin("euler"), 0.95 * limit)
    assert below.passed and below.basis == "Gershgorin discs at 9 operating points"
    above = stability_gate(model, builtin("euler"), 1.05 * limit)
    assert not above.passed and above.basis.startswith("largest Ritz values of 60 Arnoldi steps")
    assert above.limit == pytest.approx(limit, rel=1e-3)


def test_the_sparse_bound_finds_oscillating_modes():
    # Masses and springs: eigenvalues +-i*omega_j with omega_j = 2 sqrt(k) sin(j pi / (2 (n + 1)))
    # (the same tridiagonal spectrum); classical RK4 is stable on the imaginary axis up to
    # |h omega| = 2 sqrt(2) (Hairer and Wanner, Solving ODEs II, section IV.2; from memory).
    n, k = 150, 100.0
    omega = 2 * math.sqrt(k) * math.sin(n * math.pi / (2 * (n + 1)))
    limit = 2 * math.sqrt(2) / omega
    model = ladder(n, k)
    assert stability_gate(model, builtin("rk4"), 0.95 * limit).passed
    above = stability_gate(model, builtin("rk4"), 1.05 * limit)
    assert not above.passed and "Arnoldi" in above.basis
    assert above.limit == pytest.approx(limit, rel=1e-2)
    assert abs(above.eigenvalue.imag) == pytest.approx(omega, rel=1e-2)


# ---- stops named by their status -----------------------------------------------------------------

def test_no_convergence_is_named_and_nothing_says_non_finite(write_model):
    # Backward Euler on x' = x^2 + 1 from x0 = 1 with h = 1 must solve x1 = 1 + x1^2 + 1, which has
    # no real root (discriminant 1 - 8 < 0): Newton cannot converge on the first tick.
    path = write_model('name = "noroot"\n[states]\nx = { initial = 1.0, rate = "x*x + 1" }\n')
    result = run("check", path, "--method", "backward-euler", "--dt", 1, "--precision", "double")
    assert result.exit_code == 1
    lines = result.stdout.splitlines()
    assert "  run double               FAIL  the C stopped at tick 1, t = 1 s: status " \
           "NO_CONVERGENCE: the implicit solve did not converge within its iteration limit" in lines
    assert not any("non-finite" in line for line in lines)
    assert "  order                          not run: the double run stopped at tick 1" in lines
    fails = [line.split()[0] for line in lines if " FAIL " in line]
    assert fails == ["run"]  # nothing was compared, so no figure line can fail


def test_nonfinite_is_named_at_the_tick_it_happens():
    # Forward Euler on x' = x^2 from 1 with h = 1: x <- x + x^2 gives 2, 6, 42, 1806, 3263442,
    # 1.07e13, 1.13e26, 1.29e52 (over float32's 3.4e38: tick 8), 1.6e104, 2.7e208, then over
    # double's 1.8e308 at tick 11.
    x = sp.Symbol("x", real=True)
    model = define("blow", states=[State("x", initial=1.0, rate=x * x)])
    report = check(model, builtin("euler"), 1.0, ticks=50)
    stops = {c.precision: (c.completed + 1, c.status) for c in report.cross_checks}
    assert stops == {"float": (8, "NONFINITE"), "double": (11, "NONFINITE")}
    assert not report.passed and report.order is None
    assert report.order_skipped == "not run: the float run stopped at tick 8"


# ---- the worst tick and state --------------------------------------------------------------------

def test_the_accuracy_line_names_the_tick_of_the_largest_error():
    # x' = -x from 1: exp(-t) exactly; forward Euler with h = 0.1 gives 0.9^k, so the error at
    # tick k is exp(-0.1 k) - 0.9^k (closed forms), largest at one tick.
    x = sp.Symbol("x", real=True)
    model = define("decay", states=[State("x", initial=1.0, rate=-x, range=(-1, 1))])
    c = cross_check(model, builtin("euler"), 0.1, 1, "double", 60)
    k = np.arange(61)
    error = np.exp(-0.1 * k) - 0.9 ** k
    assert (c.accuracy_state, c.accuracy_tick) == ("x", int(np.argmax(error)))
    assert c.error_vs_high_accuracy == pytest.approx(error.max(), rel=1e-6)


# ---- check on the user's inputs ------------------------------------------------------------------

def drive_check(*extra):
    result = run("check", DRIVE, "--method", "rk4", "--dt", 3e-5, "--precision", "double",
                 "--no-order", "--json", *extra)
    return result, json.loads(result.stdout)


def test_check_on_a_recorded_supply_dip_measures_that_scenario():
    sweep_result, sweep = drive_check()
    dip_result, dip = drive_check("--inputs", SUPPLY_DIP)
    assert sweep_result.exit_code == 0 and sweep["passed"]
    [s], [d] = sweep["cross_checks"], dip["cross_checks"]
    assert (sweep["scenario"], dip["scenario"]) == ("input sweep", SUPPLY_DIP.name)
    assert d["ticks"] == 300 and d["compared"] == 300
    # The dip rings the input filter: the error in its current is several times the sweep's,
    # beyond the 1 % target, and the report says where.
    assert d["error_vs_high_accuracy"] > 0.01 > s["error_vs_high_accuracy"]
    assert d["error_vs_high_accuracy"] > 3 * s["error_vs_high_accuracy"]
    assert d["accuracy_state"] in ("i_L1", "i_L2")
    dip_start = 67  # the first tick at 36 V
    assert d["accuracy_tick"] >= dip_start
    assert d["accuracy_time"] == pytest.approx(d["accuracy_tick"] * 3e-5)
    assert dip_result.exit_code == 1 and not dip["passed"] and d["max_difference"] <= d["tolerance"]
    relaxed_result, relaxed = drive_check("--inputs", SUPPLY_DIP, "--tolerance", 0.05)
    assert relaxed_result.exit_code == 0 and relaxed["passed"]
    short_result, short = drive_check("--inputs", SUPPLY_DIP, "--ticks", 50)
    assert short["cross_checks"][0]["ticks"] == 50


def test_check_text_names_the_log_and_the_worst_tick():
    result = run("check", DRIVE, "--method", "rk4", "--dt", 3e-5, "--precision", "double",
                 "--no-order", "--inputs", SUPPLY_DIP)
    lines = result.stdout.splitlines()
    assert "  inputs                         drive_supply_dip.csv, 300 ticks" in lines
    [accuracy] = [line for line in lines if line.startswith("  accuracy double")]
    assert " FAIL " in accuracy and " at tick " in accuracy and ", t = " in accuracy


# ---- tunable parameters --------------------------------------------------------------------------

def heater_curve(t, c_th, t0=20.0, duty=1.0):
    """The heater with its duty held, a first-order linear ODE in closed form:
    T = T_amb + (T0 - T_amb) e^(-t/tau) + P R_th duty (1 - e^(-t/tau)), tau = R_th C_th,
    with P = 40 W, R_th = 2.5 K/W and T_amb = 20 degC (examples/heater.toml)."""
    tau = 2.5 * c_th
    return 20.0 + (t0 - 20.0) * np.exp(-t / tau) + 40.0 * 2.5 * duty * (1 - np.exp(-t / tau))


def replay_rows(path) -> np.ndarray:
    with open(path) as f:
        return np.array([[float(v) for v in row] for row in list(csv.reader(f))[1:]])


def test_set_and_a_parameter_column_change_the_replay_as_the_closed_form_predicts(tmp_path):
    log = tmp_path / "duty.csv"
    log.write_text("t,duty\n" + "".join(f"{k},1\n" for k in range(100)))
    out = tmp_path / "set.csv"
    result = run("replay", HEATER, "--method", "rk4", "--dt", 1, "--inputs", log, "--out", out,
                 "--precision", "double", "--set", "C_th=80")
    assert result.exit_code == 0, result.output
    rows = replay_rows(out)
    np.testing.assert_allclose(rows[:, 1], heater_curve(rows[:, 0], 80.0), rtol=1e-6)
    assert abs(rows[-1, 1] - heater_curve(100.0, 120.0)) > 1.0  # the model's 120 differs
    # A column switches C_th from 120 to 80 after 50 ticks: the curve restarts from tick 50.
    stepped = tmp_path / "stepped.csv"
    stepped.write_text("t,duty,C_th\n" + "".join(f"{k},1,{120 if k < 50 else 80}\n"
                                                  for k in range(100)))
    result = run("replay", HEATER, "--method", "rk4", "--dt", 1, "--inputs", stepped, "--out",
                 out, "--precision", "double")
    assert result.exit_code == 0, result.output
    rows = replay_rows(out)
    first = heater_curve(rows[:51, 0], 120.0)
    second = heater_curve(rows[50:, 0] - 50.0, 80.0, t0=first[-1])
    np.testing.assert_allclose(rows[:, 1], np.concatenate([first, second[1:]]), rtol=1e-6)


def test_check_gives_the_reference_the_same_per_tick_parameters(tmp_path):
    # C_th swings over its range tick by tick: a reference that kept the model's 120 would be
    # far from the C (the heater's time constant changes by a factor 2.5).
    log = tmp_path / "cal.csv"
    log.write_text("t,duty,C_th\n" + "".join(f"{k * 0.5},{0.3 + 0.5 * (k % 2)},{80 + k}\n"
                                              for k in range(120)))
    result = run("check", HEATER, "--method", "heun", "--dt", 0.5, "--inputs", log, "--json",
                  "--no-order")
    assert result.exit_code == 0, result.output
    report = json.loads(result.stdout)
    assert report["parameters"] == {"C_th": "column"} and report["passed"]
    assert all(c["max_difference"] <= c["tolerance"] for c in report["cross_checks"])
    result = run("check", HEATER, "--method", "heun", "--dt", 0.5, "--set", "C_th=200",
                 "--json", "--no-order", "--ticks", 50)
    assert json.loads(result.stdout)["parameters"] == {"C_th": 200.0}


@pytest.mark.parametrize("pair, fragment", [
    ("R_th=3", "parameter 'R_th' is not tunable (its value is baked into the C); set "
               "parameters.R_th.tunable = true"),
    ("C_t=100", "no tunable parameter 'C_t' (did you mean 'C_th'?)"),
    ("R_t=3", "no tunable parameter 'R_t' (did you mean 'R_th'? It is not tunable: set "
              "parameters.R_th.tunable = true"),
    ("C_th", "expected NAME=VALUE"),
    ("C_th=warm", "'warm' is not a number"),
])
def test_set_refuses_what_it_cannot_set_in_one_line(pair, fragment, tmp_path, nothing_built):
    result = run("check", HEATER, "--method", "rk4", "--dt", 0.1, "--set", pair)
    assert result.exit_code == 1 and not nothing_built
    [line] = error_lines(result)
    assert fragment in line and str(HEATER) in line


def test_a_parameter_set_twice_and_a_fixed_column_are_refused(heater, tmp_path):
    log = tmp_path / "log.csv"
    log.write_text("t,duty,C_th\n0,1,90\n1,1,95\n")
    inputs = read_log(log, heater)
    assert inputs.parameters["C_th"].tolist() == [90.0, 95.0]
    with pytest.raises(CheckError, match="'C_th' has a column and a --set value"):
        parameter_table(heater, 2, parameter_settings(heater, ["C_th=100"]), inputs.parameters,
                        str(log))
    log.write_text("t,duty,R_th\n0,1,2\n")
    with pytest.raises(CheckError, match=r"parameter 'R_th' is not tunable \(set "
                                         r"parameters.R_th.tunable = true"):
        read_log(log, heater)
    assert parameter_table(heater, 3) is None


# ---- non-smooth models ---------------------------------------------------------------------------

def test_non_smooth_functions_are_found_in_the_rates(write_model):
    tank = load_model(write_model(TANK))
    assert non_smooth(tank) == ("Piecewise in states.h.rate",)
    assert non_smooth(load_model(HEATER)) == ()
    x = sp.Symbol("x", real=True)
    friction = define("f", states=[State("x", rate=-sp.sign(x) - sp.Min(x, 1) + sp.Abs(x))])
    assert non_smooth(friction) == ("Abs in states.x.rate", "Min in states.x.rate",
                                    "sign in states.x.rate")


def test_an_accurate_piecewise_model_passes_check(write_model):
    result = run("check", write_model(TANK), "--method", "rk4", "--dt", 0.5)
    assert result.exit_code == 0, result.output
    lines = result.stdout.splitlines()
    assert "  order                          order not measurable (non-smooth model): " \
           "Piecewise in states.h.rate" in lines
    assert lines[-1] == "verdict: PASS"


def test_a_gate_that_cannot_decide_says_so_without_a_verdict(write_model):
    # 1/x at x = 0: df/dx = -1/x^2 - 1 is not finite at the only operating point.
    from codegen.report.text import stability_line

    model = load_model(write_model('name = "pole"\n[states]\nx = { initial = 0.0, rate = '
                                   '"1/x - x" }\n'))
    gate = stability_gate(model, builtin("rk4"), 0.1)
    assert gate.passed and not gate.decided and "not finite" in gate.basis
    assert stability_line(gate).split()[:2] == ["stability", "dt"]  # no ok, no FAIL
