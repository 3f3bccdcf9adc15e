"""Command line: one click group; exit 1 for a domain error, 2 for usage; diagnostics on stderr."""

from __future__ import annotations

import difflib
import functools
import math
import shlex
import sys
from pathlib import Path

import click

from . import __version__
from .errors import BuildError, CheckError, MethodError, TickwrightError


class FiniteFloatRange(click.FloatRange):
    """click's FloatRange that also refuses inf and nan (which FloatRange lets through)."""

    name = "finite float range"

    def convert(self, value, param, ctx):
        number = super().convert(value, param, ctx)
        if not math.isfinite(number):
            self.fail(f"{value!r} is not a finite number", param, ctx)
        return number


class OneLineGroup(click.Group):
    """The command group whose usage mistakes are one line on stderr, exit status 2 (click's).

    click prints the usage, a hint and the error on four lines; every other diagnostic of the
    tool is one line, so a usage mistake says the same in one: the error and where to look.
    """

    def main(self, args=None, prog_name=None, complete_var=None, standalone_mode=True, **extra):
        if not standalone_mode:
            return super().main(args, prog_name, complete_var, standalone_mode, **extra)
        try:
            code = super().main(args, prog_name, complete_var, standalone_mode=False, **extra)
        except click.UsageError as exc:
            command = exc.ctx.command_path if exc.ctx is not None else "tickwright"
            click.echo(f"tickwright: error: {exc.format_message()} (see '{command} --help')",
                       err=True)
            sys.exit(exc.exit_code)
        except click.ClickException as exc:
            click.echo(f"tickwright: error: {exc.format_message()}", err=True)
            sys.exit(exc.exit_code)
        except click.Abort:
            click.echo("tickwright: aborted", err=True)
            sys.exit(1)
        except BrokenPipeError:  # the reader of stdout went away (| head): as click does
            sys.exit(1)
        sys.exit(code if isinstance(code, int) else 0)


# A tick period, a tolerance or a margin: a positive finite number of seconds or a fraction.
POSITIVE = FiniteFloatRange(min=0, min_open=True)
PRECISION_CHOICE = click.Choice(["float", "double"])
# The generator's defaults and limits (discretize.ir: DEFAULT_NEWTON_REFRESHES, MAX_RETRY_DEPTH),
# repeated here so that the command line starts without sympy; tests/test_stiff.py checks that
# they agree.
DEFAULT_NEWTON_REFRESHES = 10
MAX_RETRY_DEPTH = 16
# Ticks of a replay given neither --inputs nor --steps: a short look at the model's start.
DEFAULT_REPLAY_TICKS = 100
# Ticks of a check's cross-check without --inputs: long enough for the input sweep to cover each
# range, short enough to check in seconds.
DEFAULT_CHECK_TICKS = 200


def fail(message: str) -> None:
    click.echo(f"tickwright: error: {message}", err=True)
    raise click.exceptions.Exit(1)


def verbose_wanted() -> bool:
    """Whether the group's --verbose flag was given."""
    ctx = click.get_current_context(silent=True)
    return bool(ctx is not None and ctx.find_root().params.get("verbose"))


def guarded(fn):
    """Turn every TickwrightError into one line on stderr and exit status 1.

    With --verbose, a compiler failure first prints the command and the compiler's whole output.
    """

    @functools.wraps(fn)
    def wrapper(*args, **kwargs):
        try:
            return fn(*args, **kwargs)
        except BuildError as exc:
            if verbose_wanted() and (exc.command or exc.output):
                click.echo(exc.details().rstrip("\n"), err=True)
            fail(str(exc))
        except TickwrightError as exc:
            fail(str(exc))

    return wrapper


def echo_lines(lines, err: bool = False) -> None:
    for line in lines:
        click.echo(line, err=err)


# Where --quiet leaves its answer for say(): click's per-invocation scratch space.
QUIET_KEY = "tickwright.quiet"
# Where the group keeps the arguments it was given, for the report's exact command line.
ARGS_KEY = "tickwright.args"


def say(message: str) -> None:
    """Progress on stderr, so stdout stays clean for --json; only to a terminal, never with
    --quiet."""
    ctx = click.get_current_context(silent=True)
    if ctx is not None and ctx.meta.get(QUIET_KEY):
        return
    if not stderr_is_terminal():
        return
    click.echo(f"... {message}", err=True)


def stderr_is_terminal() -> bool:
    """Whether progress has a person to read it: stderr is a terminal, not a file or a pipe."""
    return sys.stderr.isatty()


def quiet_option(fn):
    """--quiet for every command with long work; say() reads it from the context."""

    def remember(ctx, _param, value):
        ctx.meta[QUIET_KEY] = value

    return click.option("--quiet", "-q", is_flag=True, expose_value=False, callback=remember,
                        help="No progress messages on stderr (they are shown only on a "
                             "terminal anyway).")(fn)


def complete_methods(_ctx, _param, incomplete: str):
    """Shell completion of --method: the built-in method ids."""
    from .methods import builtin_ids

    return [m for m in builtin_ids() if m.startswith(incomplete)]


def complete_targets(_ctx, _param, incomplete: str):
    """Shell completion of --target: the shipped target ids."""
    from .targets import load_targets

    return [t for t in load_targets() if t.startswith(incomplete)]


def method_options(fn):
    fn = click.option("--tableau", "tableau_file", type=click.Path(dir_okay=False, path_type=Path),
                      help="A TOML file with your own method: a Butcher tableau (name, a, b, c"
                           "[, order, b_hat]) or a Rosenbrock method (kind = \"rosenbrock\"; see "
                           "the README).")(fn)
    fn = click.option("--method", "method_id", metavar="NAME", shell_complete=complete_methods,
                      help="A built-in method id (see 'tickwright methods').")(fn)
    return fn


def step_options(fn):
    fn = click.option("--precision", type=PRECISION_CHOICE, default="float", show_default=True,
                      help="Working precision of the generated C.")(fn)
    fn = click.option("--substeps", type=click.IntRange(min=1), default=1, show_default=True,
                      help="Method steps per tick (h = dt / substeps).")(fn)
    fn = click.option("--dt", type=POSITIVE, required=True,
                      help="Tick period in seconds.")(fn)
    return method_options(fn)


def implicit_options(fn):
    """Generation options of the implicit methods (ignored by explicit ones), and the tick's
    safeguards (every method)."""
    fn = click.option("--clamp-states", "clamp_states", is_flag=True,
                      help="Saturate every state that has a range to it after each tick; a "
                           "tick that did returns the CLAMPED status (it was taken, and the "
                           "model left its envelope).")(fn)
    fn = click.option("--accept-error", "accept_error", metavar="LIMIT", default=None,
                      type=click.FloatRange(min=0, max=1, min_open=True, max_open=True),
                      help="Fail a step whose embedded error estimate exceeds LIMIT of a "
                           "state's full scale (INACCURATE status, or a retry with "
                           "--max-retry-depth). Methods with embedded weights only: bs3, dp5, "
                           "ros2.")(fn)
    fn = click.option("--max-retry-depth", "retry_depth", metavar="N", default=0,
                      show_default=True, type=click.IntRange(min=0, max=MAX_RETRY_DEPTH),
                      help="Retry a failed step as two halves, down to h/2^N; the tick keeps "
                           "its length and its worst case grows to 2^(N+1)-1 attempts per "
                           "substep (0: no retries).")(fn)
    fn = click.option("--full-newton", "full_newton", is_flag=True,
                      help="Newton's method proper for implicit methods: a new Jacobian and "
                           "factorization after every iteration.")(fn)
    fn = click.option("--newton-refreshes", "newton_refreshes", metavar="N",
                      type=click.IntRange(min=0), default=DEFAULT_NEWTON_REFRESHES,
                      show_default=True,
                      help="Jacobian refreshes per step when Newton contracts too slowly "
                           "(implicit methods; 0 keeps J frozen for the whole step).")(fn)
    fn = click.option("--linear-solve", "linear_solve", default="auto", show_default=True,
                      type=click.Choice(["auto", "elimination", "dense-lu"]),
                      help="Linear solves of implicit methods: straight-line sparse elimination, "
                           "a looped dense LU (lower-upper) factorization with partial pivoting, "
                           "or chosen by cost.")(fn)
    fn = click.option("--newton-tol", "newton_tol", type=FiniteFloatRange(min=0, max=1,
                      min_open=True, max_open=True), default=None,
                      help="Newton tolerance of implicit methods: the largest |correction| / "
                           "state scale (default 2^-16 in float, 2^-40 in double).")(fn)
    fn = click.option("--newton-iterations", "newton_iterations", type=click.IntRange(min=1),
                      default=20, show_default=True,
                      help="Fixed upper bound of Newton iterations per solve (implicit methods); "
                           "more returns the NO_CONVERGENCE status.")(fn)
    return fn


def force_run_option(fn):
    """--force-run: run even when the tick is beyond the stability limit (check, replay)."""
    return click.option("--force-run", is_flag=True,
                        help="Run even when dt is beyond the method's stability limit over the "
                             "model's envelope (by default the command stops at once).")(fn)


def set_option(fn):
    """--set NAME=VALUE for the tunable parameters of a run (check, replay)."""
    return click.option("--set", "set_pairs", multiple=True, metavar="NAME=VALUE",
                        help="Set a tunable parameter for the whole run (repeatable); a column "
                             "of --inputs named like one sets it tick by tick.")(fn)


def log_options(fn):
    """--resample and --strict-ranges for the commands that read an input log (check, replay)."""
    fn = click.option("--strict-ranges", is_flag=True,
                      help="Refuse a log whose inputs or parameters leave their declared range "
                           "(by default a warning names the first such line).")(fn)
    return click.option("--resample", is_flag=True,
                        help="Hold each row of --inputs until the next onto the --dt grid when "
                             "the log's times are not one tick apart (by default such a log is "
                             "refused).")(fn)


def read_inputs(path: Path, model, ticks, dt: float, resample: bool, strict_ranges: bool):
    """The log of --inputs on the tick grid; inputs outside their range warn (or fail)."""
    from .inputs import range_problem, read_log

    log = read_log(path, model, ticks, dt=dt, resample=resample)
    problem = range_problem(log, model, path)
    if problem and strict_ranges:
        raise CheckError(f"{problem}; fix the log or the model's ranges (--strict-ranges)")
    if problem:
        click.echo(f"tickwright: warning: {problem}; the checks of the model hold only inside "
                   "its ranges (--strict-ranges makes this an error)", err=True)
    return log


def gate_before_run(model, method, dt, substeps, model_path, force_run: bool,
                    warn_only: bool = False, with_limit: bool = False):
    """The stability gate before anything is built: a warning (emit), else one error line and
    exit 1 unless --force-run; returns the advice.gate.StabilityGate."""
    from .advice.gate import stability_gate

    gate = stability_gate(model, method, dt, substeps, with_limit=with_limit)
    if gate.passed:
        return gate
    fix = (f"use --dt {gate.limit:.3g} or less, more --substeps or an A-stable method "
           "('tickwright advise' compares them)")
    if warn_only:
        click.echo(f"tickwright: warning: {model_path}: {gate.summary}; the C grows without "
                   f"bound on such modes: {fix}", err=True)
    elif not force_run:
        fail(f"{model_path}: {gate.summary}; {fix}, or --force-run to run anyway")
    return gate


def precisions_for(precision: str, targets) -> tuple[str, ...]:
    """The builds a check makes: 'both' is float and double, or each target's default."""
    if precision == "both" and targets:
        return tuple(sorted({t.default_precision for t in targets}))
    return ("float", "double") if precision == "both" else (precision,)


def generation_options(method, newton_iterations, newton_tol, linear_solve,
                       newton_refreshes=DEFAULT_NEWTON_REFRESHES, full_newton=False,
                       retry_depth=0, accept_error=None, clamp_states=False) -> dict:
    """The options for generate(): the tick's safeguards for every method (only those given),
    and the implicit-solver options, which an explicit method does not take."""
    options = {key: value for key, value in (("retry_depth", retry_depth),
                                             ("accept_error", accept_error),
                                             ("clamp_states", clamp_states)) if value}
    if method.is_explicit or method.kind == "exact":
        return options
    options.update(newton_iterations=newton_iterations, newton_tol=newton_tol,
                   solver=linear_solve)
    if newton_refreshes != DEFAULT_NEWTON_REFRESHES or full_newton:
        options.update(newton_refreshes=newton_refreshes, full_newton=full_newton)
    return options


def resolve_method(method_id: str | None, tableau_file: Path | None):
    from .methods import builtin, load_method_file

    if method_id and tableau_file:
        raise click.UsageError("give either --method or --tableau, not both")
    if tableau_file:
        return load_method_file(tableau_file)
    if not method_id:
        raise click.UsageError("missing --method NAME (or --tableau FILE); see 'tickwright methods'")
    return builtin(method_id)


# Where --no-units leaves its answer for load(): click's per-invocation scratch space.
NO_UNITS_KEY = "tickwright.no_units"


def units_option(fn):
    """--no-units for every command that loads a model; load() reads it from the context.

    The flag is not a parameter of the commands: each keeps its signature, and load() is the one
    place that decides whether the units are checked.
    """

    def remember(ctx, _param, value):
        ctx.meta[NO_UNITS_KEY] = value

    return click.option("--no-units", is_flag=True, expose_value=False, callback=remember,
                        help="Do not check the model's units (known unit strings, every rate in "
                             "its state's unit per second, consistent expressions).")(fn)


def load(model_path: Path):
    """The model file, with its units checked unless the command was given --no-units."""
    from .model import load_model

    ctx = click.get_current_context(silent=True)
    skip = bool(ctx is not None and ctx.meta.get(NO_UNITS_KEY))
    return load_model(model_path, check_units=not skip)


def with_values(model, settings: dict):
    """The model with the --set values as its parameters' values (what the gate starts from)."""
    from dataclasses import replace

    if not settings:
        return model
    return replace(model, parameters=tuple(replace(p, value=settings.get(p.name, p.value))
                                           for p in model.parameters))


class Commands(OneLineGroup):
    """The command group: it suggests a close command name for a mistyped one, and keeps the
    arguments it was given (the review report shows the exact command line)."""

    def parse_args(self, ctx, args):
        ctx.meta[ARGS_KEY] = list(args)
        return super().parse_args(ctx, args)

    def resolve_command(self, ctx, args):
        name = args[0] if args else ""
        if name and not name.startswith("-") and self.get_command(ctx, name) is None:
            close = difflib.get_close_matches(name, self.list_commands(ctx), n=1)
            if close:
                raise click.UsageError(f"no command '{name}' (did you mean '{close[0]}'?)", ctx)
        return super().resolve_command(ctx, args)


def command_line() -> str:
    """The command line as given (tickwright and its arguments), quoted for a shell."""
    ctx = click.get_current_context(silent=True)
    args = ctx.meta.get(ARGS_KEY, sys.argv[1:]) if ctx is not None else sys.argv[1:]
    return shlex.join(["tickwright", *args])


@click.group(cls=Commands, context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(__version__, prog_name="tickwright")
@click.option("--verbose", is_flag=True,
              help="When a C compiler fails, also print its command and its whole output "
                   "(before the one-line error).")
def main(verbose):
    """Turn an ordinary differential equation model and a Runge-Kutta method into firmware C.

    The C is dependency-free and checked against an independent reference. Validate the
    generated code on the real hardware; it is not qualified for safety functions without
    qualified review.
    """


@main.command()
@click.argument("model_path", metavar="MODEL", type=click.Path(dir_okay=False, path_type=Path))
@step_options
@click.option("--out", "out_dir", type=click.Path(file_okay=False, path_type=Path), required=True,
              help="Folder to write <name>.h and <name>.c into.")
@click.option("--force", is_flag=True, help="Replace files even if tickwright did not write them.")
@click.option("--error-estimate", is_flag=True,
              help="Also generate <name>_advance_with_error(), which returns the embedded pair's "
                   "local error estimate (methods with b_hat: bs3, dp5, ros2).")
@click.option("--build-files", is_flag=True,
              help="Also write CMakeLists.txt (a static library target) and <name>.mk (a Make "
                   "fragment) with the flags the checks use; one model per folder.")
@click.option("--check", "check_only", is_flag=True,
              help="Write nothing: exit 0 when the files in --out are exactly what this command "
                   "generates, else exit 1 with one line per differing file (for CI).")
@click.option("--json", "as_json", is_flag=True,
              help="Print the files written (or, with --check, the differences) as JSON.")
@implicit_options
@units_option
@quiet_option
@guarded
def emit(model_path, method_id, tableau_file, dt, substeps, precision, out_dir, force,
         error_estimate, build_files, check_only, as_json, newton_iterations, newton_tol,
         linear_solve, newton_refreshes, full_newton, retry_depth, accept_error, clamp_states):
    """Write the C files for MODEL: <name>.h and <name>.c.

    With --check, compare instead: exit 1 when a file in --out is missing or differs from what
    the current model, method and options generate.
    """
    from dataclasses import replace

    from .build import build_system_files, refuse_other_model
    from .errors import EmitError
    from .output import check_writable
    from .pipeline import generate
    from .report.json import json_text

    model = load(model_path)
    method = resolve_method(method_id, tableau_file)
    if not check_only:
        check_writable(out_dir, EmitError, "choose a writable folder for --out")
    options = generation_options(method, newton_iterations, newton_tol, linear_solve,
                                 newton_refreshes, full_newton, retry_depth, accept_error,
                                 clamp_states)
    gate_before_run(model, method, dt, substeps, model_path, force_run=True, warn_only=True)
    say(f"generate {model.name} ({model.nx} state{'' if model.nx == 1 else 's'}) with "
        f"{method.id}")
    csource = generate(model, method, dt, substeps, precision, error_estimate=error_estimate,
                       **options)
    if build_files:
        csource = replace(csource, files=csource.files + build_system_files(csource, model))
    if check_only:
        differences = csource.differences(out_dir)
        if as_json:
            click.echo(json_text(dict(
                up_to_date=not differences, checked=[str(out_dir / n) for n, _ in csource.files],
                differences=[dict(path=str(d.path), line=d.line, expected=d.expected,
                                  found=d.found) for d in differences])))
        else:
            echo_lines(d.summary for d in differences)
            if not differences:
                click.echo(f"{out_dir}: up to date ({', '.join(n for n, _ in csource.files)})")
        if differences:
            raise click.exceptions.Exit(1)
        return
    if build_files:
        refuse_other_model(out_dir, model.name)
    written = csource.write(out_dir, force=force)
    if as_json:
        click.echo(json_text(dict(written=[str(p) for p in written])))
    else:
        echo_lines(str(path) for path in written)


@main.command()
@click.argument("model_path", metavar="MODEL", type=click.Path(dir_okay=False, path_type=Path))
@method_options
@click.option("--dt", type=POSITIVE, required=True,
              help="Tick period in seconds.")
@click.option("--substeps", type=click.IntRange(min=1), default=1, show_default=True,
              help="Method steps per tick.")
@click.option("--precision", type=click.Choice(["float", "double", "both"]), default="both",
              show_default=True, help="Which builds to cross-check.")
@click.option("--ticks", type=click.IntRange(min=1), default=None,
              help=f"Length of the cross-check run [default: {DEFAULT_CHECK_TICKS}, or every "
                   "row of --inputs].")
@click.option("--inputs", "inputs_path", type=click.Path(dir_okay=False, path_type=Path),
              help="Run the cross-check and the accuracy check on this log instead of the input "
                   "sweep: CSV with header t,<inputs>[,<tunable parameters>], one row per tick "
                   "(as for replay).")
@log_options
@set_option
@force_run_option
@click.option("--no-order", is_flag=True, help="Skip the order study.")
@click.option("--tolerance", type=POSITIVE, default=1e-2,
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
              shell_complete=complete_targets,
              help="Also cross-compile and run on this target (see 'tickwright targets'); "
                   "repeatable. Without --precision, the target's default precision is used.")
@click.option("--targets-dir", type=click.Path(file_okay=False, exists=True, path_type=Path),
              help="A folder of your own target files, added to the shipped ones.")
@implicit_options
@units_option
@quiet_option
@guarded
def check(model_path, method_id, tableau_file, dt, substeps, precision, ticks, inputs_path,
          resample, strict_ranges, set_pairs, force_run, no_order, tolerance, as_json,
          error_estimate, plot_dir, plot_format, target_names, targets_dir, newton_iterations,
          newton_tol, linear_solve, newton_refreshes, full_newton, retry_depth, accept_error,
          clamp_states):
    """Build MODEL's C, cross-check it against the reference and measure its order.

    With --inputs, the cross-check and the accuracy check run on a recorded log of inputs. With
    --target, also cross-compile it for a microcontroller, run it on the emulator, compare it
    bit for bit with the host build and report flash, stack and instructions per tick.
    Stops at once when dt is beyond the stability limit (unless --force-run).
    Exit status 1 when any check fails.
    """
    from .inputs import parameter_settings, parameter_table
    from .methods import tolerance_note
    from .report import CheckOutcome
    from .report.json import check_data, json_text
    from .report.text import check_lines
    from .targets import check_on_targets, load_target
    from .verify import COLUMN, SWEEP, check as run_check

    from .output import check_writable

    model = load(model_path)
    method = resolve_method(method_id, tableau_file)
    if plot_dir:
        check_writable(plot_dir, CheckError, "choose a writable folder for --plot")
    if (inputs_path or set_pairs) and (error_estimate or target_names):
        raise click.UsageError("--inputs and --set apply to the cross-check and the accuracy "
                               "check; run --error-estimate and --target without them")
    settings = parameter_settings(model, set_pairs)
    inputs, columns, scenario = None, {}, SWEEP
    if inputs_path:
        log = read_inputs(inputs_path, model, ticks, dt, resample, strict_ranges)
        inputs, columns, scenario = log.inputs, log.parameters, inputs_path.name
    ticks = len(inputs) if inputs is not None else ticks or DEFAULT_CHECK_TICKS
    parameters = parameter_table(model, ticks, settings, columns, str(inputs_path))
    sources = tuple((p.name, COLUMN if p.name in columns else settings[p.name])
                    for p in model.tunable if p.name in columns or p.name in settings)
    gate = gate_before_run(with_values(model, settings), method, dt, substeps, model_path,
                           force_run, with_limit=True)
    targets = [load_target(name, targets_dir) for name in target_names]
    precisions = precisions_for(precision, targets)
    if error_estimate and method.b_hat is None:
        raise MethodError(f"{method.id}: has no embedded weights (b_hat); --error-estimate needs "
                          "an embedded pair such as bs3 or dp5")
    options = generation_options(method, newton_iterations, newton_tol, linear_solve,
                                 newton_refreshes, full_newton, retry_depth, accept_error,
                                 clamp_states)
    report = run_check(model, method, dt, substeps, precisions, ticks, inputs,
                       order=not no_order, progress=say, accuracy=tolerance, options=options,
                       parameters=parameters, scenario=scenario, parameter_sources=sources,
                       stability=gate)
    estimates = ()
    if error_estimate:
        from .verify.estimate import check_error_estimate

        estimates = tuple(check_error_estimate(model, method, dt, substeps, p, ticks)
                          for p in precisions)
    pictures = ()
    if plot_dir:
        from .report.plots import check_pictures

        say(f"pictures into {plot_dir}")
        pictures = tuple(check_pictures(model, method, dt, substeps, precisions, ticks, report,
                                        plot_dir, plot_format, options, inputs, parameters))
    target_reports = tuple(check_on_targets(model, method, dt, substeps, precisions, ticks,
                                            targets, options, progress=say))
    outcome = CheckOutcome(report, method.name, estimates, target_reports, pictures,
                           method_note=tolerance_note(method))
    if as_json:
        click.echo(json_text(check_data(outcome)))
    else:
        echo_lines(check_lines(outcome))
    if not outcome.passed:
        raise click.exceptions.Exit(1)


@main.command()
@click.argument("model_path", metavar="MODEL", type=click.Path(dir_okay=False, path_type=Path))
@method_options
@click.option("--dt", type=click.FloatRange(min=0, min_open=True), required=True,
              help="Tick period in seconds.")
@click.option("--substeps", type=click.IntRange(min=1), default=1, show_default=True,
              help="Method steps per tick.")
@click.option("--precision", type=click.Choice(["float", "double", "both"]), default="both",
              show_default=True, help="Which builds to check and fingerprint.")
@click.option("--ticks", type=click.IntRange(min=1), default=DEFAULT_CHECK_TICKS,
              show_default=True, help="Length of the cross-check run.")
@click.option("--tolerance", type=click.FloatRange(min=0, max=1, min_open=True, max_open=True),
              default=1e-2, show_default=True,
              help="Accuracy target of the check and of the advice, as a fraction of each "
                   "state's full scale.")
@click.option("--target", "target_names", multiple=True, metavar="NAME|FILE",
              shell_complete=complete_targets,
              help="Also cross-compile, run and measure on this target (repeatable).")
@click.option("--targets-dir", type=click.Path(file_okay=False, exists=True, path_type=Path),
              help="A folder of your own target files, added to the shipped ones.")
@click.option("--no-advice", is_flag=True,
              help="Leave out the advice table (it takes from seconds to a minute on large "
                   "models).")
@click.option("--no-order", is_flag=True, help="Skip the order study.")
@force_run_option
@click.option("--out", "out_path", type=click.Path(dir_okay=False, path_type=Path), required=True,
              help="The HTML file to write (one self-contained page).")
@click.option("--json", "as_json", is_flag=True,
              help="Print the file written, the verdict and the fingerprints as JSON.")
@implicit_options
@units_option
@quiet_option
@guarded
def report(model_path, method_id, tableau_file, dt, substeps, precision, ticks, tolerance,
           target_names, targets_dir, no_advice, no_order, force_run, out_path, as_json,
           newton_iterations, newton_tol, linear_solve, newton_refreshes, full_newton,
           retry_depth, accept_error, clamp_states):
    """Write a review report of MODEL: one self-contained HTML page to sign off.

    The page holds the model with its equations, the method and tick with the stability
    picture, the advice table, the check with its pictures, the target figures, the cautions,
    the command line and the SHA-256 of the model and generated files. Open it in a browser;
    it prints readably. Exit status 1 when a check fails (the page is written anyway).
    """
    import tempfile

    from .methods import tolerance_note
    from .pipeline import generate
    from .report import CheckOutcome
    from .report.html import Picture, Review, fingerprints, review_html
    from .report.json import check_data, json_text
    from .report.plots import check_pictures, stability_region
    from .targets import check_on_targets, load_target
    from .verify import check as run_check

    model = load(model_path)
    method = resolve_method(method_id, tableau_file)
    gate = gate_before_run(model, method, dt, substeps, model_path, force_run, with_limit=True)
    targets = [load_target(name, targets_dir) for name in target_names]
    precisions = precisions_for(precision, targets)
    options = generation_options(method, newton_iterations, newton_tol, linear_solve,
                                 newton_refreshes, full_newton, retry_depth, accept_error,
                                 clamp_states)
    advice = None
    if not no_advice:
        from .advice import advise as run_advice, candidates

        say("advice over the operating envelope")
        advice = run_advice(model, method, dt, tolerance, methods=candidates(), progress=say)
    checked = run_check(model, method, dt, substeps, precisions, ticks, order=not no_order,
                        progress=say, accuracy=tolerance, options=options, stability=gate)
    target_reports = tuple(check_on_targets(model, method, dt, substeps, precisions, ticks,
                                            targets, options, progress=say))
    outcome = CheckOutcome(checked, method.name, (), target_reports,
                           method_note=tolerance_note(method))
    files = []
    for p in precisions:
        csource = generate(model, method, dt, substeps, p, **options)
        files += [(f"{name} ({p})", text) for name, text in csource.files]
    method_args = ["--tableau", str(tableau_file)] if tableau_file else ["--method", method.id]
    regenerate = tuple(shlex.join(["tickwright", "emit", str(model_path), *method_args, "--dt",
                                   repr(dt), "--substeps", str(substeps), "--precision", p,
                                   "--out", "<folder>"]) for p in precisions)
    with tempfile.TemporaryDirectory(prefix="tickwright-report-") as tmp:
        say("pictures")
        if advice is not None:
            values = advice.eigenvalues
        else:
            from .advice.envelope import eigenvalues, envelope

            values = eigenvalues(model, envelope(model)[0])[0]
        pictures = [Picture(f"Stability region of {method.id} (shaded) with h·λ over the "
                            f"operating envelope at dt = {dt:g} s",
                            stability_region(method, values * (dt / substeps),
                                             Path(tmp) / "stability.svg"))]
        for path in check_pictures(model, method, dt, substeps, precisions, ticks, checked,
                                   tmp, "svg", options):
            kind = "Convergence: error against step size (the slope is the order)" \
                if path.stem.endswith("convergence") else \
                "Trajectories: the C builds against the Python reference and solve_ivp"
            pictures.append(Picture(kind, path))
        review = Review(model=model, method=method, dt=dt, substeps=substeps, outcome=outcome,
                        gate=gate, advice=advice, pictures=tuple(pictures), files=tuple(files),
                        command=command_line(), regenerate=regenerate,
                        units_checked=not click.get_current_context().meta.get(NO_UNITS_KEY))
        page = review_html(review)
    out_path.parent.mkdir(parents=True, exist_ok=True)
    tmp_path = out_path.with_name(out_path.name + ".tmp")
    tmp_path.write_text(page, encoding="utf-8", newline="\n")
    tmp_path.replace(out_path)
    if as_json:
        click.echo(json_text(dict(report=str(out_path), passed=review.passed,
                                  check=check_data(outcome), fingerprints=fingerprints(review))))
    else:
        click.echo(f"{out_path}: review report, verdict {'PASS' if review.passed else 'FAIL'}")
    if not review.passed:
        raise click.exceptions.Exit(1)


@main.command("targets")
@click.option("--targets-dir", type=click.Path(file_okay=False, exists=True, path_type=Path),
              help="A folder of your own target files, added to the shipped ones.")
@click.option("--json", "as_json", is_flag=True, help="Print the targets as JSON.")
@click.option("--cmake-toolchain", "toolchain", metavar="NAME|FILE",
              shell_complete=complete_targets,
              help="Print a CMake toolchain file for this cross-compiling target instead (its "
                   "compiler and flags), for the CMakeLists.txt of emit --build-files.")
@guarded
def targets_command(targets_dir, as_json, toolchain):
    """List the targets: precision, compiler and the command that runs a program on each."""
    from .report.json import json_text
    from .report.text import targets_table
    from .targets import load_target, load_targets

    if toolchain:
        from .build import toolchain_file

        click.echo(toolchain_file(load_target(toolchain, targets_dir)), nl=False)
        return
    targets = load_targets(targets_dir)
    if as_json:
        click.echo(json_text([t.to_dict() for t in targets.values()]))
    else:
        echo_lines(targets_table(targets.values()))


@main.command()
@click.argument("model_path", metavar="MODEL", type=click.Path(dir_okay=False, path_type=Path))
@step_options
@click.option("--inputs", "inputs_path", type=click.Path(dir_okay=False, path_type=Path),
              help="CSV with header t,<inputs>, one row per tick.")
@click.option("--steps", type=click.IntRange(min=1), default=None,
              help="Number of ticks (default: the rows of --inputs, else "
                   f"{DEFAULT_REPLAY_TICKS}).")
@click.option("--out", "out_path", type=click.Path(dir_okay=False, path_type=Path), required=True,
              help="CSV to write: t,<states>,<outputs>, one row for the start and one per tick.")
@log_options
@set_option
@force_run_option
@click.option("--json", "as_json", is_flag=True,
              help="Print what was written (file, rows, ticks taken, status) as JSON.")
@implicit_options
@units_option
@quiet_option
@guarded
def replay(model_path, method_id, tableau_file, dt, substeps, precision, inputs_path, steps,
           out_path, resample, strict_ranges, set_pairs, force_run, as_json, newton_iterations,
           newton_tol, linear_solve, newton_refreshes, full_newton, retry_depth,
           accept_error, clamp_states):
    """Run the compiled C of MODEL over a log of inputs and write the trajectory as CSV.

    Stops at once when dt is beyond the stability limit (unless --force-run).
    """
    from .inputs import held_defaults, parameter_settings, parameter_table
    from .report.text import replay_done_line, replay_stop_message
    from .output import check_writable
    from .run import replay as run_replay

    model = load(model_path)
    method = resolve_method(method_id, tableau_file)
    check_writable(out_path, CheckError, "choose a writable path for --out", is_file=True)
    settings = parameter_settings(model, set_pairs)
    columns = {}
    if inputs_path:
        log = read_inputs(inputs_path, model, steps, dt, resample, strict_ranges)
        inputs, columns = log.inputs, log.parameters
    else:
        inputs = held_defaults(model, steps or DEFAULT_REPLAY_TICKS)
    parameters = parameter_table(model, len(inputs), settings, columns, str(inputs_path))
    gate_before_run(with_values(model, settings), method, dt, substeps, model_path, force_run)
    options = generation_options(method, newton_iterations, newton_tol, linear_solve,
                                 newton_refreshes, full_newton, retry_depth, accept_error,
                                 clamp_states)
    result = run_replay(model, method, dt, inputs, substeps, precision, parameters=parameters,
                        **options)
    result.save_csv(out_path)
    if as_json:
        from .report.json import json_text

        click.echo(json_text(dict(out=str(out_path), rows=result.completed + 1,
                                  ticks=result.ticks, completed=result.completed,
                                  status=result.status_name, finished=result.finished)))
    if not result.finished:
        fail(replay_stop_message(inputs_path or model_path, out_path, result, dt))
    if not as_json:
        click.echo(replay_done_line(out_path, result))


@main.command()
@click.option("--tableau", "tableau_file", type=click.Path(dir_okay=False, path_type=Path),
              help="Analyse this tableau file instead of listing the built-in methods.")
@click.option("--json", "as_json", is_flag=True, help="Print the table as JSON.")
@guarded
def methods(tableau_file, as_json):
    """List the built-in methods (or analyse a tableau file): stages, order, kind, source."""
    from .methods import builtin, builtin_ids, load_method_file
    from .report.json import json_text, method_rows
    from .report.text import methods_table

    methods = [load_method_file(tableau_file)] if tableau_file else \
        [builtin(i) for i in builtin_ids()]
    rows = method_rows(methods)
    if as_json:
        click.echo(json_text(rows))
    else:
        echo_lines(methods_table(rows))


@main.command()
@click.argument("model_path", metavar="MODEL", type=click.Path(dir_okay=False, path_type=Path))
@method_options
@click.option("--dt", type=POSITIVE,
              help="A tick period in seconds to check for the chosen --method.")
@click.option("--tolerance", type=FiniteFloatRange(min=0, max=1, min_open=True, max_open=True),
              default=1e-3, show_default=True,
              help="Accuracy target: largest error as a fraction of each state's full scale "
                   "(max |range bound|); half of it goes to truncation, half to round-off. "
                   "Pass the same value to check --tolerance.")
@click.option("--margin", type=FiniteFloatRange(min=0, max=1, min_open=True), default=0.8,
              show_default=True, help="Use at most this fraction of the stability limit.")
@click.option("--horizon", type=POSITIVE,
              help="Seconds the error estimates look ahead: the long run goes toward it (at "
                   "most 2000 ticks, the output marks a run stopped there) and undamped modes "
                   "are followed over it (default: two of the slowest time constants).")
@click.option("--json", "as_json", is_flag=True, help="Print the advice as JSON.")
@click.option("--plot", "plot_dir", type=click.Path(file_okay=False, path_type=Path),
              help="Write the stability-region pictures into this folder.")
@click.option("--plot-format", type=click.Choice(["png", "svg"]), default="png",
              show_default=True, help="File format of the pictures.")
@units_option
@quiet_option
@guarded
def advise(model_path, method_id, tableau_file, dt, tolerance, margin, horizon, as_json,
           plot_dir, plot_format):
    """Advise a method, tick and precision for MODEL from its eigenvalues over the envelope.

    Exit status 1 when --dt is given and is unstable for the chosen method.
    """
    from .advice import advise as run_advice, candidates
    from .report.json import json_text
    from .report.text import advice_lines, advice_warnings

    from .output import check_writable

    model = load(model_path)
    method = resolve_method(method_id, tableau_file) if (method_id or tableau_file) else None
    if dt is not None and method is None:
        raise click.UsageError("--dt needs --method NAME (or --tableau FILE) to check it against")
    if plot_dir:
        check_writable(plot_dir, CheckError, "choose a writable folder for --plot")
    pool = candidates()
    advice = run_advice(model, method, dt, tolerance, margin, horizon, methods=pool, progress=say)
    if plot_dir:
        from .report.plots import advice_pictures

        known = {m.id: m for m in pool}
        if method is not None:
            known[method.id] = method
        for path in advice_pictures(model, advice, known, plot_dir, plot_format):
            click.echo(f"picture: {path}", err=True)
    if as_json:
        click.echo(json_text(advice.to_dict()))
    else:
        echo_lines(advice_lines(advice))
        echo_lines(advice_warnings(advice), err=True)
    if advice.requested and not advice.requested["stable"]:
        raise click.exceptions.Exit(1)


# The demo: the bundled axis model with classical RK4 at 5 kHz in float, the README's quick
# start (a common firmware setting: an explicit method, a fast tick, float32).
DEMO_MODEL = "axis.toml"
DEMO_METHOD = "rk4"
DEMO_DT = 2e-4
DEMO_PRECISION = "float"
# Ticks of the demo's cross-check: 0.1 s of the axis at the demo tick.
DEMO_TICKS = 500
# The demo's default folder, relative to where it runs (the repository's .gitignore names it).
DEMO_OUT = "tickwright-demo"


@main.command()
@click.option("--out", "out_dir", type=click.Path(file_okay=False, path_type=Path),
              default=Path(DEMO_OUT), show_default=True,
              help="Folder to write the demo's C files into.")
@click.option("--json", "as_json", is_flag=True,
              help="Print the files written and the check report as JSON.")
@quiet_option
@guarded
def demo(out_dir, as_json):
    """Run the whole job on the bundled demo model: emit, build, cross-check, report."""
    from .advice.cost import step_cost
    from .discretize import discretize
    from .methods import builtin
    from .pipeline import generate
    from .report import CheckOutcome
    from .report.text import check_lines, demo_lines
    from .resources import examples_dir
    from .simplify import simplify
    from .verify import check as run_check

    model_path = examples_dir() / DEMO_MODEL
    model = load(model_path)
    method = builtin(DEMO_METHOD)
    say(f"model {model.name} from {model_path.name}: {model.nx} states, "
        f"{len(model.inputs)} input(s)")
    gate = gate_before_run(model, method, DEMO_DT, 1, model_path, force_run=False)
    written = generate(model, method, DEMO_DT, 1, DEMO_PRECISION).write(out_dir)
    cost = step_cost(simplify(discretize(model, method, DEMO_DT)))
    report = run_check(model, method, DEMO_DT, 1, ("float", "double"), DEMO_TICKS, progress=say,
                       stability=gate)
    outcome = CheckOutcome(report, method.name)
    if as_json:
        from .report.json import check_data, json_text

        click.echo(json_text(dict(written=[str(p) for p in written], method=method.id,
                                  dt=DEMO_DT, precision=DEMO_PRECISION, cost=cost.to_dict(),
                                  check=check_data(outcome))))
    else:
        echo_lines(demo_lines(written, method, DEMO_DT, DEMO_PRECISION, cost))
        echo_lines(check_lines(outcome))
    if not outcome.passed:
        raise click.exceptions.Exit(1)
