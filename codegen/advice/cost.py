"""Operation counts: the floating-point operations one tick of the generated C executes.

Counted on the step's IR after CSE, with the C printer's rules (emit.printer), so that the count is
what the C performs, not what the symbolic expressions look like:

- a product with a number is one multiplication (the printer writes a rational as one literal:
  ``(1666.66663F)*V``); numbers never combine at run time (sympy folds them, the C compiler folds
  an operator between two constants);
- a quotient is a division only where the printer writes '/': a division by a symbol, a
  denominator of negative powers, ``1/x``; dividing by a number is a multiplication by a literal;
- integer powers up to MAX_EXPANDED_POWER are the multiplications the printer writes (the base is
  printed, and evaluated, once per factor); x**(1/2) is one square root; other powers one pow();
- a minus sign is folded into the subtraction the printer writes; a negation that stays (a leading
  negative term, ``-x*y``) counts as one 'add', a minus sign on a literal is part of the literal;
- a call of the C library is one 'call' (square roots have their own column; fabs only clears the
  sign bit and is not counted, nor are comparisons, isfinite/isnan and integer index arithmetic).

A tick is the advance function: per substep the stages (one rate evaluation each, the stage
combinations, the stage times), the update and the substep's time t0 + (steps * h), plus the
tick's start time and its new time, each origin + (ticks * DT) from the tick counter converted
through its two 32-bit halves. Implicit kinds add the Jacobian, the assembly and factorization of
the iteration matrix, the planned linear solves, the Newton test, and one residual per Newton
iteration; the number of Newton iterations is a stated assumption (measured by the advice, else
ASSUMED_NEWTON_ITERATIONS), the same for every solve.

The count is that of the nominal tick: every Newton solve converges on its last assumed iteration
without a refresh (the simplified iteration's monitor still costs one product per iteration
from the second to the one before the last; full Newton refreshes J and the factorization after
every iteration but the last), no step is retried, every error estimate is accepted and no state
is clamped (a clamp only compares and assigns). With retries (--max-retry-depth) the tick runs
as pieces: the piece's time t0 + (position * shortest piece) replaces the substep's, and every
h-proportional constant is multiplied by the piece's scale where it is used, one product each.
verify/opcount.py counts the operators of the generated C text itself on the same path;
tests/test_opcount.py checks that both counts agree for every built-in method on the examples,
and for every safeguard and Newton option.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass

import sympy as sp

from ..discretize import DENSE_LU, INVERSE, Block, G, ImplicitStep, LinearSolve, StepProgram
from ..emit.printer import MAX_EXPANDED_POWER
from ..emit.structure import printed_product, printed_terms
from ..errors import TickwrightError
from ..methods import DIAGONALLY_IMPLICIT, EXACT, FULLY_IMPLICIT, LINEARLY_IMPLICIT
from ..model import Model

# Newton iterations per solve assumed when none were measured: smooth ticks of the examples take 2
# to 4 simplified-Newton iterations (see discretize.ir.DEFAULT_NEWTON_ITERATIONS).
ASSUMED_NEWTON_ITERATIONS = 3
# C library functions (float or double spelling without the 'f') counted as one call each; fabs is
# left out on purpose (a sign-bit operation), sqrt has its own column.
LIBRARY_CALLS = frozenset({"sin", "cos", "tan", "asin", "acos", "atan", "atan2", "sinh", "cosh",
                           "tanh", "exp", "log", "floor", "ceil", "fmin", "fmax", "pow"})
# sympy function class name -> C library name, as emit.printer maps them.
_FUNCTION_NAMES = {"ceiling": "ceil", "Min": "fmin", "Max": "fmax", "Abs": "fabs"}
# Work of a retried step in steps: the failed attempt plus its two halves (each a full step's).
RETRY_COST = 3


@dataclass(frozen=True)
class OperationCount:
    """Floating-point operations by kind: add/subtract/negate, multiply, divide, sqrt, calls."""

    add: int = 0
    mul: int = 0
    div: int = 0
    sqrt: int = 0
    call: int = 0

    def __add__(self, other: "OperationCount") -> "OperationCount":
        return OperationCount(**{k: getattr(self, k) + getattr(other, k) for k in asdict(self)})

    def scaled(self, n: int) -> "OperationCount":
        return OperationCount(**{k: v * n for k, v in asdict(self).items()})

    @property
    def total(self) -> int:
        return sum(asdict(self).values())

    def to_dict(self) -> dict:
        return dict(asdict(self), total=self.total)


# One operation of a kind, and none: the units the counts below are sums of.
ADD = OperationCount(add=1)
DIV = OperationCount(div=1)
NONE = OperationCount()


def _sum(counts) -> OperationCount:
    total = NONE
    for c in counts:
        total = total + c
    return total


class _ExprCounter:
    """Counts one expression the way StepPrinter prints it (emit/structure.py)."""

    def count(self, e) -> OperationCount:
        if e.is_Atom or isinstance(e, (sp.logic.boolalg.BooleanAtom,)):
            return NONE
        if e.is_Add:
            return self._add(e)
        if e.is_Mul:
            return self._mul(e)
        if e.is_Pow:
            return self._pow(e.base, e.exp)
        if isinstance(e, sp.Piecewise):
            *pieces, (last, _) = e.args
            total = self.count(last)
            for value, condition in reversed(pieces):
                total = self.count(condition) + _costlier(self.count(value), total)
            return total
        if isinstance(e, sp.sign):
            # ((x > 0) ? 1 : ((x < 0) ? -1 : 0)): x is printed, and evaluated, twice.
            return self.count(e.args[0]).scaled(2)
        if isinstance(e, (sp.core.relational.Relational, sp.And, sp.Or, sp.Not)):
            return _sum(self.count(a) for a in e.args)
        if isinstance(e, (sp.Function, sp.Min, sp.Max)):
            name = type(e).__name__
            name = _FUNCTION_NAMES.get(name, name)
            args = _sum(self.count(a) for a in e.args)
            if name in ("fmin", "fmax"):  # fmin(a, fmin(b, c)) for more than two arguments
                return args + OperationCount(call=len(e.args) - 1)
            return args + (OperationCount(call=1) if name in LIBRARY_CALLS else NONE)
        raise TickwrightError(f"internal: no operation count for {type(e).__name__}; this is a bug")

    def _add(self, e) -> OperationCount:
        terms = printed_terms(e)
        total = OperationCount(add=len(terms) - 1)
        for i, (negative, body) in enumerate(terms):
            if i == 0 and negative and not body.is_Number:
                total = total + ADD  # a leading '-' on a term that is not a literal
            total = total + self.count(body)
        return total

    def _mul(self, e) -> OperationCount:
        sign, numerator, denominator = printed_product(e)
        total = OperationCount(mul=len(numerator) - 1)
        if denominator:
            total = total + OperationCount(mul=len(denominator) - 1, div=1)
        if sign and not numerator[0].is_Number:
            total = total + ADD
        return total + _sum(self.count(x) for x in numerator + denominator)

    def _pow(self, base, e) -> OperationCount:
        if base == sp.E:
            return OperationCount(call=1) + self.count(e)
        if e.is_Integer and 1 <= abs(int(e)) <= MAX_EXPANDED_POWER:
            n = abs(int(e))
            product = self.count(base).scaled(n) + OperationCount(mul=n - 1)
            return product + (DIV if int(e) < 0 else NONE)
        if e == sp.Rational(1, 2):
            return OperationCount(sqrt=1) + self.count(base)
        if e == -sp.Rational(1, 2):
            return OperationCount(sqrt=1, div=1) + self.count(base)
        return OperationCount(call=1) + self.count(base) + self.count(e)


def _costlier(a: OperationCount, b: OperationCount) -> OperationCount:
    """The branch counted for a conditional: the one with more operations (the first on a tie)."""
    return a if a.total >= b.total else b


def count_expr(expr) -> OperationCount:
    """Floating-point operations of one expression as the C printer writes it (module docstring)."""
    return _ExprCounter().count(sp.sympify(expr))


def count_block(block: Block) -> OperationCount:
    """Operations of a block of straight-line code: its temporaries and its results."""
    counter = _ExprCounter()
    return _sum(counter.count(e) for e in
                [a.expr for a in block.temporaries] + [e for _, e in block.results])


def _combination(terms: int, nx: int, plus_base: bool = True,
                 scaled: bool = False) -> OperationCount:
    """base + ((c1 * v1) + ... + (cn * vn)) for every state: n products, n additions (n - 1
    without the base); scaled: each coefficient is h-proportional and multiplied by the piece's
    scale first ((c1 * tw_hs) * v1), one more product per term."""
    if terms == 0:
        return NONE
    per_term = 2 if scaled else 1
    return OperationCount(mul=per_term * terms, add=terms if plus_base else terms - 1).scaled(nx)


def _scaled(step) -> bool:
    """Whether the C multiplies every h-proportional constant by the piece's scale tw_hs (with
    retries, emit.common.per_h), one product per use."""
    return step.safeguards.pieces


def _per_h(step) -> OperationCount:
    """One use of an h-proportional constant: a product with the piece's scale, or nothing."""
    return OperationCount(mul=1) if _scaled(step) else NONE


def _time(offset, step=None) -> OperationCount:
    """A stage time tw_t + c*h (nothing for c = 0; c*h scaled by the piece with retries)."""
    if offset == 0:
        return NONE
    return ADD + (_per_h(step) if step is not None else NONE)


def _entry(entry, scaled: bool = False) -> OperationCount:
    """One entry of M = I - sum (coefficient * J[k]): products, sum, then '1 -' or a negation;
    scaled: a numeric coefficient (h a_pq) is multiplied by the piece's scale first."""
    n = len(entry.terms)
    if n == 0:
        return NONE
    extra = sum(1 for coefficient, _ in entry.terms if coefficient != G) if scaled else 0
    return OperationCount(mul=n + extra, add=n - 1) + ADD


def factor_cost(solve: LinearSolve, scaled: bool = False) -> OperationCount:
    """Assembly and factorization of the iteration matrix (none for a generation-time inverse);
    scaled: the matrix's h-proportional entries are scaled by the piece (retries, no run-time G)."""
    if solve.kind == INVERSE:
        return NONE
    assembly = _sum(_entry(e, scaled) for e in solve.entries)
    n = solve.size
    if solve.kind == DENSE_LU:
        divisions = n * (n - 1) // 2
        updates = sum((n - 1 - k) ** 2 for k in range(n))
        return assembly + OperationCount(div=divisions, mul=updates, add=updates)
    filled, position = set(solve.filled), {v: k for k, v in enumerate(solve.order)}
    total = assembly
    for k in solve.order:
        below = sum(1 for i in range(n) if (i, k) in filled and position[i] > position[k])
        right = sum(1 for j in range(n) if (k, j) in filled and position[j] > position[k])
        total = total + OperationCount(div=below, mul=below * right, add=below * right)
    return total


def solve_cost(solve: LinearSolve, which: int = 0) -> OperationCount:
    """One solve M d = r with the factors, or with the generation-time inverse number which."""
    n = solve.size
    if solve.kind == INVERSE:
        total = NONE
        for row in solve.inverses[which]:
            nonzero = sum(1 for v in row if v != 0)
            total = total + (OperationCount(mul=nonzero, add=nonzero - 1) if nonzero else NONE)
        return total
    if solve.kind == DENSE_LU:
        updates = n * (n - 1)  # forward and back substitution: one multiply-subtract per l and u
        return OperationCount(mul=updates, add=updates, div=n)
    filled, position = set(solve.filled), {v: k for k, v in enumerate(solve.order)}
    total = NONE
    for i in solve.order:
        lower = sum(1 for k in range(n) if (i, k) in filled and position[k] < position[i])
        upper = sum(1 for j in range(n) if (i, j) in filled and position[j] > position[i])
        total = total + _combination(lower, 1) + _combination(upper, 1) + DIV
    return total


def _newton_test(size: int) -> OperationCount:
    """|correction| / scale and z + correction for every unknown of the solve."""
    return OperationCount(div=size, add=size)


def _newton_watch(step, iterations: int, refresh: OperationCount) -> OperationCount:
    """What one Newton solve adds to its iterations besides residual, solve and test, when it
    converges on the last of iterations without a refresh that the monitor asks for.

    Full Newton refreshes (refresh: J at the iterate and a factorization) after every iteration
    but the last; the monitor of the simplified iteration compares each correction with
    REFRESH_AT times the one before, one product from the second iteration on, but not on the
    iteration that converges (the test of convergence comes first).
    """
    newton = step.newton
    if newton.full:
        return refresh.scaled(iterations - 1)
    if newton.monitored:
        return OperationCount(mul=max(iterations - 2, 0))
    return NONE


def _error_estimate(step) -> OperationCount:
    """|sum (e_j * k_j)| * weight for every state: the products, their sum, the scaling by
    1/full scale (nothing without embedded weights in the step)."""
    if not step.error_weights:
        return NONE
    nx = step.model.nx
    return _combination(len(step.error_weights), nx, plus_base=False, scaled=_scaled(step)) + \
        OperationCount(mul=nx)


def _explicit_substep(step: StepProgram) -> OperationCount:
    nx, scaled = step.model.nx, _scaled(step)
    rates = count_block(step.rates)
    total = NONE
    for stage in step.stages:
        total = total + _combination(len(stage.terms), nx, scaled=scaled) + \
            _time(stage.time_offset, step) + rates
    return total + _error_estimate(step) + _combination(len(step.weights), nx, scaled=scaled)


def _dirk_substep(step: ImplicitStep, iterations: int) -> OperationCount:
    nx, solve, scaled = step.model.nx, step.solve, _scaled(step)
    rates = count_block(step.rates)
    g = _per_h(step)  # one use of h*a_ii
    nonlinear = not step.linear
    total = OperationCount(add=nx) if nonlinear else NONE  # Newton scales: floor + |x|
    for stage in step.stages:
        total = total + _combination(len(stage.terms), nx, scaled=scaled)
        time = _time(stage.time_offset, step)
        if stage.solve_index is None:
            total = total + time + rates
            continue
        if stage.refactor:
            total = total + g + factor_cost(solve)
        one_solve = solve_cost(solve, stage.solve_index)
        if nonlinear:  # residual (w + g*f) - y, solve, test: per iteration
            residual = time + rates + OperationCount(mul=nx, add=2 * nx) + g.scaled(nx) + \
                one_solve
            refresh = time + count_block(step.jacobian.block) + g + factor_cost(solve)
            total = total + (residual + _newton_test(nx)).scaled(iterations) + \
                _newton_watch(step, iterations, refresh)
        else:  # r = g*f, solve, y = w + r
            total = total + time + rates + OperationCount(mul=nx, add=nx) + g.scaled(nx) + \
                one_solve
        total = total + OperationCount(add=nx, div=nx) + g.scaled(nx)  # k = (y - w) / g
    return total + _combination(len(step.weights), nx, scaled=scaled)


def _fully_implicit_substep(step: ImplicitStep, iterations: int) -> OperationCount:
    nx, solve, scaled = step.model.nx, step.solve, _scaled(step)
    rates = count_block(step.rates)
    size = len(step.stages) * nx
    residual = solve_cost(solve)
    for stage in step.stages:  # y = x + z_p, f(t + c_p h, y)
        residual = residual + OperationCount(add=nx) + _time(stage.time_offset, step) + rates
    for stage in step.stages:  # r_p = (sum_q a_pq h f_q) - z_p
        residual = residual + _combination(len(stage.terms), nx, plus_base=False,
                                           scaled=scaled) + OperationCount(add=nx)
    factor = factor_cost(solve, scaled)
    total = factor
    if step.linear:
        total = total + residual
    else:
        refresh = factor
        for stage in step.stages:  # y = x + z_p, J(t + c_p h, y) per stage
            refresh = refresh + OperationCount(add=nx) + _time(stage.time_offset, step) + \
                count_block(step.jacobian.block)
        total = total + OperationCount(add=nx) + \
            (residual + _newton_test(size)).scaled(iterations) + \
            _newton_watch(step, iterations, refresh)
    if step.z_weights:  # d = b^T A^-1 does not scale with h
        return total + _combination(len(step.z_weights), nx)
    for p, _ in step.weights:
        total = total + OperationCount(add=nx) + _time(step.stages[p].time_offset, step) + rates
    return total + _combination(len(step.weights), nx, scaled=scaled)


def _rosenbrock_substep(step: ImplicitStep) -> OperationCount:
    nx, solve, scaled = step.model.nx, step.solve, _scaled(step)
    rates = count_block(step.rates)
    total = factor_cost(solve)
    if solve.kind != INVERSE:
        total = total + _per_h(step)  # the factor's argument gamma*h
    if step.dfdt is not None:
        total = total + count_block(step.dfdt)
    for stage in step.stages:
        # k + ((coupling_ij * k_j) + ... + (time_i*h * df/dt)): coupling has no h in it
        timed = int(stage.time_term != 0)
        extra = OperationCount(mul=timed * (2 if scaled else 1),
                               add=timed).scaled(nx) + _combination(len(stage.coupling), nx)
        total = total + _combination(len(stage.terms), nx, scaled=scaled) + \
            _time(stage.time_offset, step) + rates + extra + solve_cost(solve)
    return total + _error_estimate(step) + _combination(len(step.weights), nx, scaled=scaled)


def _exact_substep(step: ImplicitStep) -> OperationCount:
    ad, bd, ed = step.propagator
    total = NONE
    for i in range(step.model.nx):
        products = sum(1 for v in ad[i] if v != 0) + sum(1 for v in bd[i] if v != 0)
        terms = products + (ed[i] != 0)
        total = total + OperationCount(mul=products, add=max(terms - 1, 0))
    return total


# The time from the tick counter, origin + ticks * DT, with the counter converted from its two
# 32-bit halves, (high * 2^32) + low: two products, two additions.
TICK_TIME = OperationCount(mul=2, add=2)
# A piece's or substep's time in the tick: t0 + (steps * h), or t0 + (position * shortest piece).
STEP_TIME = OperationCount(mul=1, add=1)


def step_cost(step: StepProgram | ImplicitStep,
              newton_iterations: int = ASSUMED_NEWTON_ITERATIONS) -> OperationCount:
    """Floating-point operations of one tick of the simplified step, as the C executes them on
    the nominal path (module docstring): every substep taken at the first attempt (no retry), no
    state clamped, every error estimate accepted, every Newton solve converged in
    newton_iterations iterations without a refresh its monitor asks for (full Newton refreshes
    after each iteration but the last)."""
    if isinstance(step, StepProgram):
        substep = _explicit_substep(step)
    elif step.scheme == DIAGONALLY_IMPLICIT:
        substep = _dirk_substep(step, newton_iterations)
    elif step.scheme == FULLY_IMPLICIT:
        substep = _fully_implicit_substep(step, newton_iterations)
    elif step.scheme == LINEARLY_IMPLICIT:
        substep = _rosenbrock_substep(step)
    elif step.scheme == EXACT:
        substep = _exact_substep(step)
    else:  # pragma: no cover - every scheme of the IR is listed
        raise TickwrightError(f"internal: no operation count for the scheme {step.scheme!r}")
    if isinstance(step, ImplicitStep) and step.jacobian is not None and not step.prefactored:
        substep = substep + count_block(step.jacobian.block)
    timed = not (isinstance(step, ImplicitStep) and step.scheme == EXACT)  # the exact step has no t
    if timed or step.safeguards.pieces:
        # each substep's time (after it without retries, before each piece with them), and the
        # tick's start time from the counter
        substep = substep + STEP_TIME
    total = substep.scaled(step.substeps)
    if timed or step.safeguards.pieces:
        total = total + TICK_TIME
    return total + TICK_TIME  # the new time, from the incremented counter


def uses_newton(step) -> bool:
    """Whether the step has a Newton loop (the count then depends on the iterations assumed)."""
    return isinstance(step, ImplicitStep) and step.scheme in (DIAGONALLY_IMPLICIT,
                                                               FULLY_IMPLICIT) and not step.linear


def operations_per_step(model: Model, method, newton_iterations: float | None = None,
                        dt: float = 1.0, refreshes: float = 0.0, retry_rate: float = 0.0):
    """(operations of one step, how they were found), counted on the simplified step at dt.

    The count does not depend on dt except through the structure of the step (which stays the same
    for any dt that the generator accepts); newton_iterations: measured iterations per solve
    (rounded up), else ASSUMED_NEWTON_ITERATIONS. The allowance, measured over the advice's run:
    each Jacobian refresh per step (implicit Runge-Kutta) costs a Jacobian evaluation and a
    factorization, and each retried step (a fraction retry_rate of the steps) costs a failed
    attempt and its two halves, RETRY_COST steps' work.
    """
    from ..discretize import discretize
    from ..simplify import simplify

    iterations = max(1, math.ceil(newton_iterations)) if newton_iterations else \
        ASSUMED_NEWTON_ITERATIONS
    try:
        step = simplify(discretize(model, method, dt))
    except TickwrightError as exc:
        if method.kind != EXACT:
            raise
        # No exact step for this model (nonlinear): a dense propagator, for comparison only.
        nx, nu = model.nx, len(model.inputs)
        return 2 * nx * (nx + nu + 1), f"estimated: a dense propagator ({exc})"
    total = step_cost(step, iterations).total
    note = "counted"
    if uses_newton(step):
        how = "measured" if newton_iterations else "assumed"
        note = f"counted with {iterations} Newton iteration(s) per solve ({how})"
        if refreshes > 0:
            refresh = count_block(step.jacobian.block) + factor_cost(step.solve)
            total += int(math.ceil(refreshes * refresh.total))
            note += f", + {refreshes:.2g} Jacobian refreshes per step"
    if retry_rate > 0:
        total = int(math.ceil(total * (1 + RETRY_COST * retry_rate)))
        note += f", + {retry_rate:.2%} of the steps retried"
    return total, note
