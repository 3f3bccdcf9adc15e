"""The method types: one protocol for every kind of method the generator knows.

Every method has an ``id``, a ``name``, a declared ``kind``, ``stages``, ``order`` (None when the
method has no finite order), ``embedded_order``, ``b_hat``, ``tolerance`` (0 for exact data, else
the tolerance its conditions are decided to) and ``source`` (the full published citation). Three
classes implement it:

- ``Tableau``: a Runge-Kutta method given by its Butcher tableau (s, A, b, c); its kind
  (explicit, diagonally implicit, fully implicit) is the shape of its matrix A;
- ``LinearlyImplicit``: a Rosenbrock method, kind ``linearly implicit``;
- ``ExactDiscretization``: the exact zero-order-hold step of a linear model, kind ``exact``.

Coefficients stay exact (sympy Rational or exact radicals) until the C printer rounds them once.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Protocol

import sympy as sp

from ..errors import MethodError, located

EXPLICIT = "explicit"
DIAGONALLY_IMPLICIT = "diagonally implicit"
FULLY_IMPLICIT = "fully implicit"
LINEARLY_IMPLICIT = "linearly implicit"
EXACT = "exact"
KINDS = (EXPLICIT, DIAGONALLY_IMPLICIT, FULLY_IMPLICIT, LINEARLY_IMPLICIT, EXACT)
# The kinds solved by Newton's method on the stage equations.
NEWTON_KINDS = (DIAGONALLY_IMPLICIT, FULLY_IMPLICIT)

# Tableaux written in rounded decimals (as many are published) meet their conditions only to about
# the digits given: a difference below this counts as zero for every condition of such a tableau
# (row sums, weight sums, order conditions). Far below double rounding (1.1e-16 relative is not
# reachable by 17 printed digits, 1e-12 is), far above the effect of any exact entry.
DECIMAL_DATA_TOL = 1e-12


class Method(Protocol):
    """What the rest of the pipeline may ask of any method."""

    id: str
    name: str
    source: str
    b_hat: tuple[sp.Expr, ...] | None
    embedded_order: int | None
    tolerance: float

    @property
    def kind(self) -> str: ...

    @property
    def stages(self) -> int: ...

    @property
    def order(self) -> int | None: ...

    @property
    def is_explicit(self) -> bool: ...


def negligible(value: sp.Expr, tolerance: float) -> bool:
    """Exactly zero (tolerance 0), or at most tolerance in magnitude (evaluated at 30 digits)."""
    value = sp.sympify(value)
    value = sp.nsimplify(value) if value.is_Float else value
    if value == 0:
        return True
    if tolerance > 0:
        return abs(float(sp.N(value, 30))) <= tolerance
    # Radicals can cancel only after expansion: (1 - sqrt(2)/2) + sqrt(2)/2 - 1 is zero.
    return not value.is_Rational and sp.radsimp(sp.expand(value)) == 0


def unit_lower_inverse(m: tuple[tuple[sp.Expr, ...], ...]) -> list[list[sp.Expr]]:
    """(I - m)^-1 for a strictly lower triangular m, exact, by forward substitution."""
    s = len(m)
    inv = [[sp.Integer(1 if i == j else 0) for j in range(s)] for i in range(s)]
    for i in range(s):
        for j in range(i):
            inv[i][j] = sp.expand(sum((m[i][k] * inv[k][j] for k in range(j, i)), sp.Integer(0)))
    return inv


@dataclass(frozen=True)
class Tableau:
    """A Butcher tableau with exact coefficients, validated on construction.

    a is s x s, b and c have length s; b_hat (optional) are the weights of an embedded
    lower-order solution used for a local error estimate. tolerance is 0 for exact data (every
    condition must hold exactly) and positive for data given in rounded decimals or rounded on
    purpose (every condition holds to within it); the same tolerance decides the row sums here and
    the order conditions in the analysis.
    """

    id: str
    name: str
    a: tuple[tuple[sp.Expr, ...], ...]
    b: tuple[sp.Expr, ...]
    c: tuple[sp.Expr, ...]
    order: int | None = None
    b_hat: tuple[sp.Expr, ...] | None = None
    embedded_order: int | None = None
    source: str = ""
    tolerance: float = 0.0
    origin: str = field(default="", compare=False)  # file or table it came from, for diagnostics
    digest: str = field(default="", compare=False)  # SHA-256 of the method file ('' built in)

    def __post_init__(self) -> None:
        s = len(self.b)
        where = self.origin or self.id or self.name
        if s == 0:
            raise MethodError(located(where, "b", "a tableau needs at least one stage"))
        if len(self.a) != s or any(len(row) != s for row in self.a):
            raise MethodError(located(where, "a", f"must be {s} rows of {s} entries to match b"))
        if len(self.c) != s:
            raise MethodError(located(where, "c", f"must have {s} entries to match b"))
        for i, row in enumerate(self.a):
            if not negligible(sum(row) - self.c[i], self.tolerance):
                raise MethodError(located(
                    where, f"a[{i}]", f"row sums to {sp.nsimplify(sum(row))} but c[{i}] = {self.c[i]}; "
                    "the row sums of a must equal c"))
        if not negligible(sum(self.b) - 1, self.tolerance):
            raise MethodError(located(where, "b", f"weights sum to {sum(self.b)}, they must sum to 1"))
        if self.b_hat is not None:
            if len(self.b_hat) != s:
                raise MethodError(located(where, "b_hat", f"must have {s} entries to match b"))
            if not negligible(sum(self.b_hat) - 1, self.tolerance):
                raise MethodError(located(where, "b_hat", "embedded weights must sum to 1"))
        if self.order is not None and self.order < 1:
            raise MethodError(located(where, "order", "must be a positive whole number"))

    @property
    def stages(self) -> int:
        return len(self.b)

    @property
    def kind(self) -> str:
        """Explicit, diagonally implicit or fully implicit: the shape of the matrix a."""
        s = self.stages
        if all(self.a[i][j] == 0 for i in range(s) for j in range(i, s)):
            return EXPLICIT
        if all(self.a[i][j] == 0 for i in range(s) for j in range(i + 1, s)):
            return DIAGONALLY_IMPLICIT
        return FULLY_IMPLICIT

    @property
    def is_explicit(self) -> bool:
        return self.kind == EXPLICIT

    def floats(self):
        """(a, b, c) as float64 numpy arrays for the numerical reference."""
        import numpy as np

        a = np.array([[float(v) for v in row] for row in self.a])
        return a, np.array([float(v) for v in self.b]), np.array([float(v) for v in self.c])


@dataclass(frozen=True)
class LinearlyImplicit:
    """A Rosenbrock (linearly implicit) method: one linear solve per stage, no Newton loop.

    (I - gamma h J) k_i = f(t + c_i h, y + h sum_j alpha_ij k_j) + sum_j coupling_ij k_j
                          + time_i h df/dt,
    y_next = y + h sum_i b_i k_i, with J = df/dx at (t, y). alpha and coupling are strictly lower
    triangular. In the form of Hairer & Wanner (their Gamma = gamma (I - coupling)^-1, their alpha
    = alpha (I - coupling)^-1) the stage times c_i are the row sums of their alpha and the time
    weights time_i the row sums of their Gamma; both are derived here, not given.
    b_hat (optional) are the weights of an embedded solution for a local error estimate;
    tolerance is 0 for exact data, else the tolerance the order conditions are decided to.

    References
    ----------
    Hairer & Wanner, Solving ODEs II, section IV.7 (from memory); Verwer, Spee, Blom &
    Hundsdorfer 1999, SIAM J. Sci. Comput. 20(4).
    """

    id: str
    name: str
    gamma: sp.Expr
    alpha: tuple[tuple[sp.Expr, ...], ...]
    coupling: tuple[tuple[sp.Expr, ...], ...]
    b: tuple[sp.Expr, ...]
    order: int | None = None
    source: str = ""
    b_hat: tuple[sp.Expr, ...] | None = None
    embedded_order: int | None = None
    tolerance: float = 0.0
    origin: str = field(default="", compare=False)
    digest: str = field(default="", compare=False)

    def __post_init__(self) -> None:
        s = len(self.b)
        where = self.origin or self.id
        if s == 0:
            raise MethodError(located(where, "b", "a method needs at least one stage"))
        for item, rows in (("alpha", self.alpha), ("coupling", self.coupling)):
            if len(rows) != s or any(len(r) != s for r in rows) or \
                    any(rows[i][j] != 0 for i in range(s) for j in range(i, s)):
                raise MethodError(located(where, item, f"must be {s} x {s} and strictly lower "
                                          "triangular (zeros on and above the diagonal)"))
        if self.b_hat is not None and len(self.b_hat) != s:
            raise MethodError(located(where, "b_hat", f"must have {s} entries to match b"))
        if negligible(self.gamma, 0.0) or not self.gamma.is_positive:
            raise MethodError(located(where, "gamma", "must be positive"))
        if self.order is not None and self.order < 1:
            raise MethodError(located(where, "order", "must be a positive whole number"))

    kind = LINEARLY_IMPLICIT

    @property
    def stages(self) -> int:
        return len(self.b)

    @property
    def c(self) -> tuple[sp.Expr, ...]:
        """Stage times: row sums of alpha (I - coupling)^-1 (Hairer & Wanner's alpha_i)."""
        inv = unit_lower_inverse(self.coupling)
        s = self.stages
        return tuple(sp.expand(sum((self.alpha[i][k] * inv[k][j] for k in range(s)
                                    for j in range(s)), sp.Integer(0))) for i in range(s))

    @property
    def time(self) -> tuple[sp.Expr, ...]:
        """Weights of h df/dt: gamma times the row sums of (I - coupling)^-1 (their gamma_i)."""
        inv = unit_lower_inverse(self.coupling)
        return tuple(sp.expand(self.gamma * sum(row, sp.Integer(0))) for row in inv)

    @property
    def is_explicit(self) -> bool:
        return False


@dataclass(frozen=True)
class ExactDiscretization:
    """Exact zero-order-hold discretization of a model linear in states and inputs.

    x(t + h) = expm(A h) x + (int_0^h expm(A s) ds) (B u + e), computed at generation time.
    No finite order: the step is exact for inputs held over the tick.
    """

    id: str
    name: str
    source: str = ""

    kind = EXACT
    order = None
    embedded_order = None
    b_hat = None
    tolerance = 0.0
    stages = 1  # one application of the propagator per step

    @property
    def is_explicit(self) -> bool:
        return False
