"""Exact zero-order hold: x+ = expm(A h) x + (int_0^h expm(A s) ds)(B u + e), at generation time.

For models linear in states and inputs (and free of time and of tunable parameters in the
matrices), computed from expm([[A, B, e], [0, 0, 0]] h) in 50-digit arithmetic and rounded once
by the printer.
"""

from __future__ import annotations

import mpmath
import sympy as sp

from ..errors import ModelError, located
from ..model import Model
from ..methods import EXACT
from .explicit import exact_dt, output_block, rate_block
from .ir import ImplicitStep, NewtonSpec, Safeguards
from .linear_solve import GENERATION_DIGITS, _mp

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


def discretize_exact(model: Model, method, dt, substeps: int = 1,
                     safeguards: Safeguards = Safeguards()) -> ImplicitStep:
    """Model + exact method + dt -> ImplicitStep holding the propagator of one substep h."""
    from ..errors import MethodError

    if not isinstance(substeps, int) or substeps < 1:
        raise MethodError(f"--substeps: must be a whole number >= 1, got {substeps}")
    dt = exact_dt(dt)
    h = dt / substeps
    return ImplicitStep(model=model, method=method, dt=dt, substeps=substeps, scheme=EXACT,
                        rates=rate_block(model), outputs=output_block(model), newton=NewtonSpec(),
                        propagator=zoh_propagator(model, h, method), safeguards=safeguards)
