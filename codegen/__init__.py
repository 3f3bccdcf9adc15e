"""tickwright: symbolic ODE model + Runge-Kutta method -> checked, dependency-free C for firmware.

The package follows the pipeline, one stage per module:
model -> method -> discretize -> simplify -> emit (printer + templates) -> build -> verify.

The Python API (codegen.api, documented in the README) is available from here:
``compile_model`` builds a model's C with cffi and returns a ``CompiledModel`` whose
``simulate`` and ``reference`` run the C and the independent reference over numpy arrays, each
returning a labelled ``Replay``; ``load_model`` reads a model file. They are imported on first
use, so that ``import codegen`` (and the command line) stays quick.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

__version__ = "0.1.0"

if TYPE_CHECKING:  # what the lazy attributes below are, for type checkers and editors
    from .api import CompiledModel, compile_model, reference_run
    from .errors import TickwrightError
    from .model import load_model
    from .run import Replay

# Public name -> the module that defines it (imported on first use).
_PUBLIC = {"compile_model": "api", "CompiledModel": "api", "reference_run": "api",
           "Replay": "run", "load_model": "model", "TickwrightError": "errors"}

__all__ = ["CompiledModel", "Replay", "TickwrightError", "__version__", "compile_model",
           "load_model", "reference_run"]


def __getattr__(name: str):
    """The public names of _PUBLIC, imported from their modules on first use."""
    if name in _PUBLIC:
        import importlib

        return getattr(importlib.import_module(f".{_PUBLIC[name]}", __name__), name)
    raise AttributeError(f"module 'codegen' has no attribute '{name}'")
