"""The check of the C's run-time error estimate against the reference's embedded difference."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .. import reference
from ..methods import Tableau
from ..model import Model
from ..rounding import UNIT_ROUNDOFF


def embedded_estimate(model: Model, method: Tableau, t: float, x, u, dt: float,
                      substeps: int = 1):
    """(x after one tick, the tick's error estimate) in float64, as the generated C defines it.

    The estimate is max over substeps and states of |h sum_j (b_j - b_hat_j) k_j| / S_i with S_i
    the full scale of emit.error_scale (max |range bound|, or 1).
    """
    from ..emit import error_scale

    scales = np.array([float(error_scale(s)) for s in model.states])
    step = reference.stepper(model, method)
    h = dt / substeps
    worst = 0.0
    x = np.asarray(x, float)
    for m in range(substeps):
        result = step(t + m * h, x, u, h)
        x = result.x
        worst = max(worst, float(np.max(np.abs(result.error) / scales)))
    return x, worst


@dataclass(frozen=True)
class EstimateCheck:
    """The C's run-time error estimate against embedded_estimate, tick by tick."""

    precision: str
    ticks: int
    max_difference: float
    tolerance: float
    largest_estimate: float
    passed: bool


def check_error_estimate(model: Model, method: Tableau, dt: float, substeps: int,
                         precision: str, ticks: int) -> EstimateCheck:
    """Build the C with the error estimate and compare it, tick by tick, with embedded_estimate.

    Each tick the reference starts from the C's own state, so only that tick's rounding counts:
    the bound is 32 rounding units of the terms the estimate sums (sum_j |h (b_j - b_hat_j)|
    times the largest stage rate, plus the rounding of the state carried through the Jacobian).
    """
    from ..build import build, strict_compile
    from ..pipeline import generate
    from ..run import as_precision
    from .scenario import excitation

    csource = generate(model, method, dt, substeps, precision, error_estimate=True)
    strict_compile(csource)
    built = build(csource, model)
    ffi, lib = built.ffi, built.lib
    ctx = ffi.new(f"{model.name}_ctx_t *")
    err = ffi.new(f"{model.name}_real_t *")
    getattr(lib, f"{model.name}_reset")(ctx)
    advance = getattr(lib, f"{model.name}_advance_with_error")
    u_all = as_precision(excitation(model, ticks), precision)
    f, jac = reference.rate_function(model), reference.jacobian_function(model)
    eps = UNIT_ROUNDOFF[precision]
    from ..emit import error_scale

    scales = np.array([float(error_scale(s)) for s in model.states])
    weight = sum(abs(float(method.b[j] - method.b_hat[j])) for j in range(method.stages))
    h = dt / substeps
    worst_diff, worst_tol, largest = 0.0, 0.0, 0.0
    passed = True
    for k in range(ticks):
        for j, inp in enumerate(model.inputs):
            setattr(ctx, inp.name, float(u_all[k, j]))
        x = np.array([getattr(ctx, s.name) for s in model.states])
        t = float(getattr(ctx, model.time))
        status = int(advance(ctx, err))
        if status != 0:
            passed = False
            break
        _, expected = embedded_estimate(model, method, t, x, u_all[k], dt, substeps)
        rate = np.abs(f(t, x, u_all[k])) + np.max(np.abs(jac(t, x, u_all[k]))) * np.abs(x).max()
        tol = float(np.max(32 * eps * weight * h * (rate + np.abs(f(t, x, u_all[k])))
                           / scales)) + 4 * eps * expected
        diff = abs(float(err[0]) - expected)
        worst_diff, worst_tol = max(worst_diff, diff), max(worst_tol, tol)
        largest = max(largest, expected)
        if not diff <= tol:
            passed = False
    return EstimateCheck(precision, ticks, worst_diff, worst_tol, largest, passed)
