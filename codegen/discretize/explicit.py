"""Explicit Runge-Kutta steps: Model + Tableau + dt -> StepProgram.

The step program keeps the stages as arrays (one rate evaluation per stage) and the model's rate
function as one block of assignments, which the simplify stage then reduces with CSE. Substituting
stages into each other as expressions would multiply the tree size and end with more operations.

References
----------
HNW I, section II.1: the explicit Runge-Kutta step y1 = y0 + h * sum_i b_i k_i,
k_i = f(t0 + c_i h, y0 + h * sum_j a_ij k_j).
"""

from __future__ import annotations

import math

import sympy as sp

from ..errors import MethodError
from ..methods import Tableau
from ..model import Model
from .ir import Block, Safeguards, Stage, StepProgram


def exact_dt(dt) -> sp.Rational:
    """A step size as the exact decimal the user wrote (0.001 -> 1/1000)."""
    if not isinstance(dt, sp.Rational) and not math.isfinite(float(dt)):
        raise MethodError(f"--dt: must be a finite number of seconds, got {dt}")
    value = sp.Rational(repr(float(dt))) if not isinstance(dt, sp.Rational) else dt
    if not value > 0:
        raise MethodError(f"--dt: must be a positive number of seconds, got {dt}")
    return value


def rate_block(model: Model) -> Block:
    """The rate function f as a block: baked parameters substituted by their exact values."""
    baked = model.baked
    return Block(temporaries=(),
                 results=tuple((s.name, s.rate.xreplace(baked)) for s in model.states))


def output_block(model: Model) -> Block:
    baked = model.baked
    return Block(temporaries=(),
                 results=tuple((o.name, o.resolved.xreplace(baked)) for o in model.outputs))


def needed_stages(method: Tableau, with_error: bool) -> list[int]:
    """Stages whose rate is used by the update, the error estimate or a later needed stage."""
    s = method.stages
    used = {j for j in range(s) if method.b[j] != 0}
    if with_error and method.b_hat is not None:
        used |= {j for j in range(s) if method.b_hat[j] != method.b[j]}
    for i in reversed(range(s)):
        if i in used:
            used |= {j for j in range(i) if method.a[i][j] != 0}
    return sorted(used)


def discretize_explicit(model: Model, method: Tableau, dt, substeps: int = 1,
                        error_estimate: bool = False,
                        safeguards: Safeguards = Safeguards()) -> StepProgram:
    """Build the explicit step program for one substep h = dt / substeps.

    error_estimate: return the embedded estimate to the caller (--error-estimate); the embedded
    weights are carried for it and for safeguards.accept_error.
    """
    if not method.is_explicit:
        raise MethodError(f"{method.id}: {method.kind} tableaux need the implicit step generator")
    if not isinstance(substeps, int) or substeps < 1:
        raise MethodError(f"--substeps: must be a whole number >= 1, got {substeps}")
    if (error_estimate or safeguards.accept_error is not None) and method.b_hat is None:
        raise MethodError(f"{method.id}: has no embedded weights (b_hat); the error estimate needs "
                          "an embedded pair such as bs3 or dp5")
    estimated = error_estimate or safeguards.accept_error is not None
    dt = exact_dt(dt)
    h = dt / substeps
    keep = needed_stages(method, estimated)
    stages = tuple(
        Stage(index=i, c=method.c[i], time_offset=method.c[i] * h,
              terms=tuple((j, h * method.a[i][j]) for j in range(i)
                          if method.a[i][j] != 0))
        for i in keep)
    weights = tuple((j, h * method.b[j]) for j in keep if method.b[j] != 0)
    error_weights = ()
    if estimated:
        error_weights = tuple((j, h * (method.b[j] - method.b_hat[j])) for j in keep
                              if method.b[j] != method.b_hat[j])
    return StepProgram(model=model, method=method, dt=dt, substeps=substeps,
                       rates=rate_block(model), outputs=output_block(model), stages=stages,
                       weights=weights, error_weights=error_weights, safeguards=safeguards,
                       error_function=error_estimate)
