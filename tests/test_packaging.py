"""A plain, non-editable install works from any folder: wheel -> fresh venv -> tickwright demo;
the wheel ships the templates and registers the pytest plugin."""

from __future__ import annotations

import subprocess
import zipfile


def test_wheel_ships_templates_targets_and_examples(wheel):
    names = zipfile.ZipFile(wheel).namelist()
    for needed in ("codegen/data/templates/source.c.j2", "codegen/data/templates/header.h.j2",
                   "codegen/data/templates/macros.j2", "codegen/data/examples/heater.toml",
                   "codegen/data/examples/axis.toml", "codegen/data/targets/host.toml",
                   "codegen/methods/analysis.py", "codegen/cli.py",
                   "codegen/data/templates/review.html.j2", "codegen/data/templates/cmake.txt.j2",
                   "codegen/data/templates/make.mk.j2",
                   "codegen/data/templates/toolchain.cmake.j2"):
        assert needed in names, needed
    assert any(n.startswith("codegen/data/targets/") and n.endswith(".toml") for n in names)
    assert not any(n.startswith("tests/") for n in names)


def test_wheel_requires_pint_so_a_plain_install_pulls_the_unit_check(wheel):
    archive = zipfile.ZipFile(wheel)
    (metadata,) = [n for n in archive.namelist() if n.endswith(".dist-info/METADATA")]
    requires = [line.split(":", 1)[1].strip() for line in
                archive.read(metadata).decode().splitlines() if line.startswith("Requires-Dist:")]
    assert any(r.startswith("pint") and "extra ==" not in r for r in requires), requires


def test_wheel_installs_into_a_fresh_venv_and_runs_from_another_folder(venv, tmp_path):
    py = venv / "python"
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    where = subprocess.run([str(py), "-c", "import codegen; print(codegen.__file__)"],
                           cwd=elsewhere, check=True, capture_output=True, text=True).stdout
    assert str(venv.parent) in where, where
    tool = venv / "tickwright"
    help_text = subprocess.run([str(tool), "--help"], cwd=elsewhere, check=True,
                               capture_output=True, text=True).stdout
    assert "emit" in help_text and "check" in help_text
    demo = subprocess.run([str(tool), "demo", "--out", "gen"], cwd=elsewhere,
                          capture_output=True, text=True)
    assert demo.returncode == 0, demo.stderr
    assert "verdict: PASS" in demo.stdout
    assert (elsewhere / "gen" / "axis.c").exists()


def test_wheel_registers_the_pytest_plugin(wheel):
    archive = zipfile.ZipFile(wheel)
    (entry_points,) = [n for n in archive.namelist() if n.endswith(".dist-info/entry_points.txt")]
    text = archive.read(entry_points).decode()
    assert "[pytest11]\ntickwright = codegen.pytest_plugin" in text, text
    assert "codegen/pytest_plugin.py" in archive.namelist()
