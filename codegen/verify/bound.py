"""A running rounding-error bound for one tick of the generated C, from the C's own start state.

The cross-check compares the C with the reference one tick at a time: every tick, the reference
starts from the state (and time) the C holds before that tick (a "shadowing" comparison), so the
difference after the tick is that tick's own rounding and nothing accumulated. This module bounds
that difference per state and per tick by a running (first-order) error analysis of the step the
C performs, evaluated along the reference's values: every floating operation of the C, in the
C's order and grouping (the IR after CSE, printed as emit/structure.py describes), adds at most
half a unit in the last place of its result, and the errors of its operands are carried through
it to first order:

- a + b: e_a + e_b; a * b: |b| e_a + |a| e_b; a / b: e_a/|b| + |a| e_b/b^2; sqrt(a):
  min(e_a / (2 sqrt(a)), sqrt(e_a)); a C library function f: |f'(a)| e_a plus LIBM_ULPS units in
  the last place of its result;
- a literal of the C adds its own representation error |fl(c) - c| (0 when c is exact);
- an operation on exact operands whose exact result is representable (checked with error-free
  transformations: Knuth's TwoSum, Dekker's TwoProduct) adds nothing: the C's result is exact;
- the state, time, inputs and tunable parameters at the start of the tick are the C's own values,
  exact by construction.

Implicit steps: a converged Newton iteration is analysed at its fixed point instead of iteration
by iteration. If Y* solves the stage equations and the C evaluates their residual with rounding
errors rho (bounded by walking the residual at Y*), the C's stage values differ from Y* by at most
|M^-1| e_rho (M the Jacobian of the stage equations at Y*), plus the rounding of the last update
of Y, plus the Newton stopping allowance: the C stops once a correction d satisfies
|d_i| <= tol * scale_i, and for the simplified iteration E_{n+1} = K E_n, with
K = M0^-1 (M0 - M) (M0 the frozen iteration matrix), the error left is |K (K - I)^-1| tol scale.
Rosenbrock steps and the direct solves of linear models include the solve's rounding through the
backward error of LU, |Delta M| <= gamma_3n |L| |U| (the iteration matrix's own assembly errors
added), carried through |M^-1|.

The analysis is first order: terms of order u^2 and the difference between the reference's values
and the exact ones are left out; SAFETY covers them.

References
----------
N. J. Higham, Accuracy and Stability of Numerical Algorithms, 2nd ed., SIAM, 2002: section 2.2
(the model of floating-point arithmetic, |fl(x op y) - x op y| <= u |x op y|), section 3.3
(running error analysis), section 4.3 (TwoSum, error-free summation), section 9.3 (Theorem 9.4:
the backward error of LU solves, |Delta A| <= gamma_3n |L| |U|) (from memory).
T. J. Dekker, A floating-point technique for extending the available precision, Numerische
Mathematik 18 (1971) (TwoProduct by splitting, from memory).
E. Hairer and G. Wanner, Solving Ordinary Differential Equations II, 2nd ed., Springer, 1996,
section IV.8 (simplified Newton iterations and their convergence, from memory).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import sympy as sp

from ..discretize import (ELIMINATION, INVERSE, CoupledStage, G, ImplicitStep, LinearSolve,
                          StepProgram)
from ..emit.printer import MAX_EXPANDED_POWER
from ..emit.structure import printed_product, printed_terms
from ..errors import CheckError
from ..methods import DIAGONALLY_IMPLICIT, EXACT, FULLY_IMPLICIT, LINEARLY_IMPLICIT
from ..rounding import UNIT_ROUNDOFF, correctly_rounded, exact_fraction

# Units in the last place allowed for each call of a C library function (tanhf, expf, ...). C99
# requires no accuracy; glibc's manual lists known maximum errors of 1 to 3 ulp for its float and
# double elementary functions on x86-64 (from memory); 4 leaves room for other libraries.
LIBM_ULPS = 4
# Factor on the first-order bound: covers the neglected second-order terms (relative size
# ~ operations * u, below 1e-4 in float) and the grouping of the reference's own operations
# (numpy's, bounded here on the C's grouping); 2 keeps the check from failing on a bound that is
# right to first order.
SAFETY = 2.0
# Newton iterations used to solve the stage equations in double for the analysis (full Newton,
# quadratic convergence: a few iterations reach double precision from the explicit start).
ANALYSIS_NEWTON_ITERATIONS = 30
# Veltkamp's splitting constant 2^27 + 1 for double (Dekker's TwoProduct).
_SPLIT = 134217729.0


@dataclass
class Bounded:
    """Values (one per tick), a bound on |C's value - value| and whether the value is exactly the
    C's (a value the C can hold, with no error so far)."""

    value: np.ndarray
    err: np.ndarray
    exact: np.ndarray


def _two_sum_error(a, b, s):
    bb = s - a
    return (a - (s - bb)) + (b - bb)


def _split(a):
    c = _SPLIT * a
    hi = c - (c - a)
    return hi, a - hi


def _two_product_error(a, b, p):
    ah, al = _split(a)
    bh, bl = _split(b)
    return ((ah * bh - p) + ah * bl + al * bh) + al * bl


class Arithmetic:
    """The operations of the C with their first-order error bounds, for one precision."""

    def __init__(self, precision: str, ticks: int):
        self.precision = precision
        self.u = UNIT_ROUNDOFF[precision]
        self.ticks = ticks

    # -- helpers
    def fits(self, v):
        """Whether double values are representable in the precision."""
        with np.errstate(all="ignore"):
            if self.precision == "float":
                return np.isfinite(v) & (v.astype(np.float32).astype(np.float64) == v)
            return np.isfinite(v)

    def half_ulp(self, v):
        """Half the spacing of the precision at |v| (rounded to it): the largest rounding error."""
        with np.errstate(all="ignore"):
            a = np.abs(v)
            if self.precision == "float":
                return np.spacing(a.astype(np.float32)).astype(np.float64) / 2
            return np.spacing(a) / 2

    def normal(self, v):
        """Whether v is 0 or a normal number of the precision (neither underflow nor overflow)."""
        info = np.finfo(np.float32 if self.precision == "float" else np.float64)
        with np.errstate(all="ignore"):
            a = np.abs(v)
            return np.isfinite(a) & ((a == 0) | ((a >= info.tiny) & (a <= info.max)))

    def _result(self, value, propagated, exact_op, unrounded=None):
        """A result: unrounded says the C's operation adds no rounding (default: exact_op, which
        says besides that the value is exactly the C's)."""
        unrounded = exact_op if unrounded is None else unrounded
        charge = np.where(unrounded, 0.0, self.half_ulp(value))
        return Bounded(value, propagated + charge, exact_op)

    @staticmethod
    def _zero(a: Bounded):
        """Where a is exactly the C's 0 (x + 0 and x * 0 are exact in IEEE arithmetic)."""
        return a.exact & (a.value == 0)

    @staticmethod
    def _power_of_two(a: Bounded):
        """Where a is exactly the C's 2^k (a product with it only moves the exponent)."""
        with np.errstate(all="ignore"):
            mantissa, _ = np.frexp(np.abs(a.value))
        return a.exact & (mantissa == 0.5)

    # -- leaves
    def known(self, values) -> Bounded:
        """Values the C holds exactly (its state, time, inputs, parameters at the tick start)."""
        v = np.broadcast_to(np.asarray(values, dtype=np.float64), (self.ticks,)).copy()
        return Bounded(v, np.zeros(self.ticks), np.ones(self.ticks, bool))

    def solved(self, values, err=None) -> Bounded:
        """Values of the analysis (exact solution of a system) with a bound on the C's error."""
        v = np.asarray(values, dtype=np.float64)
        e = np.zeros(self.ticks) if err is None else np.asarray(err, dtype=np.float64)
        return Bounded(v, e, np.zeros(self.ticks, bool))

    def literal(self, c) -> Bounded:
        """A literal of the C: the exact value c, with its representation error in the precision."""
        exact = exact_fraction(c)
        rounded = correctly_rounded(exact, self.precision)
        error = abs(float(exact_fraction(rounded) - exact)) if np.isfinite(rounded) else np.inf
        value = rounded if error == 0 else float(exact)
        b = self.known(value)
        if error:
            b.err[:] = error
            b.exact[:] = False
        return b

    # -- operations
    def add(self, a: Bounded, b: Bounded, subtract: bool = False) -> Bounded:
        bv = -b.value if subtract else b.value
        with np.errstate(all="ignore"):
            s = a.value + bv
            both = a.exact & b.exact
            exact_op = both & (_two_sum_error(a.value, bv, s) == 0) & self.fits(s)
            unrounded = exact_op | self._zero(a) | self._zero(b)
        return self._result(s, a.err + b.err, exact_op, unrounded)

    def mul(self, a: Bounded, b: Bounded) -> Bounded:
        with np.errstate(all="ignore"):
            p = a.value * b.value
            exact_op = a.exact & b.exact & (_two_product_error(a.value, b.value, p) == 0) & \
                self.fits(p)
            propagated = np.abs(b.value) * a.err + np.abs(a.value) * b.err
            scaling = (self._power_of_two(a) | self._power_of_two(b)) & self.normal(p)
            unrounded = exact_op | self._zero(a) | self._zero(b) | scaling
        return self._result(p, propagated, exact_op, unrounded)

    def div(self, a: Bounded, b: Bounded) -> Bounded:
        with np.errstate(all="ignore"):
            q = a.value / b.value
            back = q * b.value
            exact_op = a.exact & b.exact & (b.value != 0) & (back == a.value) & \
                (_two_product_error(q, b.value, back) == 0) & self.fits(q)
            propagated = a.err / np.abs(b.value) + np.abs(a.value) * b.err / b.value ** 2
        return self._result(q, propagated, exact_op)

    def neg(self, a: Bounded) -> Bounded:
        return Bounded(-a.value, a.err, a.exact)

    def sqrt(self, a: Bounded) -> Bounded:
        with np.errstate(all="ignore"):
            r = np.sqrt(a.value)
            square = r * r
            exact_op = a.exact & (square == a.value) & (_two_product_error(r, r, square) == 0) \
                & self.fits(r)
            propagated = np.minimum(np.where(r > 0, a.err / (2 * r), np.inf), np.sqrt(a.err))
        return self._result(r, propagated, exact_op)

    def library(self, value, propagated) -> Bounded:
        """A C library function's result: the propagated error plus LIBM_ULPS ulps."""
        with np.errstate(all="ignore"):
            charge = LIBM_ULPS * 2 * self.half_ulp(value)
        return Bounded(np.asarray(value, dtype=np.float64), propagated + charge,
                       np.zeros(self.ticks, bool))

    def exact_op(self, value, err) -> Bounded:
        """A result the C computes exactly from its operands (fabs, fmin, fmax, a selection)."""
        return Bounded(np.asarray(value, dtype=np.float64), np.asarray(err, dtype=np.float64),
                       np.zeros(self.ticks, bool))

    def total(self, items: list[Bounded]) -> Bounded:
        """items[0] + items[1] + ..., left to right as the C groups a printed sum."""
        acc = items[0]
        for item in items[1:]:
            acc = self.add(acc, item)
        return acc


# Derivatives of the C library functions, for carrying an argument's error through them.
_DERIVATIVES = {
    "sin": np.cos, "cos": lambda x: -np.sin(x), "tan": lambda x: 1 + np.tan(x) ** 2,
    "asin": lambda x: 1 / np.sqrt(1 - x * x), "acos": lambda x: 1 / np.sqrt(1 - x * x),
    "atan": lambda x: 1 / (1 + x * x), "sinh": np.cosh, "cosh": np.sinh,
    "tanh": lambda x: 1 - np.tanh(x) ** 2, "exp": np.exp, "log": lambda x: 1 / x,
}
_VALUES = {"sin": np.sin, "cos": np.cos, "tan": np.tan, "asin": np.arcsin, "acos": np.arccos,
           "atan": np.arctan, "sinh": np.sinh, "cosh": np.cosh, "tanh": np.tanh, "exp": np.exp,
           "log": np.log}


class Walker:
    """Evaluates expressions of the IR as the C does (emit/structure.py), with error bounds."""

    def __init__(self, ar: Arithmetic, env: dict):
        self.ar, self.env = ar, dict(env)

    def block(self, block) -> list[Bounded]:
        """A block's results, its temporaries evaluated (and kept) first."""
        for a in block.temporaries:
            self.env[a.target] = self.value(a.expr)
        return [self.value(e) for _, e in block.results]

    def value(self, e) -> Bounded:
        ar = self.ar
        if e.is_Symbol:
            if e not in self.env:
                raise CheckError(f"rounding bound: no value for '{e}'; this is a bug")
            return self.env[e]
        if e.is_number and not e.has(sp.Function) and e.is_Atom:
            return ar.literal(e)
        if e.is_Add:
            acc = None
            for i, (negative, body) in enumerate(printed_terms(e)):
                term = self.value(body)
                if acc is None:
                    acc = ar.neg(term) if negative else term
                else:
                    acc = ar.add(acc, term, subtract=negative)
            return acc
        if e.is_Mul:
            sign, numerator, denominator = printed_product(e)
            acc = self.value(numerator[0])
            if sign:
                acc = ar.neg(acc)
            for f in numerator[1:]:
                acc = ar.mul(acc, self.value(f))
            if denominator:
                below = self.value(denominator[0])
                for f in denominator[1:]:
                    below = ar.mul(below, self.value(f))
                acc = ar.div(acc, below)
            return acc
        if e.is_Pow:
            return self.power(e.base, e.exp)
        return self.function(e)

    def power(self, base, exponent) -> Bounded:
        ar = self.ar
        if base == sp.E:
            return self.call("exp", [exponent])
        if exponent.is_Integer and 1 <= abs(int(exponent)) <= MAX_EXPANDED_POWER:
            b = self.value(base)
            acc = b
            for _ in range(abs(int(exponent)) - 1):
                acc = ar.mul(acc, b)
            return ar.div(ar.literal(1), acc) if int(exponent) < 0 else acc
        if exponent == sp.Rational(1, 2):
            return ar.sqrt(self.value(base))
        if exponent == -sp.Rational(1, 2):
            return ar.div(ar.literal(1), ar.sqrt(self.value(base)))
        b, p = self.value(base), self.value(exponent)
        with np.errstate(all="ignore"):
            r = np.power(b.value, p.value)
            propagated = np.abs(p.value * np.power(b.value, p.value - 1)) * b.err + \
                np.abs(np.log(np.abs(b.value)) * r) * p.err
        return ar.library(r, np.nan_to_num(propagated, nan=np.inf))

    def call(self, name: str, args) -> Bounded:
        a = self.value(args[0])
        with np.errstate(all="ignore"):
            r = _VALUES[name](a.value)
            propagated = np.abs(_DERIVATIVES[name](a.value)) * a.err
        return self.ar.library(r, np.nan_to_num(propagated, nan=np.inf))

    def function(self, e) -> Bounded:
        ar = self.ar
        name = type(e).__name__
        if name in _VALUES:
            return self.call(name, e.args)
        if name == "atan2":
            y, x = self.value(e.args[0]), self.value(e.args[1])
            with np.errstate(all="ignore"):
                r2 = x.value ** 2 + y.value ** 2
                propagated = (np.abs(x.value) * y.err + np.abs(y.value) * x.err) / r2
            return ar.library(np.arctan2(y.value, x.value), np.nan_to_num(propagated, nan=np.inf))
        if name == "Abs":
            a = self.value(e.args[0])
            return ar.exact_op(np.abs(a.value), a.err)
        if name in ("Min", "Max"):
            args = [self.value(a) for a in e.args]
            pick = np.minimum if name == "Min" else np.maximum
            value = args[0].value
            for a in args[1:]:
                value = pick(value, a.value)
            return ar.exact_op(value, np.max([a.err for a in args], axis=0))
        if name in ("floor", "ceiling"):
            a = self.value(e.args[0])
            value = np.floor(a.value) if name == "floor" else np.ceil(a.value)
            near = np.minimum(a.value - np.floor(a.value), np.ceil(a.value) - a.value) <= a.err
            return ar.exact_op(value, np.where(near, 1.0, 0.0))
        if name == "sign":
            a = self.value(e.args[0])
            return ar.exact_op(np.sign(a.value), np.where(np.abs(a.value) <= a.err, 2.0, 0.0))
        if name == "Piecewise":
            return self.piecewise(e)
        raise CheckError(f"rounding bound: no rule for {name}(); this is a bug")

    def condition(self, c):
        """(truth per tick, whether the C may decide otherwise within the errors)."""
        if c is sp.true:
            return np.ones(self.ar.ticks, bool), np.zeros(self.ar.ticks, bool)
        if isinstance(c, (sp.And, sp.Or)):
            parts = [self.condition(a) for a in c.args]
            truth = np.all([p[0] for p in parts], axis=0) if isinstance(c, sp.And) else \
                np.any([p[0] for p in parts], axis=0)
            return truth, np.any([p[1] for p in parts], axis=0)
        if isinstance(c, sp.Not):
            truth, near = self.condition(c.args[0])
            return ~truth, near
        lhs, rhs = self.value(c.lhs), self.value(c.rhs)
        ops = {"<": np.less, "<=": np.less_equal, ">": np.greater, ">=": np.greater_equal,
               "==": np.equal, "!=": np.not_equal}
        truth = ops[c.rel_op](lhs.value, rhs.value)
        return truth, np.abs(lhs.value - rhs.value) <= lhs.err + rhs.err

    def piecewise(self, e) -> Bounded:
        pieces = [(self.value(v), self.condition(c)) for v, c in e.args]
        value = np.zeros(self.ar.ticks)
        err = np.zeros(self.ar.ticks)
        taken = np.zeros(self.ar.ticks, bool)
        spread_lo = np.full(self.ar.ticks, np.inf)
        spread_hi = np.full(self.ar.ticks, -np.inf)
        uncertain = np.zeros(self.ar.ticks, bool)
        for v, (truth, near) in pieces:
            now = truth & ~taken
            value = np.where(now, v.value, value)
            err = np.where(now, v.err, err)
            spread_lo, spread_hi = np.minimum(spread_lo, v.value), np.maximum(spread_hi, v.value)
            uncertain |= near & ~taken
            taken |= truth
        jump = np.where(uncertain, spread_hi - spread_lo, 0.0)
        return self.ar.exact_op(value, err + jump)


# ---- the step, scheme by scheme ---------------------------------------------------------------

class StepBound:
    """Mirrors one tick of the generated C on Bounded values: the bound on each new state.

    With retries (the step's Safeguards.pieces) the C runs the tick as pieces: each starts at
    t0 + (position * shortest piece) and multiplies every h-proportional constant by the piece's
    scale 2^-depth (exact). position None mirrors a tick taken without a retry (one piece per
    substep, scale 1); a position and a scale mirror one piece of a retried tick (piece_bounds).
    """

    def __init__(self, step, precision: str, analysis_precision: str, ts, xs, us, tunables: dict,
                 newton_stop: bool, scale: float = 1.0, position: int | None = None,
                 reference_form: bool = False):
        self.step, self.model = step, step.model
        self.ticks = len(ts)
        self.ar = Arithmetic(analysis_precision, self.ticks)
        self.precision = precision  # the C's: its Newton tolerance
        self.ts, self.xs, self.us = np.asarray(ts, float), np.asarray(xs, float), \
            np.asarray(us, float)
        self.tunables = tunables
        self.newton_stop = newton_stop
        self.nx = self.model.nx
        self.pieces = step.safeguards.pieces
        self.scale, self.position = scale, position
        # The reference's own Newton form (reference.steppers.implicit_stepper): every stage at
        # once, then x + sum (h b_p) f(x + Z_p), whatever the C's stage order and update.
        self.reference_form = reference_form

    # -- pieces shared by the schemes
    def env(self, t: Bounded, x: list[Bounded]) -> dict:
        m = self.model
        env = {m.t: t}
        env.update({sym: xi for sym, xi in zip(m.x, x)})
        env.update({sym: self.ar.known(self.us[:, j]) for j, sym in enumerate(m.u)})
        env.update({p.symbol: self.ar.known(self.tunables[p.name]) for p in m.tunable})
        return env

    def rates(self, t: Bounded, x: list[Bounded]) -> list[Bounded]:
        return Walker(self.ar, self.env(t, x)).block(self.step.rates)

    def jacobian(self, t: Bounded, x: list[Bounded]) -> list[Bounded]:
        return Walker(self.ar, self.env(t, x)).block(self.step.jacobian.block)

    def jacobian_values(self, t, xv) -> np.ndarray:
        """df/dx as (ticks, nx, nx) at time values t and state values xv (ticks, nx)."""
        x = [self.ar.solved(xv[:, i]) for i in range(self.nx)]
        entries = self.jacobian(self.ar.solved(t), x)
        out = np.zeros((self.ticks, self.nx, self.nx))
        for (i, j), e in zip(self.step.jacobian.pattern, entries):
            out[:, i, j] = e.value
        return out

    def rate_values(self, t, xv) -> np.ndarray:
        x = [self.ar.solved(xv[:, i]) for i in range(self.nx)]
        return np.stack([r.value for r in self.rates(self.ar.solved(t), x)], axis=1)

    def per_h(self, c) -> Bounded:
        """An h-proportional constant as the C uses it: its literal, times the piece's scale
        with retries (emit.common.per_h)."""
        lit = self.ar.literal(c)
        return self.ar.mul(lit, self.ar.known(self.scale)) if self.pieces else lit

    def per_h_value(self, c) -> float:
        """The exact value of an h-proportional constant in the current piece."""
        return float(c) * self.scale

    def combination(self, base: Bounded | None, terms) -> Bounded:
        """base + ((c1 * v1) + (c2 * v2) + ...) as the emitters write a stage sum; each c an
        h-proportional constant (per_h), or a Bounded coefficient already as the C uses it."""
        ar = self.ar
        products = [ar.mul(c if isinstance(c, Bounded) else self.per_h(c), v) for c, v in terms]
        if not products:
            return base
        total = ar.total(products)
        return total if base is None else ar.add(base, total)

    def time(self, t: Bounded, offset) -> Bounded:
        return t if offset == 0 else self.ar.add(t, self.per_h(offset))

    # -- linear solves
    def assemble(self, solve: LinearSolve, jac: list[Bounded], g: Bounded | None):
        """M = I - sum (coefficient * J) entry by entry as the C assembles it: (values, errors)."""
        ar, n = self.ar, solve.size
        values = np.zeros((self.ticks, n, n))
        errors = np.zeros((self.ticks, n, n))
        for i in range(n):
            values[:, i, i] = 1.0
        for e in solve.entries:
            if not e.terms:
                continue
            products = [ar.mul(g if c == G else self.per_h(c), jac[k]) for c, k in e.terms]
            total = ar.total(products)
            entry = ar.add(ar.literal(1), total, subtract=True) if e.one else ar.neg(total)
            values[:, e.row, e.col] = entry.value
            errors[:, e.row, e.col] = entry.err
        return values, errors

    def solve(self, solve: LinearSolve, rhs: list[Bounded], which: int = 0,
              matrix=None) -> list[Bounded]:
        """M d = r as the C solves it: the generation-time inverse product, or LU at run time
        (matrix: the assembled (values, errors))."""
        ar = self.ar
        if solve.kind == INVERSE:
            out = []
            for row in solve.inverses[which]:
                products = [ar.mul(ar.literal(v), rhs[j]) for j, v in enumerate(row) if v != 0]
                out.append(ar.total(products) if products else ar.literal(0))
            return out
        values, errors = matrix
        r = np.stack([b.value for b in rhs], axis=1)
        er = np.stack([b.err for b in rhs], axis=1)
        d = np.linalg.solve(values, r[..., None])[..., 0]
        inverse = np.linalg.inv(values)
        n = solve.size
        gamma = 3 * n * self.ar.u / (1 - 3 * n * self.ar.u)
        lu = _abs_lu(values, solve.order if solve.kind == ELIMINATION else None)
        backward = (errors + gamma * lu) @ np.abs(d)[..., None]
        err = (np.abs(inverse) @ (er[..., None] + backward))[..., 0]
        return [ar.solved(d[:, i], err[:, i]) for i in range(n)]

    # -- the tick
    def tick(self, start_error: np.ndarray | None = None) -> np.ndarray:
        """(ticks, nx): the bound on |C - exact step| after one tick (or one piece), per state.

        start_error: (ticks, nx) bound on the C's state at the start, for a piece after the
        first of a retried tick (None: the C's own state, exact).
        """
        ar, step = self.ar, self.step
        t0 = ar.known(self.ts)
        if start_error is None:
            x = [ar.known(self.xs[:, i]) for i in range(self.nx)]
        else:
            x = [ar.solved(self.xs[:, i], start_error[:, i]) for i in range(self.nx)]
        if self.pieces:
            # t0 + (position * shortest piece) before each piece (emit.common.piece_body)
            span = 2 ** step.safeguards.retry_depth
            shortest = ar.literal(step.h / span)
            positions = [self.position] if self.position is not None else \
                [n * span for n in range(step.substeps)]
            for position in positions:
                x = self.substep(ar.add(t0, ar.mul(ar.known(float(position)), shortest)), x)
            return np.stack([xi.err for xi in x], axis=1)
        t = t0
        for n in range(step.substeps):
            x = self.substep(t, x)
            if not (isinstance(step, ImplicitStep) and step.scheme == EXACT):
                t = ar.add(t0, ar.mul(ar.known(float(n + 1)), ar.literal(step.h)))
        return np.stack([xi.err for xi in x], axis=1)

    def substep(self, t: Bounded, x: list[Bounded]) -> list[Bounded]:
        step = self.step
        if isinstance(step, StepProgram):
            return self.explicit(t, x)
        if self.reference_form and step.scheme in (DIAGONALLY_IMPLICIT, FULLY_IMPLICIT) \
                and not step.linear:
            return self.fully_implicit(t, x, *self.coupled_form())
        return {DIAGONALLY_IMPLICIT: self.dirk, FULLY_IMPLICIT: self.fully_implicit,
                LINEARLY_IMPLICIT: self.rosenbrock, EXACT: self.exact}[step.scheme](t, x)

    def update(self, x, weights, k) -> list[Bounded]:
        return [self.combination(x[i], [(c, k[j][i]) for j, c in weights]) for i in range(self.nx)]

    def explicit(self, t, x):
        k = {}
        for stage in self.step.stages:
            y = [self.combination(x[i], [(c, k[j][i]) for j, c in stage.terms])
                 for i in range(self.nx)]
            k[stage.index] = self.rates(self.time(t, stage.time_offset), y)
        return self.update(x, self.step.weights, k)

    def stop_allowance(self, frozen, difference, scale) -> np.ndarray:
        """|K (K - I)^-1| tol scale with K = M0^-1 (M0 - M): what the Newton stop may leave.

        frozen: M0, the C's iteration matrix; difference: M0 - M, M the stage equations' Jacobian
        at the solution; scale: the C's Newton scale of every unknown.
        """
        if not self.newton_stop:
            return 0.0
        tol = self.step.newton.tolerance_for(self.precision)
        with np.errstate(all="ignore"):
            kk = np.linalg.solve(frozen, difference)
            eye = np.eye(kk.shape[-1])
            left = np.abs(kk @ np.linalg.inv(kk - eye))
        out = (left @ (tol * scale)[..., None])[..., 0]
        return np.nan_to_num(out, nan=np.inf)

    def newton_scale(self, x) -> np.ndarray:
        return np.asarray(self.step.newton.scale)[None, :] + np.abs(np.stack(
            [xi.value for xi in x], axis=1))

    def dirk(self, t, x):
        ar, step, nx = self.ar, self.step, self.nx
        solve = step.solve
        jac = None if step.prefactored else self.jacobian(t, x)
        j_x = None if step.linear else self.jacobian_values(t.value, _values(x))
        k, matrix = {}, None
        eye = np.eye(nx)
        for stage in step.stages:
            w = [self.combination(x[i], [(c, k[j][i]) for j, c in stage.terms]) for i in range(nx)]
            time = self.time(t, stage.time_offset)
            if stage.solve_index is None:
                k[stage.index] = self.rates(time, w)
                continue
            g = self.per_h(stage.diagonal)
            gv = self.per_h_value(stage.diagonal)
            if stage.refactor:
                matrix = self.assemble(solve, jac, g)
            if step.linear:
                r = [ar.mul(g, fi) for fi in self.rates(time, w)]
                d = self.solve(solve, r, stage.solve_index, matrix)
                y = [ar.add(w[i], d[i]) for i in range(nx)]
                out = []
                for i in range(nx):
                    diff = ar.solved(d[i].value, d[i].err + ar.half_ulp(y[i].value))
                    diff = ar.solved(diff.value, diff.err + ar.half_ulp(diff.value))
                    out.append(ar.div(diff, g))
                k[stage.index] = out
                continue
            wv = _values(w)
            ystar = self.newton(lambda yv: yv - wv - gv * self.rate_values(time.value, yv),
                                lambda yv: eye - gv * self.jacobian_values(time.value, yv), wv)
            exact_w = [ar.solved(wv[:, i]) for i in range(nx)]
            ys = [ar.solved(ystar[:, i]) for i in range(nx)]
            f = self.rates(time, ys)
            rho = np.stack([ar.add(ar.add(exact_w[i], ar.mul(g, f[i])), ys[i], subtract=True).err
                            for i in range(nx)], axis=1)
            j_y = self.jacobian_values(time.value, ystar)
            m_y = eye - gv * j_y
            inverse = np.linalg.inv(m_y)
            e_w = np.stack([wi.err for wi in w], axis=1)
            stop = self.stop_allowance(eye - gv * j_x, gv * (j_y - j_x), self.newton_scale(x))
            e_diff = _apply(np.abs(inverse @ (gv * j_y)), e_w) + _apply(np.abs(inverse), rho) + \
                ar.half_ulp(ystar) + stop
            diff = ystar - wv
            e_k = (e_diff + ar.half_ulp(diff)) / abs(gv) + ar.half_ulp(diff / gv)
            k[stage.index] = [ar.solved(diff[:, i] / gv, e_k[:, i]) for i in range(nx)]
        return self.update(x, step.weights, k)

    def coupled_form(self) -> tuple:
        """The step's tableau as one coupled system (stages, weights): CoupledStages with every
        h*a_pq, the weights (p, h*b_p); for the reference's form of any Newton method."""
        method, h = self.step.method, self.step.h
        s = len(method.b)
        stages = tuple(CoupledStage(index=p, c=method.c[p], time_offset=method.c[p] * h,
                                    terms=tuple((q, h * method.a[p][q]) for q in range(s)
                                                if method.a[p][q] != 0))
                       for p in range(s))
        return stages, tuple((p, h * method.b[p]) for p in range(s) if method.b[p] != 0)

    def fully_implicit(self, t, x, stages=None, weights=None):
        """stages, weights: a coupled form other than the step's own (coupled_form), updated
        from f at the stages."""
        ar, step, nx = self.ar, self.step, self.nx
        z_weights = step.z_weights if stages is None else ()
        weights = step.weights if weights is None else weights
        stages = step.stages if stages is None else stages
        s = len(stages)
        size = s * nx
        times = [self.time(t, stage.time_offset) for stage in stages]
        a = np.zeros((s, s))
        for p, stage in enumerate(stages):
            for q, c in stage.terms:
                a[p, q] = self.per_h_value(c)
        eye = np.eye(size)

        def residual(z: list[Bounded]) -> list[Bounded]:
            f = [self.rates(times[p], [ar.add(x[i], z[p * nx + i]) for i in range(nx)])
                 for p in range(s)]
            out = []
            for p, stage in enumerate(stages):
                for i in range(nx):
                    total = self.combination(None, [(c, f[q][i]) for q, c in stage.terms])
                    out.append(ar.add(total if total is not None else ar.literal(0),
                                      z[p * nx + i], subtract=True))
            return out

        xv = _values(x)
        if step.linear:
            jac = None if step.prefactored else self.jacobian(t, x)
            matrix = None if step.prefactored else self.assemble(step.solve, jac, None)
            zero = [ar.literal(0) for _ in range(size)]
            z = self.solve(step.solve, residual(zero), 0, matrix)
        else:
            def big(zv):
                m = np.tile(eye, (self.ticks, 1, 1))
                for q in range(s):
                    jq = self.jacobian_values(times[q].value, xv + zv[:, q * nx:(q + 1) * nx])
                    for p in range(s):
                        m[:, p * nx:(p + 1) * nx, q * nx:(q + 1) * nx] -= a[p, q] * jq
                return m

            def g_of(zv):
                f = [self.rate_values(times[q].value, xv + zv[:, q * nx:(q + 1) * nx])
                     for q in range(s)]
                return zv - np.concatenate([sum(a[p, q] * f[q] for q in range(s))
                                            for p in range(s)], axis=1)

            zstar = self.newton(g_of, big, np.zeros((self.ticks, size)))
            zs = [ar.solved(zstar[:, i]) for i in range(size)]
            rho = np.stack([r.err for r in residual(zs)], axis=1)
            m_z = big(zstar)
            j_x = self.jacobian_values(t.value, xv)
            frozen = eye - np.einsum("pq,tij->tpiqj", a, j_x).reshape(self.ticks, size, size)
            stop = self.stop_allowance(frozen, frozen - m_z, np.tile(self.newton_scale(x), (1, s)))
            e_z = _apply(np.abs(np.linalg.inv(m_z)), rho) + ar.half_ulp(zstar) + stop
            z = [ar.solved(zstar[:, i], e_z[:, i]) for i in range(size)]
        if z_weights:
            return [self.combination(x[i], [(ar.literal(d), z[p * nx + i])
                                            for p, d in z_weights]) for i in range(nx)]
        f = {p: self.rates(times[p], [ar.add(x[i], z[p * nx + i]) for i in range(nx)])
             for p, _ in weights}
        return self.update(x, weights, f)

    def rosenbrock(self, t, x):
        ar, step, nx = self.ar, self.step, self.nx
        g = self.per_h(step.gamma_h)
        jac = None if step.prefactored else self.jacobian(t, x)
        matrix = None if step.prefactored else self.assemble(step.solve, jac, g)
        ft = None
        if step.dfdt is not None:
            ft = Walker(ar, self.env(t, x)).block(step.dfdt)
        k = {}
        for stage in step.stages:
            y = [self.combination(x[i], [(c, k[j][i]) for j, c in stage.terms]) for i in range(nx)]
            f = self.rates(self.time(t, stage.time_offset), y)
            extra = [[(ar.literal(c), k[j][i]) for j, c in stage.coupling]  # no h in them
                     for i in range(nx)]
            if stage.time_term != 0:
                for i in range(nx):
                    extra[i].append((stage.time_term, ft[i]))
            rhs = [self.combination(f[i], extra[i]) if extra[i] else f[i] for i in range(nx)]
            k[stage.index] = self.solve(step.solve, rhs, 0, matrix)
        return self.update(x, step.weights, k)

    def exact(self, t, x):
        ar, step = self.ar, self.step
        ad, bd, ed = step.propagator
        out = []
        for i in range(self.nx):
            products = [ar.mul(ar.literal(v), x[j]) for j, v in enumerate(ad[i]) if v != 0]
            products += [ar.mul(ar.literal(v), ar.known(self.us[:, j]))
                         for j, v in enumerate(bd[i]) if v != 0]
            if ed[i] != 0:
                products.append(ar.literal(ed[i]))
            out.append(ar.total(products) if products else ar.literal(0))
        return out

    def newton(self, residual, jacobian, start) -> np.ndarray:
        """The exact stage solution in double: full Newton from start, (ticks, size)."""
        z = start.copy()
        for _ in range(ANALYSIS_NEWTON_ITERATIONS):
            with np.errstate(all="ignore"):
                dz = np.linalg.solve(jacobian(z), residual(z)[..., None])[..., 0]
                z = z - dz
                small = np.abs(dz) <= 1e-15 * np.abs(z)
            if np.all(small | (dz == 0)) or not np.all(np.isfinite(z)):
                break
        return z


def _values(x: list[Bounded]) -> np.ndarray:
    return np.stack([xi.value for xi in x], axis=1)


def _apply(matrix, vector) -> np.ndarray:
    """(ticks, n, n) @ (ticks, n) -> (ticks, n)."""
    return (matrix @ vector[..., None])[..., 0]


def _abs_lu(m: np.ndarray, order) -> np.ndarray:
    """|L| |U| of the LU factorization of each matrix, in the C's pivot order (order: the fixed
    elimination order; None: partial pivoting), mapped back to the rows and columns of m."""
    ticks, n, _ = m.shape
    if order is not None:
        perm_rows = np.tile(np.asarray(order), (ticks, 1))
        a = m[:, order][:, :, order].copy()
    else:
        a = m.copy()
        perm_rows = np.tile(np.arange(n), (ticks, 1))
        idx = np.arange(ticks)
        for k in range(n):
            p = k + np.argmax(np.abs(a[:, k:, k]), axis=1)
            rows_k, rows_p = a[idx, k].copy(), a[idx, p].copy()
            a[idx, k], a[idx, p] = rows_p, rows_k
            pk, pp = perm_rows[idx, k].copy(), perm_rows[idx, p].copy()
            perm_rows[idx, k], perm_rows[idx, p] = pp, pk
            _eliminate(a, k)
        lower, upper = _split_lu(a)
        product = np.abs(lower) @ np.abs(upper)
        out = np.zeros_like(product)
        out[idx[:, None], perm_rows] = product  # P A = L U: row i of LU is row perm[i] of A
        return out
    for k in range(n):
        _eliminate(a, k)
    lower, upper = _split_lu(a)
    product = np.abs(lower) @ np.abs(upper)
    out = np.zeros_like(product)
    inverse = np.argsort(order)
    out[:] = product[:, inverse][:, :, inverse]
    return out


def _eliminate(a: np.ndarray, k: int) -> None:
    with np.errstate(all="ignore"):
        a[:, k + 1:, k] /= a[:, k:k + 1, k]
        a[:, k + 1:, k + 1:] -= a[:, k + 1:, k:k + 1] * a[:, k:k + 1, k + 1:]


def _split_lu(a: np.ndarray):
    n = a.shape[-1]
    lower = np.tril(a, -1) + np.eye(n)
    upper = np.triu(a)
    return lower, upper


@dataclass(frozen=True)
class Piece:
    """One piece a retried tick took: its start in shortest pieces of the tick (the C's tw_pos),
    its depth (length h / 2^depth) and the reference's state at its start (nx)."""

    position: int
    depth: int
    x: np.ndarray


def piece_bounds(step, precision: str, t0: float, pieces, u, tunables: dict,
                 reference_newton_stop: bool = False) -> np.ndarray:
    """(nx,): the bound on |C - reference| after a tick taken as pieces (a retried tick), both
    started from the C's state: the running analysis of each piece the tick took, in order, from
    the reference's state at its start, each starting with the bound the pieces before it left
    (carried through its operations to first order). Attempts that failed and were halved put the
    state back and leave nothing behind. SAFETY times (the C's part + the reference's part)."""
    c_part = ref_part = np.zeros((1, step.model.nx))
    for piece in pieces:
        common = dict(ts=[t0], xs=np.asarray(piece.x, float)[None, :],
                      us=np.asarray(u, float)[None, :], tunables=tunables,
                      scale=2.0 ** -piece.depth, position=piece.position)
        c_part = StepBound(step, precision, precision, newton_stop=True, **common).tick(c_part)
        ref_part = StepBound(step, precision, "double", newton_stop=reference_newton_stop,
                             reference_form=reference_newton_stop, **common).tick(ref_part)
    return SAFETY * (c_part + ref_part)[0]


def tick_bounds(step, precision: str, ts, xs, us, tunables: dict,
                reference_newton_stop: bool = False, retried: dict | None = None) -> np.ndarray:
    """(ticks, nx): the bound on |C - reference| after each tick, both started from the C's state
    before the tick: SAFETY times (the C's running bound in its precision, Newton stop included,
    plus the reference's own running bound in double, with the C's Newton stop too when the
    reference iterates as the C does: reference_newton_stop).

    retried: tick -> the Pieces the reference took in that tick when it retried a step; those
    ticks are bounded piece by piece (piece_bounds), never as the full step the C did not take.
    """
    retried = retried or {}
    ts, xs, us = np.asarray(ts, float), np.asarray(xs, float), np.asarray(us, float)
    out = np.zeros((len(ts), step.model.nx))
    plain = np.array([k for k in range(len(ts)) if k not in retried], dtype=int)

    def at(ticks) -> dict:
        return {name: (np.asarray(v)[ticks] if np.ndim(v) else v) for name, v in tunables.items()}

    if plain.size:
        values = dict(ts=ts[plain], xs=xs[plain], us=us[plain], tunables=at(plain))
        c_part = StepBound(step, precision, precision, newton_stop=True, **values).tick()
        ref_part = StepBound(step, precision, "double", newton_stop=reference_newton_stop,
                             reference_form=reference_newton_stop, **values).tick()
        out[plain] = SAFETY * (c_part + ref_part)
    for k, pieces in sorted(retried.items()):
        out[k] = piece_bounds(step, precision, ts[k], pieces, us[k], at(k),
                              reference_newton_stop)
    return out
