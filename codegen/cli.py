"""Command line: one click group; exit 1 for a domain error, 2 for usage; diagnostics on stderr."""

from __future__ import annotations

import csv
import io
import json
import math
import sys
from pathlib import Path

import click
import numpy as np

from . import __version__
from .errors import BuildError, CheckError, MethodError, TickwrightError

PRECISION_CHOICE = click.Choice(["float", "double"])


def fail(message: str) -> None:
    click.echo(f"tickwright: error: {message}", err=True)
    raise click.exceptions.Exit(1)


def guarded(fn):
    """Turn every TickwrightError into one line on stderr and exit status 1."""
    import functools

    @functools.wraps(fn)
    def wrapper(*args, **kwargs):
        try:
            return fn(*args, **kwargs)
        except BuildError as exc:
            if exc.output and "--verbose" in sys.argv:
                click.echo(exc.details(), err=True)
            fail(str(exc))
        except TickwrightError as exc:
            fail(str(exc))

    return wrapper


def say(message: str) -> None:
    """Progress on stderr, so stdout stays clean for --json."""
    click.echo(f"... {message}", err=True)


def method_options(fn):
    fn = click.option("--tableau", "tableau_file", type=click.Path(dir_okay=False, path_type=Path),
                      help="A TOML file with your own tableau (name, a, b, c[, order, b_hat]).")(fn)
    fn = click.option("--method", "method_id", metavar="NAME",
                      help="A built-in method id (see 'tickwright methods').")(fn)
    return fn


def step_options(fn):
    fn = click.option("--precision", type=PRECISION_CHOICE, default="float", show_default=True,
                      help="Working precision of the generated C.")(fn)
    fn = click.option("--substeps", type=click.IntRange(min=1), default=1, show_default=True,
                      help="Method steps per tick (h = dt / substeps).")(fn)
    fn = click.option("--dt", type=click.FloatRange(min=0, min_open=True), required=True,
                      help="Tick period in seconds.")(fn)
    return method_options(fn)


def implicit_options(fn):
    """Generation options of the implicit methods (ignored by explicit ones)."""
    fn = click.option("--linear-solve", "linear_solve", default="auto", show_default=True,
                      type=click.Choice(["auto", "elimination", "dense-lu"]),
                      help="Linear solves of implicit methods: straight-line sparse elimination, "
                           "looped dense LU with partial pivoting, or chosen by cost.")(fn)
    fn = click.option("--newton-tol", "newton_tol", type=click.FloatRange(min=0, max=1,
                      min_open=True, max_open=True), default=None,
                      help="Newton tolerance of implicit methods: max |correction| / state scale "
                           "(default 2^-16 in float, 2^-40 in double).")(fn)
    fn = click.option("--newton-iterations", "newton_iterations", type=click.IntRange(min=1),
                      default=20, show_default=True,
                      help="Fixed upper bound of Newton iterations per solve (implicit methods); "
                           "more returns the NO_CONVERGENCE status.")(fn)
    return fn


def generation_options(method, newton_iterations, newton_tol, linear_solve) -> dict:
    """The implicit-solver options for generate(); an explicit method takes none."""
    if method.is_explicit:
        return {}
    return dict(newton_iterations=newton_iterations, newton_tol=newton_tol, solver=linear_solve)


def resolve_method(method_id: str | None, tableau_file: Path | None):
    from .methods import builtin, load_method_file

    if method_id and tableau_file:
        raise click.UsageError("give either --method or --tableau, not both")
    if tableau_file:
        return load_method_file(tableau_file)
    if not method_id:
        raise click.UsageError("missing --method NAME (or --tableau FILE); see 'tickwright methods'")
    return builtin(method_id)


def load(model_path: Path):
    from .model import load_model

    return load_model(model_path)


@click.group(context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(__version__, prog_name="tickwright")
def main():
    """Turn an ODE model and a Runge-Kutta method into checked, dependency-free C for firmware.

    Validate the generated code on the real hardware; it is not qualified for safety functions
    without qualified review.
    """


@main.command()
@click.argument("model_path", metavar="MODEL", type=click.Path(dir_okay=False, path_type=Path))
@step_options
@click.option("--out", "out_dir", type=click.Path(file_okay=False, path_type=Path), required=True,
              help="Folder to write <name>.h and <name>.c into.")
@click.option("--force", is_flag=True, help="Replace files even if tickwright did not write them.")
@click.option("--error-estimate", is_flag=True,
              help="Also generate <name>_advance_with_error(), which returns the embedded pair's "
                   "local error estimate (methods with b_hat, such as bs3 and dp5).")
@implicit_options
@guarded
def emit(model_path, method_id, tableau_file, dt, substeps, precision, out_dir, force,
         error_estimate, newton_iterations, newton_tol, linear_solve):
    """Write the C files for MODEL: <name>.h and <name>.c."""
    from .pipeline import generate

    model = load(model_path)
    method = resolve_method(method_id, tableau_file)
    options = generation_options(method, newton_iterations, newton_tol, linear_solve)
    if error_estimate:
        csource = generate(model, method, dt, substeps, precision, error_estimate=True)
    else:
        csource = generate(model, method, dt, substeps, precision, **options)
    for path in csource.write(out_dir, force=force):
        click.echo(str(path))


def _print_check(report, model, method, dt, substeps, passed: bool | None = None) -> None:
    from .methods import tolerance_note

    note = tolerance_note(method)
    click.echo(f"{model.name}: {method.name} ({method.id}{'; ' + note if note else ''}), "
               f"dt = {dt:g} s, {substeps} substep(s)")
    click.echo(f"  {'strict compile':<24} ok    {report.strict_compile}")
    for c in report.cross_checks:
        verdict = "ok" if c.passed else "FAIL"
        same = "ok" if c.max_difference <= c.tolerance and c.completed == c.ticks else "FAIL"
        click.echo(f"  {'cross-check ' + c.precision:<24} {same:<5} max |C - reference| = "
                   f"{c.max_difference:.3g} in {c.worst_state} (bound {c.tolerance:.3g}) over "
                   f"{c.ticks} ticks")
        verdict = "ok" if c.accurate else "FAIL"
        click.echo(f"  {'accuracy ' + c.precision:<24} {verdict:<5} max |C - solve_ivp| = "
                   f"{100 * c.error_vs_high_accuracy:.3g} % of the state's scale (target "
                   f"{100 * c.accuracy_tolerance:g} %)")
        if c.completed < c.ticks:
            click.echo(f"  {'':<24}       stopped after {c.completed} ticks: a state became "
                       "non-finite (the step is unstable or the inputs are out of range)")
    o = report.order
    if o is not None:
        verdict = "ok" if o.passed else "FAIL"
        if o.measured is None:
            click.echo(f"  {'order':<24} {verdict:<5} {o.note}")
        else:
            click.echo(f"  {'order':<24} {verdict:<5} measured {o.measured:.2f} (expected "
                       f"{o.expected}) from {o.steps[0]}..{o.steps[-1]} steps over "
                       f"{o.horizon:.3g} s")
    for line in report.extras.get("lines", []):
        click.echo("  " + line)
    passed = report.passed if passed is None else passed
    click.echo("verdict: " + ("PASS" if passed else "FAIL"))


@main.command()
@click.argument("model_path", metavar="MODEL", type=click.Path(dir_okay=False, path_type=Path))
@method_options
@click.option("--dt", type=click.FloatRange(min=0, min_open=True), required=True,
              help="Tick period in seconds.")
@click.option("--substeps", type=click.IntRange(min=1), default=1, show_default=True,
              help="Method steps per tick.")
@click.option("--precision", type=click.Choice(["float", "double", "both"]), default="both",
              show_default=True, help="Which builds to cross-check.")
@click.option("--ticks", type=click.IntRange(min=1), default=200, show_default=True,
              help="Length of the cross-check run.")
@click.option("--no-order", is_flag=True, help="Skip the order study.")
@click.option("--tolerance", type=click.FloatRange(min=0, min_open=True), default=1e-2,
              show_default=True,
              help="Accuracy target against solve_ivp, as a fraction of each state's scale "
                   "(the largest magnitude of its range, else of its run).")
@click.option("--json", "as_json", is_flag=True, help="Print the report as JSON.")
@click.option("--error-estimate", is_flag=True,
              help="Also build <name>_advance_with_error() and check its estimate against the "
                   "reference's embedded difference, tick by tick.")
@click.option("--plot", "plot_dir", type=click.Path(file_okay=False, path_type=Path),
              help="Write pictures (trajectories, convergence) into this folder.")
@click.option("--plot-format", type=click.Choice(["png", "svg"]), default="png",
              show_default=True, help="File format of the pictures.")
@click.option("--target", "target_names", multiple=True, metavar="NAME|FILE",
              help="Also cross-compile and run on this target (see 'tickwright targets'); "
                   "repeatable. Without --precision, the target's default precision is used.")
@click.option("--targets-dir", type=click.Path(file_okay=False, exists=True, path_type=Path),
              help="A folder of your own target files, added to the shipped ones.")
@implicit_options
@guarded
def check(model_path, method_id, tableau_file, dt, substeps, precision, ticks, no_order,
          tolerance, as_json, error_estimate, plot_dir, plot_format, target_names, targets_dir,
          newton_iterations, newton_tol, linear_solve):
    """Build MODEL's C, cross-check it against the reference and measure its order.

    With --target, also cross-compile it for a microcontroller, run it on the emulator, compare
    it bit for bit with the host build and report flash, stack and instructions per tick.
    Exit status 1 when any check fails.
    """
    from .verify import check as run_check

    model = load(model_path)
    method = resolve_method(method_id, tableau_file)
    targets = [load_target_arg(name, targets_dir) for name in target_names]
    if precision == "both" and targets:
        precisions = tuple(sorted({t.default_precision for t in targets}))
    else:
        precisions = ("float", "double") if precision == "both" else (precision,)
    if error_estimate and getattr(method, "b_hat", None) is None:
        raise MethodError(f"{method.id}: has no embedded weights (b_hat); --error-estimate needs "
                          "an embedded pair such as bs3 or dp5")
    options = generation_options(method, newton_iterations, newton_tol, linear_solve)
    report = run_check(model, method, dt, substeps, precisions, ticks, order=not no_order,
                       progress=say, accuracy=tolerance, options=options)
    passed = report.passed
    if error_estimate:
        from .verify.estimate import check_error_estimate

        estimates = []
        for p in precisions:
            say(f"error estimate ({p}): build and run {ticks} ticks")
            estimates.append(check_error_estimate(model, method, dt, substeps, p, ticks))
        report.extras.setdefault("lines", []).extend(e.line() for e in estimates)
        report.extras["error_estimate"] = [dict(e.__dict__) for e in estimates]
        passed = passed and all(e.passed for e in estimates)
    if plot_dir:
        from .report.plots import check_pictures

        say(f"pictures into {plot_dir}")
        paths = check_pictures(model, method, dt, substeps, precisions, ticks, report, plot_dir,
                               plot_format)
        report.extras["pictures"] = [str(p) for p in paths]
        report.extras.setdefault("lines", []).extend(f"picture: {p}" for p in paths)
    if targets:
        target_reports = run_targets(model, method, dt, substeps, precisions, ticks, targets,
                                     options)
        report.extras["targets"] = [r.to_dict() for r in target_reports]
        report.extras.setdefault("lines", []).extend(
            line for r in target_reports for line in target_lines(r))
        passed = passed and all(r.passed for r in target_reports)
        if len(target_reports) == 1:
            # One target: its figures also at the top level of --json, for scripts.
            only = target_reports[0].to_dict()
            report.extras.update({k: only[k] for k in TARGET_SUMMARY_KEYS})
    if as_json:
        data = report.to_dict()
        extras = data.pop("extras")
        data.update(extras)
        data["passed"] = passed
        click.echo(json.dumps(data, indent=2, default=_json_default))
    else:
        _print_check(report, model, method, dt, substeps, passed)
    if not passed:
        raise click.exceptions.Exit(1)


TARGET_SUMMARY_KEYS = ("matches_host", "flash_bytes", "stack_bytes", "instructions_per_tick",
                       "double_free", "misra")


def load_target_arg(name: str, targets_dir: Path | None):
    from .targets import load_target

    return load_target(name, targets_dir)


def run_targets(model, method, dt, substeps, precisions, ticks, targets, options):
    """Cross-compile, emulate and measure the generated C on each target, in each precision."""
    from .pipeline import generate
    from .targets import check_on_target

    reports = []
    for target in targets:
        for p in precisions:
            say(f"target {target.id} ({p}): cross-compile, run {ticks} ticks on the emulator")
            csource = generate(model, method, dt, substeps, p, **(options or {}))
            reports.append(check_on_target(csource, model, target, ticks=ticks))
    return reports


def target_lines(r) -> list[str]:
    """The human summary of one target run."""
    verdict = "ok" if r.passed else "FAIL"
    ipt = "n/a" if r.instructions_per_tick is None else f"{r.instructions_per_tick}"
    lines = [f"{'target ' + r.target + ' ' + r.precision:<24} {verdict:<5} "
             f"{'bit-identical to the host' if r.matches_host and r.max_ulp == 0 else r.comparison}"
             f"; flash {r.flash_bytes} B, stack {r.stack_bytes} B, {ipt} instructions per tick"]
    if r.double_free is not None:
        lines.append(f"{'':<24} {'ok' if r.double_free else 'FAIL':<5} no double-precision code "
                     f"in the float build" + ("" if r.double_free else
                                              f": {', '.join(r.double_symbols)}"))
    lines.append(f"{'':<24} {'ok' if not r.misra else 'FAIL':<5} MISRA C:2012 (cppcheck): "
                 f"{len(r.misra)} finding(s), {len(r.misra_deviations)} documented deviation(s)")
    lines += [f"{'':<24}       {p}" for p in r.problems]
    return lines


@main.command("targets")
@click.option("--targets-dir", type=click.Path(file_okay=False, exists=True, path_type=Path),
              help="A folder of your own target files, added to the shipped ones.")
@click.option("--json", "as_json", is_flag=True, help="Print the targets as JSON.")
@guarded
def targets_command(targets_dir, as_json):
    """List the targets: compiler, precision, emulator and cost table."""
    from .targets import load_targets

    targets = load_targets(targets_dir)
    if as_json:
        click.echo(json.dumps([t.to_dict() for t in targets.values()], indent=2,
                              default=_json_default))
        return
    click.echo(f"{'id':<12} {'precision':<10} {'in hardware':<14} compiler / emulator")
    for t in targets.values():
        hw = ", ".join(t.hardware_precisions) or "none"
        run = " ".join(t.run_command[:3])
        click.echo(f"{t.id:<12} {t.default_precision:<10} {hw:<14} {t.cc}  {run}".rstrip())


def _json_default(value):
    if isinstance(value, (np.floating, np.integer)):
        return value.item()
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return str(value)


def read_input_log(path: Path, model, ticks: int | None) -> np.ndarray:
    """A CSV with header t,<input names>, one row per tick -> (n, nu) array of inputs."""
    try:
        text = path.read_text(encoding="utf-8")
    except (FileNotFoundError, IsADirectoryError, UnicodeDecodeError) as exc:
        raise CheckError(f"{path}: cannot read the input log: {exc}") from None
    rows = list(csv.reader(io.StringIO(text)))
    rows = [r for r in rows if r and any(cell.strip() for cell in r)]
    if not rows:
        raise CheckError(f"{path}: empty; expected a header 't,<inputs>' and one row per tick")
    header = [h.strip() for h in rows[0]]
    names = [u.name for u in model.inputs]
    if not header or header[0] != model.time:
        raise CheckError(f"{path}: header: first column must be '{model.time}', got "
                         f"'{header[0] if header else ''}'")
    if sorted(header[1:]) != sorted(names) or len(set(header)) != len(header):
        raise CheckError(f"{path}: header: expected the columns {model.time},{','.join(names)} "
                         f"(any order after '{model.time}'), got {','.join(header)}")
    order = [header.index(n) for n in names]
    data = np.zeros((len(rows) - 1, len(names)))
    for r, row in enumerate(rows[1:], start=2):
        if len(row) != len(header):
            raise CheckError(f"{path}: line {r}: {len(row)} values, expected {len(header)}")
        for j, col in enumerate(order):
            try:
                v = float(row[col])
            except ValueError:
                raise CheckError(f"{path}: line {r}: column '{header[col]}': '{row[col]}' is not "
                                 "a number") from None
            if not math.isfinite(v):
                raise CheckError(f"{path}: line {r}: column '{header[col]}': must be finite")
            data[r - 2, j] = v
    if ticks is not None:
        data = data[:ticks]
    return data


def format_value(v: float) -> str:
    """Round-trip text of a float (float32 values are exact in float64, so repr keeps them)."""
    return repr(float(v))


@main.command()
@click.argument("model_path", metavar="MODEL", type=click.Path(dir_okay=False, path_type=Path))
@step_options
@click.option("--inputs", "inputs_path", type=click.Path(dir_okay=False, path_type=Path),
              help="CSV with header t,<inputs>, one row per tick.")
@click.option("--steps", type=click.IntRange(min=1), default=None,
              help="Number of ticks (default: the rows of --inputs, else 100).")
@click.option("--out", "out_path", type=click.Path(dir_okay=False, path_type=Path), required=True,
              help="CSV to write: t,<states>,<outputs>, one row for the start and one per tick.")
@implicit_options
@guarded
def replay(model_path, method_id, tableau_file, dt, substeps, precision, inputs_path, steps,
           out_path, newton_iterations, newton_tol, linear_solve):
    """Run the compiled C of MODEL over a log of inputs and write the trajectory as CSV."""
    from .build import build
    from .pipeline import generate

    model = load(model_path)
    method = resolve_method(method_id, tableau_file)
    if inputs_path:
        inputs = read_input_log(inputs_path, model, steps)
    else:
        inputs = np.array([[u.default for u in model.inputs]] * (steps or 100)).reshape(
            steps or 100, len(model.inputs))
    options = generation_options(method, newton_iterations, newton_tol, linear_solve)
    csource = generate(model, method, dt, substeps, precision, **options)
    built = build(csource, model)
    ffi, lib = built.ffi, built.lib
    ctx = ffi.new(f"{model.name}_ctx_t *")
    out = ffi.new(f"{model.name}_outputs_t *") if model.outputs else None
    getattr(lib, f"{model.name}_reset")(ctx)
    advance = getattr(lib, f"{model.name}_advance")
    outputs_fn = getattr(lib, f"{model.name}_outputs") if model.outputs else None
    status_names = {0: "OK", 1: "NONFINITE", 2: "NO_CONVERGENCE", 3: "SINGULAR"}

    def row():
        if outputs_fn:
            outputs_fn(ctx, out)
        values = [getattr(ctx, model.time)] + [getattr(ctx, s.name) for s in model.states]
        values += [getattr(out, o.name) for o in model.outputs]
        return [format_value(v) for v in values]

    lines = [[model.time] + [s.name for s in model.states] + [o.name for o in model.outputs]]
    if inputs_path is None and len(inputs):
        for j, u in enumerate(model.inputs):
            setattr(ctx, u.name, float(inputs[0, j]))
    lines.append(row())
    failure = None
    with click.progressbar(range(len(inputs)), label="replay", file=sys.stderr,
                           show_pos=True) as ticks:
        for k in ticks:
            for j, u in enumerate(model.inputs):
                setattr(ctx, u.name, float(inputs[k, j]))
            status = int(advance(ctx))
            if status != 0:
                failure = (k + 1, status)
                break
            lines.append(row())
    buf = io.StringIO()
    csv.writer(buf, lineterminator="\n").writerows(lines)
    out_path.parent.mkdir(parents=True, exist_ok=True)
    tmp = out_path.with_name(out_path.name + ".tmp")
    tmp.write_text(buf.getvalue(), encoding="utf-8")
    tmp.replace(out_path)
    if failure:
        k, status = failure
        fail(f"{inputs_path or model_path}: tick {k} (t = {k * dt:g} s): status "
             f"{status_names.get(status, status)}; {out_path} holds the {k} rows before it")
    click.echo(f"{out_path}: {len(lines) - 1} rows ({len(inputs)} ticks)")


def method_rows(tableau_file: Path | None):
    """One row per method (or the tableau file's): the analysis of every method kind."""
    from .methods import builtin, builtin_ids, load_method_file, tolerance_note
    from .methods.analysis import analyse

    methods = [load_method_file(tableau_file)] if tableau_file else \
        [builtin(i) for i in builtin_ids()]
    rows = []
    for m in methods:
        report = analyse(m)
        r_inf = report.r_infinity
        rows.append({
            "id": m.id, "name": m.name, "stages": report.stages, "order": report.order,
            "embedded_order": report.embedded_order, "kind": report.kind,
            "explicit": report.kind == "explicit",
            "a_stable": report.a_stable, "l_stable": report.l_stable,
            "r_infinity": None if r_inf is None else float(r_inf),
            "real_axis_limit": report_value(report, "real_axis_limit"),
            "imag_axis_limit": report_value(report, "imag_axis_limit"),
            "stability_function": str(report.stability.function),
            "order_note": tolerance_note(m) or None,
            "source": getattr(m, "source", "")})
    return rows


def report_value(report, key):
    v = getattr(report, key, None)
    if isinstance(v, float) and not math.isfinite(v):
        return None
    return v


@main.command()
@click.option("--tableau", "tableau_file", type=click.Path(dir_okay=False, path_type=Path),
              help="Analyse this tableau file instead of listing the built-in methods.")
@click.option("--json", "as_json", is_flag=True, help="Print the table as JSON.")
@guarded
def methods(tableau_file, as_json):
    """List the built-in methods (or analyse a tableau file): stages, order, kind, source."""
    rows = method_rows(tableau_file)
    if as_json:
        click.echo(json.dumps(rows, indent=2, default=_json_default))
        return
    click.echo(f"{'id':<18} {'stages':>6} {'order':>6}  {'kind':<20} {'A':>1} {'L':>1} "
               f"{'real axis':>10} {'imag axis':>10}  name / source")
    for r in rows:
        order = "-" if r["order"] is None else \
            f"{r['order']}" + (f"({r['embedded_order']})" if r["embedded_order"] else "")
        limit = lambda v: "unbounded" if v is None else f"{v:.4g}"
        flag = lambda v: "y" if v else "n"
        click.echo(f"{r['id']:<18} {r['stages']:>6} {order:>6}  {r['kind']:<20} "
                   f"{flag(r['a_stable'])} {flag(r['l_stable'])} {limit(r['real_axis_limit']):>10} "
                   f"{limit(r['imag_axis_limit']):>10}  {r['name']}; {r['source']}")
    for r in rows:
        if r["order_note"]:
            click.echo(f"{r['id']}: order {r['order']} ({r['order_note']})")
    click.echo("A/L: A-stable, L-stable; axis limits: where |R(z)| <= 1 ends on the negative "
               "real and the imaginary axis (z = h*lambda).")


@main.command()
@click.argument("model_path", metavar="MODEL", type=click.Path(dir_okay=False, path_type=Path))
@method_options
@click.option("--dt", type=click.FloatRange(min=0, min_open=True),
              help="A tick period in seconds to check for the chosen --method.")
@click.option("--tolerance", type=click.FloatRange(min=0, max=1, min_open=True, max_open=True),
              default=1e-3, show_default=True,
              help="Accuracy target: largest error over the horizon as a fraction of each "
                   "state's full scale (max |range bound|).")
@click.option("--margin", type=click.FloatRange(min=0, max=1, min_open=True), default=0.8,
              show_default=True, help="Use at most this fraction of the stability limit.")
@click.option("--horizon", type=click.FloatRange(min=0, min_open=True),
              help="Simulated seconds for the error estimates (default: two of the slowest "
                   "time constants).")
@click.option("--json", "as_json", is_flag=True, help="Print the advice as JSON.")
@click.option("--plot", "plot_dir", type=click.Path(file_okay=False, path_type=Path),
              help="Write the stability-region pictures into this folder.")
@click.option("--plot-format", type=click.Choice(["png", "svg"]), default="png",
              show_default=True, help="File format of the pictures.")
@guarded
def advise(model_path, method_id, tableau_file, dt, tolerance, margin, horizon, as_json,
           plot_dir, plot_format):
    """Advise a method, tick and precision for MODEL from its eigenvalues over the envelope.

    Exit status 1 when --dt is given and is unstable for the chosen method.
    """
    from .advice import advise as run_advice, candidates

    model = load(model_path)
    method = resolve_method(method_id, tableau_file) if (method_id or tableau_file) else None
    if dt is not None and method is None:
        raise click.UsageError("--dt needs --method NAME (or --tableau FILE) to check it against")
    pool = candidates()
    advice = run_advice(model, method, dt, tolerance, margin, horizon, methods=pool, progress=say)
    if plot_dir:
        from .report.plots import advice_pictures

        known = {m.id: m for m in pool}
        if method is not None:
            known[method.id] = method
        for path in advice_pictures(model, advice, known, plot_dir, plot_format):
            say(f"picture: {path}")
    if as_json:
        click.echo(json.dumps(advice.to_dict(), indent=2, default=_json_default))
    else:
        _print_advice(advice)
    if advice.requested and not advice.requested["stable"]:
        raise click.exceptions.Exit(1)


def _print_advice(advice) -> None:
    seconds = lambda v: "unbounded" if v is None or not math.isfinite(v) else f"{v:.4g}"
    eig = advice.eigenvalues
    click.echo(f"{advice.model}: {len(eig)} distinct eigenvalue(s) over {advice.points} "
               f"operating point(s)" + (f" ({', '.join(advice.ranged)} ranged)"
                                        if advice.ranged else " (no ranges: initial point)"))
    if len(eig):
        fastest = eig[np.argmax(np.abs(eig))]
        click.echo(f"  fastest eigenvalue {fastest.real:.4g}{fastest.imag:+.4g}j 1/s; horizon "
                   f"{advice.horizon:.4g} s; tolerance {advice.tolerance:g} of full scale; "
                   f"margin {advice.margin:g}")
    click.echo(f"  {'method':<18} {'kind':<20} {'max stable dt':>13} {'dt':>10} "
               f"{'error':>9} {'ops/step':>8} {'ops/s':>10}")
    for r in advice.methods:
        err = r.accuracy.global_error if (r.accuracy and r.dt) else None
        cost = r.cost_per_second
        click.echo(f"  {r.id:<18} {r.kind:<20} {seconds(r.max_stable_dt):>13} "
                   f"{'-' if r.dt is None else f'{r.dt:g}':>10} "
                   f"{'-' if err is None else f'{err:.2g}':>9} {r.ops_per_step:>8} "
                   f"{'-' if cost is None else f'{cost:.3g}':>10}"
                   + (f"  ({r.note})" if r.note else ""))
    if advice.chosen:
        click.echo(f"chosen method {advice.chosen}: max stable dt "
                   f"{seconds(advice.chosen_max_stable_dt)} s")
    if advice.requested:
        q = advice.requested
        verdict = "stable" if q["stable"] else "UNSTABLE"
        text = f"requested dt {q['dt']:g} s with {q['method']}: {verdict}"
        if q.get("global_error") is not None:
            text += (f", estimated error {q['global_error']:.2g} of full scale, "
                     f"{q['precision']} precision")
        click.echo(text)
    if advice.recommended:
        r = advice.recommended
        click.echo(f"recommended: {r['method']} at dt = {r['dt']:g} s in {r['precision']}")
    if advice.precision:
        click.echo(f"precision: {advice.precision['note']}")
    if any(r.cost_note != "counted" for r in advice.methods):
        click.echo("ops/step: counted on the generated step for explicit methods; other kinds "
                   "are estimated (LU 2/3 n^3, solve 2 n^2, Newton iterations as measured)")
    for w in advice.warnings:
        click.echo(f"warning: {w}", err=True)


DEMO_MODEL = "axis.toml"
DEMO_METHOD = "rk4"
DEMO_DT = 2e-4


@main.command()
@click.option("--out", "out_dir", type=click.Path(file_okay=False, path_type=Path),
              default=Path("tickwright-demo"), show_default=True,
              help="Folder to write the demo's C files into.")
@guarded
def demo(out_dir):
    """Run the whole job on the bundled demo model: emit, build, cross-check, report."""
    from .advice.cost import step_cost
    from .discretize import discretize
    from .methods import builtin
    from .model import load_model
    from .pipeline import generate
    from .resources import examples_dir
    from .simplify import simplify
    from .verify import check as run_check

    model_path = examples_dir() / DEMO_MODEL
    model = load_model(model_path)
    method = builtin(DEMO_METHOD)
    say(f"model {model.name} from {model_path.name}: {model.nx} states, "
        f"{len(model.inputs)} input(s)")
    csource = generate(model, method, DEMO_DT, 1, "float")
    written = csource.write(out_dir)
    cost = step_cost(simplify(discretize(model, method, DEMO_DT)))
    report = run_check(model, method, DEMO_DT, 1, ("float", "double"), 500, progress=say)
    click.echo("files written:")
    for path in written:
        click.echo(f"  {path}")
    click.echo(f"method and tick: {method.name} ({method.id}), dt = {DEMO_DT:g} s "
               f"({1 / DEMO_DT:g} Hz), float")
    c = cost.to_dict()
    click.echo(f"cost per tick: {c['total']} floating-point operations ({c['add']} add/sub, "
               f"{c['mul']} mul, {c['div']} div, {c['call']} math calls)")
    _print_check(report, model, method, DEMO_DT, 1)
    if not report.passed:
        raise click.exceptions.Exit(1)
