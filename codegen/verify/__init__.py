"""Stage 7 of the pipeline: verification of the generated C.

Three checks, each with its own verdict:
1. cross-check (``crosscheck``): the C build and the independent Python reference of the same
   method agree to within a rounding bound, and the run finishes (no non-finite state);
2. accuracy: the C trajectory against scipy's solve_ivp at tight tolerance stays within a
   fraction of each state's scale (default 1 %);
3. order (``order``): the empirical order of the C build (double) on the model, halving the
   step, matches the method's order to within ORDER_TOLERANCE (on a non-smooth model, a study
   that cannot measure says so and does not fail).
The runs take the input sweep of ``scenario`` or the caller's inputs (a recorded log), and
per-tick values of the tunable parameters; a run stops at its first failed tick, and then the
order study is not run.
``estimate`` checks the run-time error estimate of the C against the reference's.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass

from ..build import strict_compile
from ..methods import Method
from ..model import Model
from ..pipeline import generate
from .crosscheck import CrossCheck, cross_check
from .order import ORDER_TOLERANCE, OrderStudy, measure_order, non_smooth
from .scenario import DEFAULT_ACCURACY, constant_inputs, excitation, state_scales

__all__ = ["COLUMN", "DEFAULT_ACCURACY", "ORDER_TOLERANCE", "SWEEP", "CheckReport", "CrossCheck",
           "OrderStudy", "check", "constant_inputs", "cross_check", "excitation",
           "measure_order", "non_smooth", "state_scales"]

# What the report calls the inputs of a check run without a log.
SWEEP = "input sweep"
# ... and of a model without inputs.
NO_INPUTS = "no inputs"
# How CheckReport.parameters marks a tunable parameter taken from a column of the input log.
COLUMN = "column"


@dataclass(frozen=True)
class CheckReport:
    """What check() found: the strict compile's command, a cross-check per precision, the order
    study (None when skipped) and the overall verdict.

    scenario: where the inputs came from (SWEEP, NO_INPUTS or the log's name); parameters: the
    tunable parameters the run set ((name, value), or (name, COLUMN) for a log's column); stability:
    the advice.gate.StabilityGate the caller decided before the run (None when not asked);
    order_skipped: why the order study was not run ('' when it ran or was not asked for).
    """

    method: str
    model: str
    dt: float
    substeps: int
    strict_compile: str
    cross_checks: tuple[CrossCheck, ...]
    order: OrderStudy | None
    passed: bool
    scenario: str = SWEEP
    parameters: tuple[tuple[str, float | str], ...] = ()
    stability: object | None = None
    order_skipped: str = ""

    def to_dict(self) -> dict:
        d = asdict(self)
        d["order"] = asdict(self.order) if self.order else None
        d["parameters"] = dict(self.parameters)
        d["stability"] = self.stability.to_dict() if self.stability is not None else None
        return d



def check(model: Model, method: Method, dt: float, substeps: int = 1,
          precisions=("float", "double"), ticks: int = 200, inputs=None, order: bool = True,
          progress=None, accuracy: float = DEFAULT_ACCURACY,
          options: dict | None = None, parameters=None, scenario: str = SWEEP,
          parameter_sources: tuple = (), stability=None) -> CheckReport:
    """Strict compile, cross-check in each precision, and the order study.

    inputs: (ticks, nu) inputs per tick instead of the sweep (a log: its rows decide the ticks);
    parameters: (ticks, len(model.tunable)) tunable parameter values per tick, or None;
    scenario, parameter_sources: how the report names them; stability: the gate's decision, which
    the verdict includes. options: generation options of implicit methods (newton_iterations,
    newton_tol, solver).
    """
    if inputs is not None:
        ticks = len(inputs)
    elif not model.inputs and scenario == SWEEP:
        scenario = NO_INPUTS
    say = progress or (lambda msg: None)
    say("strict compile")
    sources = {p: generate(model, method, dt, substeps, p, **(options or {})) for p in precisions}
    command = ""
    for csource in sources.values():
        command = strict_compile(csource)
    crosses = []
    for precision, csource in sources.items():
        say(f"cross-check ({precision}): build and run {ticks} ticks")
        crosses.append(cross_check(model, method, dt, substeps, precision, ticks, inputs,
                                   accuracy, options, csource, parameters=parameters))
    study, skipped = None, ""
    stopped = [c for c in crosses if c.completed < c.ticks]
    if order and stopped:
        skipped = f"not run: the {stopped[0].precision} run stopped at tick " \
            f"{stopped[0].completed + 1}"
    elif order:
        say("order study")
        study = measure_order(model, method, progress=say, options=options)
    passed = all(c.passed for c in crosses) and (study is None or study.passed) and \
        (stability is None or stability.passed)
    return CheckReport(method=method.id, model=model.name, dt=float(dt), substeps=substeps,
                       strict_compile=command, cross_checks=tuple(crosses), order=study,
                       passed=bool(passed), scenario=scenario,
                       parameters=tuple(parameter_sources), stability=stability,
                       order_skipped=skipped)
