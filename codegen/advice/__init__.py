"""Advice: which method, which tick and which precision suit a model.

- ``envelope``: operating points from the declared ranges, and the eigenvalues of df/dx there;
- ``cost``: operations per tick, counted on the generated step or estimated;
- ``recommend``: stable and accurate ticks per method and the recommendation.
"""

from .recommend import Advice, MethodAdvice, advise, candidates
from .cost import OperationCount, operations_per_step, step_cost
from .envelope import OperatingPoint

__all__ = ["Advice", "MethodAdvice", "OperatingPoint", "OperationCount", "advise", "candidates",
           "operations_per_step", "step_cost"]
