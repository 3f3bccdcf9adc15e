"""Implicit Runge-Kutta and Rosenbrock steps: Model + method + dt -> ImplicitStep.

Two schemes share the ImplicitStep representation (with the exact zero-order hold, exact.py):

- implicit Runge-Kutta (diagonally or fully implicit tableaux): stage values found by a simplified
  Newton iteration with the Jacobian J = df/dx frozen at the start of the step; diagonally implicit
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
from .ir import DEFAULT_NEWTON_ITERATIONS, DEFAULT_STATE_SCALE, ImplicitStep, NewtonSpec
from .derivatives import jacobian, time_derivative
from .linear_solve import G, plan_solve


def state_scales(model: Model) -> tuple[float, ...]:
    """Newton scale floor per state: the largest magnitude of its range, else DEFAULT_STATE_SCALE."""
    return tuple(s.full_scale or DEFAULT_STATE_SCALE for s in model.states)


def discretize_implicit(model: Model, method, dt, substeps: int = 1,
                        newton_iterations: int = DEFAULT_NEWTON_ITERATIONS,
                        newton_tol: float | None = None, solver: str = "auto") -> ImplicitStep:
    """Model + implicit Runge-Kutta or Rosenbrock method + dt -> ImplicitStep (one substep h)."""
    if not isinstance(substeps, int) or substeps < 1:
        raise MethodError(f"--substeps: must be a whole number >= 1, got {substeps}")
    dt = exact_dt(dt)
    h = dt / substeps
    newton = NewtonSpec(max_iterations=newton_iterations, tolerance=newton_tol,
                        scale=state_scales(model))
    common = dict(model=model, method=method, dt=dt, substeps=substeps, rates=rate_block(model),
                  outputs=output_block(model), newton=newton)
    where = f"{model.source}: --method {method.id}"
    jac = jacobian(model)
    if method.kind == LINEARLY_IMPLICIT:
        g = method.gamma * h
        return ImplicitStep(scheme=LINEARLY_IMPLICIT, jacobian=jac,
                            solve=plan_solve(jac, [[G]], (g,), solver, where),
                            dfdt=time_derivative(model), **common)
    if method.kind not in NEWTON_KINDS:
        raise MethodError(f"{method.id}: {method.kind} methods use another step generator")
    s = method.stages
    if method.kind == DIAGONALLY_IMPLICIT:
        diagonals = []
        for i in range(s):
            g = h * method.a[i][i]
            if g != 0 and (not diagonals or diagonals[-1] != g):
                diagonals.append(g)
        solve = plan_solve(jac, [[G]], tuple(dict.fromkeys(diagonals)), solver, where)
    else:
        solve = plan_solve(jac, [[h * method.a[p][q] for q in range(s)] for p in range(s)], (),
                           solver, where)
    update_z, update_f = (), ()
    a = sp.Matrix(method.a)
    if method.kind == FULLY_IMPLICIT and a.det() != 0:
        d = (sp.Matrix([list(method.b)]) * a.inv()).applyfunc(sp.nsimplify)
        update_z = tuple((i, sp.radsimp(d[0, i])) for i in range(s) if d[0, i] != 0)
    else:
        update_f = tuple((i, h * method.b[i]) for i in range(s) if method.b[i] != 0)
    return ImplicitStep(scheme=method.kind, jacobian=jac, solve=solve, update_z=update_z,
                        update_f=update_f, **common)
