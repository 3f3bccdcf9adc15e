"""The cross-check: the C build against the independent Python reference of the same method.

Tick by tick, from the C's own state: before every tick the reference is started from the state
and time the C holds, takes the same tick with the same inputs, and the difference after the tick
must stay within that tick's rounding bound (bound.py: a running rounding-error analysis of the
C's operations along the reference). Because each comparison covers one tick, errors do not
accumulate and the bound does not grow with the run; how far the C drifts over the whole run is
what the accuracy comparison (the same run against scipy's solve_ivp) measures, so no second,
accumulated comparison is kept. The check reports, per state, the largest ratio of the observed
difference to its bound over the ticks: below 1 the check passes, and a ratio well above 0 says
the bound is not loose (a bound a thousand times the observed differences would prove little).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from .. import reference
from ..build import build
from ..discretize import Safeguards
from ..methods import NEWTON_KINDS, Method
from ..model import Model
from ..pipeline import generate
from ..run import as_precision, run_built, status_name, trajectory
from .audit import CoefficientAudit, audit_coefficients
from .bound import Piece
from .scenario import DEFAULT_ACCURACY, excitation, state_scales, tunable_as_inputs


@dataclass(frozen=True)
class CrossCheck:
    """C build vs the Python reference of the same method, one tick at a time from the C's state.

    max_difference and tolerance: |C - reference| and its bound at the tick where the worst state
    (the one with the largest ratio) came closest to its bound; ratio: that largest ratio;
    state_ratios: the largest ratio per state (observed / bound over the ticks; 0 where both are
    0); coefficients: the audit of the C's literals against the IR (audit.py). Each verdict is
    for the figure it states over the ticks compared (accurate: the accuracy target is met);
    passed: besides, the run finished, every ratio is at most 1 and the audit found nothing.
    """

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
    # Where the run stopped and where the worst errors are (ticks count from 0, the start).
    # status: the C's status on the tick that stopped it ('OK' when it took every tick);
    # compared: ticks that both the C and the reference took; worst_tick: the tick of
    # max_difference; accuracy_state, accuracy_tick: where error_vs_high_accuracy is, over the
    # accuracy_compared ticks that both the C and solve_ivp took.
    status: str
    compared: int
    accuracy_compared: int
    worst_tick: int
    accuracy_state: str
    accuracy_tick: int
    ratio: float = float("nan")
    state_ratios: dict = field(default_factory=dict)
    coefficients: CoefficientAudit | None = None


def tunable_values(built, model: Model) -> dict[str, float]:
    """The tunable parameters as the C holds them after reset (its own correctly rounded values)."""
    ctx = built.ffi.new(f"{model.name}_ctx_t *")
    getattr(built.lib, f"{model.name}_reset")(ctx)
    return {p.name: float(getattr(ctx, p.name)) for p in model.tunable}


class _Recorder:
    """A reference stepper that notes every step it is asked for: (t, x, h), in order."""

    def __init__(self, stepper):
        self.stepper, self.calls = stepper, []

    def __call__(self, t, x, u, h):
        self.calls.append((t, np.array(x, dtype=np.float64), h))
        return self.stepper(t, x, u, h)


def taken_pieces(calls, h: float, depth: int) -> tuple[Piece, ...]:
    """The pieces a tick took, from the steps tried in it (in order) by a tick that succeeded.

    A step that failed is followed by its first half, which starts where it did; a step that was
    taken by the next piece, which starts later, or by the end of the tick. The position counts
    shortest pieces h / 2^depth from the tick's start, as the C's tw_pos does.
    """
    pieces, position = [], 0
    for i, (t, x, length) in enumerate(calls):
        if i + 1 < len(calls) and calls[i + 1][0] == t:
            continue  # failed, retried as halves from the same start
        level = int(round(np.log2(h / length)))
        pieces.append(Piece(position=position, depth=level, x=x))
        position += 2 ** (depth - level)
    return tuple(pieces)


def shadow_steps(model: Model, method, dt: float, substeps: int, c_run, inputs,
                 parameters: dict, guards: Safeguards | None = None, stepper=None):
    """The reference's tick from the C's state and time before each tick, with the C's
    safeguards: ((ticks, nx) states, {tick: the Pieces it took} for each tick in which a step
    was retried)."""
    guards = guards or Safeguards()
    recorder = _Recorder(stepper or reference.stepper(model, method, parameters))
    taker = reference.TickTaker(model, recorder, dt, substeps, guards)
    out = np.full((c_run.completed, model.nx), np.nan)
    retried = {}
    for k in range(c_run.completed):
        recorder.calls = []
        x = taker.tick(c_run.ts[k], c_run.xs[k], inputs[k])
        if x is None:
            continue
        out[k] = x
        if len(recorder.calls) > substeps:
            retried[k] = taken_pieces(recorder.calls, dt / substeps, guards.retry_depth)
    return out, retried


def observed_ratios(diff: np.ndarray, bounds: np.ndarray) -> np.ndarray:
    """diff / bound per tick and state: 0 where both are 0, inf where only the bound is 0 or a
    value is not finite."""
    with np.errstate(all="ignore"):
        ratio = np.where(diff == 0, 0.0, diff / bounds)
    return np.where(np.isfinite(ratio), ratio, np.inf)


def safeguards_of(options: dict | None) -> Safeguards:
    """The tick's safeguards among generation options (retry_depth, accept_error, clamp_states)."""
    options = options or {}
    return Safeguards(retry_depth=options.get("retry_depth", 0),
                      accept_error=options.get("accept_error"),
                      clamp_states=options.get("clamp_states", False))


def generated_newton(model: Model, precision: str, options: dict | None = None):
    """The generated C's Newton iteration as reference Newton options: its tolerance, scale,
    iteration limit and refreshes (or full Newton), from the generation options."""
    from ..discretize import DEFAULT_NEWTON_ITERATIONS, DEFAULT_NEWTON_REFRESHES, NewtonSpec
    from ..discretize import state_scales as newton_scales
    from ..reference.steppers import EVERY_ITERATE, FROZEN, Newton

    options = options or {}
    tol = NewtonSpec(tolerance=options.get("newton_tol")).tolerance_for(precision)
    return Newton(EVERY_ITERATE if options.get("full_newton") else FROZEN, tolerance=tol,
                  max_iterations=options.get("newton_iterations", DEFAULT_NEWTON_ITERATIONS),
                  scale=tuple(newton_scales(model)),
                  refreshes=options.get("newton_refreshes", DEFAULT_NEWTON_REFRESHES))


def cross_check(model: Model, method: Method, dt: float, substeps: int, precision: str,
                ticks: int, inputs: np.ndarray | None = None,
                accuracy: float = DEFAULT_ACCURACY, options: dict | None = None,
                csource=None, parameters: np.ndarray | None = None) -> CrossCheck:
    """Build the C, run it, and compare every tick with the reference's tick from the C's state.

    options: generation options (newton_iterations, newton_tol, solver, newton_refreshes,
    full_newton for implicit methods; retry_depth, accept_error, clamp_states for any): the
    reference retries, accepts and clamps as the C does; csource: the already generated C for
    these arguments, if the caller has it; parameters: (ticks, len(model.tunable)) values of the
    tunable parameters per tick, or None (the model's).
    """
    from ..discretize import discretize
    from ..simplify import simplify
    from .bound import tick_bounds

    options = options or {}
    if csource is None:
        csource = generate(model, method, dt, substeps, precision, **options)
    built = build(csource, model)
    u = excitation(model, ticks) if inputs is None else inputs
    u = as_precision(u, precision)
    per_tick = None if parameters is None else as_precision(parameters, precision)
    c_replay = run_built(built, model, u, parameters=per_tick)
    c_run = trajectory(c_replay, model)
    n = c_run.completed
    # The reference takes baked parameters at their exact decimal values (the C's literals are
    # their correctly rounded products) and tunable ones at the C's values: after reset, or per
    # tick as extra inputs (the symbols keep their names), as the C reads its context fields.
    tunables = tunable_values(built, model)
    params = dict(model.parameter_values(), **tunables)
    ref_model, ref_u = model, u
    if per_tick is not None:
        ref_model = tunable_as_inputs(model)
        ref_u = np.hstack([u, per_tick])
        params = {p.name: params[p.name] for p in ref_model.parameters}
        tunables = {p.name: per_tick[:n, j] for j, p in enumerate(model.tunable)}
    guards = safeguards_of(options)
    stepper = None
    same_newton = bool(guards.retry_depth and method.kind in NEWTON_KINDS)
    if same_newton:
        # Retries follow failures, so the reference must fail where the C does: its Newton,
        # with the C's tolerance and refreshes, not the reference's full Newton to roundoff.
        stepper = reference.stepper(ref_model, method, params,
                                    newton=generated_newton(model, precision, options))
    shadow, retried = shadow_steps(ref_model, method, dt, substeps, c_run, ref_u, params,
                                   guards, stepper)
    diff = np.abs(c_run.xs[1:n + 1] - shadow)
    step = simplify(discretize(model, method, dt, substeps, **options))
    # A retried tick is bounded piece by piece along the pieces the reference took (the C took
    # the same ones where both fail alike): never as the full step, which the C did not take and
    # which may have no solution at all.
    bounds = tick_bounds(step, precision, c_run.ts[:n], c_run.xs[:n], u[:n], tunables,
                         reference_newton_stop=same_newton, retried=retried) \
        if n else np.zeros((0, model.nx))
    ratios = observed_ratios(diff, bounds)
    per_state = ratios.max(axis=0) if n else np.zeros(model.nx)
    worst = int(np.argmax(per_state))
    tick = int(np.argmax(ratios[:, worst])) if n else 0
    max_diff = float(diff[tick, worst]) if n else 0.0
    tol = float(bounds[tick, worst]) if n else 0.0
    exact = reference.high_accuracy(ref_model, dt, ref_u[:n], x0=c_run.xs[0], parameters=params)
    m = min(n, exact.completed)
    scales = state_scales(model, exact.xs[: m + 1])
    rel = np.abs(c_run.xs[: m + 1] - exact.xs[: m + 1]) / scales
    acc = float(np.max(rel)) if rel.size else float("nan")
    acc_tick, acc_state = np.unravel_index(int(np.argmax(rel)), rel.shape) if rel.size else (0, 0)
    finished = n == ticks
    # Each verdict is for the figure it states: the ticks compared; a run that stopped early
    # fails the check by itself (passed), not through these figures.
    accurate = bool(m > 0 and np.isfinite(acc) and acc <= accuracy)
    within = bool(np.all(per_state <= 1.0))
    coefficients = audit_coefficients(step, csource)
    passed = bool(finished and exact.completed == ticks and within and accurate
                  and coefficients.passed)
    return CrossCheck(precision=precision, ticks=ticks, completed=n,
                      max_difference=max_diff, tolerance=tol,
                      worst_state=model.states[worst].name, error_vs_high_accuracy=acc,
                      accuracy_tolerance=accuracy, accurate=accurate, passed=passed,
                      status=status_name(c_replay.status), compared=n, accuracy_compared=m,
                      worst_tick=tick + 1 if n else 0,
                      accuracy_state=model.states[int(acc_state)].name,
                      accuracy_tick=int(acc_tick),
                      ratio=float(per_state[worst]),
                      state_ratios={s.name: float(r) for s, r in zip(model.states, per_state)},
                      coefficients=coefficients)
