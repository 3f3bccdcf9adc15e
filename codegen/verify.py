"""Stage 7: verification of a built module against the reference and outside solutions.

Three checks, each with its own verdict:
1. cross-check: the C build and the independent Python reference of the same method agree to within
   a rounding bound, and the run finishes (no non-finite state);
2. accuracy: the C trajectory against scipy's solve_ivp at tight tolerance stays within a fraction
   of each state's scale (default 1 %);
3. order: the empirical order of the C build (double) on the model, halving the step, matches the
   method's order to within ORDER_TOLERANCE.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, field

import numpy as np

from . import reference
from .build import build, strict_compile
from .method import Tableau
from .model import Model
from .pipeline import generate
from .printer import FLOAT

# Measured order must be within this of the method's order (the acceptance bound of the project).
ORDER_TOLERANCE = 0.15
# Unit roundoff of each precision.
EPS = {"float": 2.0 ** -24, "double": 2.0 ** -53}
# Rounding units allowed per stage and step: each stage adds a handful of roundings of |x|-sized
# values (the stage sum, the rate evaluation, the update): a few units per stage and step.
ULPS_PER_STAGE = 4
# Order study: errors outside [floor, ceiling] x scale are not in the asymptotic regime.
ORDER_ERROR_CEILING = 1e-2
ORDER_ERROR_FLOOR = {"double": 1e-13}
# A level counts only when its error is this many times the smallest error the study reached:
# the smallest is the noise floor (rounding, or the accuracy of the solve_ivp solution), and a
# level 30 times above it is off by at most ~3 % (0.05 in the fitted order).
ORDER_NOISE_MARGIN = 30.0
ORDER_MAX_LEVELS = 14


@dataclass(frozen=True)
class CrossCheck:
    """C build vs the Python reference of the same method over the same ticks."""

    precision: str
    ticks: int
    completed: int
    max_difference: float
    tolerance: float
    worst_state: str
    error_vs_high_accuracy: float
    accuracy_tolerance: float
    accurate: bool
    passed: bool


@dataclass(frozen=True)
class OrderStudy:
    """Empirical convergence order: errors at T for n = n0, 2 n0, ... steps."""

    expected: int | None
    horizon: float
    steps: tuple[int, ...]
    errors_c: tuple[float, ...]
    errors_reference: tuple[float, ...]
    measured: float | None
    passed: bool
    note: str = ""


@dataclass(frozen=True)
class CheckReport:
    method: str
    model: str
    dt: float
    substeps: int
    strict_compile: str
    cross_checks: tuple[CrossCheck, ...]
    order: OrderStudy | None
    passed: bool
    extras: dict = field(default_factory=dict)

    def to_dict(self) -> dict:
        d = asdict(self)
        d["order"] = asdict(self.order) if self.order else None
        return d


def excitation(model: Model, ticks: int) -> np.ndarray:
    """A deterministic excitation: each ranged input sweeps its range; others keep their default.

    Shape (ticks, nu). The frequencies differ per input so inputs are not collinear.
    """
    u = np.zeros((ticks, len(model.inputs)))
    k = np.arange(ticks)
    for j, inp in enumerate(model.inputs):
        if inp.range:
            lo, hi = inp.range
            u[:, j] = lo + (hi - lo) * (0.5 + 0.4 * np.sin(2 * np.pi * (j + 1) * k / max(ticks, 1)))
        else:
            u[:, j] = inp.default
    return u


# Where in its range each input sits during the order study: off-centre, so that a symmetric range
# (a voltage of -12..12 V) still drives the model away from rest.
ORDER_INPUT_POSITION = 0.75


def constant_inputs(model: Model) -> np.ndarray:
    """Constant inputs for the order study: 3/4 up each range, or the default."""
    return np.array([i.range[0] + ORDER_INPUT_POSITION * (i.range[1] - i.range[0]) if i.range
                     else i.default for i in model.inputs], dtype=np.float64)


def run_c(built, model: Model, inputs: np.ndarray, x0=None) -> reference.Trajectory:
    """Run the compiled step over the inputs with the test-only C loop."""
    ffi, lib = built.ffi, built.lib
    dtype = np.float32 if built.csource.precision == FLOAT else np.float64
    real_t = f"{model.name}_real_t"
    n = len(inputs)
    u = np.ascontiguousarray(inputs, dtype=dtype).reshape(-1)
    xs = np.zeros((n + 1) * model.nx, dtype=dtype)
    ts = np.zeros(n + 1, dtype=dtype)
    ctx = ffi.new(f"{model.name}_ctx_t *")
    getattr(lib, f"{model.name}_reset")(ctx)
    if x0 is not None:
        for s, v in zip(model.states, x0):
            setattr(ctx, s.name, float(v))
    status = ffi.new("int *")
    done = lib.tw_run(ctx, n, ffi.from_buffer(f"{real_t}[]", u) if u.size else ffi.NULL,
                      ffi.from_buffer(f"{real_t}[]", xs), ffi.from_buffer(f"{real_t}[]", ts),
                      status)
    xs = xs.reshape(n + 1, model.nx).astype(np.float64)
    xs[done + 1:] = np.nan
    return reference.Trajectory(ts=ts.astype(np.float64), xs=xs, completed=int(done))


def as_precision(values, precision: str):
    """Round values to the build's precision, so the reference starts from the same numbers."""
    arr = np.asarray(values, dtype=np.float64)
    return arr.astype(np.float32).astype(np.float64) if precision == FLOAT else arr


def rounding_tolerance(model: Model, method: Tableau, precision: str, ticks: int, substeps: int,
                       scale: float, growth: float) -> float:
    """Bound on |C - reference| from rounding alone.

    Each of the ticks*substeps steps adds at most ULPS_PER_STAGE*(stages + 1) rounding units of
    the state's scale; errors are carried forward with at most the growth factor of the model
    over the run (exp of the largest positive real part of the Jacobian's eigenvalues times T).
    """
    steps = ticks * substeps
    return ULPS_PER_STAGE * (method.stages + 1) * EPS[precision] * steps * scale * growth


def growth_factor(model: Model, horizon: float, inputs: np.ndarray) -> float:
    x0 = np.array([s.initial for s in model.states])
    jac = reference.jacobian_function(model)
    u = inputs[0] if len(inputs) else np.zeros(0)
    with np.errstate(all="ignore"):
        eig = np.linalg.eigvals(jac(0.0, x0, u))
    rate = max(0.0, float(np.max(eig.real))) if np.all(np.isfinite(eig)) else 0.0
    return float(np.exp(min(rate * horizon, 50.0)))


# Default accuracy target of a check: 1 % of each state's full scale (the largest magnitude of its
# declared range, else the largest magnitude it reaches); a firmware model is rarely trusted to
# better than that.
DEFAULT_ACCURACY = 1e-2


def state_scales(model: Model, run: np.ndarray | None = None) -> np.ndarray:
    """Per-state scale: State.full_scale, else the largest finite |x| of the run, else 1."""
    scales = []
    for i, s in enumerate(model.states):
        value = s.full_scale or 0.0
        if not value and run is not None and run.size:
            finite = run[:, i][np.isfinite(run[:, i])]
            value = float(np.max(np.abs(finite))) if finite.size else 0.0
        scales.append(value if value > 0 else 1.0)
    return np.array(scales)


def newton_allowance(model: Model, method, precision: str, steps: int, xs: np.ndarray,
                     options: dict | None = None) -> np.ndarray | float:
    """Extra |C - reference| allowed per state for the C's Newton stopping rule (0 without one).

    The C accepts an iterate once max_i |correction_i| / scale_i <= tol, with scale_i = the state's
    range bound + |x_i|; the reference iterates to rounding. Each step may then differ by about one
    last correction, tol * scale_i in state i, carried forward like rounding errors.
    """
    from .implicit import NewtonSpec, jacobian
    from .implicit import state_scales as newton_scales

    if method.is_explicit or method.kind not in ("diagonally implicit", "fully implicit"):
        return 0.0
    if jacobian(model).linear:
        return 0.0
    tol = NewtonSpec(tolerance=(options or {}).get("newton_tol")).tolerance_for(precision)
    reach = np.nanmax(np.abs(xs), axis=0) if xs.size else np.zeros(model.nx)
    return steps * tol * (np.asarray(newton_scales(model)) + reach)


def cross_check(model: Model, method: Tableau, dt: float, substeps: int, precision: str,
                ticks: int, inputs: np.ndarray | None = None,
                accuracy: float = DEFAULT_ACCURACY, options: dict | None = None,
                csource=None) -> CrossCheck:
    """Build the C and compare it tick by tick with the independent reference.

    options: generation options of implicit methods (newton_iterations, newton_tol, solver);
    csource: the already generated C for these arguments, if the caller has it.
    """
    if csource is None:
        csource = generate(model, method, dt, substeps, precision, **(options or {}))
    built = build(csource, model)
    u = excitation(model, ticks) if inputs is None else inputs
    u = as_precision(u, precision)
    c_run = run_c(built, model, u)
    params = {p.name: float(as_precision(p.value, precision)) for p in model.parameters}
    x0 = as_precision([s.initial for s in model.states], precision)
    ref = reference.run(model, method, dt, substeps, u, x0=x0, parameters=params)
    exact = reference.high_accuracy(model, dt, u, x0=x0, parameters=params)
    n = min(c_run.completed, ref.completed)
    # Per state: the largest difference against that state's own bound (rounding of numbers of
    # the state's full scale, plus the Newton allowance); the worst state is reported.
    diff = np.nanmax(np.abs(c_run.xs[: n + 1] - ref.xs[: n + 1]), axis=0)
    growth = growth_factor(model, ticks * dt, u)
    scales = state_scales(model, ref.xs[: n + 1])
    tols = rounding_tolerance(model, method, precision, ticks, substeps, scales, growth)
    tols = tols + newton_allowance(model, method, precision, ticks * substeps, ref.xs[: n + 1],
                                   options) * growth
    worst = int(np.nanargmax(diff / tols)) if np.all(np.isfinite(diff)) else \
        int(np.argmax(~np.isfinite(diff)))
    max_diff, tol = float(diff[worst]), float(tols[worst])
    m = min(c_run.completed, exact.completed)
    scales = state_scales(model, exact.xs[: m + 1])
    rel = np.abs(c_run.xs[: m + 1] - exact.xs[: m + 1]) / scales
    acc = float(np.max(rel)) if rel.size else float("nan")
    finished = c_run.completed == ticks == ref.completed
    accurate = bool(finished and np.isfinite(acc) and acc <= accuracy)
    passed = bool(finished and np.all(np.isfinite(diff)) and np.all(diff <= tols) and accurate)
    return CrossCheck(precision=precision, ticks=ticks, completed=c_run.completed,
                      max_difference=max_diff, tolerance=tol,
                      worst_state=model.states[worst].name, error_vs_high_accuracy=acc,
                      accuracy_tolerance=accuracy, accurate=accurate, passed=passed)


def order_horizon(model: Model, u: np.ndarray) -> float:
    """A horizon of two of the model's fastest time constants at the initial point."""
    x0 = np.array([s.initial for s in model.states])
    jac = reference.jacobian_function(model)
    with np.errstate(all="ignore"):
        eig = np.linalg.eigvals(jac(0.0, x0, u))
    fastest = float(np.max(np.abs(eig))) if np.all(np.isfinite(eig)) else 0.0
    return 2.0 / fastest if fastest > 0 else 1.0


def _window(errors: list[float], scale: float, floor: float) -> list[int]:
    """Indices of levels whose error is in the asymptotic, above-rounding range.

    Levels end at the first one whose error did not shrink (rounding or the reference's own
    accuracy took over), and each must stand ORDER_NOISE_MARGIN above the smallest error seen.
    """
    finite = [e for e in errors if np.isfinite(e) and e > 0]
    noise = min(finite) if finite else 0.0
    low = max(floor * scale, ORDER_NOISE_MARGIN * noise)
    keep = []
    for i, e in enumerate(errors):
        if i > 0 and np.isfinite(errors[i - 1]) and np.isfinite(e) and e >= errors[i - 1] / 1.5:
            if keep and keep[-1] == i - 1:
                keep.pop()  # the level before a stall is already touched by the noise
            break
        if np.isfinite(e) and low < e < ORDER_ERROR_CEILING * scale:
            keep.append(i)
    return keep


def fitted_order(steps, errors) -> float:
    """Least-squares slope of log(error) against log(1/n)."""
    return float(-np.polyfit(np.log(np.asarray(steps, float)), np.log(np.asarray(errors)), 1)[0])


# An exact discretization must match solve_ivp (rtol 1e-13) to this fraction of the state scale at
# every step size: a thousand times solve_ivp's tolerance, far below any method error.
EXACT_AGREEMENT = 1e-10


def _end_error(run: reference.Trajectory, n: int, exact: np.ndarray) -> float:
    """Max |x(T) - exact| of a run of n steps, or inf when it did not finish."""
    return float(np.max(np.abs(run.xs[-1] - exact))) if run.completed == n else float("inf")


def _c_end_errors(model, method, u, horizon, exact, steps, options, progress, what) -> list:
    """End errors of the C build (double) with n steps over the horizon, for each n in steps."""
    errors = []
    for n in steps:
        if progress:
            progress(f"{what}: C build with {n} steps over {horizon:.3g} s")
        built = build(generate(model, method, horizon / n, 1, "double", **(options or {})), model)
        errors.append(_end_error(run_c(built, model, np.repeat(u[None, :], n, axis=0)), n, exact))
    return errors


def _exact_study(model, method, u, horizon, exact, scale, options, progress) -> OrderStudy:
    """For an exact discretization: the error must stay at rounding level at every step size."""
    steps = (2, 4, 8)
    c_errors = _c_end_errors(model, method, u, horizon, exact, steps, options, progress,
                             "exactness")
    passed = all(e <= EXACT_AGREEMENT * scale for e in c_errors)
    return OrderStudy(None, horizon, steps, tuple(c_errors), (), None, bool(passed),
                      "exact discretization: error at the reference's tolerance at every step "
                      "size" if passed else "exact discretization: error above the reference's "
                      "tolerance")


def measure_order(model: Model, method: Tableau, expected: int | None = None,
                  progress=None, options: dict | None = None) -> OrderStudy:
    """Empirical order of the C build (double) by halving the step on the model.

    The reference picks the levels in the asymptotic regime, then the C is built and run at
    those levels and its own errors against solve_ivp give the measured order.
    options: generation options of implicit methods.
    """
    expected = expected or method.order
    u = constant_inputs(model)
    horizon = order_horizon(model, u)
    exact = reference.high_accuracy(model, horizon, u[None, :], rtol=1e-13).xs[-1]
    scale = max(float(np.max(np.abs(exact))), 1e-300)
    if getattr(method, "kind", "") == "exact":
        return _exact_study(model, method, u, horizon, exact, scale, options, progress)
    floor = ORDER_ERROR_FLOOR["double"]
    steps, ref_errors = [], []
    for level in range(1, ORDER_MAX_LEVELS + 1):
        n = 2 ** level
        err = _end_error(reference.run(model, method, horizon / n, 1,
                                       np.repeat(u[None, :], n, axis=0)), n, exact)
        steps.append(n)
        ref_errors.append(err)
        if np.isfinite(err) and err < floor * scale:
            break
    idx = _window(ref_errors, scale, floor)
    if len(idx) < 3:
        if all(e <= floor * scale for e in ref_errors if np.isfinite(e)) and ref_errors[0] < floor * scale:
            return OrderStudy(expected, horizon, tuple(steps), (), tuple(ref_errors), None, True,
                              "the method is exact on this model at every step size: no order "
                              "to measure")
        return OrderStudy(expected, horizon, tuple(steps), (), tuple(ref_errors), None, False,
                          "fewer than three step sizes in the asymptotic range; the model may be "
                          "non-smooth (Piecewise, abs, min/max) or badly scaled")
    idx = idx[-3:]
    chosen = [steps[i] for i in idx]
    c_errors = _c_end_errors(model, method, u, horizon, exact, chosen, options, progress,
                             "order study")
    if not all(np.isfinite(c_errors)) or min(c_errors) <= 0:
        return OrderStudy(expected, horizon, tuple(chosen), tuple(c_errors),
                          tuple(ref_errors[i] for i in idx), None, False,
                          "the C build did not finish the order study runs")
    measured = fitted_order(chosen, c_errors)
    passed = expected is None or abs(measured - expected) <= ORDER_TOLERANCE
    return OrderStudy(expected, horizon, tuple(chosen), tuple(c_errors),
                      tuple(ref_errors[i] for i in idx), measured, bool(passed))


def check(model: Model, method: Tableau, dt: float, substeps: int = 1,
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
