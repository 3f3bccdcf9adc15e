"""Stage 8 of the pipeline: the generated C on a target (cross-compiled, emulated, measured).

- ``spec``: target descriptions (one TOML file per target);
- ``harness``: the test harness, its output and the bit-for-bit comparison with the host build;
- ``tools``: processes, code size, stack depth, double-precision symbols, MISRA findings;
- ``check``: ``check_on_target``, which puts them together into a ``TargetReport``.
"""

from .check import TargetReport, check_on_target, check_on_targets
from .harness import compare_runs, default_inputs, parse_run
from .spec import COUNTER_KINDS, Target, load_target, load_targets, parse_target
from .tools import misra_findings, stack_usage

__all__ = ["COUNTER_KINDS", "Target", "TargetReport", "check_on_target", "check_on_targets",
           "compare_runs", "default_inputs", "load_target", "load_targets", "misra_findings",
           "parse_target", "parse_run", "stack_usage"]
