"""The order study: the empirical convergence order of the C build, halving the step.

The reference picks the levels in the asymptotic regime; the C is built and run (double) at
those levels and its own errors against solve_ivp give the measured order.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .. import reference
from ..build import build
from ..methods import EXACT, Method
from ..model import Model, non_smooth
from ..pipeline import generate
from ..run import run_c
from .scenario import constant_inputs

# Measured order must be within this of the method's order (the acceptance bound of the project).
ORDER_TOLERANCE = 0.15
# Order study: errors outside [floor, ceiling] x scale are not in the asymptotic regime.
ORDER_ERROR_CEILING = 1e-2
ORDER_ERROR_FLOOR = {"double": 1e-13}
# A level counts only when its error is this many times the smallest error the study reached:
# the smallest is the noise floor (rounding, or the accuracy of the solve_ivp solution), and a
# level 30 times above it is off by at most ~3 % (0.05 in the fitted order).
ORDER_NOISE_MARGIN = 30.0
ORDER_MAX_LEVELS = 14
# The coarsest level (two steps) must err by at least this fraction of the scale, or the model
# barely moves over the horizon (a stiff model whose fast mode is not excited) and the levels hit
# the floor before three of them fit: three levels of an order-5 method span 2^10, and the last
# must stand ORDER_NOISE_MARGIN above the 1e-13 floor, so the first needs about 3e-9. Such a
# study starts instead from the centre of the declared state ranges, where every mode moves, and
# failing that lengthens the horizon by ORDER_HORIZON_STRETCH at most ORDER_MAX_STRETCHES times.
ORDER_MIN_COARSE_ERROR = 1e-8
ORDER_HORIZON_STRETCH = 8.0
ORDER_MAX_STRETCHES = 6
# A ladder that never settles (no three levels with agreeing local orders above the floor) is
# tried again over a horizon ORDER_HORIZON_STRETCH times longer, at most this many times.
ORDER_SETTLE_STRETCHES = 3


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
    # False when the study could not measure a non-smooth model (passed is then True: the
    # cross-check and the accuracy decide).
    measurable: bool = True



def order_horizon(model: Model, u: np.ndarray, x0=None) -> float:
    """A horizon of two of the model's fastest time constants at x0 (default: the initial point)."""
    x0 = np.array([s.initial for s in model.states] if x0 is None else x0, dtype=float)
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


# Three levels are taken as asymptotic when the two local orders between them (log2 of the error
# ratios) agree to within this: before the asymptotic regime the local order still drifts.
ORDER_AGREEMENT = 0.1


def _local_orders_agree(errors: list[float], i: int) -> bool:
    """Whether levels i, i+1, i+2 give two local orders that agree to ORDER_AGREEMENT."""
    local = lambda k: np.log2(errors[k] / errors[k + 1])
    return abs(local(i) - local(i + 1)) <= ORDER_AGREEMENT


def _asymptotic(window: list[int], errors: list[float]) -> list[int]:
    """The three consecutive levels of the window deepest in the asymptotic regime.

    The deepest run of three whose two local orders agree to ORDER_AGREEMENT; when no run
    agrees (too few levels reach it), the last three, as before.
    """
    return (_settled_runs(window, errors) or [window[-3:]])[-1]


def _settled_runs(window: list[int], errors: list[float]) -> list[list[int]]:
    """The runs of three consecutive levels of the window whose local orders agree."""
    runs = [window[k:k + 3] for k in range(len(window) - 2)
            if window[k + 2] - window[k] == 2]
    return [r for r in runs if _local_orders_agree(errors, r[0])]


def fitted_order(steps, errors) -> float:
    """Least-squares slope of log(error) against log(1/n)."""
    return float(-np.polyfit(np.log(np.asarray(steps, float)), np.log(np.asarray(errors)), 1)[0])


# What the order line says when the study could not measure a non-smooth model.
NOT_MEASURABLE = "order not measurable (non-smooth model)"


def _not_measurable(study: OrderStudy, where: tuple[str, ...]) -> OrderStudy:
    """A study that could not measure a non-smooth model: said so, and not failed."""
    more = f" and {len(where) - 1} more" if len(where) > 1 else ""
    measured = "" if study.measured is None else f"; measured {study.measured:.2f}"
    return OrderStudy(study.expected, study.horizon, study.steps, study.errors_c,
                      study.errors_reference, study.measured, True,
                      f"{NOT_MEASURABLE}: {where[0]}{more}{measured}", measurable=False)


# An exact discretization must match solve_ivp (rtol 1e-13) to this fraction of the state scale at
# every step size: a thousand times solve_ivp's tolerance, far below any method error.
EXACT_AGREEMENT = 1e-10


def _end_error(run: reference.Trajectory, n: int, exact: np.ndarray) -> float:
    """Max |x(T) - exact| of a run of n steps, or inf when it did not finish."""
    return float(np.max(np.abs(run.xs[-1] - exact))) if run.completed == n else float("inf")


def _c_end_errors(model, method, u, x0, horizon, exact, steps, options, progress,
                  what) -> list:
    """End errors of the C build (double) with n steps over the horizon from x0, for each n."""
    errors = []
    for n in steps:
        if progress:
            progress(f"{what}: C build with {n} steps over {horizon:.3g} s")
        built = build(generate(model, method, horizon / n, 1, "double", **(options or {})), model)
        errors.append(_end_error(run_c(built, model, np.repeat(u[None, :], n, axis=0), x0=x0), n,
                                 exact))
    return errors


def _exact_study(model, method, u, x0, horizon, exact, scale, options, progress) -> OrderStudy:
    """For an exact discretization: the error must stay at rounding level at every step size."""
    steps = (2, 4, 8)
    c_errors = _c_end_errors(model, method, u, x0, horizon, exact, steps, options, progress,
                             "exactness")
    passed = all(e <= EXACT_AGREEMENT * scale for e in c_errors)
    return OrderStudy(None, horizon, steps, tuple(c_errors), (), None, bool(passed),
                      "exact discretization: error at the reference's tolerance at every step "
                      "size" if passed else "exact discretization: error above the reference's "
                      "tolerance")


def _setting(model: Model, method: Method, u: np.ndarray):
    """(x0, horizon, exact end state, scale) of the study: where the model moves enough.

    The initial point first; when two steps over its horizon err by less than
    ORDER_MIN_COARSE_ERROR of the scale, the centre of the declared state ranges; then, still
    too little motion, the horizon lengthened (see ORDER_MIN_COARSE_ERROR).
    """
    starts = [np.array([s.initial for s in model.states], dtype=float)]
    if any(s.range for s in model.states):
        starts.append(np.array([0.5 * (s.range[0] + s.range[1]) if s.range else s.initial
                                for s in model.states], dtype=float))
    for i, x0 in enumerate(starts):
        horizon = order_horizon(model, u, x0)
        stretches = ORDER_MAX_STRETCHES if i == len(starts) - 1 else 0
        for _ in range(stretches + 1):
            exact = reference.high_accuracy(model, horizon, u[None, :], x0=x0, rtol=1e-13).xs[-1]
            scale = max(float(np.max(np.abs(exact))), 1e-300)
            coarse = _end_error(reference.run(model, method, horizon / 2, 1,
                                              np.repeat(u[None, :], 2, axis=0), x0=x0), 2, exact)
            if not (np.isfinite(coarse) and coarse < ORDER_MIN_COARSE_ERROR * scale):
                return x0, horizon, exact, scale
            horizon *= ORDER_HORIZON_STRETCH
    return x0, horizon / ORDER_HORIZON_STRETCH, exact, scale


def measure_order(model: Model, method: Method, expected: int | None = None,
                  progress=None, options: dict | None = None) -> OrderStudy:
    """Empirical order of the C build (double) by halving the step on the model.

    The reference picks the levels in the asymptotic regime, then the C is built and run at
    those levels and its own errors against solve_ivp give the measured order.
    options: generation options of implicit methods. On a non-smooth model (non_smooth), a
    study that finds too few levels or another order is not measurable rather than failed;
    a C build that did not finish still fails.
    """
    study = _study(model, method, expected, progress, options)
    where = non_smooth(model)
    if where and not study.passed and (study.measured is not None or not study.errors_c):
        return _not_measurable(study, where)
    return study


def _ladder(model: Model, method: Method, u, x0, horizon: float, exact, scale: float):
    """(steps, reference errors at T) of the reference halving the step until the floor."""
    floor = ORDER_ERROR_FLOOR["double"]
    steps, ref_errors = [], []
    for level in range(1, ORDER_MAX_LEVELS + 1):
        n = 2 ** level
        err = _end_error(reference.run(model, method, horizon / n, 1,
                                       np.repeat(u[None, :], n, axis=0), x0=x0), n, exact)
        steps.append(n)
        ref_errors.append(err)
        if np.isfinite(err) and err < floor * scale:
            break
    return steps, ref_errors


def _study(model: Model, method: Method, expected: int | None, progress,
           options: dict | None) -> OrderStudy:
    expected = expected or method.order
    u = constant_inputs(model)
    x0, horizon, exact, scale = _setting(model, method, u)
    if method.kind == EXACT:
        return _exact_study(model, method, u, x0, horizon, exact, scale, options, progress)
    floor = ORDER_ERROR_FLOOR["double"]
    steps, ref_errors = _ladder(model, method, u, x0, horizon, exact, scale)
    idx = _window(ref_errors, scale, floor)
    # A ladder without three settled levels before the floor is still pre-asymptotic (on a stiff
    # model, the fast mode's transient decays faster than the method's order while the slow modes
    # barely move): a longer horizon lets the slow modes' error, of the method's order, dominate.
    # The first horizon that settles is taken; none settles, the first ladder stays.
    longer = horizon
    for _ in range(ORDER_SETTLE_STRETCHES if not _settled_runs(idx, ref_errors) else 0):
        longer *= ORDER_HORIZON_STRETCH
        end = reference.high_accuracy(model, longer, u[None, :], x0=x0, rtol=1e-13).xs[-1]
        if not np.all(np.isfinite(end)):
            break
        wide = max(float(np.max(np.abs(end))), 1e-300)
        trial = _ladder(model, method, u, x0, longer, end, wide)
        trial_idx = _window(trial[1], wide, floor)
        if _settled_runs(trial_idx, trial[1]):
            horizon, exact, scale, (steps, ref_errors), idx = longer, end, wide, trial, trial_idx
            break
    if len(idx) < 3:
        if all(e <= floor * scale for e in ref_errors if np.isfinite(e)) and ref_errors[0] < floor * scale:
            return OrderStudy(expected, horizon, tuple(steps), (), tuple(ref_errors), None, True,
                              "the method is exact on this model at every step size: no order "
                              "to measure")
        return OrderStudy(expected, horizon, tuple(steps), (), tuple(ref_errors), None, False,
                          "fewer than three step sizes in the asymptotic range; the model may be "
                          "non-smooth (Piecewise, abs, min/max) or badly scaled")
    idx = _asymptotic(idx, ref_errors)
    chosen = [steps[i] for i in idx]
    c_errors = _c_end_errors(model, method, u, x0, horizon, exact, chosen, options, progress,
                             "order study")
    if not all(np.isfinite(c_errors)) or min(c_errors) <= 0:
        return OrderStudy(expected, horizon, tuple(chosen), tuple(c_errors),
                          tuple(ref_errors[i] for i in idx), None, False,
                          "the C build did not finish the order study runs")
    measured = fitted_order(chosen, c_errors)
    passed = expected is None or abs(measured - expected) <= ORDER_TOLERANCE
    return OrderStudy(expected, horizon, tuple(chosen), tuple(c_errors),
                      tuple(ref_errors[i] for i in idx), measured, bool(passed))
