"""The stability gate: is a tick inside the method's stability limit over the envelope?

Decided before anything is built: `emit` warns, `check` and `replay` refuse to run (unless
--force-run) when h*lambda leaves the method's stability region for an eigenvalue of df/dx over
the model's operating envelope (h = dt / substeps).

What it costs:
- A-stable methods and the exact discretization: nothing, they pass at once;
- up to DENSE_STATES states: the symbolic Jacobian at every operating point of
  envelope.envelope (the points `advise` uses, so the two agree) and its dense eigenvalues,
  O(points * nx^3); the exact limit (methods.analysis.stability_limit) is computed only when the
  tick fails or the caller asks for it;
- more states: the structurally non-zero entries of df/dx by finite differences (one evaluation
  of the rates per colour of a column colouring, on a tree walk of the expressions: no code is
  generated) at the initial point and SPARSE_POINTS - 1 corners, O(points * nnz * colours);
  Gershgorin discs pass the tick when every disc of h*df/dx lies in the region; otherwise the
  ARNOLDI_EIGENVALUES Ritz values of largest magnitude after ARNOLDI_STEPS steps of Arnoldi's
  iteration decide, O(points * (steps * nnz + steps^2 * nx)). The report says which bound
  decided.
"""

from __future__ import annotations

import math
import operator
from dataclasses import dataclass

import numpy as np
import sympy as sp

from ..errors import CheckError
from ..methods import EXACT
from ..methods.analysis import analyse, in_stability_region, stability_limit
from ..model import Model
from ..reference.numeric import lambdify
from .envelope import ZERO_EIGENVALUE, decaying, eigenvalues, envelope, place

# Up to this many states the dense eigenvalues at every envelope point cost well under a second
# (an eigen-decomposition of a 64 x 64 matrix takes about a millisecond).
DENSE_STATES = 64
# Operating points of the sparse bound: the initial point and 8 corners (all ranged quantities
# low, all high, and alternating patterns), enough to meet the extremes of most envelopes at a
# cost linear in the points.
SPARSE_POINTS = 9
# Points on each Gershgorin circle tested against the stability region: a polynomial's region
# |R| <= 1 has no holes (maximum modulus), so a disc lies inside when its circle does.
GERSHGORIN_SAMPLES = 32
# Ritz values of largest magnitude tested per point: conjugate pairs of the two or three fastest
# modes, the ones that bind an explicit method.
ARNOLDI_EIGENVALUES = 6
# Arnoldi steps per point (one product with the sparse Jacobian each, plus orthogonalisation
# against the steps before: O(steps * nnz + steps^2 * nx)); the outermost Ritz values are then
# within a few percent of the outermost eigenvalues even in a dense cluster.
ARNOLDI_STEPS = 60
# Seed of the start vector: a random start meets every eigenvector; a fixed seed keeps the
# gate's answer reproducible.
ARNOLDI_SEED = 20240611
# More colours than this (a rate that reads most of the states) makes the finite-difference
# Jacobian too costly for a gate: the tick is then not decided.
MAX_COLOURS = 64
# Finite-difference step, relative to each state's scale: the square root of double's epsilon
# balances truncation and rounding (common practice, no source).
FD_STEP = math.sqrt(np.finfo(float).eps)


@dataclass(frozen=True)
class StabilityGate:
    """The gate's decision for one model, method and tick.

    passed: False only when some h*lambda was found outside the stability region; decided:
    False when no bound could be computed (passed is then True); basis: which bound decided
    ('A-stable method', 'dense eigenvalues at N operating points', 'Gershgorin discs at N
    operating points', 'largest Ritz values of M Arnoldi steps at N operating points');
    eigenvalue: the
    one that sets the limit (1/s), or None; limit: the largest stable tick along it, in s per
    tick (math.inf when unbounded, None when not computed).
    """

    method: str
    dt: float
    substeps: int
    passed: bool
    decided: bool
    basis: str
    eigenvalue: complex | None = None
    limit: float | None = None

    @property
    def summary(self) -> str:
        """One phrase for a report line or an error."""
        lam = "" if self.eigenvalue is None else f"eigenvalue {format_eigenvalue(self.eigenvalue)}"
        if not self.decided:
            return f"dt = {self.dt:g} s not checked: {self.basis}"
        if not self.passed:
            return (f"dt = {self.dt:g} s is beyond {self.method}'s stability limit "
                    f"{self.limit:.3g} s ({lam} 1/s; {self.basis})")
        if self.limit is None or math.isinf(self.limit):
            return f"dt = {self.dt:g} s stable with {self.method} ({self.basis})"
        return (f"dt = {self.dt:g} s within {self.method}'s stability limit {self.limit:.3g} s "
                f"({lam} 1/s; {self.basis})")

    def to_dict(self) -> dict:
        lam = self.eigenvalue
        return dict(method=self.method, dt=self.dt, substeps=self.substeps, passed=self.passed,
                    decided=self.decided, basis=self.basis,
                    eigenvalue=None if lam is None else [lam.real, lam.imag],
                    limit=self.limit)


def format_eigenvalue(lam: complex) -> str:
    """-612.2+3.963e+04j: four digits, the imaginary part only when there is one."""
    return f"{lam.real:.4g}" if lam.imag == 0 else f"{lam.real:.4g}{lam.imag:+.4g}j"


def stability_gate(model: Model, method, dt: float, substeps: int = 1,
                   with_limit: bool = False) -> StabilityGate:
    """Decide whether h = dt / substeps keeps h*lambda in the method's stability region for the
    decaying eigenvalues of df/dx over the envelope (growing modes are the model's own).

    with_limit: also compute the exact limit when the tick passes (it is always computed when
    the tick fails); see the module docstring for the cost.
    """
    h = dt / substeps
    done = dict(method=method.id, dt=float(dt), substeps=substeps)
    if method.kind == EXACT or analyse(method).a_stable:
        return StabilityGate(**done, passed=True, decided=True, basis="A-stable method",
                             limit=math.inf)
    if model.nx <= DENSE_STATES:
        points = envelope(model)[0]
        try:
            values = decaying(eigenvalues(model, points)[0])
        except CheckError as exc:
            return StabilityGate(**done, passed=True, decided=False, basis=str(exc))
        basis = f"dense eigenvalues at {_count(len(points), 'operating point')}"
    else:
        jacobians, basis = _sparse_jacobians(model)
        if not jacobians:
            return StabilityGate(**done, passed=True, decided=False, basis=basis)
        where = _count(len(jacobians), "operating point")
        if all(_discs_inside(method, J, h) for J in jacobians):
            return StabilityGate(**done, passed=True, decided=True,
                                 basis=f"Gershgorin discs at {where}")
        found = np.concatenate([_largest_eigenvalues(J) for J in jacobians])
        if not found.size:
            return StabilityGate(**done, passed=True, decided=False,
                                 basis="the Arnoldi iteration did not stay finite")
        values = decaying(found)
        basis = f"largest Ritz values of {ARNOLDI_STEPS} Arnoldi steps at {where}"
    inside = bool(np.all(in_stability_region(method, h * values))) if values.size else True
    limit, lam = None, None
    if with_limit or not inside:
        limit_h, lam = stability_limit(method, values)
        limit = limit_h * substeps
    return StabilityGate(**done, passed=inside, decided=True, basis=basis, eigenvalue=lam,
                         limit=limit)


def _count(n: int, noun: str) -> str:
    return f"{n} {noun}" + ("" if n == 1 else "s")


# ---- the sparse bound ----------------------------------------------------------------------------

def _sparse_points(model: Model) -> list[tuple[np.ndarray, np.ndarray, dict[str, float]]]:
    """The initial point and SPARSE_POINTS - 1 corners as (x, u, parameters).

    Corner patterns over the ranged quantities, numbered k = 0, 1, ...: all low, all high, then
    for b = 0, 1, ... quantity k at its high end when bit b of k is set, and the complement.
    """
    x0 = np.array([s.initial for s in model.states], dtype=float)
    u0 = np.array([u.default for u in model.inputs], dtype=float)
    p0 = model.parameter_values()
    ranged = [("x", i, q) for i, q in enumerate(model.states) if q.range] + \
        [("u", i, q) for i, q in enumerate(model.inputs) if q.range] + \
        [("p", i, q) for i, q in enumerate(model.parameters) if q.range]
    points = [(x0, u0, p0)]
    if not ranged:
        return points
    index = np.arange(len(ranged))
    patterns = [np.zeros(len(ranged), bool), np.ones(len(ranged), bool)]
    bit = 0
    while len(patterns) < SPARSE_POINTS - 1 and (1 << bit) < len(ranged):
        high = (index >> bit) & 1 == 1
        patterns += [high, ~high]
        bit += 1
    for high in patterns[: SPARSE_POINTS - 1]:
        x, u, p = x0.copy(), u0.copy(), dict(p0)
        for (where, i, q), up in zip(ranged, high):
            place(where, i, q, float(q.range[1] if up else q.range[0]), x, u, p)
        points.append((x, u, p))
    return points


def _pattern(model: Model) -> tuple[np.ndarray, np.ndarray]:
    """Rows and columns of the structurally non-zero entries of df/dx, row by row."""
    index = {s.name: j for j, s in enumerate(model.states)}  # names hash faster than symbols
    rows, cols = [], []
    for i, s in enumerate(model.states):
        deps = sorted(index[v.name] for v in s.rate.free_symbols if v.name in index)
        rows += [i] * len(deps)
        cols += deps
    return np.array(rows, dtype=int), np.array(cols, dtype=int)


def _colours(rows: np.ndarray, cols: np.ndarray, nx: int) -> np.ndarray:
    """A greedy colouring of the columns: two columns read by one rate get different colours,
    so one perturbation per colour gives every entry (Curtis, Powell and Reid 1974, from
    memory)."""
    by_row: dict[int, list[int]] = {}
    by_col: dict[int, list[int]] = {}
    for r, c in zip(rows.tolist(), cols.tolist()):
        by_row.setdefault(r, []).append(c)
        by_col.setdefault(c, []).append(r)
    colour = np.full(nx, -1)
    for j in range(nx):
        taken = {int(colour[k]) for r in by_col.get(j, ()) for k in by_row[r]}
        c = 0
        while c in taken:
            c += 1
        colour[j] = c
    return colour


def _sparse_jacobians(model: Model) -> tuple[list, str]:
    """df/dx at the sparse points as scipy CSR matrices, by one-sided finite differences; or no
    matrices and the reason when the pattern or the values do not allow it."""
    from scipy.sparse import csr_matrix

    rows, cols = _pattern(model)
    colour = _colours(rows, cols, model.nx)
    n_colours = int(colour.max()) + 1 if colour.size else 0
    if n_colours > MAX_COLOURS:
        return [], (f"a rate reads {n_colours} or more states, too many for the sparse bound of "
                    f"the gate (at most {MAX_COLOURS})")
    points = _sparse_points(model)
    scale = np.array([s.full_scale or 1.0 for s in model.states])
    batch = n_colours + 1
    xs, env = [], {}
    for x, _, _ in points:
        step = FD_STEP * np.maximum(np.abs(x), scale)
        xs.append(x)
        xs += [x + np.where(colour == c, step, 0.0) for c in range(n_colours)]
    X = np.array(xs)
    for j, sym in enumerate(model.x):
        env[sym] = X[:, j]
    for k, u in enumerate(model.inputs):
        env[u.symbol] = np.repeat([pt[1][k] for pt in points], batch)
    for p in model.parameters:
        env[p.symbol] = np.repeat([pt[2][p.name] for pt in points], batch)
    env[model.t] = 0.0
    F = np.empty((len(X), model.nx))
    with np.errstate(all="ignore"):
        for i, s in enumerate(model.states):
            F[:, i] = _evaluate(s.rate, env)
    jacobians = []
    for k, (x, _, _) in enumerate(points):
        base = F[k * batch]
        step = FD_STEP * np.maximum(np.abs(x), scale)
        values = (F[k * batch + 1 + colour[cols], rows] - base[rows]) / step[cols]
        if not np.all(np.isfinite(values)):
            continue
        jacobians.append(csr_matrix((values, (rows, cols)), shape=(model.nx, model.nx)))
    reason = "" if jacobians else "df/dx is not finite at any operating point of the sparse bound"
    return jacobians, reason


def _discs_inside(method, J, h: float) -> bool:
    """Whether every Gershgorin disc of h*J lies in the method's stability region (Gershgorin
    1931: every eigenvalue lies in a disc centred at a diagonal entry with the absolute row sum
    of the others as radius; from memory)."""
    centre = J.diagonal()
    radius = np.asarray(abs(J).sum(axis=1)).ravel() - np.abs(centre)
    discs = np.unique(np.round(np.column_stack([centre, radius]), 12), axis=0)
    angles = np.exp(2j * np.pi * np.arange(GERSHGORIN_SAMPLES) / GERSHGORIN_SAMPLES)
    z = h * (discs[:, :1] + discs[:, 1:] * angles[None, :])
    return bool(np.all(in_stability_region(method, z)))


def _largest_eigenvalues(J) -> np.ndarray:
    """The ARNOLDI_EIGENVALUES Ritz values of largest magnitude after ARNOLDI_STEPS steps of
    Arnoldi's iteration from a fixed start, with rounding noise of a zero real or imaginary part
    set to 0 as envelope.eigenvalues does.

    The outermost Ritz values approach the outermost eigenvalues first, even in a cluster where
    no single eigenvector converges (Saad, Numerical Methods for Large Eigenvalue Problems,
    2011, chapter 6; from memory), and the gate needs only those, to a few digits.
    """
    n = J.shape[0]
    m = min(ARNOLDI_STEPS, n)
    basis = np.zeros((m + 1, n))
    hessenberg = np.zeros((m + 1, m))
    start = np.random.default_rng(ARNOLDI_SEED).standard_normal(n)
    basis[0] = start / np.linalg.norm(start)
    for k in range(m):
        w = J @ basis[k]
        for _ in range(2):  # Gram-Schmidt twice keeps the basis orthogonal to rounding
            c = basis[: k + 1] @ w
            w = w - c @ basis[: k + 1]
            hessenberg[: k + 1, k] += c
        hessenberg[k + 1, k] = np.linalg.norm(w)
        if not np.isfinite(hessenberg[k + 1, k]):
            return np.zeros(0, dtype=complex)
        if hessenberg[k + 1, k] <= 1e-12 * np.abs(hessenberg[: k + 2, : k + 1]).max():
            m = k + 1  # an invariant subspace: its Ritz values are eigenvalues
            break
        basis[k + 1] = w / hessenberg[k + 1, k]
    ritz = np.linalg.eigvals(hessenberg[:m, :m])
    values = ritz[np.argsort(-np.abs(ritz), kind="stable")[:ARNOLDI_EIGENVALUES]]
    big = float(np.max(np.abs(values))) if values.size else 0.0
    values = np.where(np.abs(values.real) <= ZERO_EIGENVALUE * big, 1j * values.imag, values)
    return np.where(np.abs(values.imag) <= ZERO_EIGENVALUE * big, values.real + 0j, values)


# ---- evaluating the rates without generating code ------------------------------------------------

_FUNCTIONS = {sp.sin: np.sin, sp.cos: np.cos, sp.tan: np.tan, sp.asin: np.arcsin,
              sp.acos: np.arccos, sp.atan: np.arctan, sp.sinh: np.sinh, sp.cosh: np.cosh,
              sp.tanh: np.tanh, sp.asinh: np.arcsinh, sp.acosh: np.arccosh,
              sp.atanh: np.arctanh, sp.exp: np.exp, sp.log: np.log, sp.Abs: np.abs,
              sp.sign: np.sign, sp.floor: np.floor, sp.ceiling: np.ceil, sp.atan2: np.arctan2}
_RELATIONS = {"<": operator.lt, "<=": operator.le, ">": operator.gt, ">=": operator.ge,
              "==": operator.eq, "!=": operator.ne}


def _evaluate(expr, env):
    """expr on numpy arrays by walking its tree: printing code for ten thousand rates would cost
    more than the whole gate. Unknown functions fall back to sympy's lambdify of that node."""
    if expr.is_Symbol:
        return env[expr]
    if expr.is_Number or expr.is_NumberSymbol:
        return float(expr)
    if expr is sp.true or expr is sp.false:
        return bool(expr)
    args = [_evaluate(a, env) for a in expr.args] if not isinstance(expr, sp.Piecewise) else ()
    if expr.is_Add:
        return sum(args[1:], args[0])
    if expr.is_Mul:
        out = args[0]
        for a in args[1:]:
            out = out * a
        return out
    if expr.is_Pow:
        return np.power(args[0], args[1])
    if isinstance(expr, sp.Piecewise):
        out = np.nan
        for value, cond in reversed(expr.args):
            out = np.where(_evaluate(cond, env), _evaluate(value, env), out)
        return out
    if isinstance(expr, sp.Min):
        return np.minimum.reduce(np.broadcast_arrays(*args))
    if isinstance(expr, sp.Max):
        return np.maximum.reduce(np.broadcast_arrays(*args))
    if expr.is_Relational:
        return _RELATIONS[expr.rel_op](args[0], args[1])
    if isinstance(expr, sp.And):
        return np.logical_and.reduce(np.broadcast_arrays(*args))
    if isinstance(expr, sp.Or):
        return np.logical_or.reduce(np.broadcast_arrays(*args))
    if isinstance(expr, sp.Not):
        return np.logical_not(args[0])
    if type(expr) in _FUNCTIONS:
        return _FUNCTIONS[type(expr)](*args)
    symbols = sorted(expr.free_symbols, key=lambda s: s.name)
    return lambdify(symbols, expr, modules="numpy", dummify=True)(*[env[s] for s in symbols])
