"""Text and JSON reports (codegen.report): exact lines from report objects built by hand."""

from __future__ import annotations

import json
import math

import pytest

from codegen.report import CheckOutcome
from codegen.report.json import check_data, json_text
from codegen.report.text import (check_lines, estimate_line, methods_table, replay_done_line,
                                 replay_stop_message, run_command_text, target_lines,
                                 targets_table)
from codegen.run import Replay
from codegen.targets import TargetReport, load_target
from codegen.advice.gate import StabilityGate
from codegen.verify import CheckReport, CrossCheck, OrderStudy
from codegen.verify.audit import CoefficientAudit
from codegen.verify.estimate import EstimateCheck

from conftest import readme_indented_block

STRICT = "gcc -std=c99 -Wall ... -Werror -ffp-contract=off -O2 -c axis.c -o out.o"


def cross(precision, difference, bound, error, passed=True, completed=200, status="OK",
          worst=(154, 108), state="i", ratios=None, literals=30):
    ratios = ratios or {state: difference / bound}
    return CrossCheck(precision=precision, ticks=200, completed=completed,
                      max_difference=difference, tolerance=bound, worst_state=state,
                      error_vs_high_accuracy=error, accuracy_tolerance=0.01, accurate=passed,
                      passed=passed, status=status, compared=completed,
                      accuracy_compared=completed, worst_tick=worst[0], accuracy_state="i",
                      accuracy_tick=worst[1], ratio=ratios[state], state_ratios=ratios,
                      coefficients=CoefficientAudit(literals, (), True))


# The axis' gate at rk4 and 0.1 ms: its fastest eigenvalue sets the limit.
AXIS_GATE = StabilityGate(method="rk4", dt=1e-4, substeps=1, passed=True, decided=True,
                          basis="dense eigenvalues at 50 operating points",
                          eigenvalue=complex(-2983, 0), limit=0.000934)


def axis_report(passed=True, order=True) -> CheckReport:
    """The figures of the README's example check of the axis model."""
    study = OrderStudy(4, 0.000673, (64, 128, 256), (1e-6, 6e-8, 4e-9), (1e-6, 6e-8, 4e-9), 4.01,
                       True) if order else None
    return CheckReport(method="rk4", model="axis", dt=1e-4, substeps=1, strict_compile=STRICT,
                       cross_checks=(cross("float", 7.23e-12, 1.46e-11, 4.72e-06, passed,
                                           worst=(167, 108), state="x",
                                           ratios=dict(i=0.25, w=0.48, x=0.4996)),
                                     cross("double", 7.11e-15, 1.57e-14, 4.7e-06,
                                           worst=(76, 107), state="w",
                                           ratios=dict(i=0.25, w=0.45, x=0.27))),
                       order=study, passed=passed, stability=AXIS_GATE)


def readme_check_block() -> list[str]:
    """The indented example under 'Reading the check output' in the README."""
    return readme_indented_block("## Reading the check output")


def test_check_lines_are_the_readme_s_example():
    lines = check_lines(CheckOutcome(axis_report(), "classical RK4"))
    assert len(lines) == 14
    assert lines == readme_check_block()


@pytest.mark.parametrize("status, meaning", [
    ("NO_CONVERGENCE", "the implicit solve did not converge within its iteration limit"),
    ("NONFINITE", "a result was NaN or infinite (bad input or overflow)")])
def test_a_run_that_stopped_names_its_status_on_its_own_fail_line(status, meaning):
    # The figures over the 120 ticks taken are inside their bounds: those lines say ok, and the
    # stop alone fails the check.
    report = axis_report(passed=False, order=False)
    bad = cross("float", 1e-6, 0.00238, 1e-3, passed=False, completed=120, status=status,
                worst=(37, 120))
    bad = CrossCheck(**{**bad.__dict__, "accurate": True})
    report = CheckReport(**{**report.__dict__, "cross_checks": (bad,),
                            "order_skipped": "not run: the float run stopped at tick 121"})
    lines = check_lines(CheckOutcome(report, "classical RK4"))
    assert lines[4:] == [
        "  cross-check float        ok    max |C - reference| = 1e-06 (bound 0.00238, ratio "
        "0.00042) in i at tick 37, t = 0.0037 s; 120 ticks",
        "                                 observed/bound per state: i 0.00042",
        "  coefficients float       ok    every literal of the C (30) equals the correctly rounded "
        "exact value of the IR",
        "  accuracy float           ok    max |C - solve_ivp| = 0.1 % of the state's scale "
        "(target 1 %) in i at tick 120, t = 0.012 s",
        f"  run float                FAIL  the C stopped at tick 121, t = 0.0121 s: status "
        f"{status}: {meaning}",
        "  order                          not run: the float run stopped at tick 121",
        "verdict: FAIL"]
    assert not any("non-finite" in line for line in lines)


def test_an_order_study_without_a_measured_order_shows_its_note():
    note = "exact discretization: error at the reference's tolerance at every step size"
    study = OrderStudy(None, 2.0, (2, 4, 8), (1e-16,) * 3, (), None, True, note)
    report = CheckReport(**{**axis_report().__dict__, "order": study})
    assert check_lines(CheckOutcome(report, "x"))[-2] == f"  order                    ok    {note}"


def target_report(**changes) -> TargetReport:
    fields = dict(target="cortex-m4f", precision="float", passed=True, matches_host=True,
                  comparison="exact bits", max_ulp=0, ticks=50, flash_bytes=412, stack_bytes=24,
                  stack_excludes=(), instructions_per_tick=187, instructions_mean=180.5,
                  image_bytes=9000, double_free=True, double_symbols=(), warnings=(), misra=(),
                  misra_deviations=("misra-c2012-2.5",), sanitizers=None, problems=(),
                  commands=())
    fields.update(changes)
    return TargetReport(**fields)


def test_target_lines():
    assert target_lines(target_report()) == [
        "target cortex-m4f float  ok    bit-identical to the host; flash 412 B, stack 24 B, 187 "
        "instructions per tick",
        "                         ok    no double-precision code in the float build",
        "                         ok    MISRA C:2012 (cppcheck): 0 finding(s), 1 documented "
        "deviation(s)"]
    failed = target_report(passed=False, double_free=False, double_symbols=("__aeabi_dadd",),
                           instructions_per_tick=None, problems=("float build uses double",))
    assert target_lines(failed) == [
        "target cortex-m4f float  FAIL  bit-identical to the host; flash 412 B, stack 24 B, n/a "
        "instructions per tick",
        "                         FAIL  no double-precision code in the float build: "
        "__aeabi_dadd",
        "                         ok    MISRA C:2012 (cppcheck): 0 finding(s), 1 documented "
        "deviation(s)",
        "                               float build uses double"]


def test_estimate_lines_align_with_the_other_checks():
    e = EstimateCheck(precision="double", ticks=200, max_difference=3.5e-20, tolerance=1.5e-18,
                      largest_estimate=2.7e-11, passed=True)
    assert estimate_line(e) == (
        "error estimate double    ok    max |C - reference| = 3.5e-20 (rounding bound 1.5e-18); "
        "largest estimate 2.7e-11 of full scale over 200 ticks")


def test_options_add_their_lines_before_the_verdict_and_can_fail_it():
    outcome = CheckOutcome(axis_report(order=False), "classical RK4",
                           targets=(target_report(passed=False),), pictures=("p/a.png",))
    lines = check_lines(outcome)
    assert lines[-5] == "  picture: p/a.png"
    assert lines[-4].startswith("  target cortex-m4f float  FAIL  ")
    assert lines[-1] == "verdict: FAIL" and not outcome.passed and outcome.report.passed


def test_check_json_flattens_one_target_and_passes_only_when_all_pass():
    outcome = CheckOutcome(axis_report(), "classical RK4", targets=(target_report(),))
    data = json.loads(json_text(check_data(outcome)))
    assert data["passed"] is True and data["targets"][0]["target"] == "cortex-m4f"
    assert (data["matches_host"], data["flash_bytes"], data["stack_bytes"],
            data["instructions_per_tick"]) == (True, 412, 24, 187)
    assert list(data)[-1] == "passed" and "extras" not in data and "pictures" not in data
    two = CheckOutcome(axis_report(), "classical RK4",
                       targets=(target_report(), target_report(precision="double", passed=False)))
    data = check_data(two)
    assert "flash_bytes" not in data and data["passed"] is False


def test_json_writes_non_finite_numbers_as_null():
    report = CheckReport(**{**axis_report().__dict__,
                            "cross_checks": (cross("float", math.inf, 1.0, math.nan, False),)})
    data = json.loads(json_text(check_data(CheckOutcome(report, "x"))))
    assert data["cross_checks"][0]["max_difference"] is None
    assert data["cross_checks"][0]["error_vs_high_accuracy"] is None


def test_methods_table_line():
    row = dict(id="rk4", name="classical RK4", stages=4, order=4, embedded_order=None,
               kind="explicit", a_stable=False, l_stable=False, real_axis_limit=-2.785293563,
               imag_axis_limit=2.828427125, source="HNW I, II.1", order_note=None)
    lines = methods_table([row])
    assert lines[1] == ("rk4                     4      4  explicit             n n     -2.785 "
                        "     2.828  classical RK4; HNW I, II.1")
    unbounded = dict(row, id="be", order=1, embedded_order=None, kind="diagonally implicit",
                     a_stable=True, l_stable=True, real_axis_limit=None, imag_axis_limit=None)
    assert methods_table([unbounded])[1].startswith(
        "be                      4      1  diagonally implicit  y y  unbounded  unbounded  ")
    # A method decided to a tolerance gets a note line under the table.
    noted = dict(row, id="mine", order_note="decimal data: conditions to 1e-12")
    assert "mine: order 4 (decimal data: conditions to 1e-12)" in methods_table([noted])


def test_methods_table_spells_out_the_abbreviations_its_rows_use():
    row = dict(id="sdirk2", name="SDIRK2 (Alexander)", stages=2, order=2, embedded_order=None,
               kind="diagonally implicit", a_stable=True, l_stable=True, real_axis_limit=None,
               imag_axis_limit=None, source="R. Alexander, SIAM Journal 14 (1977)",
               order_note=None)
    lines = methods_table([row])
    assert lines[-1] == ("abbreviations: RK Runge-Kutta; SDIRK singly diagonally implicit "
                         "Runge-Kutta; SIAM Society for Industrial and Applied Mathematics.")
    assert not any(line.startswith("order p(q)") for line in lines)
    plain = dict(row, name="backward Euler", source="a book", embedded_order=None)
    assert not any(line.startswith("abbreviations") for line in methods_table([plain]))
    embedded = dict(plain, embedded_order=1)
    assert any(line.startswith("order p(q): ") for line in methods_table([embedded]))


def test_targets_table_shows_a_readable_run_command():
    assert run_command_text(("qemu", "-kernel", "{elf}")) == "qemu -kernel <program>"
    assert run_command_text(("sim", "--image={elf}")) == "sim --image=<program>"
    host = load_target("host")
    lines = targets_table([host])
    assert lines[1] == "host         double     float, double  gcc  <program>"
    assert all("{elf}" not in line for line in targets_table([load_target("cortex-m4f")]))


def stopped_replay() -> Replay:
    return Replay(time_name="t", state_names=("x",), output_names=(), t=[0.0, 1.0, 2.0],
                  states=[[1.0], [2.0], [6.0]], outputs=[[], [], []], ticks=50, completed=2,
                  status=1)


def test_replay_lines():
    run = stopped_replay()
    assert replay_stop_message("log.csv", "r.csv", run, 0.5) == (
        "log.csv: tick 3 (t = 1.5 s): status NONFINITE; r.csv holds the 3 rows before it")
    done = Replay(time_name="t", state_names=("x",), output_names=(), t=[0.0, 1.0],
                  states=[[1.0], [2.0]], outputs=[[], []], ticks=1, completed=1, status=0)
    assert replay_done_line("r.csv", done) == "r.csv: 2 rows (1 ticks)"


@pytest.mark.parametrize("changes, fragment", [
    ({"completed": 50}, "a run stops early exactly when a tick fails"),
    ({"status": 0}, "a run stops early exactly when a tick fails"),
    ({"t": [0.0, 1.0]}, "t has shape (2,), expected (3,)"),
])
def test_an_inconsistent_replay_is_refused(changes, fragment):
    from codegen.errors import CheckError

    fields = dict(stopped_replay().__dict__, **changes)
    with pytest.raises(CheckError, match=fragment.replace("(", r"\(").replace(")", r"\)")):
        Replay(**fields)
