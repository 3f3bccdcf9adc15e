"""The model's own expressions as numpy functions of (t, x, u), with the parameters fixed.

This is the reference's independent view of f, df/dx, df/dt and the outputs: sympy's lambdify of
the model's expressions, with no CSE and no C printer in between. Two evaluation modes:

- vector (the default): numpy on the argument lists, non-finite values propagate as inf/nan;
- scalar: the parameters substituted, Python's math module on unpacked scalars, several times
  faster on the small states of a firmware model (the advice runs thousands of small steps); a
  math domain error or overflow gives an all-NaN result.

Lambdified functions are kept per (model, expressions, parameters, mode), so many steppers on one
model compile each expression list once.
"""

from __future__ import annotations

import functools
import sys
import threading

import numpy as np
import sympy as sp

from ..model import Model

# Models, expression lists and parameter sets whose functions are kept (the advice asks for three
# lists per model; the checks for two per precision).
CACHED_FUNCTIONS = 64


# Python compiles a sum of n terms n levels deep, so lambdify's compile of a spreadsheet-built
# rate (thousands of terms, at most model.expressions.MAX_OPERATORS) needs that much recursion:
# it runs with this limit on a thread with this stack (reserved, not committed; measured: the
# main thread's 8 MiB holds about 100,000 levels of Python's parser).
DEEP_RECURSION_LIMIT = 250_000
DEEP_STACK_BYTES = 256 * 2 ** 20


def lambdify(args, exprs, **options):
    """sp.lambdify, safe for expressions of any length: the one lambdify helper.

    The compile runs on a thread with a large stack and a raised recursion limit, so a long
    flat sum compiles instead of ending in a RecursionError.
    """
    result: dict = {}

    def compile_it():
        try:
            result["fn"] = sp.lambdify(args, exprs, **options)
        except BaseException as exc:  # handed to the caller's thread below
            result["error"] = exc

    old_limit, old_size = sys.getrecursionlimit(), threading.stack_size()
    threading.stack_size(DEEP_STACK_BYTES)
    sys.setrecursionlimit(max(old_limit, DEEP_RECURSION_LIMIT))
    try:
        worker = threading.Thread(target=compile_it, name="tickwright-lambdify")
        try:
            worker.start()
        except RuntimeError:  # no room for such a stack here: compile on this thread
            compile_it()
            worker = None
    finally:
        threading.stack_size(old_size)
    try:
        if worker is not None:
            worker.join()
    finally:
        sys.setrecursionlimit(old_limit)
    if "error" in result:
        raise result["error"]
    return result["fn"]


def numeric(model: Model, exprs, parameters: dict[str, float] | None = None, shape=None,
            scalar: bool = False):
    """exprs (a list or Matrix over t, x, u, p) as a float64 function of (t, x, u).

    parameters override the model's values; shape reshapes the result (-1 for a flat vector);
    scalar selects the math-module mode (see the module docstring).
    """
    values = model.parameter_values()
    values.update(parameters or {})
    key = tuple(sorted(values.items()))
    exprs = sp.ImmutableMatrix(exprs) if isinstance(exprs, sp.MatrixBase) else tuple(exprs)
    if scalar:
        return _scalar(model, exprs, key, shape)
    return _vector(model, exprs, key, shape)


@functools.lru_cache(maxsize=CACHED_FUNCTIONS)
def _vector(model: Model, exprs, key, shape):
    psyms = [p.symbol for p in model.parameters]
    target = exprs if isinstance(exprs, sp.MatrixBase) else list(exprs)
    fn = lambdify([model.t, list(model.x), list(model.u), psyms], target, modules="numpy",
                     dummify=True)
    values = dict(key)
    pvals = [values[p.name] for p in model.parameters]

    def call(t, x, u):
        with np.errstate(all="ignore"):
            out = np.array(fn(t, list(x), list(u), pvals), dtype=np.float64)
        return out if shape is None else out.reshape(shape)

    return call


@functools.lru_cache(maxsize=CACHED_FUNCTIONS)
def _scalar(model: Model, exprs, key, shape):
    values = dict(key)
    # Exact decimals of the float values: sympy folds constants exactly, the result rounds once.
    subs = {p.symbol: sp.Rational(repr(float(values[p.name]))) for p in model.parameters}
    flat = list(exprs)
    fn = lambdify([model.t, *model.x, *model.u], [sp.sympify(e).xreplace(subs) for e in flat],
                     modules="math", dummify=True)
    out_shape = exprs.shape if isinstance(exprs, sp.MatrixBase) else (len(flat),)
    out_shape = out_shape if shape is None else shape
    nan = np.full(len(flat), np.nan).reshape(out_shape)
    flat_result = shape == -1 or (shape is None and not isinstance(exprs, sp.MatrixBase))

    def call(t, x, u):
        try:
            out = np.array(fn(t, *x, *u), dtype=np.float64)
        except (OverflowError, ValueError, ZeroDivisionError):
            return nan.copy()
        return out if flat_result else out.reshape(out_shape)

    return call


def rate_function(model: Model, parameters: dict[str, float] | None = None, scalar: bool = False):
    """f(t, x, u) -> dx/dt, a flat float64 vector."""
    return numeric(model, list(model.f), parameters, shape=-1, scalar=scalar)


def output_function(model: Model, parameters: dict[str, float] | None = None):
    """g(t, x, u) -> the algebraic outputs, a flat float64 vector."""
    return numeric(model, [o.resolved for o in model.outputs], parameters, shape=-1)


def jacobian_function(model: Model, parameters: dict[str, float] | None = None,
                      scalar: bool = False):
    """df/dx(t, x, u), differentiated symbolically from the model: an (nx, nx) array."""
    J = sp.Matrix(model.f).jacobian(sp.Matrix(model.x))
    return numeric(model, J, parameters, shape=(model.nx, model.nx), scalar=scalar)


def time_derivative_function(model: Model, parameters: dict[str, float] | None = None,
                             scalar: bool = False):
    """df/dt(t, x, u), differentiated symbolically from the model: a flat vector (zeros when the
    model does not use time)."""
    return numeric(model, [sp.diff(r, model.t) for r in model.f], parameters, shape=-1,
                   scalar=scalar)
