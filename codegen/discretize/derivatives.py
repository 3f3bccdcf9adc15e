"""df/dx and df/dt of the model, derived symbolically, only where they are structurally non-zero.

The Jacobian is differentiated entry by entry, only where a rate depends on a state, in state
order (sets are never iterated unsorted). When every entry is free of the states and time the
model is linear in the state.
"""

from __future__ import annotations

import sympy as sp

from ..errors import ModelError, located
from ..model import Model
from .ir import Block, Jacobian

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
