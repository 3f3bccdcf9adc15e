"""Generated C: template text, strict compile of every method, reproducibility, safe comments."""

from __future__ import annotations

import hashlib
import os
import re
import subprocess
import sys

import pytest

from codegen.build import strict_compile
from codegen.emit import GENERATED_MARKER, comment_text, render_body
from codegen.emit.statements import (Blank, Comment, EliminationFactor, EliminationStep, If, Line,
                                     Loop, LuNames, Sections, VectorLoop)
from codegen.errors import EmitError
from codegen.methods import EXPLICIT, builtin, builtin_ids
from codegen.model import load_model
from codegen.pipeline import generate

from conftest import DEMO_MODELS, EXAMPLES, ROOT

EXPLICIT_IDS = [i for i in builtin_ids() if builtin(i).kind == EXPLICIT]


def test_header_lays_out_the_api(heater):
    header = generate(heater, builtin("rk4"), 0.1, precision="float").text("heater.h")
    assert "typedef float heater_real_t;" in header
    assert re.search(r"typedef struct \{\n    /\* time \*/\n    heater_real_t t;", header)
    for member in ("heater_real_t T;", "heater_real_t duty;", "heater_real_t C_th;"):
        assert member in header
    # Baked parameters are literals, not fields.
    assert "heater_real_t P;" not in header and "R_th;" not in header
    assert "#define HEATER_DT       0.100000001F" in header
    assert "heater_status_t heater_advance(heater_ctx_t *tw_ctx);" in header
    assert "void heater_outputs(const heater_ctx_t *tw_ctx, heater_outputs_t *tw_out);" in header
    assert '#ifdef __cplusplus\nextern "C" {' in header
    assert header.startswith("/*\n * " + GENERATED_MARKER)


def test_field_comments_keep_unit_description_and_range_apart(axis):
    header = generate(axis, builtin("rk4"), 1e-4, precision="float").text("axis.h")
    assert "    axis_real_t i;  /* [A]; range -10 .. 10 */\n" in header
    assert ("    axis_real_t V;  /* [V] armature voltage from the H-bridge; range -12 .. 12 */\n"
            in header)
    assert ("    axis_real_t t;  /* [s] origin + ticks * DT, computed, never accumulated; set it "
            "with axis_set_time() */\n" in header)
    assert "    uint64_t tw_ticks;  /* ticks taken since the time origin (wraps to 0 after 2^64 " \
        "ticks) */\n" in header
    assert "    axis_real_t torque;\n" in header  # no unit, description or range: no comment


def test_source_keeps_exact_coefficients_in_comments(heater):
    source = generate(heater, builtin("rk4"), 0.1, precision="double").text("heater.c")
    assert "#define HEATER_B1H  (0.016666666666666666)  /* b1*h = 1/60 */" in source
    assert "static void heater_rates(" in source
    # No heap and no static variables (a static function may return a real).
    assert "malloc" not in source
    assert not re.search(r"static heater_real_t \w+\s*[=;\[]", source)


@pytest.mark.parametrize("precision", ["float", "double"])
@pytest.mark.parametrize("method_id", EXPLICIT_IDS)
@pytest.mark.parametrize("model_path", DEMO_MODELS, ids=lambda p: p.stem)
def test_every_method_compiles_warning_free(model_path, method_id, precision):
    model = load_model(model_path)
    csource = generate(model, builtin(method_id), 1e-3, precision=precision)
    strict_compile(csource)
    if precision == "float":
        source = csource.text(csource.source_name)
        body = re.sub(r"/\*.*?\*/", "", source, flags=re.S)
        literals = re.findall(r"(?<![\w.])\d+\.\d*(?:e[-+]?\d+)?[Ff]?", body)
        assert literals and all(lit.endswith("F") for lit in literals)


def test_emitting_twice_gives_identical_bytes(axis):
    first = generate(axis, builtin("dp5"), 1e-4, precision="float")
    second = generate(axis, builtin("dp5"), 1e-4, precision="float")
    assert first.files == second.files


def test_output_does_not_depend_on_the_hash_seed():
    # sympy's cse docstring warns that order='none' may depend on hashing, and iterating over a set
    # of sympy objects did change the output between hash seeds (measured here).
    script = ("from codegen.model import load_model; from codegen.methods import builtin; "
              "from codegen.pipeline import generate; import sys; "
              "c = generate(load_model('examples/axis.toml'), builtin('rk4'), 1e-4); "
              "sys.stdout.write(c.files[1][1])")
    texts = set()
    for seed in ("0", "1", "12345"):
        env = dict(os.environ, PYTHONHASHSEED=seed)
        texts.add(subprocess.run([sys.executable, "-c", script], cwd=ROOT, env=env, check=True,
                                 capture_output=True, text=True).stdout)
    assert len(texts) == 1


def test_comments_cannot_be_ended_or_start_directives(write_model):
    hostile = 'oops */ int x; /* ??/ \\\\\n#include <evil.h>'
    assert "*/" not in comment_text(hostile) and "??" not in comment_text(hostile)
    text = ("name = \"m\"\ndescription = \"a */ b /* c ??/ d\\n#define X 1\"\n[states]\n"
            "x = { initial = 1.0, rate = \"-x\", unit = \"*/ evil\" }\n")
    model = load_model(write_model(text))
    csource = generate(model, builtin("euler"), 0.1)
    for _, text in csource.files:
        comments = re.findall(r"/\*(.*?)\*/", text, flags=re.S)
        assert comments  # every file opens with its preamble comment
        for comment in comments:
            assert "/*" not in comment
        assert not re.search(r"^\s*#\s*define X", text, flags=re.M)
        assert "evil" not in text.replace("* / evil", "")
    strict_compile(csource)


def test_write_refuses_foreign_files_unless_forced(tmp_path, heater):
    csource = generate(heater, builtin("rk4"), 0.1)
    (tmp_path / "heater.c").write_text("/* my own hand-written code */\n")
    with pytest.raises(EmitError, match="was not generated by tickwright"):
        csource.write(tmp_path)
    assert (tmp_path / "heater.c").read_text() == "/* my own hand-written code */\n"
    assert not (tmp_path / "heater.h").exists()
    csource.write(tmp_path, force=True)
    assert GENERATED_MARKER in (tmp_path / "heater.c").read_text()
    csource.write(tmp_path)  # our own files may be regenerated in place


def test_unused_stages_are_not_computed(axis):
    # dp5's seventh stage only feeds the embedded estimate (b7 = 0; Dormand & Prince 1980).
    source = generate(axis, builtin("dp5"), 1e-4).text("axis.c")
    assert "stage 7" not in source and "stage 6" in source


@pytest.mark.parametrize("method_id", ["euler", "rk4", "dp5"])
def test_one_statement_per_line(axis, method_id):
    # Reads like hand-written firmware: a regression once joined every body line into one.
    for name, text in generate(axis, builtin(method_id), 1e-4).files:
        for line in text.splitlines():
            code = re.sub(r"/\*.*?\*/", "", line)
            if not code.lstrip().startswith("for ("):
                assert code.count(";") <= 1, (name, line)
        assert "\n}\n" in text or name.endswith(".h")


# ---------------------------------------------------------------------------------------------
# Layout of function bodies (templates/macros.j2 and solve.c.j2): exact text
# ---------------------------------------------------------------------------------------------

def test_statement_trees_are_laid_out_with_four_space_indents():
    body = [Line("int tw_a;"), Blank(),
            VectorLoop("N", (Line("tw_x[tw_i] = 0.0F;"),
                             Loop("tw_j", "1U", "tw_j < tw_i", (Line("f(tw_j);"),)))),
            If((("a > 0", (Line("b();"),)), ("c > 0", (Comment("nothing"),))),
               otherwise=(Line("d();"),))]
    assert render_body(body) == (
        "int tw_a;\n"
        "\n"
        "for (tw_i = 0U; tw_i < N; ++tw_i) {\n"
        "    tw_x[tw_i] = 0.0F;\n"
        "    for (tw_j = 1U; tw_j < tw_i; ++tw_j) {\n"
        "        f(tw_j);\n"
        "    }\n"
        "}\n"
        "if (a > 0) {\n"
        "    b();\n"
        "} else if (c > 0) {\n"
        "    /* nothing */\n"
        "} else {\n"
        "    d();\n"
        "}\n")


def test_sections_after_a_check_run_only_while_ok_and_empty_ones_vanish():
    body = Sections()
    body.add(Line("f();"))
    body.check("g() != 0", "s = 1;")
    body.add(Line("h();"))
    body.check("k() != 0", "s = 2;")
    assert body.may_fail
    assert render_body([body.node("s == 0")]) == (
        "f();\n"
        "if (g() != 0) {\n"
        "    s = 1;\n"
        "}\n"
        "if (s == 0) {\n"
        "    h();\n"
        "    if (k() != 0) {\n"
        "        s = 2;\n"
        "    }\n"
        "}\n")
    assert not Sections().may_fail


def test_straight_line_elimination_is_laid_out_from_slots():
    # A 2 x 2 factor in slots [l00, l10, u01, u11] order 0, 1, 2, 3 (pivot 0 first, then 3).
    steps = (EliminationStep(pivot=0, first=True, rows=((1, ((3, 2),)),)),
             EliminationStep(pivot=3, first=False, rows=()))
    node = EliminationFactor(names=LuNames(), steps=steps, fabs="fabsf", zero="0.0F")
    assert render_body([node]) == (
        "if (!(fabsf(tw_lu[0]) > 0.0F) || (isfinite(tw_lu[0]) == 0)) {\n"
        "    tw_bad = 1;\n"
        "}\n"
        "if (tw_bad == 0) {\n"
        "    tw_lu[1] = tw_lu[1] / tw_lu[0];\n"
        "    tw_lu[3] = tw_lu[3] - (tw_lu[1] * tw_lu[2]);\n"
        "}\n"
        "if ((tw_bad == 0) && (!(fabsf(tw_lu[3]) > 0.0F) || (isfinite(tw_lu[3]) == 0))) {\n"
        "    tw_bad = 1;\n"
        "}\n")


def test_an_empty_block_is_refused():
    with pytest.raises(EmitError, match="non-empty"):
        VectorLoop("N", ())
    with pytest.raises(EmitError, match="non-empty"):
        If((("a", ()),))


def test_rosenbrock_declares_the_stage_argument_only_when_a_stage_needs_it(axis):
    # Rosenbrock-Euler evaluates f at x only (alpha = 0); ROS2's second stage at x + h k1.
    euler = generate(axis, builtin("rosenbrock-euler"), 1e-3).text("axis.c")
    ros2 = generate(axis, builtin("ros2"), 1e-3).text("axis.c")
    assert "tw_y" not in euler
    assert "axis_real_t tw_y[AXIS_NX];" in ros2


# ---------------------------------------------------------------------------------------------
# Provenance: the preamble names files and their SHA-256, never a folder of this machine
# ---------------------------------------------------------------------------------------------

TABLEAU_TOML = """
name = "my Radau IIA"
c = ["1/3", 1]
b = ["3/4", "1/4"]
a = [["5/12", "-1/12"], ["3/4", "1/4"]]
"""


def test_the_same_model_emitted_from_two_checkouts_gives_identical_bytes(tmp_path, monkeypatch):
    from click.testing import CliRunner

    from codegen import __version__
    from codegen.cli import main

    model_bytes = (EXAMPLES / "heater.toml").read_bytes()
    tableau_bytes = TABLEAU_TOML.encode("utf-8")
    outputs = []
    for folder in ("first_checkout", "second_place/other_checkout"):
        where = tmp_path / folder
        where.mkdir(parents=True)
        (where / "heater.toml").write_bytes(model_bytes)
        (where / "radau.toml").write_bytes(tableau_bytes)
        # One run with paths relative to the working directory, one with absolute paths.
        if folder == "first_checkout":
            monkeypatch.chdir(where)
            args = ["heater.toml", "--tableau", "radau.toml"]
        else:
            monkeypatch.chdir(tmp_path)
            args = [str(where / "heater.toml"), "--tableau", str(where / "radau.toml")]
        out = where / "gen"
        result = CliRunner().invoke(main, ["emit", *args, "--dt", "0.5", "--out", str(out)])
        assert result.exit_code == 0, result.output
        outputs.append({p.name: p.read_bytes() for p in sorted(out.iterdir())})
    assert outputs[0] == outputs[1] and sorted(outputs[0]) == ["heater.c", "heater.h"]
    for text in (b.decode("utf-8") for b in outputs[0].values()):
        assert "checkout" not in text and "second_place" not in text and str(tmp_path) not in text
        assert f"tickwright {__version__}" in text
        assert f"Model file heater.toml, SHA-256 {hashlib.sha256(model_bytes).hexdigest()}." \
            in text
        assert f"Method file radau.toml, SHA-256 {hashlib.sha256(tableau_bytes).hexdigest()}." \
            in text


def test_a_model_built_in_python_says_so_in_the_preamble():
    import sympy as sp

    from codegen.model import State, define

    x = sp.Symbol("x", real=True)
    model = define("decay", states=[State(name="x", initial=1.0, rate=-x)])
    header = generate(model, builtin("rk4"), 0.1).text("decay.h")
    assert "Model built in Python (no model file)." in header
    assert "Method file" not in header  # a built-in method has no file
