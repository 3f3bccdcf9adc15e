"""Shared fixtures: the bundled example models and a helper to write model files."""

from __future__ import annotations

from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
EXAMPLES = ROOT / "examples"
DEMO_MODELS = sorted(EXAMPLES.glob("*.toml"))


@pytest.fixture(scope="session")
def heater():
    from codegen.model import load_model

    return load_model(EXAMPLES / "heater.toml")


@pytest.fixture(scope="session")
def axis():
    from codegen.model import load_model

    return load_model(EXAMPLES / "axis.toml")


@pytest.fixture
def write_model(tmp_path):
    """Write a model file from TOML text and return its path."""

    def write(text: str, name: str = "m.toml") -> Path:
        path = tmp_path / name
        path.write_text(text, encoding="utf-8")
        return path

    return write


# ---- the fuzz suite's case count -----------------------------------------------------------------

# The user property under which each fuzz test records how many generated cases it ran.
FUZZ_PROPERTY = "fuzz_cases"


def pytest_terminal_summary(terminalreporter):
    """Print how many generated cases the fuzz tests ran (summed over xdist workers too)."""
    counts: dict[str, int] = {}
    for outcome in ("passed", "failed"):
        for report in terminalreporter.stats.get(outcome, []):
            for name, value in getattr(report, "user_properties", ()):
                if name == FUZZ_PROPERTY:
                    counts[report.nodeid] = counts.get(report.nodeid, 0) + int(value)
    if counts:
        terminalreporter.write_sep("-", "fuzz cases")
        for nodeid, count in sorted(counts.items()):
            terminalreporter.write_line(f"{count:7d}  {nodeid}")
        terminalreporter.write_line(f"{sum(counts.values()):7d}  generated cases in "
                                    f"{len(counts)} fuzz tests")
