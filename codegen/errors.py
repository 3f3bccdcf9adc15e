"""One exception hierarchy for every stage of the pipeline.

Every message reads like a compiler diagnostic: the file, the item, what is wrong and the fix,
for example ``heater.toml: states.T.rate: unknown symbol 'Tamb' (did you mean 'T_amb'?)``.
"""

from __future__ import annotations


class TickwrightError(Exception):
    """Base of every error the tool reports as one line (exit status 1)."""


class ModelError(TickwrightError):
    """A model file or a model built in Python is not valid."""


class MethodError(TickwrightError):
    """A Butcher tableau or a method id is not valid."""


class EmitError(TickwrightError):
    """The C cannot be generated or written (for example, it would overwrite foreign files)."""


class BuildError(TickwrightError):
    """A C compiler failed; carries the command and its output."""

    def __init__(self, message: str, command: list[str] | None = None, output: str = ""):
        super().__init__(message)
        self.command = command or []
        self.output = output

    def details(self) -> str:
        """The compiler command and its output, for a verbose report."""
        return " ".join(self.command) + "\n" + self.output


class CheckError(TickwrightError):
    """Input to a check, replay or advice run is not valid (for example, a bad CSV log)."""


def located(source: str, item: str, message: str) -> str:
    """Format one diagnostic line: ``source: item: message``."""
    return f"{source}: {item}: {message}" if item else f"{source}: {message}"
