"""The model's own expressions as numpy functions of (t, x, u), with the parameters fixed.

This is the reference's independent view of f, df/dx and the outputs: sympy's lambdify of the
model's expressions, with no CSE and no C printer in between.
"""

from __future__ import annotations

import numpy as np
import sympy as sp

from ..model import Model


def numeric(model: Model, exprs, parameters: dict[str, float] | None = None, shape=None):
    """exprs (a list or Matrix over t, x, u, p) as a float64 function of (t, x, u).

    parameters override the model's values; shape reshapes the result (-1 for a flat vector).
    """
    values = model.parameter_values()
    values.update(parameters or {})
    psyms = [p.symbol for p in model.parameters]
    fn = sp.lambdify([model.t, list(model.x), list(model.u), psyms], exprs, modules="numpy")
    pvals = [values[p.name] for p in model.parameters]

    def call(t, x, u):
        with np.errstate(all="ignore"):
            out = np.array(fn(t, list(x), list(u), pvals), dtype=np.float64)
        return out if shape is None else out.reshape(shape)

    return call


def rate_function(model: Model, parameters: dict[str, float] | None = None):
    """f(t, x, u) -> dx/dt, a flat float64 vector."""
    return numeric(model, list(model.f), parameters, shape=-1)


def output_function(model: Model, parameters: dict[str, float] | None = None):
    """g(t, x, u) -> the algebraic outputs, a flat float64 vector."""
    return numeric(model, [o.resolved for o in model.outputs], parameters, shape=-1)


def jacobian_function(model: Model, parameters: dict[str, float] | None = None):
    """df/dx(t, x, u), differentiated symbolically from the model: an (nx, nx) array."""
    J = sp.Matrix(model.f).jacobian(sp.Matrix(model.x))
    return numeric(model, J, parameters, shape=(model.nx, model.nx))
