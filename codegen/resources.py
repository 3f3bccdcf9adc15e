"""Where the shipped data folders live: inside the installed package, or beside it in a checkout."""

from __future__ import annotations

from pathlib import Path

_PACKAGE = Path(__file__).resolve().parent


def data_dir(name: str) -> Path:
    """The folder ``templates``, ``targets`` or ``examples``: the installed copy (package data under
    ``codegen/data``) first, then the source checkout."""
    for candidate in (_PACKAGE / "data" / name, _PACKAGE.parent / name):
        if candidate.is_dir():
            return candidate
    raise FileNotFoundError(f"tickwright installation is missing its '{name}' folder")


def templates_dir() -> Path:
    return data_dir("templates")


def targets_dir() -> Path:
    return data_dir("targets")


def examples_dir() -> Path:
    return data_dir("examples")
