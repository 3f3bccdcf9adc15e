"""The linear solve inside implicit steps: M d = r with M = I - (C (x) J), planned at generation time.

Chosen by cost: straight-line elimination that follows the sparsity pattern (reverse
Cuthill-McKee ordering, no run-time pivoting, every pivot guarded) while its operation count
stays under ELIMINATION_MAX_OPERATIONS, else a looped dense LU with partial pivoting. When J is a
constant matrix the iteration matrix is inverted here, at generation time, in 50-digit arithmetic
and rounded once.
"""

from __future__ import annotations

import mpmath
import numpy as np
import sympy as sp

from ..errors import MethodError
from .ir import (DENSE_LU, ELIMINATION, INVERSE, SOLVERS, G, Jacobian, LinearSolve,
                 MatrixEntry, elimination_counts)

ELIMINATION_MAX_OPERATIONS = 2500
# Digits for generation-time matrix work (inverse of a constant iteration matrix, expm): far more
# than double needs, so the one rounding to the target precision is the only one that matters.
GENERATION_DIGITS = 50
# A constant iteration matrix is inverted at generation time up to this size (the inverse is emitted
# as straight-line products, size^2 multiply-adds per solve); larger ones are factored at run time.
MAX_PREINVERTED_SIZE = 32


def matrix_entries(jac: Jacobian, coefficients) -> tuple[MatrixEntry, ...]:
    """Entries of M = I - (C (x) J) for a block coefficient matrix C (s x s), row-major.

    coefficients[p][q] is h a_pq (exact), or G for a single stage-by-stage block.
    """
    n = jac.nx
    s = len(coefficients)
    cells: dict[tuple[int, int], list] = {}
    for p in range(s):
        for i in range(n):
            cells.setdefault((p * n + i, p * n + i), [])
    for p in range(s):
        for q in range(s):
            cpq = coefficients[p][q]
            if cpq == 0:
                continue
            for k, (i, j) in enumerate(jac.pattern):
                cells.setdefault((p * n + i, q * n + j), []).append((cpq, k))
    return tuple(MatrixEntry(row=r, col=c, one=(r == c), terms=tuple(cells[(r, c)]))
                 for r, c in sorted(cells))


def fill_in(size: int, pattern: set, order) -> tuple[tuple[int, int], ...]:
    """Pattern of L + U after elimination in the given pivot order (no pivoting), sorted."""
    filled = set(pattern)
    position = {v: k for k, v in enumerate(order)}
    for k in order:
        below = sorted(i for i in range(size) if (i, k) in filled and position[i] > position[k])
        right = sorted(j for j in range(size) if (k, j) in filled and position[j] > position[k])
        for i in below:
            for j in right:
                filled.add((i, j))
    return tuple(sorted(filled))


def _rcm(size: int, pattern) -> tuple[int, ...]:
    """Reverse Cuthill-McKee order of the symmetrized pattern (keeps fill-in low)."""
    from scipy.sparse import csr_matrix
    from scipy.sparse.csgraph import reverse_cuthill_mckee

    rows = [r for r, c in pattern] + [c for r, c in pattern]
    cols = [c for r, c in pattern] + [r for r, c in pattern]
    graph = csr_matrix((np.ones(len(rows)), (rows, cols)), shape=(size, size))
    return tuple(int(v) for v in reverse_cuthill_mckee(graph, symmetric_mode=True))


def _mp_matrix(entries, size: int, jac_values, scale) -> mpmath.matrix:
    m = mpmath.matrix(size, size)
    for e in entries:
        value = mpmath.mpf(1) if e.one else mpmath.mpf(0)
        for coeff, k in e.terms:
            c = scale if coeff == G else coeff
            value -= _mp(c) * _mp(jac_values[k])
        m[e.row, e.col] = value
    return m


def _mp(value) -> mpmath.mpf:
    return mpmath.mpf(sp.Float(sp.N(value, GENERATION_DIGITS), GENERATION_DIGITS)._mpf_)


def _inverse(m: mpmath.matrix, where: str) -> tuple[tuple[sp.Float, ...], ...]:
    size = m.rows
    try:
        inv = m ** -1
    except ZeroDivisionError:
        inv = None
    if inv is None or any(not mpmath.isfinite(inv[i, j]) for i in range(size) for j in range(size)):
        raise MethodError(f"{where}: the iteration matrix I - h*a*J is singular at this step; "
                          "change --dt or the method")
    norm_m = max(sum(abs(m[i, j]) for j in range(size)) for i in range(size))
    norm_inv = max(sum(abs(inv[i, j]) for j in range(size)) for i in range(size))
    if norm_m * norm_inv > mpmath.mpf(10) ** 12:
        raise MethodError(f"{where}: the iteration matrix I - h*a*J is nearly singular at this step "
                          f"(condition ~{float(norm_m * norm_inv):.2g}); change --dt or the method")
    return tuple(tuple(sp.Float(mpmath.nstr(inv[i, j], GENERATION_DIGITS), GENERATION_DIGITS)
                       for j in range(size)) for i in range(size))


def plan_solve(jac: Jacobian, coefficients, diagonals=(), solver: str = "auto",
               where: str = "", allow_inverse: bool = True) -> LinearSolve:
    """Choose and lay out the linear solve for M = I - (coefficients (x) J).

    diagonals: the run-time values of G (stage-by-stage blocks); used to pre-invert M when J is
    constant; allow_inverse False factors M at run time even then (h changes at run time).
    """
    if solver not in SOLVERS:
        raise MethodError(f"--linear-solve: must be one of {', '.join(SOLVERS)}, got {solver!r}")
    entries = matrix_entries(jac, coefficients)
    size = jac.nx * len(coefficients)
    # With J = 0 (rates free of the state) M = I at every h and for every solver choice: its
    # inverse is the identity, and a run-time factor would have no Jacobian to read.
    if not jac.pattern or (jac.values is not None and solver == "auto"
                           and size <= MAX_PREINVERTED_SIZE and allow_inverse):
        with mpmath.workdps(GENERATION_DIGITS):
            if diagonals:
                inverses = tuple(_inverse(_mp_matrix(entries, size, jac.values, _mp(g)), where)
                                 for g in diagonals)
            else:
                inverses = (_inverse(_mp_matrix(entries, size, jac.values, None), where),)
        return LinearSolve(kind=INVERSE, size=size, entries=entries, diagonals=tuple(diagonals),
                           inverses=inverses)
    pattern = {(e.row, e.col) for e in entries}
    order = _rcm(size, sorted(pattern))
    filled = fill_in(size, pattern, order)
    sparse_cost = sum(elimination_counts(size, set(filled), order))
    dense_cost = (2 * size ** 3) // 3 + 2 * size * size
    use_elimination = solver == ELIMINATION or (
        solver == "auto" and sparse_cost <= min(ELIMINATION_MAX_OPERATIONS, dense_cost))
    if use_elimination:
        return LinearSolve(kind=ELIMINATION, size=size, entries=entries, order=order,
                           filled=filled, diagonals=tuple(diagonals))
    return LinearSolve(kind=DENSE_LU, size=size, entries=entries, diagonals=tuple(diagonals))
