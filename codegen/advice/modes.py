"""The per-mode error estimate: each linear mode of the envelope, how much it is excited, and the
error a method's stability function makes on it over the mode's whole decay.

At every operating point the model is linearized, x' = A x + B u (A = df/dx, B = df/du), and A
is split into its modes (eigenvalues lambda_k, eigenvectors V). A mode is excited by
- a step of every ranged input across its whole range at once: the equilibrium moves by
  A^-1 B du, mode k's share of it is (V^-1 B du)_k / lambda_k (signs taken at their worst);
- at the initial point, the start away from equilibrium: (V^-1 f(x0, u0))_k / lambda_k.
Its amplitude in state i, relative to the state's full scale, is the weight
w_ik = |V_ik| (step_k + start_k) / scale_i (capped at WEIGHT_CAP).

A Runge-Kutta (or Rosenbrock) method multiplies a mode's deviation from equilibrium by R(z),
z = h*lambda, per step where the solution multiplies it by exp(z); equilibria are kept exactly,
so after n steps the error of mode k is w_ik |R(z)^n - exp(n z)|. The estimate for state i is the
sum over the modes of one operating point (worst signs), the estimate of the tick the largest
over states and points. n runs over the mode's whole decay: until both R(z)^n and exp(n z) have
fallen by exp(-MODE_LIFE), or over the horizon for an undamped mode; n is sampled on a
logarithmic grid of MODE_SAMPLES whole numbers, each with its neighbour n + 1 (a negative R
alternates in sign; otherwise |R^n - exp(nz)| = exp(n Re z) |exp(n eps) - 1| with
eps = log R(z) - z varies slowly in n, so the grid finds its maximum to a few per cent).

Modes with lambda = 0 (integrators) have no error of their own (R(0) = 1 = exp(0)); growing modes
(Re lambda > 0: the model itself is unstable there) are left out and the advice says so.

References
----------
HW: Hairer & Wanner, Solving ODEs II, 2nd ed., 1996, IV.2 (the stability function R(z) as the
method applied to y' = lambda y) (from memory). Modal decomposition of a linear system: common
practice, no source.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import sympy as sp

from ..methods import analysis
from ..model import Model
from ..reference.numeric import lambdify
from .envelope import ZERO_EIGENVALUE

# A mode can swing a state from one end of its range to the other: twice its full scale at most.
# Larger weights come from nearly parallel eigenvectors (their contributions cancel) and are cut.
WEIGHT_CAP = 2.0
# A mode has decayed when R(z)^n and exp(nz) are both below exp(-MODE_LIFE) (about 1e-13) of
# where they started: nothing of it is left above double rounding.
MODE_LIFE = 30.0
# Values of n sampled (logarithmically) between 1 and a mode's last step.
MODE_SAMPLES = 160
# Below this |w|, log(1 + w) is summed as a series: log of a number this close to 1 loses the
# digits that make up log R(z) - z.
SERIES_LIMIT = 1e-2
# Terms of that series: |w|^9 / 9 < 1e-19 at the limit, below double rounding of the sum.
SERIES_TERMS = 8


@dataclass(frozen=True)
class Modes:
    """The excited modes of the envelope.

    values: (m,) eigenvalues in 1/s (decaying or undamped, non-zero); weights: (m, nx) amplitude
    of each mode in each state as a fraction of the state's full scale; point: (m,) index of the
    operating point the mode belongs to (the modes of one point add up, and are stored next to
    each other); growing: how many eigenvalues with Re lambda > 0 were left out.
    """

    values: np.ndarray
    weights: np.ndarray
    point: np.ndarray
    growing: int

    @property
    def excitation(self) -> np.ndarray:
        """(m,) the largest weight of each mode over the states."""
        return self.weights.max(axis=1) if self.weights.size else np.zeros(0)


def _linearization(model: Model):
    """(f, df/dx, df/du) as one numpy function of (t, x, u, parameter values)."""
    f = sp.Matrix(model.f)
    jx = f.jacobian(sp.Matrix(model.x))
    ju = f.jacobian(sp.Matrix(model.u)) if model.inputs else sp.zeros(model.nx, 0)
    psyms = [p.symbol for p in model.parameters]
    args = [model.t, list(model.x), list(model.u), psyms]
    fns = [lambdify(args, m, modules="numpy", dummify=True) for m in (f, jx)]
    fu = lambdify(args, ju, modules="numpy", dummify=True) if model.inputs else None
    names = [p.name for p in model.parameters]
    nx, nu = model.nx, len(model.inputs)

    def evaluate(x, u, parameters: dict):
        values = [parameters[n] for n in names]
        with np.errstate(all="ignore"):
            rate = np.array(fns[0](0.0, list(x), list(u), values), float).reshape(nx)
            a = np.array(fns[1](0.0, list(x), list(u), values), float).reshape(nx, nx)
            b = np.zeros((nx, 0)) if fu is None else \
                np.array(fu(0.0, list(x), list(u), values), float).reshape(nx, nu)
        return rate, a, b

    return evaluate


def excited_modes(model: Model, points, scales: np.ndarray) -> Modes:
    """The modes of every operating point with their weights (see the module docstring).

    points: envelope.OperatingPoint list, the initial point first; scales: (nx,) full scale of
    each state.
    """
    evaluate = _linearization(model)
    du = np.array([(i.range[1] - i.range[0]) if i.range else 0.0 for i in model.inputs])
    values, weights, owner, growing = [], [], [], 0
    big = 0.0
    found = []
    for index, pt in enumerate(points):
        rate, a, b = evaluate(pt.x, pt.u, dict(pt.parameters))
        if not (np.all(np.isfinite(a)) and np.all(np.isfinite(b)) and np.all(np.isfinite(rate))):
            continue
        lam, v = np.linalg.eig(a)
        found.append((index, rate, b, lam, v))
        big = max(big, float(np.max(np.abs(lam))) if lam.size else 0.0)
    for index, rate, b, lam, v in found:
        try:
            vinv = np.linalg.inv(v)
        except np.linalg.LinAlgError:
            vinv = np.linalg.pinv(v)
        keep = np.abs(lam) > ZERO_EIGENVALUE * big
        growing += int(np.sum(keep & (lam.real > ZERO_EIGENVALUE * big)))
        keep &= lam.real <= ZERO_EIGENVALUE * big
        with np.errstate(all="ignore"):
            step = (np.abs(vinv @ b) @ du) if du.size else np.zeros(len(lam))
            start = np.abs(vinv @ rate) if index == 0 else np.zeros(len(lam))
            amplitude = (step + start) / np.where(keep, np.abs(lam), 1.0)
            w = np.abs(v) * amplitude[None, :] / scales[:, None]
        w = np.where(np.isfinite(w), np.minimum(w, WEIGHT_CAP), WEIGHT_CAP)
        for k in np.flatnonzero(keep):
            values.append(complex(min(lam[k].real, 0.0), lam[k].imag))
            weights.append(w[:, k])
            owner.append(index)
    nx = model.nx
    return Modes(np.array(values, complex), np.array(weights, float).reshape(-1, nx),
                 np.array(owner, int), growing)


def _log_ratio(p: np.ndarray, q: np.ndarray, z: np.ndarray) -> np.ndarray:
    """log R(z) - z with R = P/Q, accurate for small z (where R is close to 1)."""
    with np.errstate(all="ignore"):
        qz = np.polynomial.polynomial.polyval(z, q)
        length = max(len(p), len(q))
        diff = np.zeros(length)
        diff[:len(p)] += p
        diff[:len(q)] -= q
        diff[0] = 0.0  # R(0) = 1: the constant terms cancel exactly
        w = np.polynomial.polynomial.polyval(z, diff) / qz
        small = np.abs(w) < SERIES_LIMIT
        series = np.zeros_like(w)
        power = np.ones_like(w)
        for k in range(1, SERIES_TERMS + 1):
            power = power * w
            series = series + ((-1) ** (k + 1)) * power / k
        log_r = np.where(small, series, np.log(1 + w.astype(complex)))
    return log_r - z


def mode_errors(method, values: np.ndarray, dt: float, horizon: float) -> np.ndarray:
    """(m,) max over n of |R(dt lambda)^n - exp(n dt lambda)| for each eigenvalue (inf where the
    method lets the mode grow); zeros for the exact discretization."""
    coefficients = analysis.float_stability_coefficients(method)
    if coefficients is None or values.size == 0:
        return np.zeros(values.shape)
    # R has real coefficients: a conjugate pair has one error, and many points share a mode.
    keys = np.round(values.real, 9) + 1j * np.round(np.abs(values.imag), 9)
    unique, back = np.unique(keys, return_inverse=True)
    return _unique_mode_errors(coefficients, unique, dt, horizon)[back.reshape(-1)]


def _unique_mode_errors(coefficients, values: np.ndarray, dt: float, horizon: float):
    z = values * dt
    eps = _log_ratio(*coefficients, z)
    log_r = eps + z
    # R(z) = 0 (backward Euler's limit, forward Euler at z = -1): the method wipes the mode out
    # in one step, the error is exp(n z) itself, largest at n = 1.
    wiped = np.isneginf(log_r.real)
    eps = np.where(wiped, 0.0, eps)
    log_r = np.where(wiped, z, log_r)
    with np.errstate(all="ignore"):
        decay = np.minimum(-z.real, -log_r.real)
        undamped = max(1.0, horizon / dt)
        last = np.where(decay > 0, np.minimum(MODE_LIFE / np.where(decay > 0, decay, 1.0),
                                              1e18), undamped)
        last = np.where(z.real == 0, np.minimum(last, undamped), last)
        grid = np.exp(np.linspace(0.0, 1.0, MODE_SAMPLES)[None, :]
                      * np.log(np.maximum(last, 1.0))[:, None])
        # Whole steps, each with its neighbour: a negative R(z) alternates in sign, so the
        # largest difference sits on every other n.
        grid = np.round(grid)
        grid = np.concatenate([grid, grid + 1], axis=1)
        n_eps = grid * eps[:, None]
        a, b = n_eps.real, n_eps.imag
        # Close to each other (|n eps| < 1): exp(n Re z) |exp(n eps) - 1| without cancellation.
        re = np.expm1(a) * np.cos(b) - 2.0 * np.sin(b / 2.0) ** 2
        im = np.exp(a) * np.sin(b)
        near = np.exp(grid * z.real[:, None]) * np.hypot(re, im)
        # Far apart: both terms scaled by the larger modulus (no overflow when R >> exp(z)).
        method_n, exact_n = grid * log_r[:, None], grid * z[:, None]
        top = np.maximum(method_n.real, exact_n.real)
        far = np.exp(top) * np.abs(np.exp(method_n - top) - np.exp(exact_n - top))
        e = np.where(np.abs(n_eps) < 1.0, near, far)
        e = np.where(np.isnan(e), np.inf, e)
        out = np.where(wiped, np.exp(z.real), e.max(axis=1))
    return np.where(log_r.real > 1e-12, np.inf, out)


def per_mode_error(method, modes: Modes, dt: float, horizon: float) -> float:
    """The per-mode estimate at tick dt: max over points and states of sum_k w_ik E_k."""
    if modes.values.size == 0:
        return 0.0
    e = mode_errors(method, modes.values, dt, horizon)
    with np.errstate(invalid="ignore"):
        contribution = modes.weights * e[:, None]
    contribution = np.where(modes.weights == 0, 0.0, contribution)
    # The modes of one point are stored together (excited_modes appends them point by point).
    starts = np.flatnonzero(np.r_[True, modes.point[1:] != modes.point[:-1]])
    return float(np.max(np.add.reduceat(contribution, starts, axis=0)))
