"""Stage 2 of the pipeline: the method, as data with its published source.

- ``types``: the method protocol and its three implementations (Butcher tableau, Rosenbrock
  method, exact zero-order hold), each with a declared kind;
- ``data``: every built-in method and its source;
- ``values``: exact numbers from text; ``files``: methods from data and users' method files
  (tableaux and Rosenbrock methods);
- ``analysis``: order conditions (rooted trees), stability functions, A-/L-stability and
  stability limits of any method.
"""

from __future__ import annotations

import difflib

from ..errors import MethodError
from .data import ALIASES, EXACT_METHODS, EXPLICIT_TABLEAUX, IMPLICIT_TABLEAUX, ROSENBROCK_METHODS
from .files import (load_method_file, method_from_data, rosenbrock_from_data, tableau_from_data,
                    tolerance_note, with_order)
from .types import (DECIMAL_DATA_TOL, DIAGONALLY_IMPLICIT, EXACT, EXPLICIT, FULLY_IMPLICIT, KINDS,
                    LINEARLY_IMPLICIT, NEWTON_KINDS, ExactDiscretization, LinearlyImplicit, Method,
                    Tableau)
from .values import exact

__all__ = ["DECIMAL_DATA_TOL", "DIAGONALLY_IMPLICIT", "EXACT", "EXPLICIT", "FULLY_IMPLICIT",
           "KINDS", "LINEARLY_IMPLICIT", "NEWTON_KINDS", "ExactDiscretization",
           "LinearlyImplicit", "Method", "Tableau", "builtin", "builtin_ids", "exact",
           "load_method_file", "method_from_data", "rosenbrock_from_data", "tableau_from_data",
           "tolerance_note", "with_order"]

# Every built-in tableau, explicit ones first, in the order they are listed.
BUILTIN_TABLEAUX: dict[str, dict] = {**EXPLICIT_TABLEAUX, **IMPLICIT_TABLEAUX}

_CACHE: dict[str, Method] = {}


def builtin_ids() -> list[str]:
    """The built-in method ids in the order they are listed."""
    return list(BUILTIN_TABLEAUX) + list(ROSENBROCK_METHODS) + list(EXACT_METHODS)


def builtin(method_id: str) -> Method:
    """The built-in method with this id (or alias): a Tableau, LinearlyImplicit or exact method."""
    key = ALIASES.get(method_id, method_id)
    if key not in builtin_ids():
        hint = difflib.get_close_matches(method_id, builtin_ids() + list(ALIASES), n=1)
        fix = f"did you mean '{hint[0]}'?" if hint else "see 'tickwright methods'"
        raise MethodError(f"--method: unknown method '{method_id}' ({fix})")
    if key not in _CACHE:
        if key in ROSENBROCK_METHODS:
            _CACHE[key] = rosenbrock_from_data(ROSENBROCK_METHODS[key], f"built-in method {key}",
                                               key)
        elif key in EXACT_METHODS:
            _CACHE[key] = ExactDiscretization(id=key, **EXACT_METHODS[key])
        else:
            _CACHE[key] = tableau_from_data(BUILTIN_TABLEAUX[key], f"built-in method {key}", key)
    return _CACHE[key]
