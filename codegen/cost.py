"""Operation counts of a step program: the cost per tick before any target is involved."""

from __future__ import annotations

from dataclasses import asdict, dataclass

import sympy as sp

from .discretize import Block, StepProgram

# sympy's visual count_ops names -> our categories. Powers are small integer powers (written out
# as multiplications by the printer) or calls; both count here as one 'call' to stay conservative.
_CATEGORY = {"ADD": "add", "SUB": "add", "NEG": "add", "MUL": "mul", "DIV": "div", "POW": "call"}


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


def count_expr(expr: sp.Expr) -> OperationCount:
    counts = {"add": 0, "mul": 0, "div": 0, "sqrt": 0, "call": 0}
    visual = sp.count_ops(expr, visual=True)
    if visual == 0:
        return OperationCount()
    for term in sp.Add.make_args(visual):
        coeff, sym = term.as_coeff_Mul()
        name = str(sym)
        if name == "POW" and expr.has(sp.sqrt):
            counts["sqrt"] += int(coeff)
        else:
            counts[_CATEGORY.get(name, "call")] += int(coeff)
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
