"""Operation counts: the cost per tick of a step before any target is involved.

Counted on the generated step program for explicit methods; estimated from the rate and Jacobian
counts for the other kinds.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass

import sympy as sp

from ..discretize import Block, StepProgram
from ..methods import DIAGONALLY_IMPLICIT, EXACT, EXPLICIT, LINEARLY_IMPLICIT
from ..model import Model

# sympy's visual count_ops names -> our categories. Integer powers are written out as
# multiplications by the printer, other powers call pow(); both count here as one 'call' to stay
# conservative. Square roots are counted as such (see count_expr).
_CATEGORY = {"ADD": "add", "SUB": "add", "NEG": "add", "MUL": "mul", "DIV": "div", "POW": "call",
             "FUNC_TW_SQRT": "sqrt", "FUNC_TW_POWER": "call"}
# Stand-ins for powers while sympy counts: count_ops reports sqrt(x) = x**(1/2) as a POW plus a
# DIV (the exponent 1/2) and 1/sqrt(x) with a NEG as well; the printer writes sqrt(x) and
# 1/sqrt(x), one square root (and one division).
_SQRT = sp.Function("TW_SQRT")
_POWER = sp.Function("TW_POWER")
# Work of a retried step in steps: the failed attempt plus its two halves (each a full step's).
RETRY_COST = 3


@dataclass(frozen=True)
class OperationCount:
    add: int = 0
    mul: int = 0
    div: int = 0
    sqrt: int = 0
    call: int = 0

    def __add__(self, other: "OperationCount") -> "OperationCount":
        return OperationCount(**{k: getattr(self, k) + getattr(other, k) for k in asdict(self)})

    def scaled(self, n: int) -> "OperationCount":
        return OperationCount(**{k: v * n for k, v in asdict(self).items()})

    @property
    def total(self) -> int:
        return sum(asdict(self).values())

    def to_dict(self) -> dict:
        return dict(asdict(self), total=self.total)


def _as_printed(expr: sp.Expr) -> sp.Expr:
    """expr with each power replaced by what the C printer writes for it (emit.printer):
    x**(1/2) -> sqrt(x), x**(-1/2) -> 1/sqrt(x), x**(-n) -> 1/x**n, other non-integer powers ->
    one pow() call on the base."""
    if expr.is_Atom or not expr.args:
        return expr
    args = [_as_printed(a) for a in expr.args]
    if not expr.is_Pow:
        return expr.func(*args)
    base, e = args
    if e == sp.Rational(1, 2):
        return _SQRT(base)
    if e == -sp.Rational(1, 2):
        return 1 / _SQRT(base)
    if e.is_Integer:
        return 1 / _POWER(base) if e < -1 else (1 / base if e == -1 else expr.func(base, e))
    return _POWER(base) if e.is_number else _POWER(base, e)


def count_expr(expr: sp.Expr) -> OperationCount:
    """Floating-point operations of one expression as the C printer writes it.

    Add, subtract and negate count as 'add'; square roots as 'sqrt'; other functions and powers
    as 'call'.
    """
    counts = {"add": 0, "mul": 0, "div": 0, "sqrt": 0, "call": 0}
    visual = sp.count_ops(_as_printed(sp.sympify(expr)), visual=True)
    if visual == 0:
        return OperationCount()
    for term in sp.Add.make_args(visual):
        coeff, sym = term.as_coeff_Mul()
        counts[_CATEGORY.get(str(sym), "call")] += int(coeff)
    return OperationCount(**counts)


def count_block(block: Block) -> OperationCount:
    total = OperationCount()
    for a in block.temporaries:
        total = total + count_expr(a.expr)
    for _, e in block.results:
        total = total + count_expr(e)
    return total


def step_cost(step: StepProgram) -> OperationCount:
    """Floating-point operations of one tick (all substeps) of an explicit step program."""
    nx = step.model.nx
    per_step = count_block(step.rates).scaled(len(step.stages))
    for stage in step.stages:
        per_step = per_step + OperationCount(add=(len(stage.terms)) * nx, mul=len(stage.terms) * nx)
        if stage.time_offset != 0:
            per_step = per_step + OperationCount(add=1)
    per_step = per_step + OperationCount(add=len(step.weights) * nx, mul=len(step.weights) * nx)
    return per_step.scaled(step.substeps)


def _rate_operations(model: Model) -> tuple[int, int]:
    """Operations of one rate evaluation and of one Jacobian evaluation (after CSE)."""
    from ..discretize import rate_block
    from ..model import INTERNAL_PREFIX
    from ..simplify import cse_block

    f_ops = count_block(cse_block(rate_block(model), INTERNAL_PREFIX + "r")).total
    J = sp.Matrix(model.f).jacobian(sp.Matrix(model.x)).xreplace(model.baked)
    entries = tuple((f"j{i}", e) for i, e in enumerate(J) if e != 0)
    j_ops = count_block(cse_block(Block((), entries), INTERNAL_PREFIX + "j")).total
    return f_ops, j_ops


def operations_per_step(model: Model, method, newton_iterations: float | None = None,
                        refreshes: float = 0.0, retry_rate: float = 0.0):
    """(operations of one step, how they were found).

    Explicit tableaux: counted on the generated step program (cost.step_cost). Other kinds are
    estimated from the rate and Jacobian operation counts: an LU factorization costs 2/3 n^3, a
    solve 2 n^2 (common practice, no source), times the Newton iterations measured by the
    numerical model (or 3 assumed when none were measured). The allowance, measured over the
    advice's run: each Jacobian refresh per step (implicit Runge-Kutta) costs its evaluations and
    a factorization, and each retried step (a fraction retry_rate of the steps) costs a failed
    attempt and its two halves, 3 steps' work.
    """
    ops, note = _operations(model, method, newton_iterations, refreshes)
    if retry_rate > 0:
        ops = int(math.ceil(ops * (1 + RETRY_COST * retry_rate)))
        note += f", + {retry_rate:.2%} of the steps retried"
    return ops, note


def _operations(model: Model, method, newton_iterations: float | None, refreshes: float):
    """operations_per_step before the retry allowance."""
    kind = method.kind
    nx = model.nx
    if kind == EXPLICIT:
        from ..discretize import discretize
        from ..simplify import simplify

        return step_cost(simplify(discretize(model, method, 1))).total, "counted"
    f_ops, j_ops = _rate_operations(model)
    lu = lambda n: (2 * n ** 3) // 3 + n * n
    solve = lambda n: 2 * n * n
    iterations = max(1, math.ceil(newton_iterations)) if newton_iterations else 3
    if kind == EXACT:
        nu = len(model.inputs)
        return 2 * nx * (nx + nu + 1), "estimated: one matrix-vector product"
    s = method.stages
    if kind == LINEARLY_IMPLICIT:
        ops = j_ops + lu(nx) + s * (f_ops + solve(nx) + 2 * s * nx)
        return ops, "estimated: Jacobian, one LU, one solve per stage"
    a = method.a
    refreshed = f", + {refreshes:.2g} Jacobian refreshes per step" if refreshes > 0 else ""
    if kind == DIAGONALLY_IMPLICIT:
        diagonals = {a[i][i] for i in range(s) if a[i][i] != 0}
        implicit_stages = sum(1 for i in range(s) if a[i][i] != 0)
        ops = j_ops + len(diagonals) * lu(nx) + (s - implicit_stages) * f_ops + \
            implicit_stages * iterations * (f_ops + solve(nx) + 2 * s * nx) + 2 * s * nx
        ops += int(math.ceil(refreshes * (j_ops + lu(nx))))
        return ops, f"estimated: {iterations} Newton iteration(s) per stage{refreshed}"
    n = s * nx
    ops = j_ops + lu(n) + iterations * (s * f_ops + solve(n) + 2 * s * n) + 2 * s * nx
    ops += int(math.ceil(refreshes * (s * j_ops + lu(n))))  # a J per stage, one factorization
    return ops, (f"estimated: {iterations} Newton iteration(s) on the {n} x {n} stage "
                 f"system{refreshed}")
