"""Command line: one click group; exit 1 for a domain error, 2 for usage; diagnostics on stderr."""

from __future__ import annotations

import functools
from pathlib import Path

import click

from . import __version__
from .errors import BuildError, MethodError, TickwrightError

PRECISION_CHOICE = click.Choice(["float", "double"])
# The generator's defaults and limits (discretize.ir: DEFAULT_NEWTON_REFRESHES, MAX_RETRY_DEPTH),
# repeated here so that the command line starts without sympy; tests/test_stiff.py checks that
# they agree.
DEFAULT_NEWTON_REFRESHES = 10
MAX_RETRY_DEPTH = 16
# Ticks of a replay given neither --inputs nor --steps: a short look at the model's start.
DEFAULT_REPLAY_TICKS = 100


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


def say(message: str) -> None:
    """Progress on stderr, so stdout stays clean for --json."""
    click.echo(f"... {message}", err=True)


def method_options(fn):
    fn = click.option("--tableau", "tableau_file", type=click.Path(dir_okay=False, path_type=Path),
                      help="A TOML file with your own method: a Butcher tableau (name, a, b, c"
                           "[, order, b_hat]) or a Rosenbrock method (kind = \"rosenbrock\"; see "
                           "the README).")(fn)
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
    fn = click.option("--newton-tol", "newton_tol", type=click.FloatRange(min=0, max=1,
                      min_open=True, max_open=True), default=None,
                      help="Newton tolerance of implicit methods: the largest |correction| / "
                           "state scale (default 2^-16 in float, 2^-40 in double).")(fn)
    fn = click.option("--newton-iterations", "newton_iterations", type=click.IntRange(min=1),
                      default=20, show_default=True,
                      help="Fixed upper bound of Newton iterations per solve (implicit methods); "
                           "more returns the NO_CONVERGENCE status.")(fn)
    return fn


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


@click.group(context_settings={"help_option_names": ["-h", "--help"]})
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
@implicit_options
@units_option
@guarded
def emit(model_path, method_id, tableau_file, dt, substeps, precision, out_dir, force,
         error_estimate, newton_iterations, newton_tol, linear_solve, newton_refreshes,
         full_newton, retry_depth, accept_error, clamp_states):
    """Write the C files for MODEL: <name>.h and <name>.c."""
    from .pipeline import generate

    model = load(model_path)
    method = resolve_method(method_id, tableau_file)
    options = generation_options(method, newton_iterations, newton_tol, linear_solve,
                                 newton_refreshes, full_newton, retry_depth, accept_error,
                                 clamp_states)
    csource = generate(model, method, dt, substeps, precision, error_estimate=error_estimate,
                       **options)
    for path in csource.write(out_dir, force=force):
        click.echo(str(path))


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
@units_option
@guarded
def check(model_path, method_id, tableau_file, dt, substeps, precision, ticks, no_order,
          tolerance, as_json, error_estimate, plot_dir, plot_format, target_names, targets_dir,
          newton_iterations, newton_tol, linear_solve, newton_refreshes, full_newton,
          retry_depth, accept_error, clamp_states):
    """Build MODEL's C, cross-check it against the reference and measure its order.

    With --target, also cross-compile it for a microcontroller, run it on the emulator, compare
    it bit for bit with the host build and report flash, stack and instructions per tick.
    Exit status 1 when any check fails.
    """
    from .methods import tolerance_note
    from .report import CheckOutcome
    from .report.json import check_data, json_text
    from .report.text import check_lines
    from .targets import check_on_targets, load_target
    from .verify import check as run_check

    model = load(model_path)
    method = resolve_method(method_id, tableau_file)
    targets = [load_target(name, targets_dir) for name in target_names]
    if precision == "both" and targets:
        precisions = tuple(sorted({t.default_precision for t in targets}))
    else:
        precisions = ("float", "double") if precision == "both" else (precision,)
    if error_estimate and method.b_hat is None:
        raise MethodError(f"{method.id}: has no embedded weights (b_hat); --error-estimate needs "
                          "an embedded pair such as bs3 or dp5")
    options = generation_options(method, newton_iterations, newton_tol, linear_solve,
                                 newton_refreshes, full_newton, retry_depth, accept_error,
                                 clamp_states)
    report = run_check(model, method, dt, substeps, precisions, ticks, order=not no_order,
                       progress=say, accuracy=tolerance, options=options)
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
                                        plot_dir, plot_format, options))
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


@main.command("targets")
@click.option("--targets-dir", type=click.Path(file_okay=False, exists=True, path_type=Path),
              help="A folder of your own target files, added to the shipped ones.")
@click.option("--json", "as_json", is_flag=True, help="Print the targets as JSON.")
@guarded
def targets_command(targets_dir, as_json):
    """List the targets: precision, compiler and the command that runs a program on each."""
    from .report.json import json_text
    from .report.text import targets_table
    from .targets import load_targets

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
@implicit_options
@units_option
@guarded
def replay(model_path, method_id, tableau_file, dt, substeps, precision, inputs_path, steps,
           out_path, newton_iterations, newton_tol, linear_solve, newton_refreshes, full_newton,
           retry_depth, accept_error, clamp_states):
    """Run the compiled C of MODEL over a log of inputs and write the trajectory as CSV."""
    from .inputs import held_defaults, read_input_log
    from .report.text import replay_done_line, replay_stop_message
    from .run import replay as run_replay

    model = load(model_path)
    method = resolve_method(method_id, tableau_file)
    if inputs_path:
        inputs = read_input_log(inputs_path, model, steps)
    else:
        inputs = held_defaults(model, steps or DEFAULT_REPLAY_TICKS)
    options = generation_options(method, newton_iterations, newton_tol, linear_solve,
                                 newton_refreshes, full_newton, retry_depth, accept_error,
                                 clamp_states)
    result = run_replay(model, method, dt, inputs, substeps, precision, **options)
    result.save_csv(out_path)
    if not result.finished:
        fail(replay_stop_message(inputs_path or model_path, out_path, result, dt))
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
@click.option("--dt", type=click.FloatRange(min=0, min_open=True),
              help="A tick period in seconds to check for the chosen --method.")
@click.option("--tolerance", type=click.FloatRange(min=0, max=1, min_open=True, max_open=True),
              default=1e-3, show_default=True,
              help="Accuracy target: largest error as a fraction of each state's full scale "
                   "(max |range bound|); half of it goes to truncation, half to round-off. "
                   "Pass the same value to check --tolerance.")
@click.option("--margin", type=click.FloatRange(min=0, max=1, min_open=True), default=0.8,
              show_default=True, help="Use at most this fraction of the stability limit.")
@click.option("--horizon", type=click.FloatRange(min=0, min_open=True),
              help="Seconds the error estimates look ahead: the long run goes toward it (at "
                   "most 2000 ticks, the output marks a run stopped there) and undamped modes "
                   "are followed over it (default: two of the slowest time constants).")
@click.option("--json", "as_json", is_flag=True, help="Print the advice as JSON.")
@click.option("--plot", "plot_dir", type=click.Path(file_okay=False, path_type=Path),
              help="Write the stability-region pictures into this folder.")
@click.option("--plot-format", type=click.Choice(["png", "svg"]), default="png",
              show_default=True, help="File format of the pictures.")
@units_option
@guarded
def advise(model_path, method_id, tableau_file, dt, tolerance, margin, horizon, as_json,
           plot_dir, plot_format):
    """Advise a method, tick and precision for MODEL from its eigenvalues over the envelope.

    Exit status 1 when --dt is given and is unstable for the chosen method.
    """
    from .advice import advise as run_advice, candidates
    from .report.json import json_text
    from .report.text import advice_lines, advice_warnings

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
@guarded
def demo(out_dir):
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
    written = generate(model, method, DEMO_DT, 1, DEMO_PRECISION).write(out_dir)
    cost = step_cost(simplify(discretize(model, method, DEMO_DT)))
    report = run_check(model, method, DEMO_DT, 1, ("float", "double"), DEMO_TICKS, progress=say)
    outcome = CheckOutcome(report, method.name)
    echo_lines(demo_lines(written, method, DEMO_DT, DEMO_PRECISION, cost))
    echo_lines(check_lines(outcome))
    if not outcome.passed:
        raise click.exceptions.Exit(1)
