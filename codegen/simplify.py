"""Stage 4: StepProgram -> StepProgram with common subexpressions of each block shared.

CSE runs inside the rate function and the output function only (the stages stay arrays).
order='none' is several times faster than the canonical order on large blocks and was
byte-reproducible across hash seeds (measured; a regression test regenerates under two seeds).
"""

from __future__ import annotations

import dataclasses

import sympy as sp

from .discretize import Assign, Block, StepProgram
from .model import INTERNAL_PREFIX


def cse_block(block: Block, prefix: str) -> Block:
    """Share common subexpressions of a block; temporaries are named ``<prefix>0, 1, ...``."""
    if not block.results:
        return block
    names = sp.numbered_symbols(prefix, real=True)
    replacements, reduced = sp.cse([e for _, e in block.results], symbols=names, order="none")
    temporaries = tuple(Assign(sym, expr) for sym, expr in replacements)
    results = tuple((name, expr) for (name, _), expr in zip(block.results, reduced))
    return Block(temporaries=block.temporaries + temporaries, results=results)


def simplify(step: StepProgram) -> StepProgram:
    """Share common subexpressions inside the rate and output blocks."""
    return dataclasses.replace(step, rates=cse_block(step.rates, INTERNAL_PREFIX + "r"),
                               outputs=cse_block(step.outputs, INTERNAL_PREFIX + "o"))
