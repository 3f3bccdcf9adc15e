"""Reports for people: each function turns a report object into the lines the CLI prints.

The check lines are documented in the README ("Reading the check output"): a label column of
LABEL_WIDTH characters, a verdict column of VERDICT_WIDTH, then the figures.
"""

from __future__ import annotations

import math

import numpy as np

from ..emit import STATUS_CODES
from ..run import Replay
from ..verify import COLUMN, SWEEP

# Status name -> what it means, as the generated header documents it.
STATUS_MEANINGS = {name: meaning for name, _, meaning in STATUS_CODES}

# Width of the label column of the check lines ('cross-check double', 'target cortex-m4f float').
LABEL_WIDTH = 24
# Width of the verdict column ('ok', 'FAIL').
VERDICT_WIDTH = 5
# What the targets table shows where a target's run command takes the program's path.
PROGRAM = "<program>"
# Abbreviations in method names and citations, spelled out under the methods table when a row
# uses them (the names and titles themselves stay as published).
ABBREVIATIONS = (
    ("RK", "Runge-Kutta"),
    ("SSP", "strong stability preserving"),
    ("SDIRK", "singly diagonally implicit Runge-Kutta"),
    ("ROS", "Rosenbrock"),
    ("O.D.E.", "ordinary differential equation"),
    ("SIAM", "Society for Industrial and Applied Mathematics"),
)


def verdict(passed: bool) -> str:
    return "ok" if passed else "FAIL"


class Row(str):
    """A check line as text, remembering its parts (label, verdict and figures) for a table."""

    label: str
    verdict: str
    figures: str


def row(label: str, passed: bool | None, text: str) -> Row:
    """One check line: label, verdict (blank for a continuation line) and the figures."""
    mark = "" if passed is None else verdict(passed)
    line = Row(f"{label:<{LABEL_WIDTH}} {mark:<{VERDICT_WIDTH}} {text}")
    line.label, line.verdict, line.figures = label, mark, text
    return line


# ---- check ----------------------------------------------------------------------------------------

def _at(tick: int, dt: float) -> str:
    """Where a figure was found: 'tick 37, t = 0.0037 s' (tick 0 is the start)."""
    return f"tick {tick}, t = {tick * dt:g} s"


def cross_check_lines(c, dt: float) -> list[str]:
    """The cross-check, coefficient audit and accuracy lines of one verify.CrossCheck, and why a
    run stopped.

    Each verdict is for the figure on its line, over the ticks compared; a run that stopped
    early gets its own FAIL line, with the status by its name (emit.STATUS_CODES).
    """
    if c.compared == 0:
        lines = [row(f"cross-check {c.precision}", None, "nothing to compare: no tick completed")]
    else:
        lines = [row(f"cross-check {c.precision}", c.max_difference <= c.tolerance,
                     f"max |C - reference| = {c.max_difference:.3g} (bound {c.tolerance:.3g}, "
                     f"ratio {c.ratio:.2g}) in {c.worst_state} at {_at(c.worst_tick, dt)}; "
                     f"{c.compared} ticks")]
        if c.state_ratios:
            lines.append(row("", None, "observed/bound per state: " + ", ".join(
                f"{name} {ratio:.2g}" for name, ratio in c.state_ratios.items())))
    if c.coefficients is not None:
        a = c.coefficients
        lines.append(row(f"coefficients {c.precision}", a.passed,
                         f"every literal of the C ({a.literals}) equals the correctly rounded "
                         "exact value of the IR" if a.passed else
                         f"{len(a.problems)} of {a.literals} literals differ from the IR"))
        lines += [row("", None, problem) for problem in a.problems]
    if c.accuracy_compared == 0:
        lines.append(row(f"accuracy {c.precision}", None, "not measured: no tick completed"))
    else:
        lines.append(row(f"accuracy {c.precision}", c.accurate,
                         f"max |C - solve_ivp| = {100 * c.error_vs_high_accuracy:.3g} % of the "
                         f"state's scale (target {100 * c.accuracy_tolerance:g} %) in "
                         f"{c.accuracy_state} at {_at(c.accuracy_tick, dt)}"))
    if c.completed < c.ticks:
        k = c.completed + 1
        lines.append(row(f"run {c.precision}", False,
                         f"the C stopped at {_at(k, dt)}: status {c.status}: "
                         f"{STATUS_MEANINGS.get(c.status, 'unknown status')}"))
    elif c.compared < c.ticks:
        k = c.compared + 1
        lines.append(row(f"run {c.precision}", False, f"the reference stopped at {_at(k, dt)}: "
                                                      "a state became non-finite"))
    elif c.accuracy_compared < c.ticks:
        k = c.accuracy_compared + 1
        lines.append(row(f"run {c.precision}", False, f"solve_ivp stopped at {_at(k, dt)}: no "
                                                      "accurate solution beyond it (the model "
                                                      "may blow up there)"))
    return lines


def order_line(o) -> str:
    """The line of one verify.OrderStudy (a study that could not measure has no verdict)."""
    if not o.measurable:
        return row("order", None, o.note)
    if o.measured is None:
        return row("order", o.passed, o.note)
    return row("order", o.passed, f"measured {o.measured:.2f} (expected {o.expected}) from "
                                  f"{o.steps[0]}..{o.steps[-1]} steps over {o.horizon:.3g} s")


def inputs_line(r) -> str:
    """What the runs of a CheckReport took: the sweep or a log, and any parameters set."""
    source = "each input sweeps its range" if r.scenario == SWEEP else r.scenario
    ticks = r.cross_checks[0].ticks if r.cross_checks else 0
    text = f"{source}, {ticks} ticks"
    if r.parameters:
        text += "; " + ", ".join(f"{name} per tick (column)" if value == COLUMN else
                                 f"{name} = {value:g} (--set)" for name, value in r.parameters)
    return row("inputs", None, text)


def stability_line(g) -> str:
    """The line of one advice.gate.StabilityGate (no verdict when it could not decide)."""
    return row("stability", g.passed if g.decided else None, g.summary)


def estimate_line(e) -> str:
    """The line of one verify.estimate.EstimateCheck."""
    return row(f"error estimate {e.precision}", e.passed,
               f"max |C - reference| = {e.max_difference:.3g} (rounding bound "
               f"{e.tolerance:.3g}); largest estimate {e.largest_estimate:.3g} of full scale "
               f"over {e.ticks} ticks")


def target_lines(r) -> list[str]:
    """The lines of one targets.TargetReport: figures, double-precision check, MISRA, problems."""
    same = "bit-identical to the host" if r.matches_host and r.max_ulp == 0 else r.comparison
    ipt = "n/a" if r.instructions_per_tick is None else f"{r.instructions_per_tick}"
    lines = [row(f"target {r.target} {r.precision}", r.passed,
                 f"{same}; flash {r.flash_bytes} B, stack {r.stack_bytes} B, {ipt} instructions "
                 "per tick")]
    if r.double_free is not None:
        lines.append(row("", r.double_free, "no double-precision code in the float build"
                         + ("" if r.double_free else f": {', '.join(r.double_symbols)}")))
    lines.append(row("", not r.misra, f"MISRA C:2012 (cppcheck): {len(r.misra)} finding(s), "
                                      f"{len(r.misra_deviations)} documented deviation(s)"))
    lines += [row("", None, p) for p in r.problems]
    return lines


def check_lines(outcome) -> list[str]:
    """Every line of `tickwright check` for a report.CheckOutcome, the verdict last."""
    r = outcome.report
    note = f"; {outcome.method_note}" if outcome.method_note else ""
    lines = [f"{r.model}: {outcome.method_name} ({r.method}{note}), dt = {r.dt:g} s, {r.substeps} "
             "substep(s)"]
    lines += ["  " + line for line in check_body(outcome)]
    lines.append("verdict: " + ("PASS" if outcome.passed else "FAIL"))
    return lines


def check_body(outcome) -> list[str]:
    """The lines of check_lines between the title and the verdict: a Row per check, then a line
    per picture."""
    r = outcome.report
    body = [row("strict compile", True, r.strict_compile)]
    if r.stability is not None:
        body.append(stability_line(r.stability))
    body.append(inputs_line(r))
    for c in r.cross_checks:
        body += cross_check_lines(c, r.dt)
    if r.order is not None:
        body.append(order_line(r.order))
    elif r.order_skipped:
        body.append(row("order", None, r.order_skipped))
    body += [estimate_line(e) for e in outcome.estimates]
    body += [f"picture: {p}" for p in outcome.pictures]
    for t in outcome.targets:
        body += target_lines(t)
    return body


# ---- replay ---------------------------------------------------------------------------------------

def replay_done_line(out_path, replay: Replay) -> str:
    """The line after a replay that took every tick."""
    return f"{out_path}: {replay.completed + 1} rows ({replay.ticks} ticks)"


def replay_stop_message(source, out_path, replay: Replay, dt: float) -> str:
    """The error after a replay that stopped: which tick, its status, what the file holds."""
    k = replay.completed + 1
    return (f"{source}: tick {k} (t = {k * dt:g} s): status {replay.status_name}; {out_path} "
            f"holds the {k} rows before it")


# ---- methods and targets --------------------------------------------------------------------------

def _limit(v) -> str:
    return "unbounded" if v is None else f"{v:.4g}"


def methods_table(rows) -> list[str]:
    """The table of `tickwright methods` from report.json.method_rows, and its legend."""
    lines = [f"{'id':<18} {'stages':>6} {'order':>6}  {'kind':<20} {'A':>1} {'L':>1} "
             f"{'real axis':>10} {'imag axis':>10}  name / source"]
    for r in rows:
        order = "-" if r["order"] is None else \
            f"{r['order']}" + (f"({r['embedded_order']})" if r["embedded_order"] else "")
        flags = f"{'y' if r['a_stable'] else 'n'} {'y' if r['l_stable'] else 'n'}"
        lines.append(f"{r['id']:<18} {r['stages']:>6} {order:>6}  {r['kind']:<20} {flags} "
                     f"{_limit(r['real_axis_limit']):>10} {_limit(r['imag_axis_limit']):>10}  "
                     f"{r['name']}; {r['source']}")
    lines += [f"{r['id']}: order {r['order']} ({r['order_note']})" for r in rows if r["order_note"]]
    lines.append("A, L: A-stable, L-stable (y yes, n no); real axis, imag axis: where the "
                 "stability region |R(z)| <= 1 ends on the negative real and on the imaginary "
                 "axis, z = h*lambda (h the step, lambda an eigenvalue of the Jacobian, R the "
                 "method's stability function); unbounded: it never ends there.")
    if any(r["embedded_order"] for r in rows):
        lines.append("order p(q): order p, with an embedded solution of order q for the error "
                     "estimate.")
    text = " ".join(f"{r['name']} {r['source']}" for r in rows)
    used = [f"{short} {long}" for short, long in ABBREVIATIONS if short in text]
    if used:
        lines.append("abbreviations: " + "; ".join(used) + ".")
    return lines


def run_command_text(command) -> str:
    """A target's run command as a person reads it: the program's path placeholder as PROGRAM."""
    return " ".join(PROGRAM if arg == "{elf}" else arg.replace("{elf}", PROGRAM)
                    for arg in command)


def targets_table(targets) -> list[str]:
    """The table of `tickwright targets`: id, precisions, compiler and the run command."""
    lines = [f"{'id':<12} {'precision':<10} {'in hardware':<14} compiler / run command"]
    for t in targets:
        hw = ", ".join(t.hardware_precisions) or "none"
        lines.append(f"{t.id:<12} {t.default_precision:<10} {hw:<14} {t.cc}  "
                     f"{run_command_text(t.run_command)}")
    return lines


# ---- advice ---------------------------------------------------------------------------------------

def _seconds(v) -> str:
    """A time in seconds, or 'unbounded' (no unit) for an infinite one."""
    return "unbounded" if v is None or not math.isfinite(v) else f"{v:.4g} s"


def _mode(v) -> str:
    """An eigenvalue with its time constant 1/|Re lambda| and, oscillating, its period."""
    v = complex(v)
    if v.imag == 0:
        return f"{v.real:.4g} 1/s (time constant {1 / -v.real:.3g} s)"
    period = f"period {2 * math.pi / abs(v.imag):.3g} s"
    if v.real >= 0:
        return f"{v.real:.4g}{v.imag:+.4g}j 1/s (undamped, {period})"
    return f"{v.real:.4g}{v.imag:+.4g}j 1/s (time constant {1 / -v.real:.3g} s, {period})"


def _long_run(e) -> str:
    """The long run's simulated time at a row's tick, '*' when it stopped at the cap."""
    if e is None or e.long is None:
        return "-"
    return f"{e.long.steps * e.dt:.3g} s" + ("*" if e.long_capped else "")


def advice_rule_lines(advice) -> list[str]:
    """How the advice decides: the rule and the estimates, with this model's figures."""
    from ..advice.recommend import (LONG_RUN_TICKS, MONOTONE_CHECKS, ROUNDOFF_SHARE,
                                    SHORT_RUN_TICKS, TRUNCATION_SHARE, share_text)

    switches = (" (the model switches: Piecewise, abs, min or max; the runs assume order 1 "
                "at a switch)") if advice.non_smooth else ""
    return [
        f"  rule: a tick is advised when its estimated truncation error is at most "
        f"{advice.target:.2g} = {share_text(TRUNCATION_SHARE)} of full scale (the other "
        f"{share_text(ROUNDOFF_SHARE)} is for round-off), Newton's method of an implicit "
        f"Runge-Kutta method converges there over the envelope, and the same holds at the "
        f"{MONOTONE_CHECKS} next finer ticks of the ladder 1, 1.25, 1.5, 2, 2.5, 3, 4, 5, 6, 8 "
        f"x 10^k s",
        "  truncation error: the largest of three estimates" + switches + ":",
        "    per-mode: |R(h*lambda)^n - exp(n*h*lambda)| over each mode's whole decay (undamped "
        f"ones over the {advice.horizon:.4g} s horizon), weighted by how far a full-range step "
        "of every input and the start move it",
        f"    short run: the model for {SHORT_RUN_TICKS} ticks with each input sweeping its "
        "range (the run of `check`), by step doubling",
        f"    long run: the same toward the {advice.horizon:.4g} s horizon (two of the slowest "
        f"time constants, or --horizon), at most {LONG_RUN_TICKS} ticks; '*' marks a run "
        "stopped there, short of the horizon: slower modes then rest on the per-mode estimate",
    ]


def advice_lines(advice) -> list[str]:
    """The lines of `tickwright advise` for an advice.Advice (its warnings: advice_warnings)."""
    eig = advice.eigenvalues
    lines = [f"{advice.model}: {len(eig)} distinct eigenvalue(s) over {advice.points} "
             f"operating point(s)" + (f" ({', '.join(advice.ranged)} ranged)"
                                      if advice.ranged else " (no ranges: initial point)")]
    if len(eig):
        fastest = eig[np.argmax(np.abs(eig))]
        lines.append(f"  fastest eigenvalue {_mode(fastest)}")
    if advice.fastest is not None:
        lines.append(f"  excited modes (an input step or the start moves them by at least "
                     f"{advice.excited_floor:.2g} of full scale): fastest {_mode(advice.fastest)}, "
                     f"slowest {_mode(advice.slowest)}")
    if advice.growing:
        lines.append(f"  {advice.growing} growing eigenvalue(s) (Re > 0: the model is unstable "
                     "there) are left out of the stability limits and the per-mode estimate")
    lines.append(f"  tolerance {advice.tolerance:g} of each state's full scale; horizon "
                 f"{advice.horizon:.4g} s; margin {advice.margin:g} of the stability limit")
    lines += advice_rule_lines(advice)
    lines.append(f"  {'method':<18} {'kind':<20} {'max stable dt':>13} {'dt':>9} "
                 f"{'error':>8} {'from':<9} {'long run':>10} {'ops/tick':>8} {'ops/s':>9}")
    for r in advice.methods:
        e = r.estimate if r.dt else None
        cost = r.cost_per_second
        lines.append(f"  {r.id:<18} {r.kind:<20} {_seconds(r.max_stable_dt):>13} "
                     f"{'-' if r.dt is None else f'{r.dt:g} s':>9} "
                     f"{'-' if e is None else f'{e.truncation:.2g}':>8} "
                     f"{'-' if e is None else e.source:<9} {_long_run(e):>10} "
                     f"{r.ops_per_step:>8} {'-' if cost is None else f'{cost:.3g}':>9}"
                     + (f"  ({r.note})" if r.note else ""))
    lines.append("  columns: max stable dt = the largest stable tick ('unbounded' for an A-stable "
                 "method); dt = the advised tick; error = its estimated truncation error, a "
                 "fraction of full scale, and the estimate it comes from; long run = the time "
                 "it simulated; ops/tick = floating-point operations per tick; ops/s = "
                 "floating-point operations per simulated second")
    if any(r.cost_note != "counted" for r in advice.methods):
        lines.append("  ops/tick is counted on the generated step; for methods with a Newton "
                     "loop, with the iterations per solve the short run took")
    if advice.chosen:
        lines.append(f"chosen method {advice.chosen}: max stable dt "
                     f"{_seconds(advice.chosen_max_stable_dt)}")
    if advice.requested:
        q = advice.requested
        text = f"requested dt {q['dt']:g} s with {q['method']}: " + \
            ("stable" if q["stable"] else "UNSTABLE")
        if q.get("global_error") is not None:
            text += (f", estimated truncation error {q['global_error']:.2g} of full scale "
                     f"({q['error_source']}), "
                     + ("meets the rule" if q["meets_tolerance"] else "does not meet the rule")
                     + f", {q['precision']} precision")
        lines.append(text)
    if advice.recommended:
        r = advice.recommended
        row = advice.row(r["method"])
        e = row.estimate
        lines.append(f"recommended: {r['method']} at dt = {r['dt']:g} s in {r['precision']} "
                     f"(estimated truncation error {e.truncation:.2g} of full scale, from the "
                     f"{e.source} estimate)")
        lines.append(f"  its runs: short {e.short.steps} ticks = {e.short.steps * e.dt:.3g} s"
                     + _time_constants(e.short.steps * e.dt, advice.fastest)
                     + f"; long {e.long.steps} ticks = {e.long.steps * e.dt:.3g} s of the "
                     f"{advice.horizon:.4g} s horizon"
                     + (" (stopped at the cap)" if e.long_capped else ""))
        lines.append(f"  confirm it: tickwright check <model file> --method {r['method']} "
                     f"--dt {r['dt']:g} --precision {r['precision']} --tolerance "
                     f"{advice.tolerance:g}")
    if advice.precision:
        lines.append(f"precision: {advice.precision['note']}")
    return lines


def _time_constants(span: float, mode) -> str:
    """How many time constants (and periods) of the mode a run of span seconds covers."""
    if mode is None or complex(mode).real >= 0:
        return ""
    v = complex(mode)
    periods = "" if v.imag == 0 else f", {span * abs(v.imag) / (2 * math.pi):.3g} periods"
    return f" ({span * -v.real:.3g} time constants{periods} of the fastest excited mode)"


def advice_warnings(advice) -> list[str]:
    """The warnings of an advice, one line each (printed on stderr)."""
    return [f"warning: {w}" for w in advice.warnings]


# ---- demo -----------------------------------------------------------------------------------------

def demo_lines(written, method, dt: float, precision: str, cost) -> list[str]:
    """What `tickwright demo` wrote and chose, before its check lines.

    written: the files; cost: an advice.OperationCount of one tick.
    """
    c = cost.to_dict()
    return ["files written:", *[f"  {p}" for p in written],
            f"method and tick: {method.name} ({method.id}), dt = {dt:g} s ({1 / dt:g} Hz), "
            f"{precision}",
            f"cost per tick: {c['total']} floating-point operations ({c['add']} add/sub, "
            f"{c['mul']} mul, {c['div']} div, {c['call']} math calls)"]
