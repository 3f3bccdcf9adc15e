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
