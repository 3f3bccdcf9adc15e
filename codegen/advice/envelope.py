"""The operating envelope of a model and the eigenvalues of df/dx over it.

Operating points come from the `range` of states, inputs and parameters (corners, the centre, a
few interior points; the initial point when nothing has a range); at every point the Jacobian's
eigenvalues give the modes a stable tick must damp.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import sympy as sp

from ..errors import CheckError
from ..model import Model
from ..reference.numeric import lambdify

# Envelope sampling: all corners up to this many, else this many corners from a Halton sequence.
MAX_CORNERS = 64
# Interior points (Halton sequence) besides the centre and the initial point.
INTERIOR_POINTS = 16
# An eigenvalue below this fraction of the largest |lambda| is rounding noise of a zero eigenvalue.
ZERO_EIGENVALUE = 1e-9


@dataclass(frozen=True)
class OperatingPoint:
    """One point of the envelope: states x, inputs u and every parameter's value."""

    x: tuple[float, ...]
    u: tuple[float, ...]
    parameters: tuple[tuple[str, float], ...]


def place(where: str, i: int, quantity, value: float, x, u, p: dict) -> None:
    """Set one coordinate of an operating point: state i ("x"), input i ("u") or the parameter
    quantity.name (anything else) to value, in place."""
    if where == "x":
        x[i] = value
    elif where == "u":
        u[i] = value
    else:
        p[quantity.name] = value


def envelope(model: Model) -> tuple[list[OperatingPoint], list[str]]:
    """Operating points from the ranges, and the names of the ranged quantities.

    The initial point (initial states, default inputs, parameter values) always comes first; with
    ranges, the centre of the box, its corners (all when there are at most MAX_CORNERS, else a
    Halton subset) and INTERIOR_POINTS Halton points follow.
    """
    base_x = [s.initial for s in model.states]
    base_u = [u.default for u in model.inputs]
    base_p = {p.name: float(p.value) for p in model.parameters}
    dims = [("x", i, q) for i, q in enumerate(model.states) if q.range] + \
        [("u", i, q) for i, q in enumerate(model.inputs) if q.range] + \
        [("p", i, q) for i, q in enumerate(model.parameters) if q.range]

    def point(fractions) -> OperatingPoint:
        x, u, p = list(base_x), list(base_u), dict(base_p)
        for (where, i, q), f in zip(dims, fractions):
            place(where, i, q, q.range[0] + f * (q.range[1] - q.range[0]), x, u, p)
        return OperatingPoint(tuple(map(float, x)), tuple(map(float, u)),
                              tuple(sorted((k, float(v)) for k, v in p.items())))

    points = [point([])]
    d = len(dims)
    if d:
        points.append(point([0.5] * d))
        if 2 ** d <= MAX_CORNERS:
            corners = [[(k >> j) & 1 for j in range(d)] for k in range(2 ** d)]
        else:
            halton = _halton(d, MAX_CORNERS)
            corners = np.round(halton).tolist()
        points += [point(c) for c in corners]
        interior = _halton(d, INTERIOR_POINTS)
        points += [point(row) for row in interior]
    names = [f"{'states' if w == 'x' else 'inputs' if w == 'u' else 'parameters'}.{q.name}"
             for w, _, q in dims]
    return points, names


def _halton(d: int, n: int) -> np.ndarray:
    """n points of the Halton sequence in [0, 1)^d (prime bases), skipping the origin.

    References
    ----------
    Halton 1960, Numer. Math. 2 (from memory): the radical inverse of i in the k-th prime base.
    """
    primes, candidate = [], 2
    while len(primes) < d:
        if all(candidate % q for q in primes):
            primes.append(candidate)
        candidate += 1
    out = np.zeros((n, d))
    for i in range(1, n + 1):
        for j, base in enumerate(primes):
            value, scale, k = 0.0, 1.0 / base, i
            while k:
                k, digit = divmod(k, base)
                value += digit * scale
                scale /= base
            out[i - 1, j] = value
    return out


def _jacobian_with_parameters(model: Model):
    J = sp.Matrix(model.f).jacobian(sp.Matrix(model.x))
    psyms = [p.symbol for p in model.parameters]
    fn = lambdify([model.t, list(model.x), list(model.u), psyms], J, modules="numpy",
                     dummify=True)
    names = [p.name for p in model.parameters]

    def jac(t, x, u, parameters: dict):
        with np.errstate(all="ignore"):
            return np.array(fn(t, list(x), list(u), [parameters[n] for n in names]),
                            dtype=np.float64).reshape(model.nx, model.nx)

    return jac


def eigenvalues(model: Model, points=None) -> tuple[np.ndarray, list[str]]:
    """Distinct eigenvalues of df/dx over the envelope (1/s), sorted, and any warnings.

    Eigenvalues below ZERO_EIGENVALUE times the largest |lambda| are set to exactly 0 (a pure
    integrator such as a position state); a point whose Jacobian is not finite is skipped.
    """
    points = envelope(model)[0] if points is None else points
    jac = _jacobian_with_parameters(model)
    found, warnings, skipped = [], [], 0
    for pt in points:
        J = jac(0.0, np.array(pt.x), np.array(pt.u), dict(pt.parameters))
        if not np.all(np.isfinite(J)):
            skipped += 1
            continue
        found.append(np.linalg.eigvals(J))
    if skipped:
        warnings.append(f"the Jacobian is not finite at {skipped} of {len(points)} operating "
                        "points (they were skipped); check the ranges")
    if not found:
        raise CheckError(f"{model.source}: the Jacobian is not finite at any operating point; "
                         "check the ranges and the initial values")
    lam = np.concatenate(found)
    big = float(np.max(np.abs(lam))) if lam.size else 0.0
    lam = np.where(np.abs(lam) <= ZERO_EIGENVALUE * big, 0.0, lam)
    lam = np.where(np.abs(lam.real) <= ZERO_EIGENVALUE * big, 1j * lam.imag, lam)
    lam = np.where(np.abs(lam.imag) <= ZERO_EIGENVALUE * big, lam.real + 0j, lam)
    rounded = {}
    for v in lam:
        key = (float(f"{v.real:.9g}"), float(f"{v.imag:.9g}"))
        rounded.setdefault(key, complex(v))
    values = np.array(sorted(rounded.values(), key=lambda v: (v.real, v.imag)), dtype=complex)
    return values, warnings


def decaying(values: np.ndarray) -> np.ndarray:
    """The eigenvalues a stable discretization must damp (Re lambda <= 0)."""
    return values[values.real <= 0]

