"""The command line through click's runner: each command, its JSON and its one-line errors."""

from __future__ import annotations

import csv
import json

import pytest
from click.testing import CliRunner

from codegen.cli import main

from conftest import EXAMPLES, ROOT

HEATER = str(EXAMPLES / "heater.toml")
AXIS = str(EXAMPLES / "axis.toml")


def run(*args):
    return CliRunner().invoke(main, [str(a) for a in args])


@pytest.mark.parametrize("command", ["emit", "check", "replay", "methods", "advise", "targets",
                                     "demo", "report"])
def test_every_command_has_help(command):
    result = run(command, "--help")
    assert result.exit_code == 0 and "Usage:" in result.output


def test_emit_writes_both_files_and_refuses_foreign_ones(tmp_path):
    out = tmp_path / "gen"
    result = run("emit", HEATER, "--method", "rk4", "--dt", "0.1", "--out", out)
    assert result.exit_code == 0, result.output
    assert sorted(p.name for p in out.iterdir()) == ["heater.c", "heater.h"]
    (out / "heater.h").write_text("// mine\n")
    result = run("emit", HEATER, "--method", "rk4", "--dt", "0.1", "--out", out)
    assert result.exit_code == 1 and "--force" in result.output
    assert (out / "heater.h").read_text() == "// mine\n"
    result = run("emit", HEATER, "--method", "rk4", "--dt", "0.1", "--out", out, "--force")
    assert result.exit_code == 0


def test_emit_with_a_user_tableau(tmp_path):
    tableau = tmp_path / "ralston.toml"
    tableau.write_text('name = "my ralston"\nc = [0, "2/3"]\nb = ["1/4", "3/4"]\n'
                       'a = [[0, 0], ["2/3", 0]]\n')
    result = run("emit", HEATER, "--tableau", tableau, "--dt", "0.1", "--out", tmp_path / "o")
    assert result.exit_code == 0, result.output
    assert "my ralston" in (tmp_path / "o" / "heater.c").read_text()


def test_user_tableau_with_a_wrong_stated_order_is_refused(tmp_path):
    tableau = tmp_path / "bad.toml"
    tableau.write_text('name = "bad"\norder = 3\nc = [0, "2/3"]\nb = ["1/4", "3/4"]\n'
                       'a = [[0, 0], ["2/3", 0]]\n')
    result = run("emit", HEATER, "--tableau", tableau, "--dt", "0.1", "--out", tmp_path / "o")
    assert result.exit_code == 1 and "order conditions give 2" in result.output
    assert not (tmp_path / "o").exists()


def test_check_json_reports_every_verdict():
    result = run("check", HEATER, "--method", "heun", "--dt", "0.5", "--json")
    assert result.exit_code == 0, result.output
    report = json.loads(result.stdout)
    assert report["passed"] is True
    assert {c["precision"] for c in report["cross_checks"]} == {"float", "double"}
    assert abs(report["order"]["measured"] - 2) <= 0.15


def test_check_text_names_each_check():
    result = run("check", AXIS, "--method", "midpoint", "--dt", "1e-4", "--precision", "float",
                 "--no-order")
    assert result.exit_code == 0, result.output
    assert "cross-check float" in result.stdout and "verdict: PASS" in result.stdout


def test_check_fails_with_exit_1_when_the_step_is_unstable():
    # The axis' electrical pole is about -2970/s: Euler at 1 ms has h*lambda = -2.97 < -2
    # (forward Euler's real-axis limit, from |1 + z| <= 1; common practice, no source), so the run
    # diverges: the stability gate stops the check before anything is built, in one line.
    result = run("check", AXIS, "--method", "euler", "--dt", "1e-3", "--precision", "double",
                 "--ticks", "2000", "--no-order")
    assert result.exit_code == 1 and result.stdout == ""
    [line] = result.output.splitlines()
    assert "beyond euler's stability limit" in line and "--force-run" in line


def test_replay_writes_one_row_per_tick_with_round_trip_values(tmp_path):
    log = tmp_path / "log.csv"
    log.write_text("t,duty\n" + "".join(f"{k * 0.1:.1f},{0.5 if k > 3 else 0.0}\n"
                                        for k in range(20)))
    out = tmp_path / "result.csv"
    result = run("replay", HEATER, "--method", "rk4", "--dt", "0.1", "--inputs", log,
                 "--out", out, "--precision", "double")
    assert result.exit_code == 0, result.output
    rows = list(csv.reader(out.open()))
    assert rows[0] == ["t", "T", "T_surface"]
    assert len(rows) == 1 + 21
    assert float(rows[1][1]) == 20.0 and float(rows[-1][0]) == pytest.approx(2.0)
    assert all(repr(float(v)) == v for row in rows[1:] for v in row)


def test_replay_without_inputs_uses_defaults_and_steps(tmp_path):
    out = tmp_path / "r.csv"
    result = run("replay", AXIS, "--method", "rk4", "--dt", "1e-4", "--steps", "7", "--out", out)
    assert result.exit_code == 0, result.output
    assert len(out.read_text().splitlines()) == 1 + 8


@pytest.mark.parametrize("text, fragment", [
    ("time,duty\n0,1\n", "first column must be 't'"),
    ("t,power\n0,1\n", "expected the columns t,duty"),
    ("t,duty\n0,abc\n", "line 2: column 'duty': 'abc' is not a number"),
    ("t,duty\n0,1,2\n", "line 2: 3 values"),
    ("t,duty\n0,nan\n", "must be finite"),
])
def test_replay_rejects_a_bad_log_in_one_line(tmp_path, text, fragment):
    log = tmp_path / "log.csv"
    log.write_text(text)
    out = tmp_path / "r.csv"
    result = run("replay", HEATER, "--method", "rk4", "--dt", "0.1", "--inputs", log, "--out", out)
    assert result.exit_code == 1
    assert fragment in result.output and str(log) in result.output
    assert not out.exists()


def test_replay_stops_at_the_first_failed_tick(tmp_path):
    model = tmp_path / "blow.toml"
    model.write_text('name = "blow"\n[states]\nx = { initial = 1.0, rate = "x*x" }\n')
    out = tmp_path / "r.csv"
    result = run("replay", model, "--method", "euler", "--dt", "1", "--steps", "50",
                 "--out", out, "--precision", "float")
    assert result.exit_code == 1
    errors = [line for line in result.output.splitlines() if "error" in line]
    assert len(errors) == 1 and "status NONFINITE" in errors[0] and "tick " in errors[0]
    k = int(errors[0].split("tick ")[1].split()[0])
    assert len(out.read_text().splitlines()) == 1 + k  # header, start row, k - 1 good ticks


def test_methods_json_lists_every_built_in():
    result = run("methods", "--json")
    assert result.exit_code == 0
    rows = {r["id"]: r for r in json.loads(result.stdout)}
    for method_id in ("euler", "midpoint", "heun", "ralston2", "kutta3", "ssprk3", "rk4",
                      "rk4-38", "bs3", "dp5"):
        assert rows[method_id]["kind"] == "explicit" and rows[method_id]["source"]
    assert rows["dp5"]["order"] == 5 and rows["dp5"]["embedded_order"] == 4
    assert rows["rk4"]["stages"] == 4


@pytest.mark.parametrize("args, code, fragment", [
    (["emit", HEATER, "--method", "rk5", "--dt", "0.1", "--out", "x"], 1, "unknown method"),
    (["emit", HEATER, "--dt", "0.1", "--out", "x"], 2, "missing --method"),
    (["emit", HEATER, "--method", "rk4", "--tableau", "t.toml", "--dt", "0.1", "--out", "x"], 2,
     "not both"),
    (["emit", HEATER, "--method", "rk4", "--dt", "-1", "--out", "x"], 2, "--dt"),
    (["emit", HEATER, "--method", "rk4", "--dt", "0.1", "--out", "x", "--precision", "half"], 2,
     "--precision"),
])
def test_usage_and_domain_errors(tmp_path, monkeypatch, args, code, fragment):
    monkeypatch.chdir(tmp_path)
    result = run(*args)
    assert result.exit_code == code, result.output
    assert fragment in result.output
    # usage mistakes (2) and domain errors (1) alike: one line, no usage text
    [line] = [text for text in result.output.splitlines() if text.strip()]
    assert line.startswith("tickwright: error: ") and "Usage:" not in result.output
    assert not (tmp_path / "x").exists()


def test_demo_runs_the_whole_job(tmp_path):
    result = run("demo", "--out", tmp_path / "demo")
    assert result.exit_code == 0, result.output
    for needle in ("files written:", "axis.c", "method and tick:", "cost per tick:",
                   "verdict: PASS"):
        assert needle in result.stdout
    assert sorted(p.name for p in (tmp_path / "demo").iterdir()) == ["axis.c", "axis.h"]
    result = run("demo", "--out", tmp_path / "demo", "--json")
    assert result.exit_code == 0, result.output
    data = json.loads(result.stdout)
    assert [p.rsplit("/", 1)[1] for p in data["written"]] == ["axis.h", "axis.c"]
    assert data["method"] == "rk4" and data["check"]["passed"] is True
    assert data["cost"]["total"] > 0


def test_version():
    import tomllib

    import codegen

    result = run("--version")
    assert result.exit_code == 0 and result.output == f"tickwright, version {codegen.__version__}\n"
    # ... which is the distribution's version in pyproject.toml.
    project = tomllib.loads((ROOT / "pyproject.toml").read_text())["project"]
    assert codegen.__version__ == project["version"]


@pytest.mark.parametrize("args, code, fragment", [
    (["chek", HEATER], 2, "no command 'chek' (did you mean 'check'?)"),
    (["emit", HEATER, "--method", "rk5", "--dt", "0.1", "--out", "x"], 1,
     "unknown method 'rk5' (did you mean 'rk4'?)"),
    (["check", HEATER, "--method", "rk4", "--dt", "0.1", "--target", "cortex-m4"], 1,
     "unknown target 'cortex-m4'; did you mean 'cortex-m4f'?"),
    (["emit", HEATER, "--method", "rk4", "--dtt", "0.1"], 2, "(Did you mean one of: '--dt'"),
])
def test_a_mistyped_name_gets_a_suggestion(tmp_path, monkeypatch, args, code, fragment):
    monkeypatch.chdir(tmp_path)
    result = run(*args)
    assert result.exit_code == code and fragment in result.output, result.output


def test_a_mistyped_symbol_in_an_expression_gets_a_suggestion(write_model, tmp_path):
    model = write_model('name = "m"\n[states]\nT = { initial = 0.0, rate = "(T_amb - T)/tau" }\n'
                        '[parameters]\nT_amb = 20.0\ntau = 5.0\n[outputs]\nhot = "T - Tamb"\n')
    result = run("emit", model, "--method", "rk4", "--dt", "0.1", "--out", tmp_path / "o")
    assert result.exit_code == 1
    assert "outputs.hot" in result.output and "unknown symbol 'Tamb' (did you mean 'T_amb'?)" \
        in result.output


def test_emit_and_replay_json(tmp_path):
    result = run("emit", HEATER, "--method", "rk4", "--dt", "0.1", "--out", tmp_path, "--json")
    assert result.exit_code == 0, result.output
    assert json.loads(result.stdout) == {"written": [str(tmp_path / "heater.h"),
                                                     str(tmp_path / "heater.c")]}
    out = tmp_path / "r.csv"
    result = run("replay", HEATER, "--method", "rk4", "--dt", "0.1", "--steps", "5", "--out", out,
                 "--json")
    assert result.exit_code == 0, result.output
    assert json.loads(result.stdout) == {"out": str(out), "rows": 6, "ticks": 5, "completed": 5,
                                         "status": "OK", "finished": True}


@pytest.mark.parametrize("terminal, quiet, shown", [(True, False, True), (True, True, False),
                                                    (False, False, False)])
def test_progress_only_on_a_terminal_and_never_with_quiet(monkeypatch, tmp_path, terminal, quiet,
                                                          shown):
    import codegen.cli

    monkeypatch.setattr(codegen.cli, "stderr_is_terminal", lambda: terminal)
    args = ["emit", HEATER, "--method", "rk4", "--dt", "0.1", "--out", tmp_path]
    result = run(*args, *(["--quiet"] if quiet else []))
    assert result.exit_code == 0, result.output
    assert ("... generate heater (1 state) with rk4" in result.stderr) == shown
    assert result.stdout.splitlines() == [str(tmp_path / "heater.h"), str(tmp_path / "heater.c")]


@pytest.mark.parametrize("words, cword, expected", [
    ("tickwright rep", 1, ["replay", "report"]),
    ("tickwright check m.toml --method rk", 4, ["rk4", "rk4-38"]),
    ("tickwright check m.toml --target cortex-m", 4, ["cortex-m3", "cortex-m4f", "cortex-m7"]),
])
def test_shell_completion_of_commands_methods_and_targets(words, cword, expected):
    env = {"_TICKWRIGHT_COMPLETE": "bash_complete", "COMP_WORDS": words,
           "COMP_CWORD": str(cword)}
    result = CliRunner().invoke(main, [], prog_name="tickwright", env=env)
    assert result.exit_code == 0
    assert result.output.splitlines() == [f"plain,{e}" for e in expected]


def test_the_readme_s_completion_line_gives_a_bash_script():
    result = CliRunner().invoke(main, [], prog_name="tickwright",
                                env={"_TICKWRIGHT_COMPLETE": "bash_source"})
    assert result.exit_code == 0 and "_tickwright_completion()" in result.output
    assert 'eval "$(_TICKWRIGHT_COMPLETE=bash_source tickwright)"' in \
        (ROOT / "README.md").read_text()


def test_the_demo_s_default_folder_is_ignored_by_git():
    # `tickwright demo` in a checkout must not leave untracked files behind.
    default = next(p.default for p in main.commands["demo"].params if p.name == "out_dir")
    ignored = [line.strip() for line in (ROOT / ".gitignore").read_text().splitlines()]
    assert f"{default}/" in ignored or f"/{default}/" in ignored, (default, ignored)


@pytest.mark.parametrize("target", ["host", "cortex-m4f"])
def test_check_with_a_target_reports_its_figures_in_json(target):
    import shutil

    from codegen.targets import load_target

    if shutil.which(load_target(target).cc) is None:
        pytest.fail(f"{target}: toolchain missing; run scripts/install-toolchains.sh")
    result = run("check", HEATER, "--method", "rk4", "--dt", "0.5", "--ticks", "50",
                 "--no-order", "--target", target, "--json")
    assert result.exit_code == 0, result.output
    report = json.loads(result.stdout)
    assert report["passed"] is True and report["matches_host"] is True
    for key in ("flash_bytes", "stack_bytes", "instructions_per_tick"):
        assert isinstance(report[key], int) and report[key] >= 0, key
    assert report["instructions_per_tick"] > 0 and report["flash_bytes"] > 0
    assert report["targets"][0]["target"] == target


def test_check_with_a_target_prints_the_figures():
    result = run("check", HEATER, "--method", "rk4", "--dt", "0.5", "--ticks", "50", "--no-order",
                 "--target", "cortex-m4f")
    assert result.exit_code == 0, result.output
    line = next(l for l in result.stdout.splitlines() if "target cortex-m4f float" in l)
    assert "flash" in line and "stack" in line and "instructions per tick" in line
    assert "MISRA C:2012 (cppcheck): 0 finding(s)" in result.stdout


def test_targets_lists_the_six_cores():
    result = run("targets", "--json")
    assert result.exit_code == 0
    ids = {t["id"] for t in json.loads(result.stdout)}
    assert ids == {"host", "cortex-m4f", "cortex-m3", "cortex-m7", "rv32imac", "rv32imafc"}


def test_targets_table_names_the_program_in_words():
    result = run("targets")
    assert result.exit_code == 0, result.output
    lines = result.stdout.splitlines()
    assert len(lines) == 1 + 6 and "{elf}" not in result.stdout
    assert next(l for l in lines if l.startswith("host ")).endswith("gcc  <program>")
    assert next(l for l in lines if l.startswith("cortex-m4f ")).endswith("-kernel <program>")


def fake_compiler(tmp_path):
    """A C compiler that fails with two lines of output, the second only in the details."""
    cc = tmp_path / "fakecc"
    cc.write_text("#!/bin/sh\necho 'heater.c:1:1: error: first line' >&2\n"
                  "echo 'heater.c:2:1: note: the detail' >&2\nexit 1\n")
    cc.chmod(0o755)
    return str(cc)


@pytest.mark.parametrize("verbose", [False, True])
def test_verbose_adds_the_compiler_output_to_the_one_line_error(tmp_path, verbose):
    args = ["--verbose"] if verbose else []
    result = CliRunner().invoke(main, args + ["check", HEATER, "--method", "rk4", "--dt", "0.5",
                                              "--no-order"], env={"CC": fake_compiler(tmp_path)})
    assert result.exit_code == 1
    errors = [line for line in result.output.splitlines() if line.startswith("tickwright: error")]
    assert len(errors) == 1 and "does not compile cleanly" in errors[0]
    assert "first line" in errors[0] and "the detail" not in errors[0]
    assert ("heater.c:2:1: note: the detail" in result.output) is verbose
    details = result.output.replace(errors[0], "")
    assert (f"{fake_compiler(tmp_path)} -std=c99" in details) is verbose
    assert "Traceback" not in result.output


def test_a_tableau_in_rounded_decimals_keeps_its_stated_order(tmp_path):
    # Alexander's L-stable SDIRK3 as often printed, to 15-16 digits (gamma = 0.435866521508459,
    # Alexander 1977, SIAM J. Numer. Anal. 14, from memory): its conditions hold only to the
    # digits given.
    g, c2, b1, b2 = "0.435866521508459", "0.7179332607542295", "1.2084966491760101", \
        "-0.6443631706844691"
    tableau = tmp_path / "sdirk3.toml"
    tableau.write_text(f'name = "decimal sdirk3"\norder = 3\nc = [{g}, {c2}, 1.0]\n'
                       f"b = [{b1}, {b2}, {g}]\n"
                       f"a = [[{g}, 0.0, 0.0], [0.2820667392457705, {g}, 0.0], "
                       f"[{b1}, {b2}, {g}]]\n")
    result = run("methods", "--tableau", tableau, "--json")
    assert result.exit_code == 0, result.output
    (row,) = json.loads(result.stdout)
    assert row["order"] == 3 and row["kind"] == "diagonally implicit" and row["l_stable"]
    # ...while a real mistake (a weight off by 1e-3) is still refused.
    tableau.write_text(tableau.read_text().replace(b2, "-0.6453631706844691", 1))
    result = run("methods", "--tableau", tableau)
    assert result.exit_code == 1 and "weights sum" in result.output
