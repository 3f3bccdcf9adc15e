"""Step-size advice: which method, which tick and which precision suit a model.

Model -> Advice. The stages:
1. envelope: operating points from the `range` of states, inputs and parameters (corners, the
   centre, a few interior points; the initial point when nothing has a range);
2. eigenvalues of the Jacobian df/dx at every point;
3. per candidate method: the largest stable step (every h*lambda in the stability region, decided
   exactly on each ray), the error at a step size (embedded pair or step doubling per step, step
   doubling of the whole run for the global error), and the operations per simulated second;
4. the recommendation: the cheapest method and tick that are stable with a margin and meet the
   tolerance, and whether float32 is enough.

Error measures are relative to each state's full scale: max(|low|, |high|) of its range, or the
largest |x| of the simulated run for a state without a range.

The simulation runs the steppers of the reference stage (reference.stepper: explicit stages,
simplified Newton on the stage equations of implicit tableaux with J frozen as in the C, the
linear solves of Rosenbrock methods, the matrix exponential of the exact method), evaluating the
model with the math module on scalars; the generated C is checked against it by the tests.

References
----------
HNW: Hairer, Norsett & Wanner, Solving ODEs I, 2nd ed., 1993, II.4 (step doubling and embedded
pairs, from memory). HW: Hairer & Wanner, Solving ODEs II, 2nd ed., 1996, IV.2-IV.3 (stability
regions), IV.7 (Rosenbrock), IV.8 (simplified Newton iterations) (from memory).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
import sympy as sp

from .. import reference
from ..discretize import linear_parts as exact_linear_parts
from ..errors import CheckError, ModelError, TickwrightError
from ..methods import EXACT, analysis
from ..model import Model
from ..reference.steppers import SIMPLIFIED_NEWTON
from ..rounding import rounding_per_step
from ..verify.scenario import excitation, state_scales
from .cost import operations_per_step
from .envelope import decaying, eigenvalues, envelope


# Default accuracy target: 0.1 % of each state's full scale over the horizon (common practice, no
# source: a tenth of a percent of full scale is the resolution of a 10-bit converter).
DEFAULT_TOLERANCE = 1e-3
# Use at most this fraction of the stability limit: the eigenvalues are sampled, not bounded, and
# nonlinear models move them (common practice, no source).
DEFAULT_MARGIN = 0.8
# Share of the tolerance given to truncation and to round-off each, so that together they meet it.
TRUNCATION_SHARE = 0.5
ROUNDOFF_SHARE = 0.5
# The advice horizon: this many of the slowest non-zero time constants of the envelope.
HORIZON_TIME_CONSTANTS = 2.0
# Fewer steps than this over the horizon do not resolve the dynamics the error is measured on.
MIN_STEPS = 10
# More steps than this per simulated run make the advice slow; such a tick is extrapolated instead.
MAX_STEPS = 2000
# At most this many attempts to find the largest tick that meets the tolerance.
MAX_ATTEMPTS = 5
# Tick periods are rounded down to these mantissas (times a power of ten), like firmware timers.
NICE_MANTISSAS = (1.0, 1.25, 1.5, 2.0, 2.5, 3.0, 4.0, 5.0, 6.0, 8.0)


def nice_floor(dt: float) -> float:
    """Round a tick period down to a firmware-friendly value (NICE_MANTISSAS times 10^k)."""
    if not math.isfinite(dt) or dt <= 0:
        return dt
    exponent = math.floor(math.log10(dt))
    for _ in range(2):
        for m in reversed(NICE_MANTISSAS):
            value = float(f"{m}e{exponent}")
            if value <= dt * (1 + 1e-12):
                return value
        exponent -= 1
    return dt  # pragma: no cover - a mantissa of 1 always fits one decade down


# ---------------------------------------------------------------------------------------------
# Error estimates, from the reference's steppers
# ---------------------------------------------------------------------------------------------

def _exact_applies(model: Model) -> None:
    """Raise CheckError, in the generator's words, when the exact method refuses the model."""
    try:
        exact_linear_parts(model)
    except ModelError as exc:
        raise CheckError(str(exc).split(": ", 2)[-1]) from None


def _stepper(model: Model, method):
    """The reference's step of this method as the advice runs it: simplified Newton (its
    iteration counts estimate the C's), the model evaluated on scalars."""
    if method.kind == EXACT:
        _exact_applies(model)
    return reference.stepper(model, method, newton=SIMPLIFIED_NEWTON, scalar=True)


@dataclass(frozen=True)
class Accuracy:
    """Errors of one method at one tick over the horizon, relative to each state's full scale.

    global_error: max over ticks and states of |x_dt - x_exact| / scale, estimated by step
    doubling of the whole run; local_error: the largest one-step error (embedded pair or step
    doubling per step); completed: False when the run stopped on a non-finite value.
    """

    dt: float
    steps: int
    global_error: float
    local_error: float
    local_by: str
    completed: bool
    newton_iterations: float | None = None


# Ticks at which the step-doubling local error is sampled (it costs three extra steps each).
LOCAL_SAMPLES = 40


def accuracy(model: Model, method, dt: float, horizon: float, scales=None) -> Accuracy:
    """Estimate the errors of the method at tick dt over the horizon.

    The run starts at the initial states under verify.excitation (each ranged input sweeps its
    range smoothly, as a controller's tick-to-tick changes would excite a stiff model's fast
    modes, not as a step) and compares n ticks of one step dt
    with n ticks of two steps dt/2 (same inputs): for a method of order p the error of the coarse
    run is (x_dt - x_dt/2) * 2^p / (2^p - 1) (Richardson; HNW II.4, from memory). The local error
    is the embedded difference where the method has a pair, else the same doubling applied to
    single steps at LOCAL_SAMPLES ticks.
    """
    n = max(1, int(round(horizon / dt)))
    u = excitation(model, n)
    x0 = np.array([s.initial for s in model.states], float)
    order = method.order
    factor = 1.0 if order is None else 2.0 ** order / (2.0 ** order - 1.0)
    step = _stepper(model, method)
    coarse = reference.run(model, method, dt, 1, u, x0=x0, stepper=step)
    if coarse.completed < n:
        return Accuracy(dt, n, math.inf, math.inf, "none", False)
    fine = reference.run(model, method, dt, 2, u, x0=x0, stepper=step)
    xs, xf = coarse.xs, fine.xs
    if scales is None:
        scales = state_scales(model, xf)
    if fine.completed < n:
        return Accuracy(dt, n, math.inf, math.inf, "none", False)
    global_error = float(np.max(np.abs(xs - xf) / scales) * factor)
    if coarse.largest_error is not None:
        local_error = float(np.max(coarse.largest_error / scales))
        local_by = "embedded pair"
    else:
        local_error, local_by = 0.0, "step doubling"
        with np.errstate(all="ignore"):
            for k in np.unique(np.linspace(0, n - 1, min(n, LOCAL_SAMPLES)).astype(int)):
                one = step(k * dt, xs[k], u[k], dt).x
                half = step(k * dt, xs[k], u[k], dt / 2).x
                two = step(k * dt + dt / 2, half, u[k], dt / 2).x
                local_error = max(local_error, float(np.max(np.abs(one - two) / scales) * factor))
    iterations = coarse.newton_iterations / n if coarse.newton_iterations else None
    return Accuracy(dt, n, global_error, local_error, local_by, True, iterations)


# ---------------------------------------------------------------------------------------------
# Float or double
# ---------------------------------------------------------------------------------------------

def roundoff(method, steps: int, precision: str, bound: bool = False) -> float:
    """Accumulated round-off over `steps` steps, relative to full scale.

    Each step adds at most rounding.rounding_per_step of full scale (the budget of the
    cross-check's rounding bound). bound=True adds them all (worst case, N units); the
    estimate lets independent roundings add like a random walk (sqrt(N); common practice, no
    source). On a decaying model, errors older than the horizon (two slow time constants) have
    faded, so the horizon's steps are the ones that add up.
    """
    per_step = rounding_per_step(method.stages, precision)
    return per_step * (steps if bound else math.sqrt(steps))


def precision_for(method, steps: int, tolerance: float) -> str:
    """float when its round-off estimate fits the round-off share of the tolerance, else double."""
    return "float" if roundoff(method, steps, "float") <= ROUNDOFF_SHARE * tolerance else "double"


# ---------------------------------------------------------------------------------------------
# The advice
# ---------------------------------------------------------------------------------------------

@dataclass(frozen=True)
class MethodAdvice:
    """One row of the advice table (times in seconds, errors relative to full scale)."""

    id: str
    name: str
    kind: str
    order: int | None
    max_stable_dt: float
    dt: float | None
    accuracy: Accuracy | None
    ops_per_step: int
    cost_note: str
    note: str = ""

    @property
    def cost_per_second(self) -> float | None:
        return None if not self.dt else self.ops_per_step / self.dt

    @property
    def meets(self) -> bool:
        return self.dt is not None and self.accuracy is not None and self.accuracy.completed

    def to_dict(self) -> dict:
        return dict(id=self.id, name=self.name, kind=self.kind, order=self.order,
                    max_stable_dt=_finite(self.max_stable_dt), dt=self.dt,
                    ops_per_step=self.ops_per_step, cost_per_second=self.cost_per_second,
                    cost_note=self.cost_note, note=self.note,
                    global_error=None if self.accuracy is None else _finite(
                        self.accuracy.global_error),
                    local_error=None if self.accuracy is None else _finite(
                        self.accuracy.local_error),
                    local_error_by=None if self.accuracy is None else self.accuracy.local_by)


@dataclass(frozen=True)
class Advice:
    """Everything `tickwright advise` reports."""

    model: str
    tolerance: float
    margin: float
    horizon: float
    points: int
    ranged: tuple[str, ...]
    eigenvalues: np.ndarray
    methods: tuple[MethodAdvice, ...]
    chosen: str | None
    chosen_max_stable_dt: float | None
    requested_dt: float | None
    requested: dict | None
    recommended: dict | None
    precision: dict | None
    warnings: tuple[str, ...] = field(default_factory=tuple)

    def row(self, method_id: str) -> MethodAdvice | None:
        return next((m for m in self.methods if m.id == method_id), None)

    def to_dict(self) -> dict:
        return dict(model=self.model, tolerance=self.tolerance, margin=self.margin,
                    horizon=self.horizon, operating_points=self.points,
                    ranged=list(self.ranged),
                    eigenvalues=[[float(v.real), float(v.imag)] for v in self.eigenvalues],
                    method=self.chosen, max_stable_dt=_finite(self.chosen_max_stable_dt),
                    requested_dt=self.requested_dt, requested=self.requested,
                    recommended=self.recommended, precision=self.precision,
                    methods=[m.to_dict() for m in self.methods], warnings=list(self.warnings))


def _finite(v):
    return None if v is None or (isinstance(v, float) and not math.isfinite(v)) else v


def default_horizon(values: np.ndarray) -> float:
    """HORIZON_TIME_CONSTANTS of the slowest non-zero decay in the envelope (1 s if none)."""
    rates = np.abs(values[values != 0])
    return HORIZON_TIME_CONSTANTS / float(rates.min()) if rates.size else 1.0


def candidates() -> list:
    """Every built-in method, looked up at run time (implicit ones join when they are built in)."""
    from ..methods import builtin, builtin_ids

    return [builtin(i) for i in builtin_ids()]


def _search_dt(model, method, dt_cap: float, horizon: float, tolerance: float, scales):
    """The largest nice tick <= dt_cap whose estimated global error meets the truncation share."""
    target = TRUNCATION_SHARE * tolerance
    order = method.order or 1
    dt = nice_floor(min(dt_cap, horizon / MIN_STEPS))
    best, last, tried = None, None, set()
    for _ in range(MAX_ATTEMPTS):
        if dt in tried or horizon / dt > MAX_STEPS:
            break
        tried.add(dt)
        acc = accuracy(model, method, dt, horizon, scales)
        last = acc
        if acc.completed and acc.global_error <= target:
            best = acc
            if acc.global_error == 0:
                break
            grow = min(4.0, 0.8 * (target / acc.global_error) ** (1.0 / order))
            nxt = nice_floor(min(dt_cap, horizon / MIN_STEPS, dt * grow))
            if nxt <= dt:
                break
        else:
            if not acc.completed or not math.isfinite(acc.global_error):
                shrink = 0.25
            else:
                shrink = min(0.8, 0.8 * (target / acc.global_error) ** (1.0 / order))
            nxt = nice_floor(dt * shrink)
            if best is not None and nxt <= best.dt:
                break
        dt = nxt
    return best, last


def advise(model: Model, method=None, dt: float | None = None,
           tolerance: float = DEFAULT_TOLERANCE, margin: float = DEFAULT_MARGIN,
           horizon: float | None = None, methods=None, progress=None) -> Advice:
    """The step-size advice for a model (see the module docstring).

    method: the method the user asked about (any kind), or None; dt: a requested tick to check;
    methods: the candidate methods (default: every built-in method).
    """
    if not 0 < tolerance < 1:
        raise CheckError(f"--tolerance: must be between 0 and 1 (a fraction of full scale), "
                         f"got {tolerance}")
    if not 0 < margin <= 1:
        raise CheckError(f"--margin: must be in (0, 1], got {margin}")
    say = progress or (lambda message: None)
    points, ranged = envelope(model)
    say(f"linearize at {len(points)} operating point(s)")
    values, warnings = eigenvalues(model, points)
    warnings = list(warnings)
    growing = values[values.real > 0]
    if growing.size:
        worst = growing[np.argmax(growing.real)]
        warnings.append(f"the model itself is unstable at some operating points (eigenvalue "
                        f"{_fmt_complex(worst)} 1/s grows); stability limits below only cover "
                        "its decaying modes")
    if np.any(values == 0):
        warnings.append("a state integrates without damping (eigenvalue 0): its truncation and "
                        "round-off errors are not forgotten and grow over long runs")
    damped = decaying(values)
    horizon = horizon or default_horizon(values)
    pool = list(candidates() if methods is None else methods)
    if method is not None and all(m.id != method.id for m in pool):
        pool.append(method)
    scales = None
    rows = []
    for m in pool:
        say(f"method {m.id}")
        rows.append(_advise_method(model, m, damped, horizon, tolerance, margin, scales))
    ok = [r for r in rows if r.meets]
    recommended, precision = None, None
    if ok:
        best = min(ok, key=lambda r: (r.cost_per_second, -r.dt))
        steps = int(round(horizon / best.dt))
        prec = precision_for(_find(pool, best.id), steps, tolerance)
        recommended = dict(method=best.id, dt=best.dt, precision=prec)
        precision = _precision_report(_find(pool, best.id), best, steps, tolerance)
    else:
        warnings.append("no candidate method meets the tolerance within "
                        f"{MAX_STEPS} steps over the horizon; loosen --tolerance or pass --horizon")
    chosen = method.id if method is not None else (recommended or {}).get("method")
    chosen_row = next((r for r in rows if r.id == chosen), None)
    requested = None
    if dt is not None and chosen_row is not None:
        requested = _requested(model, _find(pool, chosen), chosen_row, dt, damped, horizon,
                               tolerance, margin, warnings)
    return Advice(model=model.name, tolerance=tolerance, margin=margin, horizon=horizon,
                  points=len(points), ranged=tuple(ranged), eigenvalues=values,
                  methods=tuple(rows), chosen=chosen,
                  chosen_max_stable_dt=None if chosen_row is None else chosen_row.max_stable_dt,
                  requested_dt=dt, requested=requested, recommended=recommended,
                  precision=precision, warnings=tuple(warnings))


def _find(pool, method_id):
    return next(m for m in pool if m.id == method_id)


def _advise_method(model, m, damped, horizon, tolerance, margin, scales) -> MethodAdvice:
    kind = m.kind
    limit = analysis.max_stable_dt(m, damped)
    note = ""
    acc = None
    try:
        if kind == EXACT:
            _exact_applies(model)  # the generator would refuse it: say why, in its words
        if limit == 0:
            raise CheckError("no step size is stable: an eigenvalue lies outside the region at "
                             "every h (for example a lightly damped mode and an explicit method "
                             "without imaginary-axis stability)")
        best, last = _search_dt(model, m, margin * limit, horizon, tolerance, scales)
        acc = best or last
        if best is None:
            if last is None:
                note = f"needs more than {MAX_STEPS} steps over the {horizon:.3g} s horizon"
            else:
                note = (f"does not meet the tolerance at dt = {last.dt:.3g} s (error "
                        f"{last.global_error:.2g}); a smaller tick needs more than "
                        f"{MAX_STEPS} steps over the horizon")
        dt = best.dt if best else None
    except CheckError as exc:
        note, dt = str(exc), None
    except TickwrightError as exc:
        note, dt = str(exc), None
    iterations = acc.newton_iterations if acc is not None else None
    try:
        ops, cost_note = operations_per_step(model, m, iterations)
    except TickwrightError as exc:  # pragma: no cover - every kind has an estimate
        ops, cost_note = 0, str(exc)
    report = analysis.analyse(m)
    return MethodAdvice(id=m.id, name=m.name, kind=kind, order=report.order, max_stable_dt=limit,
                        dt=dt, accuracy=acc, ops_per_step=ops, cost_note=cost_note, note=note)


def _requested(model, method, row, dt, damped, horizon, tolerance, margin, warnings) -> dict:
    limit = row.max_stable_dt
    stable = dt <= limit
    out = dict(method=method.id, dt=dt, stable=bool(stable),
               ratio_to_limit=_finite(dt / limit) if limit > 0 else None)
    if not stable:
        worst = _binding(method, damped, dt)
        where = "" if worst is None else (f"; the eigenvalue {_fmt_complex(worst)} 1/s puts "
                                         f"h*lambda at {_fmt_complex(worst * dt)}")
        how_far = f"{dt / limit:.3g} times" if limit > 0 else "at any h, beyond"
        warnings.append(f"--dt {dt:g} s is unstable for {method.id}: {how_far} its stability limit "
                        f"{limit:.4g} s{where}")
    elif dt > margin * limit:
        warnings.append(f"--dt {dt:g} s is within the stability limit of {method.id} "
                        f"({limit:.4g} s) but above the {margin:g} margin")
    if stable and horizon / dt <= MAX_STEPS:
        acc = accuracy(model, method, dt, horizon)
        out.update(global_error=_finite(acc.global_error), local_error=_finite(acc.local_error),
                   local_error_by=acc.local_by, meets_tolerance=bool(
                       acc.completed and acc.global_error <= tolerance))
        steps = int(round(horizon / dt))
        out.update(float_roundoff=roundoff(method, steps, "float"),
                   precision=precision_for(method, steps, tolerance))
        if acc.completed and acc.global_error > tolerance:
            warnings.append(f"--dt {dt:g} s with {method.id}: estimated error "
                            f"{acc.global_error:.2g} of full scale exceeds --tolerance "
                            f"{tolerance:g}")
    ops, _ = operations_per_step(model, method)
    out["cost_per_second"] = ops / dt
    return out


def _binding(method, damped, dt):
    """The eigenvalue whose h*lambda is furthest outside the region (largest |R|)."""
    if damped.size == 0:
        return None
    from ..methods.analysis import Z

    R = sp.lambdify(Z, analysis.analyse(method).stability.function, modules="numpy")
    with np.errstate(all="ignore"):
        mags = np.abs(np.asarray(R(damped * dt), dtype=complex) * np.ones(damped.shape))
    return damped[int(np.nanargmax(mags))]


def _precision_report(method, row: MethodAdvice, steps: int, tolerance: float) -> dict:
    rf, rd = roundoff(method, steps, "float"), roundoff(method, steps, "double")
    bound = roundoff(method, steps, "float", bound=True)
    trunc = row.accuracy.global_error if row.accuracy else None
    choice = precision_for(method, steps, tolerance)
    if choice == "float":
        note = (f"float32 is enough: round-off estimate {rf:.2g} of full scale over {steps} steps "
                f"(worst case {bound:.2g}) is within {ROUNDOFF_SHARE:g} x tolerance")
    else:
        note = (f"float32 is not enough: its round-off estimate {rf:.2g} of full scale over "
                f"{steps} steps exceeds {ROUNDOFF_SHARE:g} x tolerance; use double "
                f"(estimate {rd:.2g})")
    if trunc is not None and rf > trunc:
        note += "; in float, round-off dominates truncation, so a smaller tick would not help"
    return dict(float_roundoff=rf, float_roundoff_bound=bound, double_roundoff=rd,
                truncation=trunc, choice=choice, note=note)


def _fmt_complex(v) -> str:
    v = complex(v)
    if v.imag == 0:
        return f"{v.real:.4g}"
    return f"{v.real:.4g}{'+' if v.imag >= 0 else '-'}{abs(v.imag):.4g}j"


def as_dict(advice: Advice) -> dict:
    """Plain data for --json."""
    return advice.to_dict()
