"""One exception hierarchy for every stage of the pipeline.

Every message reads like a compiler diagnostic: the file, the item, what is wrong and the fix,
for example ``heater.toml: states.T.rate: unknown symbol 'Tamb' (did you mean 'T_amb'?)``.
"""

from __future__ import annotations


# Characters that would split a message over lines (or move the cursor) when it quotes user text.
_BREAKS = {**{code: f"\\x{code:02x}" for code in (*range(32), 127)},
           0x85: "\\x85", 0x2028: "\\u2028", 0x2029: "\\u2029"}


def one_line(text: str) -> str:
    """text with line breaks and control characters written as escapes (\\r, \\x00, ...)."""
    return str(text).translate(_BREAKS)


class TickwrightError(Exception):
    """Base of every error the tool reports as one line (exit status 1).

    The message is kept on one line whatever user text it quotes (a unit with a carriage
    return, a name with a newline): control characters are shown as escapes.
    """

    def __init__(self, message: str = "", *args):
        super().__init__(one_line(message), *args)


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
