"""Step-size advice: which method, which tick and which precision suit a model.

Model -> Advice. The stages:
1. envelope: operating points from the `range` of states, inputs and parameters (corners, the
   centre, a few interior points; the initial point when nothing has a range);
2. eigenvalues of the Jacobian df/dx at every point, and how much an input step and the start
   excite each mode (modes.py);
3. per candidate method: the largest stable step (every h*lambda in the stability region, decided
   exactly on each ray), then the tick search below;
4. the recommendation: the cheapest method and tick that meet the rule, and whether float32 is
   enough.

The acceptance rule. A tick meets the tolerance when its estimated truncation error is at most
TRUNCATION_SHARE (1/2) of the tolerance (the other half is for round-off, see precision_for),
Newton's method of an implicit Runge-Kutta method converges there (convergence.py), and the same
holds at the MONOTONE_CHECKS next finer ticks of the tick ladder (NICE_MANTISSAS x 10^k s). The
last clause keeps the advice monotone in dt: on a model with Piecewise, abs, min or max, a coarse
tick can be lucky (its error estimate cancels at a switch) while a finer one fails; such a tick is
never advised.

The truncation error estimate of a tick is the largest of three, each a fraction of each state's
full scale (max(|low|, |high|) of its range; 1 for a state without a range in the per-mode
estimate, the largest |x| of the run in the simulations):
- per-mode (modes.py): |R(h lambda)^n - exp(n h lambda)| over each mode's whole decay, from the
  first step (the fastest mode) to the last (the slowest; undamped modes over the horizon),
  weighted by how much a full-range step of every input and the start excite the mode;
- the short run: the nonlinear model for SHORT_RUN_TICKS ticks with each input sweeping its range
  (verify.excitation), the run `check` makes by default;
- the long run: the same toward the horizon (HORIZON_TIME_CONSTANTS of the slowest time
  constant, or --horizon), at most LONG_RUN_TICKS ticks; a run that stops at that cap is reported
  (the modes slower than it are then covered by the per-mode estimate alone).
The runs compare n ticks of one step dt with n ticks of two steps dt/2 (Richardson: the coarse
error is (x_dt - x_dt/2) 2^p / (2^p - 1)); on a non-smooth model p = 1 (the order a switch leaves).

The tick search goes down the ladder from the stability limit times --margin (for an A-stable
method: from the horizon over MIN_STEPS) to MIN_TICK: first the per-mode estimate (cheap: every
decade, then the ticks of the decade above its lowest failure, so that a huge tick at which an
L-stable method wipes every fast mode out is not taken while smaller ones fail), then, from the
largest tick it allows, Newton's convergence and the runs, shrinking by the error's ratio to the
target, at most MAX_ATTEMPTS times.

The simulations run the steppers of the reference stage (reference.stepper: explicit stages,
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
from ..methods import EXACT, NEWTON_KINDS, analysis
from ..model import Model, non_smooth
from ..reference.steppers import SIMPLIFIED_NEWTON
from ..rounding import rounding_per_step
from ..verify.scenario import excitation, state_scales
from .convergence import Convergence, newton_converges
from .cost import operations_per_step
from .envelope import decaying, eigenvalues, envelope
from .modes import Modes, excited_modes, per_mode_error


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
# An A-stable method's search starts at the horizon over this many ticks: fewer do not resolve
# the slowest dynamics the error is measured on.
MIN_STEPS = 10
# The short run: the length of the run `check` makes by default (its --ticks), so the advice
# has seen the scenario its recommendation is checked on.
SHORT_RUN_TICKS = 200
# The long run stops after this many ticks (the advice must take seconds, not minutes); the
# output says where it stopped.
LONG_RUN_TICKS = 2000
# At most this many ticks are simulated per method before the search gives up.
MAX_ATTEMPTS = 6
# A tick is advised only if this many next finer ticks of the ladder meet the rule too.
MONOTONE_CHECKS = 2
# The search stops at this tick: below a nanosecond no controller ticks.
MIN_TICK = 1e-9
# Tick periods are rounded down to these mantissas (times a power of ten), like firmware timers.
NICE_MANTISSAS = (1.0, 1.25, 1.5, 2.0, 2.5, 3.0, 4.0, 5.0, 6.0, 8.0)
# A mode counts as excited (for the report) when its error, at most twice its amplitude
# (|R^n| and |exp(n z)| are both <= 1), can reach this fraction of the truncation target.
EXCITED_SHARE = 0.1


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


def finer(dt: float) -> float:
    """The next tick of the ladder below dt."""
    return nice_floor(dt * (1 - 1e-9))


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
    # Per step of the run, measured: Jacobian refreshes of the C's Newton, and steps retried
    # (the cost allowance of cost.operations_per_step).
    refreshes: float = 0.0
    retry_rate: float = 0.0


# Ticks at which the step-doubling local error is sampled (it costs three extra steps each).
LOCAL_SAMPLES = 40


def accuracy(model: Model, method, dt: float, horizon: float, scales=None,
             order: int | None = None, local: bool = True) -> Accuracy:
    """Estimate the errors of the method at tick dt over the horizon.

    The run starts at the initial states under verify.excitation (each ranged input sweeps its
    range smoothly, as a controller's tick-to-tick changes would excite a stiff model's fast
    modes, not as a step) and compares n ticks of one step dt
    with n ticks of two steps dt/2 (same inputs): for a method of order p the error of the coarse
    run is (x_dt - x_dt/2) * 2^p / (2^p - 1) (Richardson; HNW II.4, from memory). order
    overrides p (1 on a non-smooth model). The local error is the embedded difference where the
    method has a pair, else the same doubling applied to single steps at LOCAL_SAMPLES ticks
    (local=False skips that and reports 0).
    """
    n = max(1, int(round(horizon / dt)))
    u = excitation(model, n)
    x0 = np.array([s.initial for s in model.states], float)
    order = method.order if order is None else order
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
    elif not local:
        local_error, local_by = 0.0, "none"
    else:
        local_error, local_by = 0.0, "step doubling"
        with np.errstate(all="ignore"):
            for k in np.unique(np.linspace(0, n - 1, min(n, LOCAL_SAMPLES)).astype(int)):
                one = step(k * dt, xs[k], u[k], dt).x
                half = step(k * dt, xs[k], u[k], dt / 2).x
                two = step(k * dt + dt / 2, half, u[k], dt / 2).x
                local_error = max(local_error, float(np.max(np.abs(one - two) / scales) * factor))
    iterations = coarse.newton_iterations / n if coarse.newton_iterations else None
    return Accuracy(dt, n, global_error, local_error, local_by, True, iterations,
                    coarse.refreshes / n, coarse.retried / n)


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
class Estimate:
    """What the rule looked at for one method at one tick (errors: fractions of full scale).

    Cheapest first, stopping at the first failure: per_mode (always), convergence (implicit
    Runge-Kutta methods only, None otherwise), short (the SHORT_RUN_TICKS run), long (the run
    toward the horizon; None when the search did not get there or did not ask for it).
    long_capped: the long run stopped at LONG_RUN_TICKS, short of the horizon.
    """

    dt: float
    per_mode: float
    convergence: Convergence | None = None
    short: Accuracy | None = None
    long: Accuracy | None = None
    long_capped: bool = False

    @property
    def converged(self) -> bool:
        return self.convergence is None or self.convergence.converged

    def _parts(self) -> list[tuple[str, float]]:
        parts = [("per-mode", self.per_mode)]
        for name, run in (("short run", self.short), ("long run", self.long)):
            if run is not None:
                parts.append((name, run.global_error if run.completed else math.inf))
        return parts

    @property
    def truncation(self) -> float:
        """The largest of the estimates made (inf when a run stopped on a non-finite value)."""
        return max(value for _, value in self._parts())

    @property
    def source(self) -> str:
        """Which estimate gave the truncation error: 'per-mode', 'short run' or 'long run'."""
        return max(self._parts(), key=lambda part: part[1])[0]

    def meets(self, target: float, full: bool = True) -> bool:
        """Every estimate made is within target and Newton converged; full: the runs were made
        (the long run too)."""
        ran = self.short is not None and (self.long is not None or not full)
        return ran and self.converged and self.truncation <= target

    def to_dict(self) -> dict:
        return dict(dt=self.dt, truncation=_finite(self.truncation), source=self.source,
                    per_mode=_finite(self.per_mode), converged=self.converged,
                    short_run_ticks=None if self.short is None else self.short.steps,
                    short_run_error=None if self.short is None else _finite(
                        self.short.global_error),
                    long_run_ticks=None if self.long is None else self.long.steps,
                    long_run_error=None if self.long is None else _finite(
                        self.long.global_error),
                    long_run_capped=self.long_capped)


@dataclass(frozen=True)
class MethodAdvice:
    """One row of the advice table (times in seconds, errors relative to full scale).

    estimate: at the advised tick dt; when no tick met the rule, at the last tick tried (dt is
    then None and note says why).
    """

    id: str
    name: str
    kind: str
    order: int | None
    max_stable_dt: float
    dt: float | None
    estimate: Estimate | None
    ops_per_step: int
    cost_note: str
    note: str = ""

    @property
    def cost_per_second(self) -> float | None:
        return None if not self.dt else self.ops_per_step / self.dt

    @property
    def meets(self) -> bool:
        return self.dt is not None and self.estimate is not None

    @property
    def accuracy(self) -> Accuracy | None:
        """The short run at the advised tick (its local error and Newton iterations)."""
        return None if self.estimate is None else self.estimate.short

    def to_dict(self) -> dict:
        e = self.estimate
        short = None if e is None else e.short
        return dict(id=self.id, name=self.name, kind=self.kind, order=self.order,
                    max_stable_dt=_finite(self.max_stable_dt), dt=self.dt,
                    ops_per_step=self.ops_per_step, cost_per_second=self.cost_per_second,
                    cost_note=self.cost_note, note=self.note,
                    global_error=None if e is None else _finite(e.truncation),
                    local_error=None if short is None else _finite(short.local_error),
                    local_error_by=None if short is None else short.local_by,
                    estimate=None if e is None else e.to_dict())


@dataclass(frozen=True)
class Advice:
    """Everything `tickwright advise` reports.

    fastest, slowest: the eigenvalues (1/s) of the fastest and the slowest excited decaying
    modes (None without any); non_smooth: the model switches (Piecewise, abs, ...), so the runs
    take order 1; growing: eigenvalues with Re > 0 left out of the per-mode estimate.
    """

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
    fastest: complex | None = None
    slowest: complex | None = None
    non_smooth: bool = False
    growing: int = 0

    @property
    def target(self) -> float:
        """The truncation error a tick may have: TRUNCATION_SHARE of the tolerance."""
        return TRUNCATION_SHARE * self.tolerance

    @property
    def excited_floor(self) -> float:
        """The smallest weight (fraction of full scale) of a mode that counts as excited."""
        return EXCITED_SHARE * self.target / 2

    def row(self, method_id: str) -> MethodAdvice | None:
        return next((m for m in self.methods if m.id == method_id), None)

    def to_dict(self) -> dict:
        return dict(model=self.model, tolerance=self.tolerance, margin=self.margin,
                    horizon=self.horizon, operating_points=self.points,
                    ranged=list(self.ranged),
                    eigenvalues=[[float(v.real), float(v.imag)] for v in self.eigenvalues],
                    rule=dict(truncation_share=TRUNCATION_SHARE, roundoff_share=ROUNDOFF_SHARE,
                              truncation_target=self.target, finer_ticks=MONOTONE_CHECKS,
                              short_run_ticks=SHORT_RUN_TICKS, long_run_ticks=LONG_RUN_TICKS),
                    fastest_mode=_pair(self.fastest), slowest_mode=_pair(self.slowest),
                    non_smooth=self.non_smooth,
                    method=self.chosen, max_stable_dt=_finite(self.chosen_max_stable_dt),
                    requested_dt=self.requested_dt, requested=self.requested,
                    recommended=self.recommended, precision=self.precision,
                    methods=[m.to_dict() for m in self.methods], warnings=list(self.warnings))


def _pair(v):
    return None if v is None else [float(v.real), float(v.imag)]


def _finite(v):
    return None if v is None or (isinstance(v, float) and not math.isfinite(v)) else v


def share_text(share: float) -> str:
    """'tolerance/2' for a share of one half, else '<share> x tolerance'."""
    return "tolerance/2" if share == 0.5 else f"{share:g} x tolerance"


def default_horizon(values: np.ndarray) -> float:
    """HORIZON_TIME_CONSTANTS of the slowest non-zero decay in the envelope (1 s if none)."""
    rates = np.abs(values[values != 0])
    return HORIZON_TIME_CONSTANTS / float(rates.min()) if rates.size else 1.0


def candidates() -> list:
    """Every built-in method, looked up at run time (implicit ones join when they are built in)."""
    from ..methods import builtin, builtin_ids

    return [builtin(i) for i in builtin_ids()]


@dataclass(frozen=True)
class Setting:
    """What every estimate of one advice shares: the model, its envelope and modes, the horizon
    (s) and the tolerance; smooth is False for a model with switches (the runs take order 1)."""

    model: Model
    points: tuple
    modes: Modes
    horizon: float
    tolerance: float
    smooth: bool

    @property
    def target(self) -> float:
        return TRUNCATION_SHARE * self.tolerance


def _steps(horizon: float, dt: float) -> int:
    """Ticks over the horizon (the round-off estimate's N)."""
    return max(1, int(round(horizon / dt)))


def estimate(setting: Setting, method, dt: float, full: bool = True) -> Estimate:
    """The estimates of the rule at tick dt, cheapest first, stopping at the first failure.

    full=False leaves out the long run (the finer ticks that confirm a tick).
    """
    target = setting.target
    per_mode = per_mode_error(method, setting.modes, dt, setting.horizon)
    if per_mode > target:
        return Estimate(dt, per_mode)
    convergence = None
    if method.kind in NEWTON_KINDS:
        precision = precision_for(method, _steps(setting.horizon, dt), setting.tolerance)
        convergence = newton_converges(setting.model, method, dt, precision, setting.points,
                                       SHORT_RUN_TICKS)
        if not convergence.converged:
            return Estimate(dt, per_mode, convergence)
    order = None if setting.smooth or method.order is None else 1
    short = accuracy(setting.model, method, dt, SHORT_RUN_TICKS * dt, order=order, local=full)
    if not full or not (short.completed and short.global_error <= target):
        return Estimate(dt, per_mode, convergence, short)
    wanted = max(1, math.ceil(setting.horizon / dt - 1e-9))
    ticks = min(wanted, LONG_RUN_TICKS)
    long = accuracy(setting.model, method, dt, ticks * dt, order=order, local=False)
    return Estimate(dt, per_mode, convergence, short, long, wanted > LONG_RUN_TICKS)


def _per_mode_start(setting: Setting, method, top: float) -> tuple[float | None, Estimate]:
    """The largest ladder tick <= top whose per-mode estimate meets the target, and so do all
    finer ticks checked, down to MIN_TICK; with the estimate at that tick, or (None, the
    estimate at the smallest tick that failed).

    The estimate is cheap but not free: every decade from top down to MIN_TICK first (an
    L-stable method can pass at a huge tick, where it wipes the fast modes out, and fail at
    smaller ones: such a tick is not taken), then every tick of the decade above the lowest
    failure, each with its MONOTONE_CHECKS finer ticks.
    """
    target = setting.target
    seen: dict[float, float] = {}

    def error(dt):
        if dt not in seen:
            seen[dt] = per_mode_error(method, setting.modes, dt, setting.horizon)
        return seen[dt]

    decades = [top]
    while decades[-1] > MIN_TICK:
        decades.append(max(nice_floor(decades[-1] / 10), MIN_TICK))
    failing = [dt for dt in decades if error(dt) > target]
    if not failing:
        return top, Estimate(top, error(top))
    if failing[-1] == decades[-1]:
        return None, Estimate(failing[-1], error(failing[-1]))
    tick, failed = finer(failing[-1]), failing[-1]
    while tick >= MIN_TICK:
        probe, ok = tick, error(tick) <= target
        for _ in range(MONOTONE_CHECKS if ok else 0):
            probe = finer(probe)
            ok = error(probe) <= target
            if not ok:
                break
        if ok:
            return tick, Estimate(tick, error(tick))
        failed = probe
        tick = finer(probe)
    return None, Estimate(failed, error(failed))


def _shrink(e: Estimate, target: float, order: int) -> float:
    """The next tick to try after e failed: by the error's ratio to the target, at least one
    step down the ladder."""
    if not e.converged:
        factor = 0.5  # Newton's contraction grows with h: halve it
    elif e.short is not None and not e.short.completed or not math.isfinite(e.truncation):
        factor = 0.25
    else:
        factor = min(0.8, 0.9 * (target / e.truncation) ** (1.0 / order))
    return min(finer(e.dt), nice_floor(e.dt * factor))


def _search_dt(setting: Setting, method, top: float):
    """The largest ladder tick <= top that meets the rule (see the module docstring).

    Returns (the estimate at the advised tick or None, the last estimate made, the first tick
    the simulations rejected or None): the last says why nothing was advised, the first what
    held an advised tick down.
    """
    target = setting.target
    # The next tick is guessed from the error's ratio and the method's order; on a non-smooth
    # model at most 2 (a guess only: a switch lowers the order the error shrinks with, and the
    # runs' Richardson estimate already takes order 1 there).
    order = method.order or 1
    order = order if setting.smooth else min(order, 2)
    dt, last = _per_mode_start(setting, method, top)
    if dt is None:
        return None, last, None
    first = None
    for _ in range(MAX_ATTEMPTS):
        last = estimate(setting, method, dt)
        if not last.meets(target):
            first = first or last
            dt = _shrink(last, target, order)
            continue
        probe, failed = dt, None
        for _ in range(MONOTONE_CHECKS):
            probe = finer(probe)
            check = estimate(setting, method, probe, full=False)
            if not check.meets(target, full=False):
                failed = check
                break
        if failed is None:
            return last, last, first
        first = first or failed
        last = failed
        dt = _shrink(failed, target, order)
    return None, last, first


def _excited(modes: Modes, target: float) -> tuple[complex | None, complex | None]:
    """The fastest and the slowest decaying modes that are excited (EXCITED_SHARE)."""
    keep = modes.excitation >= EXCITED_SHARE * target / 2
    values = modes.values[keep]
    if values.size == 0:
        return None, None
    return complex(values[np.argmax(np.abs(values))]), complex(values[np.argmin(np.abs(values))])


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
                        f"{_fmt_complex(worst)} 1/s grows); stability limits and the per-mode "
                        "error estimate only cover its decaying modes")
    if np.any(values == 0):
        warnings.append("a state integrates without damping (eigenvalue 0): its truncation and "
                        "round-off errors are not forgotten and grow over long runs")
    damped = decaying(values)
    horizon = horizon or default_horizon(values)
    modes = excited_modes(model, points, state_scales(model))
    setting = Setting(model, tuple(points), modes, horizon, tolerance, not non_smooth(model))
    pool = list(candidates() if methods is None else methods)
    if method is not None and all(m.id != method.id for m in pool):
        pool.append(method)
    rows = []
    for m in pool:
        say(f"method {m.id}")
        rows.append(_advise_method(setting, m, damped, margin))
    ok = [r for r in rows if r.meets]
    recommended, precision = None, None
    if ok:
        best = min(ok, key=lambda r: (r.cost_per_second, -r.dt))
        steps = _steps(horizon, best.dt)
        prec = precision_for(_find(pool, best.id), steps, tolerance)
        recommended = dict(method=best.id, dt=best.dt, precision=prec)
        precision = _precision_report(_find(pool, best.id), best, steps, tolerance)
    else:
        warnings.append(f"no candidate method meets the rule (estimated truncation error <= "
                        f"{share_text(TRUNCATION_SHARE)}) at any tick tried; the notes of the "
                        "table say why; loosen --tolerance or narrow the ranges")
    chosen = method.id if method is not None else (recommended or {}).get("method")
    chosen_row = next((r for r in rows if r.id == chosen), None)
    requested = None
    if dt is not None and chosen_row is not None:
        requested = _requested(setting, _find(pool, chosen), chosen_row, dt, damped, margin,
                               warnings)
    fastest, slowest = _excited(modes, setting.target)
    return Advice(model=model.name, tolerance=tolerance, margin=margin, horizon=horizon,
                  points=len(points), ranged=tuple(ranged), eigenvalues=values,
                  methods=tuple(rows), chosen=chosen,
                  chosen_max_stable_dt=None if chosen_row is None else chosen_row.max_stable_dt,
                  requested_dt=dt, requested=requested, recommended=recommended,
                  precision=precision, warnings=tuple(warnings), fastest=fastest,
                  slowest=slowest, non_smooth=not setting.smooth, growing=modes.growing)


def _find(pool, method_id):
    return next(m for m in pool if m.id == method_id)


def failure_note(e: Estimate, target: float) -> str:
    """Why the last tick tried does not meet the rule, in one clause."""
    if not e.converged:
        return e.convergence.note()
    runs = [r for r in (e.short, e.long) if r is not None]
    if any(not r.completed for r in runs):
        return f"the run at dt = {e.dt:g} s stops on a non-finite value"
    where = f"no tick down to {MIN_TICK:g} s" if e.dt <= MIN_TICK else f"dt = {e.dt:g} s"
    return (f"{where} does not meet the tolerance: {e.source} estimate {e.truncation:.2g} > "
            f"{target:.2g} = {share_text(TRUNCATION_SHARE)} (the other half is for round-off)")


def _advise_method(setting: Setting, m, damped, margin) -> MethodAdvice:
    model = setting.model
    limit = analysis.max_stable_dt(m, damped)
    note = ""
    found, last = None, None
    try:
        if m.kind == EXACT:
            _exact_applies(model)  # the generator would refuse it: say why, in its words
        if limit == 0:
            raise CheckError("no step size is stable: an eigenvalue lies outside the region at "
                             "every h (for example a lightly damped mode and an explicit method "
                             "without imaginary-axis stability)")
        top = nice_floor(margin * limit if math.isfinite(limit) else setting.horizon / MIN_STEPS)
        found, last, held = _search_dt(setting, m, top)
        if found is None:
            note = failure_note(last, setting.target)
            if last.short is not None or last.convergence is not None:
                note += f"; the search stops after {MAX_ATTEMPTS} simulated ticks"
        elif held is not None:
            note = "a larger tick was rejected: " + failure_note(held, setting.target)
    except TickwrightError as exc:
        note = str(exc)
    shown = found or last
    short = shown.short if shown else None
    iterations = short.newton_iterations if short else None
    try:
        ops, cost_note = operations_per_step(model, m, iterations,
                                             short.refreshes if short else 0.0,
                                             short.retry_rate if short else 0.0)
    except TickwrightError as exc:  # pragma: no cover - every kind has an estimate
        ops, cost_note = 0, str(exc)
    report = analysis.analyse(m)
    return MethodAdvice(id=m.id, name=m.name, kind=m.kind, order=report.order,
                        max_stable_dt=limit, dt=None if found is None else found.dt,
                        estimate=shown, ops_per_step=ops, cost_note=cost_note, note=note)


def _requested(setting: Setting, method, row, dt, damped, margin, warnings) -> dict:
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
    if stable:
        target = setting.target
        e = estimate(setting, method, dt)
        short = e.short
        out.update(global_error=_finite(e.truncation), error_source=e.source,
                   local_error=None if short is None else _finite(short.local_error),
                   local_error_by=None if short is None else short.local_by,
                   meets_tolerance=bool(e.meets(target)), estimate=e.to_dict())
        steps = _steps(setting.horizon, dt)
        out.update(float_roundoff=roundoff(method, steps, "float"),
                   precision=precision_for(method, steps, setting.tolerance))
        if not e.meets(target):
            warnings.append(f"with {method.id}, {failure_note(e, target)}")
    ops, _ = operations_per_step(setting.model, method)
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
    trunc = row.estimate.truncation if row.estimate else None
    choice = precision_for(method, steps, tolerance)
    half = share_text(ROUNDOFF_SHARE)
    if choice == "float":
        note = (f"float32 is enough: round-off estimate {rf:.2g} of full scale over the "
                f"{steps:.3g} ticks of the horizon (worst case {bound:.2g}) is within {half}")
    else:
        note = (f"float32 is not enough: its round-off estimate {rf:.2g} of full scale over the "
                f"{steps:.3g} ticks of the horizon exceeds {half}; use double (estimate {rd:.2g})")
    if trunc is not None and rf > trunc:
        note += ("; float's round-off is larger than the truncation error, so a smaller tick "
                 "would not make the result more accurate" if choice == "float" else
                 "; float's round-off is larger than the truncation error, so no smaller tick "
                 "would make float enough")
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
