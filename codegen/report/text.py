"""Reports for people: each function turns a report object into the lines the CLI prints.

The check lines are documented in the README ("Reading the check output"): a label column of
LABEL_WIDTH characters, a verdict column of VERDICT_WIDTH, then the figures.
"""

from __future__ import annotations

import math

import numpy as np

from ..run import Replay

# Width of the label column of the check lines ('cross-check double', 'target cortex-m4f float').
LABEL_WIDTH = 24
# Width of the verdict column ('ok', 'FAIL').
VERDICT_WIDTH = 5
# What the targets table shows where a target's run command takes the program's path.
PROGRAM = "<program>"


def verdict(passed: bool) -> str:
    return "ok" if passed else "FAIL"


def row(label: str, passed: bool | None, text: str) -> str:
    """One check line: label, verdict (blank for a continuation line) and the figures."""
    mark = "" if passed is None else verdict(passed)
    return f"{label:<{LABEL_WIDTH}} {mark:<{VERDICT_WIDTH}} {text}"


# ---- check ----------------------------------------------------------------------------------------

def cross_check_lines(c) -> list[str]:
    """The cross-check, coefficient audit and accuracy lines of one verify.CrossCheck."""
    same = c.max_difference <= c.tolerance and c.completed == c.ticks
    lines = [
        row(f"cross-check {c.precision}", same,
            f"max |C - reference| = {c.max_difference:.3g} in {c.worst_state} (bound "
            f"{c.tolerance:.3g}, ratio {c.ratio:.2g}) over {c.ticks} ticks")]
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
    lines.append(
        row(f"accuracy {c.precision}", c.accurate,
            f"max |C - solve_ivp| = {100 * c.error_vs_high_accuracy:.3g} % of the state's scale "
            f"(target {100 * c.accuracy_tolerance:g} %)"))
    if c.completed < c.ticks:
        lines.append(row("", None, f"stopped after {c.completed} ticks: a state became "
                                   "non-finite (the step is unstable or the inputs are out of "
                                   "range)"))
    return lines


def order_line(o) -> str:
    """The line of one verify.OrderStudy."""
    if o.measured is None:
        return row("order", o.passed, o.note)
    return row("order", o.passed, f"measured {o.measured:.2f} (expected {o.expected}) from "
                                  f"{o.steps[0]}..{o.steps[-1]} steps over {o.horizon:.3g} s")


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
    body = [row("strict compile", True, r.strict_compile)]
    for c in r.cross_checks:
        body += cross_check_lines(c)
    if r.order is not None:
        body.append(order_line(r.order))
    body += [estimate_line(e) for e in outcome.estimates]
    body += [f"picture: {p}" for p in outcome.pictures]
    for t in outcome.targets:
        body += target_lines(t)
    lines += ["  " + line for line in body]
    lines.append("verdict: " + ("PASS" if outcome.passed else "FAIL"))
    return lines


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
    lines.append("A/L: A-stable, L-stable; axis limits: where |R(z)| <= 1 ends on the negative "
                 "real and the imaginary axis (z = h*lambda).")
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
    return "unbounded" if v is None or not math.isfinite(v) else f"{v:.4g}"


def advice_lines(advice) -> list[str]:
    """The lines of `tickwright advise` for an advice.Advice (its warnings: advice_warnings)."""
    eig = advice.eigenvalues
    lines = [f"{advice.model}: {len(eig)} distinct eigenvalue(s) over {advice.points} "
             f"operating point(s)" + (f" ({', '.join(advice.ranged)} ranged)"
                                      if advice.ranged else " (no ranges: initial point)")]
    if len(eig):
        fastest = eig[np.argmax(np.abs(eig))]
        lines.append(f"  fastest eigenvalue {fastest.real:.4g}{fastest.imag:+.4g}j 1/s; horizon "
                     f"{advice.horizon:.4g} s; tolerance {advice.tolerance:g} of full scale; "
                     f"margin {advice.margin:g}")
    lines.append(f"  {'method':<18} {'kind':<20} {'max stable dt':>13} {'dt':>10} "
                 f"{'error':>9} {'ops/step':>8} {'ops/s':>10}")
    for r in advice.methods:
        err = r.accuracy.global_error if (r.accuracy and r.dt) else None
        cost = r.cost_per_second
        lines.append(f"  {r.id:<18} {r.kind:<20} {_seconds(r.max_stable_dt):>13} "
                     f"{'-' if r.dt is None else f'{r.dt:g}':>10} "
                     f"{'-' if err is None else f'{err:.2g}':>9} {r.ops_per_step:>8} "
                     f"{'-' if cost is None else f'{cost:.3g}':>10}"
                     + (f"  ({r.note})" if r.note else ""))
    if advice.chosen:
        lines.append(f"chosen method {advice.chosen}: max stable dt "
                     f"{_seconds(advice.chosen_max_stable_dt)} s")
    if advice.requested:
        q = advice.requested
        text = f"requested dt {q['dt']:g} s with {q['method']}: " + \
            ("stable" if q["stable"] else "UNSTABLE")
        if q.get("global_error") is not None:
            text += (f", estimated error {q['global_error']:.2g} of full scale, "
                     f"{q['precision']} precision")
        lines.append(text)
    if advice.recommended:
        r = advice.recommended
        lines.append(f"recommended: {r['method']} at dt = {r['dt']:g} s in {r['precision']}")
    if advice.precision:
        lines.append(f"precision: {advice.precision['note']}")
    if any(r.cost_note != "counted" for r in advice.methods):
        lines.append("ops/step: counted on the generated step; methods with a Newton loop for "
                     "the iterations per solve measured on the model")
    return lines


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
