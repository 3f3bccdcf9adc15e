"""Runge-Kutta methods as data: the Butcher tableau type, the built-in set and user tableau files.

A method is its tableau (s, A, b, c) with exact entries (sympy Rational or exact radicals) that stay
exact until the C printer turns them into literals.

References
----------
HNW: Hairer, Norsett & Wanner, Solving Ordinary Differential Equations I, 2nd ed., 1993.
HW: Hairer & Wanner, Solving Ordinary Differential Equations II, 2nd ed., 1996.
"""

from __future__ import annotations

import ast
import tomllib
from dataclasses import dataclass, field
from pathlib import Path

import sympy as sp

from .analysis_data import IMPLICIT_TABLEAUX, ROSENBROCK_METHODS
from .errors import MethodError, located

# Tableaux written in rounded decimals (as many are published) meet their row-sum and weight-sum
# conditions only to about the digits given; differences below this count as zero.
DECIMAL_DATA_TOL = 1e-12

EXPLICIT = "explicit"
DIAGONALLY_IMPLICIT = "diagonally implicit"
FULLY_IMPLICIT = "fully implicit"
LINEARLY_IMPLICIT = "linearly implicit"
EXACT = "exact"


@dataclass(frozen=True)
class Tableau:
    """A Butcher tableau with exact coefficients, validated on construction.

    a is s x s, b and c have length s; b_hat (optional) are the weights of an embedded
    lower-order solution used for a local error estimate.
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
    origin: str = field(default="", compare=False)  # file or table it came from, for diagnostics

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
            if not _negligible(sum(row) - self.c[i]):
                raise MethodError(located(
                    where, f"a[{i}]", f"row sums to {sp.nsimplify(sum(row))} but c[{i}] = {self.c[i]}; "
                    "the row sums of a must equal c"))
        if not _negligible(sum(self.b) - 1):
            raise MethodError(located(where, "b", f"weights sum to {sum(self.b)}, they must sum to 1"))
        if self.b_hat is not None:
            if len(self.b_hat) != s:
                raise MethodError(located(where, "b_hat", f"must have {s} entries to match b"))
            if not _negligible(sum(self.b_hat) - 1):
                raise MethodError(located(where, "b_hat", "embedded weights must sum to 1"))
        if self.order is not None and self.order < 1:
            raise MethodError(located(where, "order", "must be a positive whole number"))

    @property
    def stages(self) -> int:
        return len(self.b)

    @property
    def kind(self) -> str:
        """Explicit, diagonally implicit or fully implicit, detected from the matrix a."""
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


def _negligible(value: sp.Expr) -> bool:
    """Exactly zero, or below DECIMAL_DATA_TOL (rounded decimal data) at 30 digits."""
    value = sp.nsimplify(value) if value.is_Float else value
    if value == 0:
        return True
    return abs(float(sp.N(value, 30))) <= DECIMAL_DATA_TOL


# ---------------------------------------------------------------------------------------------
# Exact parsing of tableau entries: numbers, + - * / **, parentheses, sqrt and Rational only.
# ---------------------------------------------------------------------------------------------

_EXACT_FUNCTIONS = {"sqrt": sp.sqrt, "Rational": sp.Rational}


def exact(value, where: str = "", item: str = "") -> sp.Expr:
    """Turn a number or a string such as "1/3" or "sqrt(3)/6" into an exact sympy value.

    Floats are taken as the exact decimal they are written as (0.1 -> 1/10).
    """
    if isinstance(value, bool):
        raise MethodError(located(where, item, "expected a number or an exact string like \"1/3\""))
    if isinstance(value, int):
        return sp.Integer(value)
    if isinstance(value, float):
        if value != value or value in (float("inf"), float("-inf")):
            raise MethodError(located(where, item, "must be a finite number"))
        return sp.Rational(repr(value))
    if not isinstance(value, str):
        raise MethodError(located(where, item, "expected a number or an exact string like \"1/3\""))
    try:
        tree = ast.parse(value.strip(), mode="eval")
    except SyntaxError:
        raise MethodError(located(where, item, f"cannot read {value!r}; write a number or an exact "
                                  "expression such as \"1/3\" or \"sqrt(3)/6\"")) from None
    return _exact_node(tree.body, value, where, item)


def _exact_node(node, text, where, item):
    if isinstance(node, ast.Constant) and isinstance(node.value, (int, float)) \
            and not isinstance(node.value, bool):
        return exact(node.value, where, item)
    if isinstance(node, ast.UnaryOp) and isinstance(node.op, (ast.UAdd, ast.USub)):
        v = _exact_node(node.operand, text, where, item)
        return -v if isinstance(node.op, ast.USub) else v
    if isinstance(node, ast.BinOp) and isinstance(node.op, (ast.Add, ast.Sub, ast.Mult, ast.Div,
                                                            ast.Pow)):
        left = _exact_node(node.left, text, where, item)
        right = _exact_node(node.right, text, where, item)
        if isinstance(node.op, ast.Div) and right == 0:
            raise MethodError(located(where, item, f"division by zero in {text!r}"))
        ops = {ast.Add: lambda x, y: x + y, ast.Sub: lambda x, y: x - y,
               ast.Mult: lambda x, y: x * y, ast.Div: lambda x, y: x / y,
               ast.Pow: lambda x, y: x ** y}
        return ops[type(node.op)](left, right)
    if isinstance(node, ast.Call) and isinstance(node.func, ast.Name) \
            and node.func.id in _EXACT_FUNCTIONS and not node.keywords:
        args = [_exact_node(arg, text, where, item) for arg in node.args]
        return _EXACT_FUNCTIONS[node.func.id](*args)
    raise MethodError(located(where, item, f"{text!r} is not an exact number; only numbers, "
                              "+ - * / **, parentheses, sqrt() and Rational() are allowed"))


def _vector(values, where, item):
    if not isinstance(values, list) or not values:
        raise MethodError(located(where, item, "must be a non-empty list of numbers"))
    return tuple(exact(v, where, f"{item}[{i}]") for i, v in enumerate(values))


def tableau_from_data(data: dict, where: str, method_id: str = "") -> Tableau:
    """Build a Tableau from a plain dict (a TOML document or a built-in table row)."""
    known = {"name", "a", "b", "c", "order", "b_hat", "embedded_order", "source"}
    for key in data:
        if key not in known:
            raise MethodError(located(where, key, f"unknown key; expected one of {sorted(known)}"))
    for key in ("name", "a", "b", "c"):
        if key not in data:
            raise MethodError(located(where, key, "missing; a tableau needs name, a, b and c"))
    if not isinstance(data["name"], str) or not data["name"].strip():
        raise MethodError(located(where, "name", "must be a non-empty string"))
    rows = data["a"]
    if not isinstance(rows, list) or not all(isinstance(r, list) for r in rows):
        raise MethodError(located(where, "a", "must be a list of rows, each a list of numbers"))
    a = tuple(tuple(exact(v, where, f"a[{i}][{j}]") for j, v in enumerate(row))
              for i, row in enumerate(rows))
    b = _vector(data["b"], where, "b")
    c = _vector(data["c"], where, "c")
    b_hat = _vector(data["b_hat"], where, "b_hat") if "b_hat" in data else None
    order = data.get("order")
    for key in ("order", "embedded_order"):
        value = data.get(key)
        if value is not None and (not isinstance(value, int) or isinstance(value, bool)):
            raise MethodError(located(where, key, "must be a whole number"))
    return Tableau(id=method_id or data["name"], name=data["name"], a=a, b=b, c=c, order=order,
                   b_hat=b_hat, embedded_order=data.get("embedded_order"),
                   source=data.get("source", "user tableau " + where), origin=where)


def load_tableau(path: str | Path) -> Tableau:
    """Read a user tableau from a TOML file (keys name, a, b, c, optional order and b_hat)."""
    path = Path(path)
    try:
        data = tomllib.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise MethodError(f"{path}: file not found") from None
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise MethodError(f"{path}: not valid TOML: {exc}") from None
    return tableau_from_data(data, str(path), method_id=path.stem)


# ---------------------------------------------------------------------------------------------
# Built-in tableaux: data plus published source. Entries are exact strings.
# ---------------------------------------------------------------------------------------------

BUILTIN_TABLEAUX: dict[str, dict] = {
    "euler": dict(
        name="forward Euler", order=1, c=[0], b=[1], a=[[0]],
        source="HNW I, section II.1 (from memory)"),
    "midpoint": dict(
        name="explicit midpoint (RK2)", order=2, c=[0, "1/2"], b=[0, 1],
        a=[[0, 0], ["1/2", 0]],
        source="HNW I, section II.1 (from memory)"),
    "heun": dict(
        name="Heun (explicit trapezoid)", order=2, c=[0, 1], b=["1/2", "1/2"],
        a=[[0, 0], [1, 0]],
        source="HNW I, section II.1 (from memory); 'modified Euler' in Burden & Faires ch. 5"),
    "ralston2": dict(
        name="Ralston 2", order=2, c=[0, "2/3"], b=["1/4", "3/4"],
        a=[[0, 0], ["2/3", 0]],
        source="Ralston 1962, Math. Comp. 16 (from memory)"),
    "kutta3": dict(
        name="Kutta 3", order=3, c=[0, "1/2", 1], b=["1/6", "2/3", "1/6"],
        a=[[0, 0, 0], ["1/2", 0, 0], [-1, 2, 0]],
        source="HNW I, Table 1.1 (from memory)"),
    "ssprk3": dict(
        name="SSPRK3 (Shu-Osher)", order=3, c=[0, 1, "1/2"], b=["1/6", "1/6", "2/3"],
        a=[[0, 0, 0], [1, 0, 0], ["1/4", "1/4", 0]],
        source="Shu & Osher 1988, J. Comput. Phys. 77 (from memory)"),
    "rk4": dict(
        name="classical RK4", order=4, c=[0, "1/2", "1/2", 1], b=["1/6", "1/3", "1/3", "1/6"],
        a=[[0, 0, 0, 0], ["1/2", 0, 0, 0], [0, "1/2", 0, 0], [0, 0, 1, 0]],
        source="HNW I, Table 1.2 (from memory)"),
    "rk4-38": dict(
        name="3/8 rule", order=4, c=[0, "1/3", "2/3", 1], b=["1/8", "3/8", "3/8", "1/8"],
        a=[[0, 0, 0, 0], ["1/3", 0, 0, 0], ["-1/3", 1, 0, 0], [1, -1, 1, 0]],
        source="HNW I, Table 1.2 (from memory)"),
    "bs3": dict(
        name="Bogacki-Shampine 3(2)", order=3, embedded_order=2,
        c=[0, "1/2", "3/4", 1], b=["2/9", "1/3", "4/9", 0],
        b_hat=["7/24", "1/4", "1/3", "1/8"],
        a=[[0, 0, 0, 0], ["1/2", 0, 0, 0], [0, "3/4", 0, 0], ["2/9", "1/3", "4/9", 0]],
        source="Bogacki & Shampine 1989, Appl. Math. Lett. 2 (from memory); equals scipy RK23"),
    "dp5": dict(
        name="Dormand-Prince 5(4)", order=5, embedded_order=4,
        c=[0, "1/5", "3/10", "4/5", "8/9", 1, 1],
        b=["35/384", 0, "500/1113", "125/192", "-2187/6784", "11/84", 0],
        b_hat=["5179/57600", 0, "7571/16695", "393/640", "-92097/339200", "187/2100", "1/40"],
        a=[[0, 0, 0, 0, 0, 0, 0],
           ["1/5", 0, 0, 0, 0, 0, 0],
           ["3/40", "9/40", 0, 0, 0, 0, 0],
           ["44/45", "-56/15", "32/9", 0, 0, 0, 0],
           ["19372/6561", "-25360/2187", "64448/6561", "-212/729", 0, 0, 0],
           ["9017/3168", "-355/33", "46732/5247", "49/176", "-5103/18656", 0, 0],
           ["35/384", 0, "500/1113", "125/192", "-2187/6784", "11/84", 0]],
        source="Dormand & Prince 1980, J. Comput. Appl. Math. 6 (scipy RK45 uses the same A, B, C)"),
}

# The implicit tableaux (backward Euler ... SDIRK3) live as data beside the analysis stage, with
# their published sources; they join the built-in table after dp5 so the listing stays in order.
BUILTIN_TABLEAUX.update(IMPLICIT_TABLEAUX)

# Other names a user may type for a built-in method.
ALIASES: dict[str, str] = {"crank-nicolson": "trapezoidal"}


# ---------------------------------------------------------------------------------------------
# Methods that are not Butcher tableaux: linearly implicit (Rosenbrock) and exact discretization.
# ---------------------------------------------------------------------------------------------

@dataclass(frozen=True)
class LinearlyImplicit:
    """A Rosenbrock (linearly implicit) method: one linear solve per stage, no Newton loop.

    (I - gamma h J) k_i = f(t + alpha_i h, y + h sum_j alpha_ij k_j) + sum_j coupling_ij k_j
                          + time_i h df/dt,
    y_next = y + h sum_i b_i k_i, with alpha_i = sum_j alpha_ij and J = df/dx at (t, y).

    References
    ----------
    HW, section IV.7 (from memory); Verwer, Spee, Blom & Hundsdorfer 1999, SIAM J. Sci. Comput. 20(4).
    """

    id: str
    name: str
    gamma: sp.Expr
    alpha: tuple[tuple[sp.Expr, ...], ...]
    coupling: tuple[tuple[sp.Expr, ...], ...]
    b: tuple[sp.Expr, ...]
    time: tuple[sp.Expr, ...]
    order: int | None = None
    source: str = ""
    embedded_order: None = None
    b_hat: None = None

    def __post_init__(self) -> None:
        s = len(self.b)
        for item, rows in (("alpha", self.alpha), ("coupling", self.coupling)):
            if len(rows) != s or any(len(r) != s for r in rows) or \
                    any(rows[i][j] != 0 for i in range(s) for j in range(i, s)):
                raise MethodError(located(self.id, item, f"must be {s} x {s} and strictly lower "
                                          "triangular"))
        if len(self.time) != s or len(self.b) != s:
            raise MethodError(located(self.id, "time", f"must have {s} entries to match b"))

    @property
    def stages(self) -> int:
        return len(self.b)

    @property
    def c(self) -> tuple[sp.Expr, ...]:
        return tuple(sum(row, sp.Integer(0)) for row in self.alpha)

    kind = LINEARLY_IMPLICIT
    is_explicit = False


@dataclass(frozen=True)
class ExactDiscretization:
    """Exact zero-order-hold discretization of a model linear in states and inputs.

    x(t + h) = expm(A h) x + (int_0^h expm(A s) ds) (B u + e), computed at generation time.
    No finite order: the step is exact for inputs held over the tick.
    """

    id: str
    name: str
    source: str = ""
    order: None = None
    embedded_order: None = None
    b_hat: None = None
    stages: int = 1  # one application of the propagator per step

    kind = EXACT
    is_explicit = False


# Time-derivative weights time_i of each Rosenbrock stage (needed when f depends on t explicitly):
# gamma_i = sum_j gamma_ij of the method's Gamma matrix in HW's form. For ROS2 they are (gamma,
# -gamma), which makes the step reduce to the trapezoidal rule on y' = g(t) (order 2).
ROSENBROCK_TIME_WEIGHTS: dict[str, list] = {
    "rosenbrock-euler": ["1"],
    "ros2": ["1 + 1/sqrt(2)", "-(1 + 1/sqrt(2))"],
}

EXACT_METHODS: dict[str, dict] = {
    "zoh-exact": dict(
        name="exact zero-order hold (matrix exponential)",
        source="common practice, no source; equals scipy.signal.cont2discrete(method='zoh')"),
}

_CACHE: dict[str, object] = {}


def builtin_ids() -> list[str]:
    """The built-in method ids in the order they are listed."""
    return list(BUILTIN_TABLEAUX) + list(ROSENBROCK_METHODS) + list(EXACT_METHODS)


def _rosenbrock(key: str) -> LinearlyImplicit:
    data = ROSENBROCK_METHODS[key]
    where = f"built-in method {key}"
    rows = lambda name: tuple(tuple(exact(v, where, name) for v in r) for r in data[name])
    return LinearlyImplicit(
        id=key, name=data["name"], gamma=exact(data["gamma"], where, "gamma"),
        alpha=rows("alpha"), coupling=rows("coupling"),
        b=tuple(exact(v, where, "b") for v in data["b"]),
        time=tuple(exact(v, where, "time") for v in ROSENBROCK_TIME_WEIGHTS[key]),
        order=data["order"], source=data["source"])


def builtin(method_id: str):
    """The built-in method with this id (or alias): a Tableau, LinearlyImplicit or exact method."""
    key = ALIASES.get(method_id, method_id)
    if key not in builtin_ids():
        import difflib

        hint = difflib.get_close_matches(method_id, builtin_ids() + list(ALIASES), n=1)
        fix = f"did you mean '{hint[0]}'?" if hint else "see 'tickwright methods'"
        raise MethodError(f"--method: unknown method '{method_id}' ({fix})")
    if key not in _CACHE:
        if key in ROSENBROCK_METHODS:
            _CACHE[key] = _rosenbrock(key)
        elif key in EXACT_METHODS:
            _CACHE[key] = ExactDiscretization(id=key, **EXACT_METHODS[key])
        else:
            _CACHE[key] = tableau_from_data(BUILTIN_TABLEAUX[key], f"built-in method {key}", key)
    return _CACHE[key]
