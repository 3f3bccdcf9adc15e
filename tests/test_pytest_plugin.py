"""The pytest plugin in a firmware team's own repository: the wheel installed into a fresh venv,
the README's three-line test run by pytest in a subprocess, passing on the committed files and
failing once the model changes and the files are not regenerated (as emit --check does)."""

from __future__ import annotations

import os
import shutil
import subprocess

from conftest import EXAMPLES, readme_block

EMIT = ["emit", "model/heater.toml", "--method", "rk4", "--dt", "0.5", "--out", "firmware/gen"]


def run(command, cwd):
    """Run a command of the venv without the checkout on the path (only the wheel counts)."""
    env = {k: v for k, v in os.environ.items() if k != "PYTHONPATH"}
    return subprocess.run([str(c) for c in command], cwd=cwd, capture_output=True, text=True,
                          env=env, timeout=600)


def test_the_fixture_checks_the_committed_c_and_fails_when_it_is_stale(venv, tmp_path):
    project = tmp_path / "firmware-repo"
    (project / "model").mkdir(parents=True)
    (project / "tests").mkdir()
    (project / "pytest.ini").write_text("[pytest]\n")
    shutil.copy(EXAMPLES / "heater.toml", project / "model" / "heater.toml")
    emitted = run([venv / "tickwright", *EMIT], project)
    assert emitted.returncode == 0, emitted.stderr
    (project / "tests" / "test_heater_c.py").write_text(
        readme_block("### In your pytest suite: the `tickwright_model` fixture", "python"))
    (project / "tests" / "test_cache.py").write_text(f'''
import codegen


def test_the_plugin_is_the_installed_one_and_builds_once(tickwright_model):
    assert codegen.__file__.startswith({str(venv.parent)!r})
    fresh = tickwright_model("model/heater.toml", "rk4", dt=0.5)
    assert fresh is tickwright_model("model/heater.toml", "rk4", 0.5)
    assert fresh.sources is None and fresh.simulate({{"duty": 1.0}}, ticks=10).finished
''')
    pytest_run = [venv / "python", "-m", "pytest", "-p", "no:cacheprovider", "-q"]
    passed = run(pytest_run, project)
    assert passed.returncode == 0, passed.stdout + passed.stderr
    assert "2 passed" in passed.stdout
    # The model changes (more heater power) and nobody regenerates the files.
    model = project / "model" / "heater.toml"
    model.write_text(model.read_text().replace("P = { value = 40.0", "P = { value = 44.0"))
    failed = run(pytest_run, project)
    assert failed.returncode == 1, failed.stdout
    assert "1 failed, 1 passed" in failed.stdout
    assert "heater (the C in" in failed.stdout and "does not match the model" in failed.stdout
    assert "firmware/gen/heater.c: line 3 differs" in failed.stdout
    # The CI step of the README sees the same, and passes again once the files are regenerated.
    stale = run([venv / "tickwright", *EMIT, "--check"], project)
    assert stale.returncode == 1 and len(stale.stdout.splitlines()) == 2, stale.stdout
    assert run([venv / "tickwright", *EMIT], project).returncode == 0
    assert run([venv / "tickwright", *EMIT, "--check"], project).returncode == 0
    again = run(pytest_run, project)
    assert again.returncode == 0, again.stdout
