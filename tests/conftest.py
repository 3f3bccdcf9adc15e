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


@pytest.fixture(scope="session")
def wheel(tmp_path_factory):
    """The wheel built from the checkout (pip wheel, no dependencies, no build isolation)."""
    import shutil
    import subprocess
    import sys

    out = tmp_path_factory.mktemp("wheel")
    src = tmp_path_factory.mktemp("src") / "tickwright"
    # Build from a copy so no build/ or egg-info folder lands in the checkout.
    shutil.copytree(ROOT, src, ignore=shutil.ignore_patterns(".git", "build", "*.egg-info",
                                                             "__pycache__", ".pytest_cache"))
    subprocess.run([sys.executable, "-m", "pip", "wheel", "--no-deps", "--no-build-isolation",
                    "-q", "-w", str(out), str(src)], check=True)
    (path,) = out.glob("tickwright-*.whl")
    return path


@pytest.fixture(scope="session")
def venv(wheel, tmp_path_factory):
    """A fresh virtual environment with the wheel installed: its bin folder.

    System site packages provide the dependencies (sympy, numpy, pytest, ...) without a
    download; the project itself comes from the wheel only, and wins over any other copy.
    """
    import subprocess
    import sys

    folder = tmp_path_factory.mktemp("venv") / "venv"
    subprocess.run([sys.executable, "-m", "venv", "--system-site-packages", str(folder)],
                   check=True)
    subprocess.run([str(folder / "bin" / "python"), "-m", "pip", "install", "-q", "--no-deps",
                    "--force-reinstall", str(wheel)], check=True)
    return folder / "bin"


def readme_block(heading: str, language: str) -> str:
    """The first fenced block of language under the README heading (its text, as written)."""
    import re

    text = (ROOT / "README.md").read_text(encoding="utf-8")
    section = text.split(heading + "\n", 1)[1]
    found = re.search(rf"```{language}\n(.*?)```", section, re.S)
    assert found, f"README: no {language} block under {heading!r}"
    return found.group(1)


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


def readme_indented_block(after: str) -> list[str]:
    """The first indented block of the README after the line that contains `after`."""
    text = (ROOT / "README.md").read_text(encoding="utf-8")
    section = text.split(after, 1)[1]
    lines = []
    for line in section.splitlines()[1:]:
        if line.startswith("    "):
            lines.append(line[4:])
        elif lines:
            break
    return lines
