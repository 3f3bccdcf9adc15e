"""Stage 7 of the pipeline: verification of the generated C.

Three checks, each with its own verdict:
1. cross-check (``crosscheck``): the C build and the independent Python reference of the same
   method agree to within a rounding bound, and the run finishes (no non-finite state);
2. accuracy: the C trajectory against scipy's solve_ivp at tight tolerance stays within a
   fraction of each state's scale (default 1 %);
3. order (``order``): the empirical order of the C build (double) on the model, halving the
   step, matches the method's order to within ORDER_TOLERANCE.
``estimate`` checks the run-time error estimate of the C against the reference's.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass

from ..build import strict_compile
from ..methods import Method
from ..model import Model
from ..pipeline import generate
from .crosscheck import CrossCheck, cross_check
from .order import ORDER_TOLERANCE, OrderStudy, measure_order
from .scenario import DEFAULT_ACCURACY, constant_inputs, excitation, state_scales

__all__ = ["DEFAULT_ACCURACY", "ORDER_TOLERANCE", "CheckReport", "CrossCheck", "OrderStudy",
           "check", "constant_inputs", "cross_check", "excitation", "measure_order",
           "state_scales"]


@dataclass(frozen=True)
class CheckReport:
    """What check() found: the strict compile's command, a cross-check per precision, the order
    study (None when skipped) and the overall verdict."""

    method: str
    model: str
    dt: float
    substeps: int
    strict_compile: str
    cross_checks: tuple[CrossCheck, ...]
    order: OrderStudy | None
    passed: bool

    def to_dict(self) -> dict:
        d = asdict(self)
        d["order"] = asdict(self.order) if self.order else None
        return d



def check(model: Model, method: Method, dt: float, substeps: int = 1,
          precisions=("float", "double"), ticks: int = 200, inputs=None, order: bool = True,
          progress=None, accuracy: float = DEFAULT_ACCURACY,
          options: dict | None = None) -> CheckReport:
    """Strict compile, cross-check in each precision, and the order study.

    options: generation options of implicit methods (newton_iterations, newton_tol, solver).
    """
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
                                   accuracy, options, csource))
    study = None
    if order:
        say("order study")
        study = measure_order(model, method, progress=say, options=options)
    passed = all(c.passed for c in crosses) and (study is None or study.passed)
    return CheckReport(method=method.id, model=model.name, dt=float(dt), substeps=substeps,
                       strict_compile=command, cross_checks=tuple(crosses), order=study,
                       passed=bool(passed))
