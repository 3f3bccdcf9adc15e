"""The independent Python reference: the same method, run with numpy straight from the model.

- ``numeric``: the model's own expressions as float64 functions (sympy's lambdify, no CSE, no C
  printer in between);
- ``steppers``: one step of any method kind;
- ``trajectory``: ticks of the reference, and the high-accuracy solution (scipy's solve_ivp).
"""

from .numeric import jacobian_function, numeric, output_function, rate_function
from .trajectory import TickTaker, Trajectory, high_accuracy, run
from .steppers import stepper

__all__ = ["TickTaker", "Trajectory", "high_accuracy", "jacobian_function", "numeric",
           "output_function", "rate_function", "run", "stepper"]
