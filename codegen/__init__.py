"""tickwright: symbolic ODE model + Runge-Kutta method -> checked, dependency-free C for firmware.

The package follows the pipeline, one stage per module:
model -> method -> discretize -> simplify -> emit (printer + templates) -> build -> verify.
"""

__version__ = "0.1.0"
