"""The intermediate representation of one discretized step, for every method kind.

A step is straight-line code plus solver blocks: the model's rate function (and, for implicit
kinds, its Jacobian) as blocks of assignments that the simplify stage reduces with CSE, and the
method's stages with every coefficient already multiplied out (h*a_ij, c_i*h, h*b_j, ...) as exact
values. Emitters only print what the IR holds.

- ``StepProgram``: an explicit Runge-Kutta step (stages kept as arrays);
- ``ImplicitStep``: implicit Runge-Kutta (Newton on the stage equations), Rosenbrock (one linear
  solve per stage) and the exact zero-order hold (a propagator computed at generation time).
"""

from __future__ import annotations

from dataclasses import dataclass

import sympy as sp

from ..errors import MethodError
from ..methods import Method
from ..model import INTERNAL_PREFIX, Model

@dataclass(frozen=True)
class Assign:
    """One assignment ``target = expr`` of straight-line code."""

    target: sp.Symbol
    expr: sp.Expr


@dataclass(frozen=True)
class Block:
    """Straight-line code: temporaries first, then the results in order.

    inputs: the symbols the block reads; results: (name, expression) pairs it produces.
    """

    temporaries: tuple[Assign, ...]
    results: tuple[tuple[str, sp.Expr], ...]

    def operation_count(self) -> int:
        exprs = [a.expr for a in self.temporaries] + [e for _, e in self.results]
        return int(sum(sp.count_ops(e, visual=False) for e in exprs))


@dataclass(frozen=True)
class Stage:
    """Stage i of an explicit step: k_i = f(t + c_i h, x + sum_j (h a_ij) k_j).

    terms holds (j, h*a_ij) for the non-zero a_ij only, as exact values.
    """

    index: int
    c: sp.Expr
    time_offset: sp.Expr
    terms: tuple[tuple[int, sp.Expr], ...]


# Deepest halving of a failed step: pieces of h / 2^16. The tick's position is counted in pieces
# of that size in a uint32_t, and the worst case grows as 2^(depth + 1) attempts per substep, so a
# deeper limit would only make the documented worst case meaningless.
MAX_RETRY_DEPTH = 16


@dataclass(frozen=True)
class Safeguards:
    """What one tick may do beyond one attempt per substep, all off by default.

    retry_depth: a step that fails (no convergence, singular matrix, non-finite value, or an
    error estimate above accept_error) is retried as two halves, each of which may be halved again,
    down to pieces of h / 2^retry_depth; 0 means no retry (one attempt per substep).
    accept_error: the largest embedded error estimate a step may have, as a fraction of each
    state's full scale (None: not checked); needs a method with embedded weights (b_hat).
    clamp_states: saturate every state with a declared range to it after each tick.
    """

    retry_depth: int = 0
    accept_error: float | None = None
    clamp_states: bool = False

    def __post_init__(self) -> None:
        if not isinstance(self.retry_depth, int) or isinstance(self.retry_depth, bool) \
                or not 0 <= self.retry_depth <= MAX_RETRY_DEPTH:
            raise MethodError(f"--max-retry-depth: must be a whole number from 0 to "
                              f"{MAX_RETRY_DEPTH}, got {self.retry_depth!r}")
        if self.accept_error is not None and not (0.0 < float(self.accept_error) < 1.0):
            raise MethodError(f"--accept-error: must be a fraction of each state's scale between "
                              f"0 and 1, got {self.accept_error!r}")

    @property
    def pieces(self) -> bool:
        """Whether the tick runs as a loop over pieces that can fail and be retried."""
        return self.retry_depth > 0

    def attempts(self, substeps: int) -> int:
        """Step attempts per tick, at most: each substep is a binary tree of depth retry_depth
        whose inner nodes failed once and whose 2^depth leaves were tried once each."""
        return substeps * (2 ** (self.retry_depth + 1) - 1)


@dataclass(frozen=True)
class StepProgram:
    """The discretized step: what one substep of length h computes, before simplification.

    h = dt / substeps; weights are (j, h*b_j) for the stages that contribute; error_weights
    (j, h*(b_j - b_hat_j)) when an embedded estimate is computed, and error_function when it is
    also returned to the caller (--error-estimate).
    """

    model: Model
    method: Method
    dt: sp.Rational
    substeps: int
    rates: Block
    outputs: Block
    stages: tuple[Stage, ...]
    weights: tuple[tuple[int, sp.Expr], ...]
    error_weights: tuple[tuple[int, sp.Expr], ...] = ()
    safeguards: Safeguards = Safeguards()
    error_function: bool = False

    @property
    def h(self) -> sp.Rational:
        return self.dt / self.substeps

    @property
    def rate_evaluations(self) -> int:
        return len(self.stages)


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
# Default Jacobian refreshes per step when the simplified Newton iteration contracts too slowly.
# Robertson's kinetics at dt = 0.1 (tests/test_stiff.py) needs 9 with backward Euler and Radau
# IIA, 8 with SDIRK2, in its first step (measured on the generated C), where J at the initial
# state has a zero species and cannot see the stiffness (Newton then halves its overshoot once
# per iteration); half the iteration limit leaves room for that and keeps the worst case of a
# step at 11 Jacobians and factorizations.
DEFAULT_NEWTON_REFRESHES = 10
# Contraction rate above which the frozen Jacobian is refreshed: max |correction| must shrink at
# least 4-fold per iteration, or 20 iterations gain fewer than 40 bits (the double tolerance 2^-40
# from a first correction of order 1) and the limit is reached first. Hairer & Wanner (IV.8) stop
# at rates near 1; refreshing is cheaper here than a failed tick.
NEWTON_REFRESH_RATE = 0.25

ELIMINATION = "elimination"
DENSE_LU = "dense-lu"
INVERSE = "inverse"
SOLVERS = ("auto", ELIMINATION, DENSE_LU)


@dataclass(frozen=True)
class NewtonSpec:
    """Newton iteration bounds: at most max_iterations, converged when max |dz_i|/scale_i <= tol.

    tolerance None means the precision's default (DEFAULT_NEWTON_TOLERANCE). scale_i is
    scale[i] + |x_i| with scale[i] the largest magnitude of the state's range (or
    DEFAULT_STATE_SCALE). J is frozen at the start of the step; when a correction is larger than
    NEWTON_REFRESH_RATE times the one before, J is re-evaluated at the current iterate (at the one
    before when the iteration diverged from a stale J) and the matrix refactored, at most
    refreshes times per step (0: always frozen); full re-evaluates it after every iteration
    (Newton's method proper).

    References
    ----------
    HW IV.8: simplified Newton, its contraction rate and when to stop (from memory).
    """

    max_iterations: int = DEFAULT_NEWTON_ITERATIONS
    tolerance: float | None = None
    scale: tuple[float, ...] = ()
    refreshes: int = DEFAULT_NEWTON_REFRESHES
    full: bool = False

    def __post_init__(self) -> None:
        if not isinstance(self.max_iterations, int) or isinstance(self.max_iterations, bool) \
                or self.max_iterations < 1:
            raise MethodError(f"--newton-iterations: must be a whole number >= 1, got "
                              f"{self.max_iterations!r}")
        if not isinstance(self.refreshes, int) or isinstance(self.refreshes, bool) \
                or self.refreshes < 0:
            raise MethodError(f"--newton-refreshes: must be a whole number >= 0, got "
                              f"{self.refreshes!r}")
        if self.tolerance is not None and not (0.0 < float(self.tolerance) < 1.0):
            raise MethodError(f"--newton-tol: must be a relative tolerance between 0 and 1, got "
                              f"{self.tolerance!r}")

    @property
    def monitored(self) -> bool:
        """Simplified Newton that refreshes J when it contracts too slowly (not full Newton)."""
        return self.refreshes > 0 and not self.full

    @property
    def refreshing(self) -> bool:
        """Whether J is ever re-evaluated inside a step (monitored or full Newton)."""
        return self.full or self.refreshes > 0

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


@dataclass(frozen=True)
class DiagonalStage:
    """Stage i of a diagonally implicit Runge-Kutta step, every coefficient multiplied by h.

    The stage value solves Y_i = W_i + (h a_ii) f(t + c_i h, Y_i) with the explicit part
    W_i = x + sum_j (h a_ij) k_j, j < i; then k_i = (Y_i - W_i) / (h a_ii). terms holds (j, h*a_ij)
    for the non-zero a_ij only. diagonal is h*a_ii (0 for an explicit stage: k_i = f(t + c_i h,
    W_i)); solve_index is the position of diagonal in LinearSolve.diagonals (and of its
    generation-time inverse), None for an explicit stage; refactor says the iteration matrix
    I - h a_ii J must be factored at run time before this stage (the first implicit stage, and every
    stage whose h*a_ii differs from the last factored one).
    """

    index: int
    c: sp.Expr
    time_offset: sp.Expr
    terms: tuple[tuple[int, sp.Expr], ...]
    diagonal: sp.Expr
    solve_index: int | None
    refactor: bool


@dataclass(frozen=True)
class CoupledStage:
    """Stage p of a fully implicit Runge-Kutta step: Z_p = sum_q (h a_pq) f(t + c_q h, x + Z_q).

    terms holds (q, h*a_pq) for the non-zero a_pq only (one block row of I - h A (x) J).
    """

    index: int
    c: sp.Expr
    time_offset: sp.Expr
    terms: tuple[tuple[int, sp.Expr], ...]


@dataclass(frozen=True)
class RosenbrockStage:
    """Stage i of a linearly implicit step, every coefficient multiplied by h where it applies.

    (I - gamma h J) k_i = f(t + c_i h, x + sum_j (alpha_ij h) k_j) + sum_j coupling_ij k_j
    + (time_i h) df/dt. terms holds (j, alpha_ij*h) and coupling (j, coupling_ij) for the non-zero
    entries only; time_term is time_i*h, or 0 when f does not depend on t explicitly.
    """

    index: int
    c: sp.Expr
    time_offset: sp.Expr
    terms: tuple[tuple[int, sp.Expr], ...]
    coupling: tuple[tuple[int, sp.Expr], ...]
    time_term: sp.Expr


@dataclass(frozen=True)
class ImplicitStep:
    """The discretized implicit step for one substep h = dt / substeps.

    scheme: 'diagonally implicit', 'fully implicit', 'linearly implicit' or 'exact'.
    stages: DiagonalStage, CoupledStage or RosenbrockStage per stage of the scheme (none for exact).
    weights: (j, h*b_j) for the non-zero b_j: x+ = x + sum_j (h b_j) k_j, with k_j the stage
    rates (for a fully implicit step, f evaluated at the converged stages).
    z_weights: fully implicit with A invertible only: (i, d_i) for the non-zero d_i of
    d = b^T A^-1, and x+ = x + sum_i d_i Z_i replaces the update with weights.
    gamma_h: linearly implicit only: gamma*h, the scale of J in its iteration matrix.
    error_weights: linearly implicit with b_hat only, when an estimate is asked for: (j, h*(b_j -
    b_hat_j)) for the non-zero differences; error_function: the estimate is also returned to the
    caller (--error-estimate).
    For the exact scheme, propagator holds (Ad, Bd, ed) with Bd's columns per input and ed the
    response to the model's constant term.
    """

    model: Model
    method: Method
    dt: sp.Rational
    substeps: int
    scheme: str
    rates: Block
    outputs: Block
    jacobian: Jacobian | None = None
    solve: LinearSolve | None = None
    newton: NewtonSpec = NewtonSpec()
    stages: tuple[DiagonalStage | CoupledStage | RosenbrockStage, ...] = ()
    weights: tuple[tuple[int, sp.Expr], ...] = ()
    z_weights: tuple[tuple[int, sp.Expr], ...] = ()
    gamma_h: sp.Expr | None = None
    dfdt: Block | None = None
    propagator: tuple | None = None
    error_weights: tuple[tuple[int, sp.Expr], ...] = ()
    safeguards: Safeguards = Safeguards()
    error_function: bool = False

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




@dataclass(frozen=True)
class Work:
    """The most work one tick can do, per step attempt and over the whole tick.

    attempts: step attempts per tick (substeps, times 2^(depth + 1) - 1 with retries); the other
    fields count one attempt: rate evaluations f(t, x), Jacobian evaluations (one per stage
    block for a fully implicit refresh), df/dt evaluations, factorizations of the iteration
    matrix, linear solves with it, and products with the exact step's matrices (zoh-exact). Every loop of the generated advance function is bounded by
    these numbers; none depends on the data.
    """

    attempts: int
    rate_evaluations: int
    jacobian_evaluations: int = 0
    time_derivatives: int = 0
    factorizations: int = 0
    linear_solves: int = 0
    propagations: int = 0

    def per_tick(self, field_name: str) -> int:
        return self.attempts * getattr(self, field_name)

    def note(self) -> str:
        """The bound in words, for the generated preamble."""
        parts = [(self.rate_evaluations, "rate evaluation"),
                 (self.jacobian_evaluations, "Jacobian evaluation"),
                 (self.time_derivatives, "df/dt evaluation"),
                 (self.factorizations, "factorization"), (self.linear_solves, "linear solve"),
                 (self.propagations, "product with the exact propagator")]
        shown = [(n, word) for n, word in parts if n] or [(0, "rate evaluation")]
        total = ", ".join(f"{self.attempts * n} {word}{'s' if self.attempts * n != 1 else ''}"
                          for n, word in shown)
        each = ", ".join(str(n) for n, _ in shown)
        return (f"Worst-case work per tick: {total} ({self.attempts} step attempt"
                f"{'s' if self.attempts != 1 else ''} of at most {each}).")


def worst_case_work(step: StepProgram | ImplicitStep) -> Work:
    """The worst-case work of one tick of the generated advance function (see Work)."""
    from ..methods import DIAGONALLY_IMPLICIT, FULLY_IMPLICIT, LINEARLY_IMPLICIT

    attempts = step.safeguards.attempts(step.substeps)
    if isinstance(step, StepProgram):
        return Work(attempts, len(step.stages))
    if step.scheme not in (DIAGONALLY_IMPLICIT, FULLY_IMPLICIT, LINEARLY_IMPLICIT):
        return Work(attempts, 0, propagations=1)  # the exact step
    jac = 0 if step.prefactored else 1
    if step.scheme == LINEARLY_IMPLICIT:
        s = len(step.stages)
        return Work(attempts, s, jac, int(step.dfdt is not None), jac, s)
    newton = step.newton
    n = newton.max_iterations
    if step.scheme == DIAGONALLY_IMPLICIT:
        implicit = sum(1 for stage in step.stages if stage.solve_index is not None)
        explicit = len(step.stages) - implicit
        factors = sum(1 for stage in step.stages if stage.refactor)
        if step.linear:
            return Work(attempts, len(step.stages), jac, 0, factors, implicit)
        # A refresh follows an iteration that did not converge, so at most n - 1 per solve.
        extra = implicit * (n - 1) if newton.full else newton.refreshes
        return Work(attempts, explicit + implicit * n, 1 + extra, 0, factors + extra,
                    implicit * n)
    s = len(step.stages)
    final = 0 if step.z_weights else len(step.weights)  # f at the stages for the update
    if step.linear:
        return Work(attempts, s + final, jac, 0, jac, 1)
    refreshes = (n - 1) if newton.full else newton.refreshes
    return Work(attempts, s * n + final, 1 + s * refreshes, 0, 1 + refreshes, n)
