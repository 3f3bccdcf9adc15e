"""A plain, non-editable install works from any folder: wheel -> fresh venv -> tickwright demo."""

from __future__ import annotations

import shutil
import subprocess
import sys
import zipfile

import pytest

from conftest import ROOT


@pytest.fixture(scope="module")
def wheel(tmp_path_factory):
    out = tmp_path_factory.mktemp("wheel")
    src = tmp_path_factory.mktemp("src") / "tickwright"
    # Build from a copy so no build/ or egg-info folder lands in the checkout.
    shutil.copytree(ROOT, src, ignore=shutil.ignore_patterns(".git", "build", "*.egg-info",
                                                             "__pycache__", ".pytest_cache"))
    subprocess.run([sys.executable, "-m", "pip", "wheel", "--no-deps", "--no-build-isolation",
                    "-q", "-w", str(out), str(src)], check=True)
    (path,) = out.glob("tickwright-*.whl")
    return path


def test_wheel_ships_templates_targets_and_examples(wheel):
    names = zipfile.ZipFile(wheel).namelist()
    for needed in ("codegen/data/templates/source.c.j2", "codegen/data/templates/header.h.j2",
                   "codegen/data/templates/macros.j2", "codegen/data/examples/heater.toml",
                   "codegen/data/examples/axis.toml", "codegen/data/targets/host.toml",
                   "codegen/methods/analysis.py", "codegen/cli.py"):
        assert needed in names, needed
    assert any(n.startswith("codegen/data/targets/") and n.endswith(".toml") for n in names)
    assert not any(n.startswith("tests/") for n in names)


def test_wheel_requires_pint_so_a_plain_install_pulls_the_unit_check(wheel):
    archive = zipfile.ZipFile(wheel)
    (metadata,) = [n for n in archive.namelist() if n.endswith(".dist-info/METADATA")]
    requires = [line.split(":", 1)[1].strip() for line in
                archive.read(metadata).decode().splitlines() if line.startswith("Requires-Dist:")]
    assert any(r.startswith("pint") and "extra ==" not in r for r in requires), requires


def test_wheel_installs_into_a_fresh_venv_and_runs_from_another_folder(wheel, tmp_path):
    venv = tmp_path / "venv"
    # System site packages provide the dependencies (sympy, numpy, ...) without a download;
    # the project itself is installed into the venv from the wheel only.
    subprocess.run([sys.executable, "-m", "venv", "--system-site-packages", str(venv)], check=True)
    py = venv / "bin" / "python"
    subprocess.run([str(py), "-m", "pip", "install", "-q", "--no-deps", "--force-reinstall",
                    str(wheel)], check=True)
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    where = subprocess.run([str(py), "-c", "import codegen; print(codegen.__file__)"],
                           cwd=elsewhere, check=True, capture_output=True, text=True).stdout
    assert str(venv) in where, where
    tool = venv / "bin" / "tickwright"
    help_text = subprocess.run([str(tool), "--help"], cwd=elsewhere, check=True,
                               capture_output=True, text=True).stdout
    assert "emit" in help_text and "check" in help_text
    demo = subprocess.run([str(tool), "demo", "--out", "gen"], cwd=elsewhere,
                          capture_output=True, text=True)
    assert demo.returncode == 0, demo.stderr
    assert "verdict: PASS" in demo.stdout
    assert (elsewhere / "gen" / "axis.c").exists()
