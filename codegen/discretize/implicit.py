"""Implicit Runge-Kutta and Rosenbrock steps: Model + method + dt -> ImplicitStep.

Two schemes share the ImplicitStep representation (with the exact zero-order hold, exact.py):

- implicit Runge-Kutta (diagonally or fully implicit tableaux): stage values found by a simplified
  Newton iteration with the Jacobian J = df/dx frozen at the start of the step (refreshed at the
  iterate when it contracts too slowly, or at every iterate for full Newton); diagonally implicit
  methods solve stage by stage with the n x n matrix I - h a_ii J, fully implicit methods solve all
  stages at once with the (s n) x (s n) matrix I - h A (x) J;
- linearly implicit (Rosenbrock): one linear solve with I - gamma h J per stage, no iteration.

The Jacobian is derived symbolically, entry by entry, only where a rate depends on a state
(structurally non-zero entries, in state order; sets are never iterated unsorted). When every
entry is free of the states and time the model is linear in the state: one Newton step from any
start is exact, so the iteration is replaced by one direct solve. When every entry is a number as
well (linear time-invariant, constant dt) the iteration matrix is inverted here, at generation
time, in 50-digit arithmetic and rounded once.

The linear solve is chosen by cost: straight-line elimination that follows the sparsity pattern
(reverse Cuthill-McKee ordering, no run-time pivoting, every pivot guarded) while its operation
count stays under ELIMINATION_MAX_OPERATIONS, else a looped dense LU with partial pivoting.

References
----------
HW: Hairer & Wanner, Solving Ordinary Differential Equations II, 2nd ed., 1996: sections IV.8
(simplified Newton iterations, the formulation in Z_i = Y_i - y0 and the update with
d^T = b^T A^{-1}), IV.7 (Rosenbrock methods) (from memory).
"""

from __future__ import annotations

import sympy as sp

from ..errors import MethodError
from ..methods import DIAGONALLY_IMPLICIT, FULLY_IMPLICIT, LINEARLY_IMPLICIT, NEWTON_KINDS
from ..model import Model
from .explicit import exact_dt, output_block, rate_block
from .ir import (DEFAULT_NEWTON_ITERATIONS, DEFAULT_NEWTON_REFRESHES, DEFAULT_STATE_SCALE,
                 INVERSE, CoupledStage, DiagonalStage, ImplicitStep, NewtonSpec, RosenbrockStage,
                 Safeguards)
from .derivatives import jacobian, time_derivative
from .linear_solve import G, plan_solve


def state_scales(model: Model) -> tuple[float, ...]:
    """Newton scale floor per state: the largest magnitude of its range, else DEFAULT_STATE_SCALE."""
    return tuple(s.full_scale or DEFAULT_STATE_SCALE for s in model.states)


def discretize_implicit(model: Model, method, dt, substeps: int = 1,
                        newton_iterations: int = DEFAULT_NEWTON_ITERATIONS,
                        newton_tol: float | None = None, solver: str = "auto",
                        newton_refreshes: int = DEFAULT_NEWTON_REFRESHES,
                        full_newton: bool = False, error_estimate: bool = False,
                        safeguards: Safeguards = Safeguards()) -> ImplicitStep:
    """Model + implicit Runge-Kutta or Rosenbrock method + dt -> ImplicitStep (one substep h).

    error_estimate: return a Rosenbrock method's embedded estimate (b_hat) to the caller;
    safeguards: the tick's retries, accepted error (which also needs the embedded weights) and
    clamping. A retried piece scales h by a power of two at run
    time, so with retries no iteration matrix is inverted at generation time.
    """
    if not isinstance(substeps, int) or substeps < 1:
        raise MethodError(f"--substeps: must be a whole number >= 1, got {substeps}")
    dt = exact_dt(dt)
    h = dt / substeps
    newton = NewtonSpec(max_iterations=newton_iterations, tolerance=newton_tol,
                        scale=state_scales(model), refreshes=newton_refreshes, full=full_newton)
    common = dict(model=model, method=method, dt=dt, substeps=substeps, rates=rate_block(model),
                  outputs=output_block(model), newton=newton, safeguards=safeguards)
    where = f"{model.source}: --method {method.id}"
    jac = jacobian(model)
    s = method.stages
    weights = tuple((j, h * method.b[j]) for j in range(s) if method.b[j] != 0)
    inverse = not safeguards.pieces
    if method.kind == LINEARLY_IMPLICIT:
        dfdt = time_derivative(model)
        gamma_h = method.gamma * h
        error_weights = ()
        if error_estimate or safeguards.accept_error is not None:
            error_weights = tuple((j, h * (method.b[j] - method.b_hat[j])) for j in range(s)
                                  if method.b[j] != method.b_hat[j])
        return ImplicitStep(scheme=LINEARLY_IMPLICIT, jacobian=jac,
                            solve=plan_solve(jac, [[G]], (gamma_h,), solver, where, inverse),
                            stages=rosenbrock_stages(method, h, dfdt is not None),
                            weights=weights, gamma_h=gamma_h, dfdt=dfdt,
                            error_weights=error_weights, error_function=error_estimate,
                            **common)
    if method.kind not in NEWTON_KINDS:
        raise MethodError(f"{method.id}: {method.kind} methods use another step generator")
    if method.kind == DIAGONALLY_IMPLICIT:
        diagonals = tuple(dict.fromkeys(h * method.a[i][i] for i in range(s)
                                        if method.a[i][i] != 0))
        solve = plan_solve(jac, [[G]], diagonals, solver, where, inverse)
        return ImplicitStep(scheme=DIAGONALLY_IMPLICIT, jacobian=jac, solve=solve,
                            stages=diagonal_stages(method, h, diagonals, solve.kind != INVERSE),
                            weights=weights, **common)
    stages = tuple(CoupledStage(index=p, c=method.c[p], time_offset=method.c[p] * h,
                                terms=tuple((q, h * method.a[p][q]) for q in range(s)
                                            if method.a[p][q] != 0))
                   for p in range(s))
    solve = plan_solve(jac, [[h * method.a[p][q] for q in range(s)] for p in range(s)], (),
                       solver, where, inverse)
    z_weights = stage_weights(method)
    return ImplicitStep(scheme=FULLY_IMPLICIT, jacobian=jac, solve=solve, stages=stages,
                        weights=() if z_weights else weights, z_weights=z_weights, **common)


def diagonal_stages(method, h, diagonals: tuple, factored_at_run_time: bool
                    ) -> tuple[DiagonalStage, ...]:
    """The stages of a diagonally implicit step; a factorization is reused while h*a_ii repeats."""
    stages, factored = [], None
    for i in range(method.stages):
        g = h * method.a[i][i]
        refactor = g != 0 and g != factored
        if g != 0:
            factored = g
        stages.append(DiagonalStage(
            index=i, c=method.c[i], time_offset=method.c[i] * h,
            terms=tuple((j, h * method.a[i][j]) for j in range(i) if method.a[i][j] != 0),
            diagonal=g, solve_index=diagonals.index(g) if g != 0 else None,
            refactor=refactor and factored_at_run_time))
    return tuple(stages)


def rosenbrock_stages(method, h, time_dependent: bool) -> tuple[RosenbrockStage, ...]:
    """The stages of a linearly implicit step; the df/dt terms only when f depends on t."""
    s = method.stages
    return tuple(RosenbrockStage(
        index=i, c=method.c[i], time_offset=method.c[i] * h,
        terms=tuple((j, h * method.alpha[i][j]) for j in range(i) if method.alpha[i][j] != 0),
        coupling=tuple((j, method.coupling[i][j]) for j in range(i)
                       if method.coupling[i][j] != 0),
        time_term=method.time[i] * h if time_dependent else sp.Integer(0))
        for i in range(s))


def stage_weights(method) -> tuple[tuple[int, sp.Expr], ...]:
    """(i, d_i) for the non-zero entries of d = b^T A^-1, or () when A is singular.

    With Z_i = Y_i - y0 = h sum_j a_ij f(Y_j), the update y1 = y0 + h sum_j b_j f(Y_j) equals
    y0 + sum_i d_i Z_i without evaluating f again (HW IV.8, from memory).
    """
    a = sp.Matrix(method.a)
    if a.det() == 0:
        return ()
    d = (sp.Matrix([list(method.b)]) * a.inv()).applyfunc(sp.nsimplify)
    return tuple((i, sp.radsimp(d[0, i])) for i in range(method.stages) if d[0, i] != 0)
