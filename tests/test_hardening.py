"""Hardening: the errors a new user meets are one line, output is written whole or not at all,
generated C is byte-reproducible and clean under sanitizers and static analyzers, and a model no
tool should choke on (a 5000-term sum) emits, compiles and matches the reference.
"""

from __future__ import annotations

import os
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner

import codegen.output
from codegen import reference
from codegen.build import STRICT_FLAGS, build, strict_compile
from codegen.cli import main
from codegen.emit import common
from codegen.errors import EmitError, ModelError
from codegen.methods import builtin, builtin_ids
from codegen.model import load_model, model_from_data
from codegen.pipeline import generate
from codegen.run import run_built

ROOT = Path(__file__).resolve().parent.parent
HEATER = ROOT / "examples" / "heater.toml"


def run(*args):
    return CliRunner().invoke(main, [str(a) for a in args])


def error_lines(result) -> list[str]:
    return [line for line in result.output.splitlines() if line.strip()]


def snapshot(folder: Path) -> dict[str, bytes]:
    """Every file under folder (hidden ones too) with its bytes."""
    return {str(p.relative_to(folder)): p.read_bytes() for p in sorted(folder.rglob("*"))
            if p.is_file()}


# ---- one line for every mistake in the issue -----------------------------------------------------

@pytest.mark.parametrize("value", ["inf", "nan", "-inf", "0", "-1"])
def test_a_tick_that_is_not_a_positive_finite_number_is_a_usage_error(tmp_path, value):
    result = run("emit", HEATER, "--method", "rk4", "--dt", value, "--out", tmp_path / "o")
    assert result.exit_code == 2
    [line] = error_lines(result)
    assert line.startswith("tickwright: error: Invalid value for '--dt'") and "--help" in line
    assert not (tmp_path / "o").exists()


@pytest.mark.parametrize("dt, precision, fragment", [
    ("1e-300", "float", "rounds to 0 in float"),
    ("1e-40", "float", "rounds to a subnormal number in float"),
    ("1e39", "float", "beyond the range of float"),
    ("1e-310", "double", "rounds to a subnormal number in double"),
])
def test_a_tick_the_precision_cannot_hold_is_refused(tmp_path, dt, precision, fragment):
    result = run("emit", HEATER, "--method", "rk4", "--dt", dt, "--precision", precision,
                 "--out", tmp_path / "o")
    assert result.exit_code == 1
    errors = [line for line in error_lines(result) if "warning" not in line]
    assert len(errors) == 1 and fragment in errors[0] and "--dt" in errors[0], result.output
    assert not (tmp_path / "o").exists()


def test_a_parameter_a_rate_divides_by_is_named(write_model, tmp_path):
    path = write_model('name = "coil"\n[states]\ni = { initial = 0.1, rate = "(V - R*i)/L" }\n'
                       '[inputs]\nV = 1.0\n[parameters]\nR = 2.0\nL = 0.0\n')
    result = run("emit", path, "--method", "rk4", "--dt", "0.01", "--out", tmp_path / "o")
    assert result.exit_code == 1
    [line] = error_lines(result)
    assert f"{path}: states.i.rate: divides by zero with L = 0" in line
    assert not (tmp_path / "o").exists()


@pytest.mark.parametrize("name, fragment", [
    ("sinf", "reserved"), ("FLT_MAX", "reserved"), ("int32_t", "reserved"),
    ("UINT8_C", "reserved"), ("isnormal", "reserved"), ("coil_reset", "generated code"),
    ("COIL_OK", "generated code"), ("tw_x", "reserved"), ("a__b", "reserved"),
])
def test_names_the_c_library_or_the_generated_api_use_are_refused(write_model, name, fragment):
    path = write_model(f'name = "coil"\n[states]\n{name} = {{ initial = 1.0, rate = "-{name}" }}\n')
    with pytest.raises(ModelError) as info:
        load_model(path)
    assert f"states.{name}" in str(info.value) and fragment in str(info.value)


def test_a_look_alike_letter_in_an_expression_is_refused(write_model):
    # Python folds the fullwidth x into 'x' (NFKC): accepted, the rate would use a name that is
    # not written in the file.
    path = write_model('name = "m"\n[states]\nx = { initial = 1.0, rate = "-\uff58" }\n')
    with pytest.raises(ModelError, match=r"U\+FF58 at column 2 is not allowed"):
        load_model(path)


def test_deep_nesting_is_refused_in_one_line_and_long_sums_are_not(write_model):
    deep = "sin(" * 100 + "x" + ")" * 100
    path = write_model(f'name = "m"\n[states]\nx = {{ initial = 1.0, rate = "{deep}" }}\n')
    with pytest.raises(ModelError, match="nested 101 levels deep"):
        load_model(path)
    flat = " + ".join(["sin(x)"] * 5000)
    path = write_model(f'name = "m"\n[states]\nx = {{ initial = 1.0, rate = "-x + {flat}" }}\n')
    model = load_model(path)
    assert str(model.states[0].rate) == "-x + 5000*sin(x)"


# ---- the long flat sum ---------------------------------------------------------------------------

def long_sum_model(terms: int):
    """x' = 1 - 2x - y/10 + sum_i c_i sin(x + i/terms), y' = x - y: terms distinct sines."""
    rate = " + ".join(f"{(i % 9 + 1) * 1e-5}*sin(x + {i}/{terms})" for i in range(terms))
    return model_from_data({"name": "longsum", "states": {
        "x": {"initial": 0.1, "rate": f"1 - 2*x - y/10 + {rate}", "range": [-2, 2]},
        "y": {"initial": 0.2, "rate": "x - y", "range": [-2, 2]}}}, "longsum.toml")


def test_a_400_term_sum_emits_through_the_command_line(tmp_path):
    # The regression: the translator recursed once per term and ended in a RecursionError.
    terms = " + ".join(["sin(x)"] * 400)
    model = tmp_path / "long.toml"
    model.write_text(f'name = "longsum"\n[states]\nx = {{ initial = 0.1, rate = "a - b + '
                     f'{terms}" }}\n[parameters]\na = 1.0\nb = 2.0\n')
    result = run("emit", model, "--method", "rk4", "--dt", "0.01", "--out", tmp_path / "o")
    assert result.exit_code == 0, result.output
    assert "tw_dx[0] = (400.0F*sinf(x)) - 1.0F;" in (tmp_path / "o" / "longsum.c").read_text()
    strict_compile(generate(load_model(model), builtin("rk4"), 0.01))


# Ticks of the 5000-term run against the reference.
LONG_TICKS = 20


def test_a_5000_term_sum_compiles_and_matches_the_reference():
    # The C compiler takes most of this test's time (5000 sin calls at -O2).
    model = long_sum_model(5000)
    assert len(model.states[0].rate.args) == 5003  # nothing merged: 5000 sines, 1, -2x, -y/10
    csource = generate(model, builtin("rk4"), 0.01, precision="double")
    c = run_built(build(csource, model), model, np.zeros((LONG_TICKS, 0)))
    ref = reference.run(model, builtin("rk4"), 0.01, 1, np.zeros((LONG_TICKS, 0)))
    assert c.completed == ref.completed == LONG_TICKS
    # Both sum the same 5000 terms of size <= 9e-5 in different orders: the difference is
    # rounding, about 5000 units of 2^-53 of the sum per stage (common practice, no source);
    # a wrong or missing term would be 1e-7 or more.
    assert np.max(np.abs(c.states - ref.xs)) <= 1e-11
    assert np.max(np.abs(c.states[-1] - c.states[0])) > 1e-3  # the state moved


# ---- output written whole or not at all ----------------------------------------------------------

def emit_args(out):
    return ["emit", HEATER, "--method", "rk4", "--dt", "0.1", "--out", out]


def test_a_late_failure_in_generation_leaves_the_folder_as_it_was(tmp_path, monkeypatch):
    out = tmp_path / "gen"
    assert run(*emit_args(out)).exit_code == 0
    (out / "notes.txt").write_text("mine")
    before = snapshot(out)
    original = common.render

    def failing(template, **context):
        if template == "source.c.j2":  # the header is already rendered: fail as late as can be
            raise EmitError("simulated failure while rendering the source")
        return original(template, **context)

    monkeypatch.setattr(common, "render", failing)
    result = run("emit", HEATER, "--method", "heun", "--dt", "0.1", "--out", out)
    assert result.exit_code == 1 and "simulated failure" in result.output
    assert snapshot(out) == before


def test_a_failed_rename_puts_every_file_back(tmp_path, monkeypatch):
    out = tmp_path / "gen"
    assert run(*emit_args(out)).exit_code == 0
    before = snapshot(out)
    calls = []
    original = os.replace

    def flaky(src, dst):
        calls.append(dst)
        if len(calls) == 2 and str(dst).endswith(".c"):
            raise OSError(28, "No space left on device")
        return original(src, dst)

    monkeypatch.setattr(codegen.output.os, "replace", flaky)
    result = run("emit", HEATER, "--method", "heun", "--dt", "0.1", "--out", out)
    assert result.exit_code == 1
    [line] = error_lines(result)
    assert "heater.c: cannot write: No space left on device" in line
    assert snapshot(out) == before  # the header renamed first was put back
    fresh = tmp_path / "fresh" / "deeper"
    calls.clear()
    result = run("emit", HEATER, "--method", "heun", "--dt", "0.1", "--out", fresh)
    assert result.exit_code == 1 and not (tmp_path / "fresh").exists()


@pytest.mark.parametrize("make_out", [
    lambda tmp: tmp / "a-file" / "sub",   # a file in the way
    lambda tmp: Path("/proc/tickwright-test-out"),  # a file system that takes no new files
    lambda tmp: Path("/sys/tickwright-test-out"),   # read-only for everyone, root included
])
def test_an_unwritable_out_is_one_line_and_writes_nothing(tmp_path, make_out):
    (tmp_path / "a-file").write_text("x")
    out = make_out(tmp_path)
    for args in (emit_args(out),
                 ["replay", HEATER, "--method", "rk4", "--dt", "0.1", "--steps", "3",
                  "--out", out / "r.csv"],
                 ["advise", HEATER, "--method", "rk4", "--plot", out]):
        result = run(*args)
        assert result.exit_code == 1, (args, result.output)
        [line] = [x for x in error_lines(result) if not x.startswith("...")]
        assert line.startswith("tickwright: error: ") and str(out) in line, line
        assert "choose a writable" in line
    assert not out.exists()


def test_an_immutable_folder_is_one_line_and_stays_as_it_was(tmp_path):
    # chattr +i stops even root (the tests run as root in CI, where chmod would not).
    out = tmp_path / "locked"
    assert run(*emit_args(out)).exit_code == 0
    before = snapshot(out)
    subprocess.run(["chattr", "+i", str(out)], check=True)
    try:
        result = run("emit", HEATER, "--method", "heun", "--dt", "0.1", "--out", out)
        replay = run("replay", HEATER, "--method", "rk4", "--dt", "0.1", "--steps", "3",
                     "--out", out / "r.csv")
    finally:
        subprocess.run(["chattr", "-i", str(out)], check=True)
    for outcome in (result, replay):
        assert outcome.exit_code == 1
        [line] = error_lines(outcome)
        assert str(out) in line and "choose a writable" in line, line
    assert snapshot(out) == before


def test_a_permission_error_while_writing_is_one_line(tmp_path, monkeypatch):
    def refuse(*_args, **_kwargs):
        raise PermissionError(13, "Permission denied")

    monkeypatch.setattr(codegen.output.tempfile, "mkstemp", refuse)
    result = run(*emit_args(tmp_path / "o"))
    assert result.exit_code == 1
    [line] = error_lines(result)
    assert line.startswith(f"tickwright: error: {tmp_path / 'o'}: cannot write")
    assert line.endswith("Permission denied; choose a writable folder for --out")
    assert not (tmp_path / "o").exists()


SLOW_WRITER = """
import sys, time
import codegen.output as output
from codegen.cli import main
real = output.os.replace
def slow(src, dst):
    print("renaming", flush=True)
    time.sleep(30)
    return real(src, dst)
output.os.replace = slow
sys.argv = ["tickwright"] + sys.argv[1:]
main()
"""


def test_a_run_terminated_while_writing_leaves_the_folder_as_it_was(tmp_path):
    out = tmp_path / "gen"
    assert run(*emit_args(out)).exit_code == 0
    before = snapshot(out)
    proc = subprocess.Popen([sys.executable, "-c", SLOW_WRITER, "emit", str(HEATER), "--method",
                             "heun", "--dt", "0.1", "--out", str(out)], cwd=ROOT,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                            env=dict(os.environ, PYTHONPATH=str(ROOT)))
    assert proc.stdout.readline().strip() == "renaming"  # the temporary files are written
    assert len(snapshot(out)) > len(before)  # ... and are in the folder now
    proc.send_signal(signal.SIGTERM)
    _, err = proc.communicate(timeout=60)
    assert proc.returncode == 1 and "aborted" in err and "Traceback" not in err, err
    assert snapshot(out) == before


def test_a_run_killed_at_any_moment_never_leaves_a_partial_file(tmp_path):
    """SIGKILL at ten moments of real runs: each target is the old file or the new one, never a
    mix; a leftover is only a hidden temporary, and the next run removes it."""
    out = tmp_path / "gen"
    assert run(*emit_args(out)).exit_code == 0
    old = snapshot(out)
    new_run = [sys.executable, "-m", "codegen", "emit", str(HEATER), "--method", "heun",
               "--dt", "0.1", "--out", str(out)]
    new = subprocess.run(new_run, cwd=tmp_path, capture_output=True, env=dict(
        os.environ, PYTHONPATH=str(ROOT)))
    assert new.returncode == 0
    new = snapshot(out)
    assert new != old
    shutil.rmtree(out)
    for delay in np.linspace(0.5, 4.0, 10):
        shutil.rmtree(out, ignore_errors=True)
        assert run(*emit_args(out)).exit_code == 0
        proc = subprocess.Popen(new_run, cwd=tmp_path, stdout=subprocess.DEVNULL,
                                stderr=subprocess.DEVNULL, env=dict(os.environ,
                                                                    PYTHONPATH=str(ROOT)))
        time.sleep(delay)
        proc.kill()
        proc.wait()
        now = snapshot(out)
        for name in ("heater.h", "heater.c"):
            assert now[name] in (old[name], new[name]), f"{name} is partial after {delay} s"
        assert all(name.startswith(".") and name.endswith(".tw-tmp") for name in now
                   if name not in ("heater.h", "heater.c")), sorted(now)
    assert run(*emit_args(out)).exit_code == 0
    assert sorted(snapshot(out)) == ["heater.c", "heater.h"]


def test_files_it_did_not_write_are_kept_unless_forced(tmp_path):
    out = tmp_path / "gen"
    out.mkdir()
    (out / "heater.h").write_text("/* my own header */\n")
    result = run(*emit_args(out))
    assert result.exit_code == 1 and "not generated by tickwright" in result.output
    assert (out / "heater.h").read_text() == "/* my own header */\n"
    assert not (out / "heater.c").exists()
    assert run(*emit_args(out), "--force").exit_code == 0
    assert "Generated by tickwright" in (out / "heater.h").read_text()


# ---- byte-reproducible output --------------------------------------------------------------------

def test_output_is_byte_identical_across_hash_seeds_and_working_folders(tmp_path):
    outputs = []
    model = tmp_path / "copy" / "heater.toml"
    model.parent.mkdir()
    shutil.copy(HEATER, model)
    for seed, cwd, path in (("0", tmp_path, model), ("1", model.parent, Path("heater.toml")),
                            ("4242", ROOT, model)):
        out = tmp_path / f"out-{seed}"
        for method_id in ("sdirk3", "dp5"):
            proc = subprocess.run([sys.executable, "-m", "codegen", "emit", str(path),
                                   "--method", method_id, "--dt", "0.5", "--out",
                                   str(out / method_id)], cwd=cwd, capture_output=True,
                                  env=dict(os.environ, PYTHONHASHSEED=seed,
                                           PYTHONPATH=str(ROOT)))
            assert proc.returncode == 0, proc.stderr
        outputs.append(snapshot(out))
    assert outputs[0] == outputs[1] == outputs[2]
    assert len(outputs[0]) == 4


# ---- injected text never leaves a comment --------------------------------------------------------

MARKER = "INJECTED_MARKER"


def test_model_text_cannot_inject_c(tmp_path):
    hostile = [f"*/ int {MARKER}1; /*", f"??/\\n{MARKER}2", f"\\\\\\n{MARKER}3",
               f"x */\\r\\n#define {MARKER}4 1", f"\\u0000{MARKER}5", "??=", f"/* {MARKER}6"]
    path = tmp_path / "evil.toml"
    path.write_text(
        f'name = "evil"\ndescription = "{hostile[0]}"\n[states]\n'
        f'x = {{ initial = 1.0, rate = "-k*x + u", unit = "{hostile[1]}", '
        f'description = "{hostile[2]}" }}\n'
        f'[inputs]\nu = {{ default = 0.0, unit = "{hostile[3]}", description = "{hostile[4]}" }}\n'
        f'[parameters]\nk = {{ value = 2.0, tunable = true, description = "{hostile[5]}" }}\n'
        f'[outputs]\ny = {{ expr = "2*x", description = "{hostile[6]}" }}\n', encoding="utf-8")
    tableau = tmp_path / f"t{MARKER}.toml"
    tableau.write_text(f'name = "heun */ {MARKER}7 /*"\nc = [0, 1]\nb = ["1/2", "1/2"]\n'
                       'a = [[0, 0], [1, 0]]\n')
    out = tmp_path / "o"
    result = run("emit", path, "--tableau", tableau, "--dt", "0.1", "--out", out, "--no-units",
                 "--error-estimate")
    assert result.exit_code == 1 and "b_hat" in result.output  # the option is checked first
    result = run("emit", path, "--tableau", tableau, "--dt", "0.1", "--out", out, "--no-units")
    assert result.exit_code == 0, result.output
    texts = {p.name: p.read_text() for p in out.iterdir()}
    for name, text in texts.items():
        code = strip_comments(text)
        for n in range(1, 8):
            assert f"{MARKER}{n}" not in code, (name, n)
        assert "??" not in text and "\\\n" not in text
    assert sum(text.count(MARKER) for text in texts.values()) >= 7  # they did reach comments
    model = load_model(path)
    strict_compile(generate(model, builtin("rk4"), 0.1))


def strip_comments(text: str) -> str:
    out, i = [], 0
    while i < len(text):
        if text.startswith("/*", i):
            i = text.index("*/", i + 2) + 2
        elif text.startswith("//", i):
            i = text.find("\n", i)
            i = len(text) if i < 0 else i
        else:
            out.append(text[i])
            i += 1
    return "".join(out)


# ---- input logs ----------------------------------------------------------------------------------

def test_a_log_at_another_tick_is_refused_or_resampled(tmp_path):
    log = tmp_path / "ms.csv"
    log.write_text("t,duty\n0,0.5\n0.001,0.5\n0.002,0.25\n0.003,0.25\n")
    out = tmp_path / "r.csv"
    result = run("replay", HEATER, "--method", "rk4", "--dt", "5e-5", "--inputs", log,
                 "--out", out)
    assert result.exit_code == 1 and not out.exists()
    [line] = error_lines(result)
    assert "line 3: t = 0.001 s, but row 1 of a log at --dt 5e-05 s" in line
    assert "pass --dt 0.001, or --resample" in line
    result = run("replay", HEATER, "--method", "rk4", "--dt", "5e-5", "--inputs", log,
                 "--out", out, "--resample", "--precision", "double")
    assert result.exit_code == 0, result.output
    assert len(out.read_text().splitlines()) == 1 + 1 + 61  # header, start, 3 ms / 50 us + 1
    # Held: the same as a log that repeats each row for the 20 ticks until the next one.
    held = tmp_path / "held.csv"
    levels = [0.5, 0.5, 0.25, 0.25]
    held.write_text("t,duty\n" + "".join(f"{k * 5e-5!r},{levels[k // 20]}\n"
                                          for k in range(61)))
    same = tmp_path / "same.csv"
    result = run("replay", HEATER, "--method", "rk4", "--dt", "5e-5", "--inputs", held,
                 "--out", same, "--precision", "double")
    assert result.exit_code == 0, result.output
    assert same.read_bytes() == out.read_bytes()


def test_inputs_outside_their_range_warn_or_fail(tmp_path):
    log = tmp_path / "log.csv"
    log.write_text("t,duty\n0,0.5\n0.1,1.5\n0.2,0.5\n0.3,-1\n")
    out = tmp_path / "r.csv"
    args = ["replay", HEATER, "--method", "rk4", "--dt", "0.1", "--inputs", log, "--out", out]
    result = run(*args)
    assert result.exit_code == 0
    warning = [x for x in error_lines(result) if "warning" in x]
    assert warning == [f"tickwright: warning: {log}: line 3: duty = 1.5 is outside its declared "
                       "range [0, 1] (2 of 4 ticks are outside); the checks of the model hold "
                       "only inside its ranges (--strict-ranges makes this an error)"]
    out.unlink()
    result = run(*args, "--strict-ranges")
    assert result.exit_code == 1 and not out.exists()
    [line] = error_lines(result)
    assert "line 3: duty = 1.5 is outside" in line


@pytest.mark.parametrize("text, fragment", [
    ("t,duty\n", "no rows after the header"),
    ("t,duty\n0,1\n0,1\n", "line 3: t = 0 is not after the row before"),
    ("t,duty\n0.2,1\n0.1,1\n", "rows must be in time order"),
])
def test_replay_refuses_an_empty_or_unordered_log(tmp_path, text, fragment):
    log = tmp_path / "log.csv"
    log.write_text(text)
    result = run("replay", HEATER, "--method", "rk4", "--dt", "0.1", "--inputs", log, "--out",
                 tmp_path / "r.csv")
    assert result.exit_code == 1 and not (tmp_path / "r.csv").exists()
    [line] = error_lines(result)
    assert fragment in line and str(log) in line


# ---- sanitizers and static analyzers on every method kind ----------------------------------------

def generated_sources(folder: Path, precision: str) -> list[tuple[str, str]]:
    """Every built-in method's C for one model each (linear for zoh-exact), written to folder;
    (prefix, method id) pairs. The embedded pairs also carry their error estimate."""
    linear = {"states": {"x": {"initial": 0.5, "rate": "-2*x + y + u"},
                         "y": {"initial": 0.25, "rate": "-y + u/2"}},
              "inputs": {"u": {"default": 0.5}}}
    rich = {"states": {"x": {"initial": 0.5, "rate": "a*x + c*x**2 + u + 1/w - 1"},
                       "y": {"initial": 0.25, "rate": "sin(x) - y + t"}},
            "inputs": {"u": {"default": 0.5}, "w": {"default": 1.0}},
            "parameters": {"a": {"value": -1.0, "tunable": True},
                           "c": {"value": 0.1, "tunable": True}},
            "outputs": {"z": "x*y"}}
    kinds = []
    for i, method_id in enumerate(builtin_ids()):
        prefix = f"k{i}"
        data = dict(linear if method_id == "zoh-exact" else rich, name=prefix)
        model = model_from_data(data, f"{prefix}.toml")
        method = builtin(method_id)
        csource = generate(model, method, 0.05, precision=precision,
                           error_estimate=method.is_explicit and method.b_hat is not None)
        for name, text in csource.files:
            (folder / name).write_text(text, encoding="utf-8")
        kinds.append((prefix, method_id))
    return kinds


def sanitizer_driver(kinds) -> str:
    """main(): every method 50 ticks from reset, then every failure that applies, each checked
    to leave the context unchanged (memcmp); exit status 1 on any surprise."""
    lines = ["#include <math.h>", "#include <stdio.h>", "#include <string.h>"]
    lines += [f'#include "{p}.h"' for p, _ in kinds]
    lines += ["int main(void)", "{", "    int bad = 0;", "    int n;"]
    for prefix, method_id in kinds:
        settings = [{"u": "NAN"}, {"u": "HUGE_VAL"}]
        if method_id != "zoh-exact":
            settings += [{"w": "0.0"}, {"a": "NAN"}, {"c": "HUGE_VAL"}]
        lines += ["    {", f"        {prefix}_ctx_t ctx;", f"        {prefix}_ctx_t before;",
                  f"        {prefix}_reset(&ctx);",
                  "        for (n = 0; n < 50; n++) {",
                  f"            if ({prefix}_advance(&ctx) != 0) {{ bad = 1; }}", "        }"]
        for fields in settings:
            lines.append(f"        {prefix}_reset(&ctx);")
            lines += [f"        ctx.{k} = {v};" for k, v in fields.items()]
            lines += ["        before = ctx;",
                      f"        if ({prefix}_advance(&ctx) == 0) {{ bad = 1; }}",
                      "        if (memcmp(&before, &ctx, sizeof ctx) != 0) { bad = 1; }"]
        lines.append("    }")
    lines += ['    printf("done %d\\n", bad);', "    return bad;", "}"]
    return "\n".join(lines) + "\n"


@pytest.mark.parametrize("precision", ["float", "double"])
def test_every_method_runs_clean_under_address_and_undefined_behaviour_sanitizers(
        tmp_path, precision):
    kinds = generated_sources(tmp_path, precision)
    (tmp_path / "driver.c").write_text(sanitizer_driver(kinds))
    flags = ["-std=c99", "-fsanitize=address,undefined", "-fno-sanitize-recover=all", "-g",
             "-O1", "-ffp-contract=off"]
    build_cmd = ["gcc", *flags, "driver.c", *[f"{p}.c" for p, _ in kinds], "-lm", "-o", "san"]
    subprocess.run(build_cmd, cwd=tmp_path, check=True, capture_output=True)
    proc = subprocess.run(["./san"], cwd=tmp_path, capture_output=True, text=True, timeout=300,
                          env=dict(os.environ, ASAN_OPTIONS="detect_leaks=0",
                                   UBSAN_OPTIONS="halt_on_error=1:print_stacktrace=1"))
    assert proc.returncode == 0 and proc.stdout.strip() == "done 0", proc.stdout + proc.stderr
    assert "runtime error" not in proc.stderr and "Sanitizer" not in proc.stderr, proc.stderr


# gcc 12's analyzer reports nothing on the generated code; its false positives on float
# comparisons and loops are off by default (common practice, no source).
ANALYZER_FLAGS = ("-fanalyzer", "-Werror", "-std=c99", "-O0")
# The clang static analyzer with its default checkers (core, deadcode, unix, security, ...).
CLANG_ANALYZE = ("--analyze", "-std=c99", "-Xclang", "-analyzer-output=text")


@pytest.mark.parametrize("precision", ["float", "double"])
def test_gcc_analyzer_finds_nothing_in_any_method_kind(tmp_path, precision):
    kinds = generated_sources(tmp_path, precision)
    for prefix, method_id in kinds:
        proc = subprocess.run(["gcc", *ANALYZER_FLAGS, *STRICT_FLAGS, "-c", f"{prefix}.c",
                               "-o", f"{prefix}.o"], cwd=tmp_path, capture_output=True,
                              text=True, timeout=600)
        assert proc.returncode == 0 and not proc.stderr.strip(), (method_id, proc.stderr)


@pytest.mark.parametrize("precision", ["float", "double"])
def test_clang_analyzer_finds_nothing_in_any_method_kind(tmp_path, precision):
    clang = shutil.which("clang")
    assert clang, "clang is missing: run scripts/install-toolchains.sh (CI installs it)"
    kinds = generated_sources(tmp_path, precision)
    proc = subprocess.run([clang, *CLANG_ANALYZE, *[f"{p}.c" for p, _ in kinds]], cwd=tmp_path,
                          capture_output=True, text=True, timeout=600)
    assert proc.returncode == 0 and "warning" not in proc.stderr, proc.stderr
    assert not proc.stdout.strip(), proc.stdout
