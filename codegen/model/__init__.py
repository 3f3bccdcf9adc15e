"""Stage 1 of the pipeline: the model x' = f(t, x, u, p), from a TOML file or from sympy directly.

- ``types``: the frozen, validated ``Model`` and its quantities (``State``, ``Input``,
  ``Parameter``, ``Output``), built from Python with ``define``;
- ``expressions``: the expression language, translated from Python's syntax tree into sympy by
  hand (no eval);
- ``loader``: model files (TOML) -> ``Model``;
- ``units``: the unit check (pint): known unit strings, rates in their state's unit per second,
  dimensionally consistent expressions (``check_units``).
"""

from .expressions import parse_expression
from .loader import load_model, model_from_data
from .types import (C_KEYWORDS, INTERNAL_PREFIX, NON_SMOOTH_FUNCTIONS, RESERVED_NAMES, Input, Model,
                    Output, Parameter, Quantity, State, define, non_smooth)
from .units import check_units

__all__ = ["C_KEYWORDS", "INTERNAL_PREFIX", "NON_SMOOTH_FUNCTIONS", "RESERVED_NAMES", "Input",
           "Model", "Output", "Parameter", "Quantity", "State", "check_units", "define",
           "load_model", "model_from_data", "non_smooth", "parse_expression"]
