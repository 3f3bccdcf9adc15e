"""Reports for people and programs: text lines (text), JSON data (json) and pictures (plots).

``CheckOutcome`` gathers what one `tickwright check` found, so the text and the JSON of a check
are two views of one value.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

from ..errors import CheckError
from ..verify import CheckReport


@dataclass(frozen=True)
class CheckOutcome:
    """The check report plus what the options added: error estimates, target runs, pictures.

    method_name: the method's full name (the report carries its id); method_note: how its
    conditions were decided when its data are decimals (methods.tolerance_note), else ''; estimates:
    verify.estimate.EstimateCheck per precision; targets: targets.TargetReport per target and
    precision; pictures: the files written.
    """

    report: CheckReport
    method_name: str
    estimates: tuple = ()
    targets: tuple = ()
    pictures: tuple[Path, ...] = ()
    method_note: str = ""

    def __post_init__(self):
        for name in ("estimates", "targets", "pictures"):
            if not isinstance(getattr(self, name), tuple):
                raise CheckError(f"CheckOutcome.{name}: must be a tuple, got "
                                 f"{type(getattr(self, name)).__name__}")

    @property
    def passed(self) -> bool:
        """Every check passed: the report's, each error estimate's and each target run's."""
        return bool(self.report.passed and all(e.passed for e in self.estimates)
                    and all(t.passed for t in self.targets))
