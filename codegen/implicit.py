"""Stage 3 for implicit methods: Model + method + dt -> ImplicitStep, the step before emission.

Three schemes share one intermediate representation:

- implicit Runge-Kutta (diagonally or fully implicit tableaux): stage values found by a simplified
  Newton iteration with the Jacobian J = df/dx frozen at the start of the step; diagonally implicit
  methods solve stage by stage with the n x n matrix I - h a_ii J, fully implicit methods solve all
  stages at once with the (s n) x (s n) matrix I - h A (x) J;
- linearly implicit (Rosenbrock): one linear solve with I - gamma h J per stage, no iteration;
- exact zero-order hold: x+ = expm(A h) x + (int_0^h expm(A s) ds)(B u + e) for models linear in
  states and inputs, computed at generation time.

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

import dataclasses
from dataclasses import dataclass

import mpmath
import numpy as np
import sympy as sp

from .discretize import Block, exact_dt, output_block, rate_block
from .errors import MethodError, ModelError, located
from .method import (DIAGONALLY_IMPLICIT, EXACT, EXPLICIT, FULLY_IMPLICIT, LINEARLY_IMPLICIT,
                     ExactDiscretization, LinearlyImplicit, Tableau)
from .model import INTERNAL_PREFIX, Model
from .simplify import cse_block

# Straight-line elimination is emitted while factor + solve stay under this many operations:
# about 40 bytes of C per operation keeps the function near 100 kB, where gcc -O2 still takes
# seconds (SCALING.md, compile time); beyond it a looped dense LU is smaller and compiles at once.
ELIMINATION_MAX_OPERATIONS = 2500
# Digits for generation-time matrix work (inverse of a constant iteration matrix, expm): far more
# than double needs, so the one rounding to the target precision is the only one that matters.
GENERATION_DIGITS = 50
# A constant iteration matrix is inverted at generation time up to this size (the inverse is emitted
# as straight-line products, size^2 multiply-adds per solve); larger ones are factored at run time.
MAX_PREINVERTED_SIZE = 32
# Default Newton iteration limit per solve: a hard start of the stiff demo (a 12 V step on the axis
# at rest, where Coulomb friction makes the frozen Jacobian stale) contracts by ~0.2 per
# simplified-Newton iteration and needs up to ~15 iterations to reach the double tolerance (float:
# ~6); smooth ticks take 2-4. The limit bounds the time per tick either way.
DEFAULT_NEWTON_ITERATIONS = 20
# Default Newton tolerance on max_i |correction_i| / scale_i. Float: 2^-16 = 256 units of float
# roundoff, well above the rounding noise of one correction (a few tens of units for a
# well-conditioned iteration matrix), so it is attainable in float32. Double: 2^-40, below the
# 1e-13 error floor of the order study once the contraction factor (< 0.1) is applied.
DEFAULT_NEWTON_TOLERANCE = {"float": 2.0 ** -16, "double": 2.0 ** -40}
# Scale of a state without a range in the Newton test (an absolute floor in the state's unit).
DEFAULT_STATE_SCALE = 1.0

ELIMINATION = "elimination"
DENSE_LU = "dense-lu"
INVERSE = "inverse"
SOLVERS = ("auto", ELIMINATION, DENSE_LU)


@dataclass(frozen=True)
class NewtonSpec:
    """Newton iteration bounds: at most max_iterations, converged when max |dz_i|/scale_i <= tol.

    tolerance None means the precision's default (DEFAULT_NEWTON_TOLERANCE). scale_i is
    scale[i] + |x_i| with scale[i] the largest magnitude of the state's range (or
    DEFAULT_STATE_SCALE).
    """

    max_iterations: int = DEFAULT_NEWTON_ITERATIONS
    tolerance: float | None = None
    scale: tuple[float, ...] = ()

    def __post_init__(self) -> None:
        if not isinstance(self.max_iterations, int) or isinstance(self.max_iterations, bool) \
                or self.max_iterations < 1:
            raise MethodError(f"--newton-iterations: must be a whole number >= 1, got "
                              f"{self.max_iterations!r}")
        if self.tolerance is not None and not (0.0 < float(self.tolerance) < 1.0):
            raise MethodError(f"--newton-tol: must be a relative tolerance between 0 and 1, got "
                              f"{self.tolerance!r}")

    def tolerance_for(self, precision: str) -> float:
        return float(self.tolerance) if self.tolerance is not None \
            else DEFAULT_NEWTON_TOLERANCE[precision]


@dataclass(frozen=True)
class Jacobian:
    """df/dx by its structural non-zeros: pattern[k] = (i, j) holds d f_i / d x_j = block result k.

    linear: f is affine in x and J depends on neither x nor t (one Newton step is exact).
    values: the exact entries when J is a constant matrix (linear time-invariant), else None.
    """

    nx: int
    pattern: tuple[tuple[int, int], ...]
    block: Block
    linear: bool
    values: tuple[sp.Expr, ...] | None


@dataclass(frozen=True)
class MatrixEntry:
    """One structural non-zero of the iteration matrix M = I - sum (coefficient * J[k]).

    terms: (coefficient, k) with coefficient an exact number or G (the run-time diagonal scale).
    """

    row: int
    col: int
    one: bool
    terms: tuple[tuple[sp.Expr, int], ...]


# The run-time scale of J in M = I - G J for stage-by-stage solves (h a_ii, or gamma h).
G = sp.Symbol(INTERNAL_PREFIX + "g", real=True)


@dataclass(frozen=True)
class LinearSolve:
    """How M d = r is solved: kind elimination, dense-lu or inverse (M constant, inverted here).

    order: pivot order (a permutation of 0..size-1) for straight-line elimination; filled: the
    pattern of L + U after fill-in, in the slot order of the factor array; inverses: for kind
    inverse, one exact inverse per value in diagonals (or one for the fully implicit matrix).
    """

    kind: str
    size: int
    entries: tuple[MatrixEntry, ...]
    order: tuple[int, ...] = ()
    filled: tuple[tuple[int, int], ...] = ()
    diagonals: tuple[sp.Expr, ...] = ()
    inverses: tuple[tuple[tuple[sp.Float, ...], ...], ...] = ()

    @property
    def needs_scale(self) -> bool:
        return any(c == G for e in self.entries for c, _ in e.terms)

    def slot(self) -> dict[tuple[int, int], int]:
        return {rc: k for k, rc in enumerate(self.filled)}

    def operation_count(self) -> int:
        """Operations of one factorization and one solve (multiply-add counted as two)."""
        if self.kind == INVERSE:
            return 2 * self.size * self.size
        if self.kind == DENSE_LU:
            n = self.size
            return (2 * n ** 3) // 3 + 2 * n * n
        return sum(elimination_counts(self.size, set(self.filled), self.order))


@dataclass(frozen=True)
class ImplicitStep:
    """The discretized implicit step for one substep h = dt / substeps.

    scheme: 'diagonally implicit', 'fully implicit', 'linearly implicit' or 'exact'.
    For Runge-Kutta schemes: update_z holds (i, d_i) when x+ = x + sum d_i Z_i (A invertible),
    otherwise update_f holds (i, h b_i) and the update evaluates f at the converged stages.
    For the exact scheme, propagator holds (Ad, Bd, ed) with Bd's columns per input and ed the
    response to the model's constant term.
    """

    model: Model
    method: object
    dt: sp.Rational
    substeps: int
    scheme: str
    rates: Block
    outputs: Block
    jacobian: Jacobian | None = None
    solve: LinearSolve | None = None
    newton: NewtonSpec = NewtonSpec()
    update_z: tuple[tuple[int, sp.Expr], ...] = ()
    update_f: tuple[tuple[int, sp.Expr], ...] = ()
    dfdt: Block | None = None
    propagator: tuple | None = None

    @property
    def h(self) -> sp.Rational:
        return self.dt / self.substeps

    @property
    def linear(self) -> bool:
        return self.jacobian is not None and self.jacobian.linear

    @property
    def prefactored(self) -> bool:
        return self.solve is not None and self.solve.kind == INVERSE

    @property
    def rate_evaluations(self) -> int:
        return self.method.stages


# ---------------------------------------------------------------------------------------------
# Jacobian
# ---------------------------------------------------------------------------------------------

def _differentiable(expr: sp.Expr, where: str, item: str) -> sp.Expr:
    """A derivative the C printer can print: steps as Piecewise, impulses dropped (measure zero)."""
    expr = expr.replace(sp.DiracDelta, lambda *args: sp.Integer(0))
    expr = expr.replace(sp.Heaviside,
                        lambda arg, *rest: sp.Piecewise((sp.Integer(1), arg > 0), (sp.Integer(0), True)))
    if expr.has(sp.Derivative, sp.Subs):
        raise ModelError(located(where, item, "cannot be differentiated symbolically (floor, "
                                 "ceil or a similar step of a state); the implicit methods need "
                                 "df/dx: rewrite it with Piecewise or use an explicit method"))
    return expr


def jacobian(model: Model) -> Jacobian:
    """Structurally non-zero entries of df/dx (baked parameters substituted), in row-major order."""
    baked = model.baked
    xs = model.x
    index = {sym: i for i, sym in enumerate(xs)}
    pattern, results, values = [], [], []
    linear = True
    for i, s in enumerate(model.states):
        f = s.rate.xreplace(baked)
        deps = sorted(index[v] for v in f.free_symbols if v in index)
        affine_rest = f
        for j in deps:
            d = _differentiable(sp.diff(f, xs[j]), model.source, f"states.{s.name}.rate")
            if d == 0:
                continue
            pattern.append((i, j))
            results.append((f"J{i}_{j}", d))
            values.append(d)
            if d.free_symbols & (set(xs) | {model.t}):
                linear = False
            affine_rest = affine_rest - d * xs[j]
        if linear and deps and sp.expand(affine_rest).free_symbols & set(xs):
            linear = False  # a step function of a state: zero derivative, not affine
    constant = linear and all(v.is_number for v in values)
    return Jacobian(nx=model.nx, pattern=tuple(pattern),
                    block=Block(temporaries=(), results=tuple(results)), linear=linear,
                    values=tuple(values) if constant else None)


def time_derivative(model: Model) -> Block | None:
    """df/dt (explicit time dependence only) as a block, or None when f does not depend on t."""
    baked = model.baked
    if not any(model.t in s.rate.free_symbols for s in model.states):
        return None
    return Block(temporaries=(), results=tuple(
        (f"dfdt{i}", _differentiable(sp.diff(s.rate.xreplace(baked), model.t), model.source,
                                     f"states.{s.name}.rate"))
        for i, s in enumerate(model.states)))


# ---------------------------------------------------------------------------------------------
# Linear solve plan
# ---------------------------------------------------------------------------------------------

def matrix_entries(jac: Jacobian, coefficients) -> tuple[MatrixEntry, ...]:
    """Entries of M = I - (C (x) J) for a block coefficient matrix C (s x s), row-major.

    coefficients[p][q] is h a_pq (exact), or G for a single stage-by-stage block.
    """
    n = jac.nx
    s = len(coefficients)
    cells: dict[tuple[int, int], list] = {}
    for p in range(s):
        for i in range(n):
            cells.setdefault((p * n + i, p * n + i), [])
    for p in range(s):
        for q in range(s):
            cpq = coefficients[p][q]
            if cpq == 0:
                continue
            for k, (i, j) in enumerate(jac.pattern):
                cells.setdefault((p * n + i, q * n + j), []).append((cpq, k))
    return tuple(MatrixEntry(row=r, col=c, one=(r == c), terms=tuple(cells[(r, c)]))
                 for r, c in sorted(cells))


def fill_in(size: int, pattern: set, order) -> tuple[tuple[int, int], ...]:
    """Pattern of L + U after elimination in the given pivot order (no pivoting), sorted."""
    filled = set(pattern)
    position = {v: k for k, v in enumerate(order)}
    for k in order:
        below = sorted(i for i in range(size) if (i, k) in filled and position[i] > position[k])
        right = sorted(j for j in range(size) if (k, j) in filled and position[j] > position[k])
        for i in below:
            for j in right:
                filled.add((i, j))
    return tuple(sorted(filled))


def elimination_counts(size: int, filled: set, order) -> tuple[int, int]:
    """(factor, solve) operation counts of straight-line elimination on a filled pattern."""
    position = {v: k for k, v in enumerate(order)}
    factor = solve = 0
    for k in order:
        below = [i for i in range(size) if (i, k) in filled and position[i] > position[k]]
        right = [j for j in range(size) if (k, j) in filled and position[j] > position[k]]
        factor += len(below) * (1 + 2 * len(right))
        solve += 2 * (len(below) + len(right)) + 1
    return factor, solve


def _rcm(size: int, pattern) -> tuple[int, ...]:
    """Reverse Cuthill-McKee order of the symmetrized pattern (keeps fill-in low)."""
    from scipy.sparse import csr_matrix
    from scipy.sparse.csgraph import reverse_cuthill_mckee

    rows = [r for r, c in pattern] + [c for r, c in pattern]
    cols = [c for r, c in pattern] + [r for r, c in pattern]
    graph = csr_matrix((np.ones(len(rows)), (rows, cols)), shape=(size, size))
    return tuple(int(v) for v in reverse_cuthill_mckee(graph, symmetric_mode=True))


def _mp_matrix(entries, size: int, jac_values, scale) -> mpmath.matrix:
    m = mpmath.matrix(size, size)
    for e in entries:
        value = mpmath.mpf(1) if e.one else mpmath.mpf(0)
        for coeff, k in e.terms:
            c = scale if coeff == G else coeff
            value -= _mp(c) * _mp(jac_values[k])
        m[e.row, e.col] = value
    return m


def _mp(value) -> mpmath.mpf:
    return mpmath.mpf(sp.Float(sp.N(value, GENERATION_DIGITS), GENERATION_DIGITS)._mpf_)


def _inverse(m: mpmath.matrix, where: str) -> tuple[tuple[sp.Float, ...], ...]:
    size = m.rows
    try:
        inv = m ** -1
    except ZeroDivisionError:
        inv = None
    if inv is None or any(not mpmath.isfinite(inv[i, j]) for i in range(size) for j in range(size)):
        raise MethodError(f"{where}: the iteration matrix I - h*a*J is singular at this step; "
                          "change --dt or the method")
    norm_m = max(sum(abs(m[i, j]) for j in range(size)) for i in range(size))
    norm_inv = max(sum(abs(inv[i, j]) for j in range(size)) for i in range(size))
    if norm_m * norm_inv > mpmath.mpf(10) ** 12:
        raise MethodError(f"{where}: the iteration matrix I - h*a*J is nearly singular at this step "
                          f"(condition ~{float(norm_m * norm_inv):.2g}); change --dt or the method")
    return tuple(tuple(sp.Float(mpmath.nstr(inv[i, j], GENERATION_DIGITS), GENERATION_DIGITS)
                       for j in range(size)) for i in range(size))


def plan_solve(jac: Jacobian, coefficients, diagonals=(), solver: str = "auto",
               where: str = "") -> LinearSolve:
    """Choose and lay out the linear solve for M = I - (coefficients (x) J).

    diagonals: the run-time values of G (stage-by-stage blocks); used to pre-invert M when J is
    constant.
    """
    if solver not in SOLVERS:
        raise MethodError(f"--solver: must be one of {', '.join(SOLVERS)}, got {solver!r}")
    entries = matrix_entries(jac, coefficients)
    size = jac.nx * len(coefficients)
    if jac.values is not None and solver == "auto" and size <= MAX_PREINVERTED_SIZE:
        with mpmath.workdps(GENERATION_DIGITS):
            if diagonals:
                inverses = tuple(_inverse(_mp_matrix(entries, size, jac.values, _mp(g)), where)
                                 for g in diagonals)
            else:
                inverses = (_inverse(_mp_matrix(entries, size, jac.values, None), where),)
        return LinearSolve(kind=INVERSE, size=size, entries=entries, diagonals=tuple(diagonals),
                           inverses=inverses)
    pattern = {(e.row, e.col) for e in entries}
    order = _rcm(size, sorted(pattern))
    filled = fill_in(size, pattern, order)
    sparse_cost = sum(elimination_counts(size, set(filled), order))
    dense_cost = (2 * size ** 3) // 3 + 2 * size * size
    use_elimination = solver == ELIMINATION or (
        solver == "auto" and sparse_cost <= min(ELIMINATION_MAX_OPERATIONS, dense_cost))
    if use_elimination:
        return LinearSolve(kind=ELIMINATION, size=size, entries=entries, order=order,
                           filled=filled, diagonals=tuple(diagonals))
    return LinearSolve(kind=DENSE_LU, size=size, entries=entries, diagonals=tuple(diagonals))


# ---------------------------------------------------------------------------------------------
# Discretization
# ---------------------------------------------------------------------------------------------

def state_scales(model: Model) -> tuple[float, ...]:
    """Newton scale floor per state: the largest magnitude of its range, else DEFAULT_STATE_SCALE."""
    return tuple(s.full_scale or DEFAULT_STATE_SCALE for s in model.states)


def discretize_implicit(model: Model, method, dt, substeps: int = 1,
                        newton_iterations: int = DEFAULT_NEWTON_ITERATIONS,
                        newton_tol: float | None = None, solver: str = "auto") -> ImplicitStep:
    """Model + implicit, linearly implicit or exact method + dt -> ImplicitStep (one substep h)."""
    if not isinstance(substeps, int) or substeps < 1:
        raise MethodError(f"--substeps: must be a whole number >= 1, got {substeps}")
    dt = exact_dt(dt)
    h = dt / substeps
    newton = NewtonSpec(max_iterations=newton_iterations, tolerance=newton_tol,
                        scale=state_scales(model))
    common = dict(model=model, method=method, dt=dt, substeps=substeps, rates=rate_block(model),
                  outputs=output_block(model), newton=newton)
    where = f"{model.source}: --method {method.id}"
    if isinstance(method, ExactDiscretization):
        return ImplicitStep(scheme=EXACT, propagator=zoh_propagator(model, h, method), **common)
    jac = jacobian(model)
    if isinstance(method, LinearlyImplicit):
        g = method.gamma * h
        return ImplicitStep(scheme=LINEARLY_IMPLICIT, jacobian=jac,
                            solve=plan_solve(jac, [[G]], (g,), solver, where),
                            dfdt=time_derivative(model), **common)
    if not isinstance(method, Tableau) or method.kind == EXPLICIT:
        raise MethodError(f"{method.id}: explicit tableaux use the explicit step generator")
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


def simplify_implicit(step: ImplicitStep) -> ImplicitStep:
    """Share common subexpressions inside the rate, output, Jacobian and df/dt blocks."""
    jac = step.jacobian
    if jac is not None:
        jac = dataclasses.replace(jac, block=cse_block(jac.block, INTERNAL_PREFIX + "j"))
    dfdt = cse_block(step.dfdt, INTERNAL_PREFIX + "d") if step.dfdt is not None else None
    return dataclasses.replace(step, rates=cse_block(step.rates, INTERNAL_PREFIX + "r"),
                               outputs=cse_block(step.outputs, INTERNAL_PREFIX + "o"),
                               jacobian=jac, dfdt=dfdt)


# ---------------------------------------------------------------------------------------------
# Exact zero-order hold
# ---------------------------------------------------------------------------------------------

def linear_parts(model: Model, method_id: str = "zoh-exact"):
    """(A, B, e) exact with f = A x + B u + e, or a ModelError naming the offending rate."""
    baked = model.baked
    xs, us = list(model.x), list(model.u)
    tunable = {p.symbol for p in model.tunable}
    rows_a, rows_b, e = [], [], []
    for s in model.states:  # nonlinearity first: it rules the method out whatever the parameters
        f = s.rate.xreplace(baked)
        item = f"states.{s.name}.rate"
        if model.t in f.free_symbols:
            raise ModelError(located(model.source, item, f"depends on time '{model.time}'; "
                                     f"{method_id} needs a time-invariant linear model; use an "
                                     "implicit method such as sdirk2 or radau-iia3"))
        row_a = [sp.diff(f, v) for v in xs]
        row_b = [sp.diff(f, v) for v in us]
        for coeff, v in zip(row_a + row_b, xs + us):
            if coeff.free_symbols & (set(xs) | set(us)) or coeff.has(sp.Derivative):
                raise ModelError(located(model.source, item, f"is nonlinear in '{v}'; {method_id} "
                                         "needs a model linear in states and inputs; use an "
                                         "implicit method such as sdirk2 or radau-iia3"))
        rest = sp.expand(f - sum(c * v for c, v in zip(row_a + row_b, xs + us)))
        if rest.free_symbols & (set(xs) | set(us)):
            raise ModelError(located(model.source, item, f"is not affine in the states and inputs "
                                     f"(a step function of one?); {method_id} needs a linear model"))
        rows_a.append(row_a)
        rows_b.append(row_b)
        e.append(rest)
    for s, row_a, row_b, rest in zip(model.states, rows_a, rows_b, e):
        bad = sorted(p.name for c in row_a + row_b + [rest] for p in c.free_symbols & tunable)
        if bad:
            raise ModelError(located(model.source, f"states.{s.name}.rate", f"uses tunable "
                                     f"parameter '{bad[0]}'; {method_id} computes expm(A dt) at "
                                     f"generation time: set parameters.{bad[0]}.tunable = false "
                                     "or use an implicit method"))
    return sp.Matrix(rows_a), sp.Matrix(len(xs), len(us), lambda i, j: rows_b[i][j]), sp.Matrix(e)


def zoh_propagator(model: Model, h, method=None):
    """(Ad, Bd, ed) of the exact step, from expm([[A, B, e], [0, 0, 0]] h) at 50 digits."""
    a, b, e = linear_parts(model, method.id if method is not None else "zoh-exact")
    n, m = model.nx, len(model.inputs)
    size = n + m + 1
    with mpmath.workdps(GENERATION_DIGITS):
        aug = mpmath.matrix(size, size)
        for i in range(n):
            for j in range(n):
                aug[i, j] = _mp(a[i, j] * h)
            for j in range(m):
                aug[i, n + j] = _mp(b[i, j] * h)
            aug[i, n + m] = _mp(e[i] * h)
        phi = mpmath.expm(aug)
        as_float = lambda v: sp.Float(mpmath.nstr(v, GENERATION_DIGITS), GENERATION_DIGITS)
        ad = tuple(tuple(as_float(phi[i, j]) for j in range(n)) for i in range(n))
        bd = tuple(tuple(as_float(phi[i, n + j]) for j in range(m)) for i in range(n))
        ed = tuple(as_float(phi[i, n + m]) for i in range(n))
    return ad, bd, ed
