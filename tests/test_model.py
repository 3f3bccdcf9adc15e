"""Model files and the Python API: valid models load; every mistake is one clear line, exit 1."""

from __future__ import annotations

import hashlib

import sympy as sp
import pytest
from click.testing import CliRunner

from codegen.build import build
from codegen.cli import main
from codegen.errors import ModelError
from codegen.methods import builtin
from codegen.model import Input, Model, Output, Parameter, State, define, load_model
from codegen.pipeline import generate

GOOD = """
name = "heater"
description = "test"
[states]
T = { initial = 20.0, rate = "(P*duty - (T - T_amb)/R_th)/C_th", unit = "degC", range = [-40, 300] }
[inputs]
duty = { default = 0.0, unit = "1", range = [0, 1] }
[parameters]
P = { value = 40.0, unit = "W" }
R_th = 2.5
C_th = { value = 120.0, tunable = true }
T_amb = 20.0
[outputs]
T_surface = "T - 0.1*P*duty"
"""


def test_file_and_python_api_build_the_same_model(write_model):
    from_file = load_model(write_model(GOOD))
    T, duty, P, R_th, C_th, T_amb = sp.symbols("T duty P R_th C_th T_amb", real=True)
    from_api = define(
        "heater",
        states=[State("T", unit="degC", range=(-40.0, 300.0), initial=20.0,
                      rate=(P * duty - (T - T_amb) / R_th) / C_th)],
        inputs=[Input("duty", unit="1", range=(0.0, 1.0), default=0.0)],
        parameters=[Parameter("P", unit="W", value=40.0), Parameter("R_th", value=2.5),
                    Parameter("C_th", value=120.0, tunable=True), Parameter("T_amb", value=20.0)],
        outputs=[Output("T_surface", expr=T - sp.Rational(1, 10) * P * duty)],
        description="test")
    assert sp.simplify(from_file.f[0] - from_api.f[0]) == 0
    assert sp.simplify(from_file.outputs[0].resolved - from_api.outputs[0].resolved) == 0
    assert [p.name for p in from_file.tunable] == ["C_th"]
    assert from_file.baked[sp.Symbol("R_th", real=True)] == sp.Rational(5, 2)


def test_outputs_may_use_other_outputs(write_model):
    text = GOOD.replace('T_surface = "T - 0.1*P*duty"',
                        'T_surface = "T - 0.1*P*duty"\nT_k = "T_surface + 273.15"')
    model = load_model(write_model(text))
    T, P, duty = sp.symbols("T P duty", real=True)
    resolved = {o.name: o.resolved for o in model.outputs}
    assert sp.simplify(resolved["T_k"] - (T - P * duty / 10 + sp.Rational("273.15"))) == 0


def test_piecewise_and_whitelisted_functions_parse(write_model):
    text = GOOD.replace('"(P*duty - (T - T_amb)/R_th)/C_th"',
                        '"Piecewise((0.0, T > 250), (P*duty, True))/C_th + 0*sin(T)*atan2(T, 1)'
                        ' + min(T, 1, 2)*0 + abs(sign(T))*0 + floor(T)*0 + ceil(T)*0"')
    model = load_model(write_model(text))
    assert model.f[0].has(sp.Piecewise)


# Each mistake: (what to replace in GOOD, with what, the item the message must name, a fragment).
MISTAKES = [
    ("unknown symbol", "(T - T_amb)", "(T - Tamb)", "states.T.rate",
     "unknown symbol 'Tamb' (did you mean 'T_amb'?)"),
    ("duplicate name across tables", "T_amb = 20.0", "T_amb = 20.0\nduty = 1.0",
     "parameters.duty", "duplicate name 'duty'"),
    ("duplicate key in one table", "T_amb = 20.0", "T_amb = 20.0\nT_amb = 21.0", "",
     "not valid TOML"),
    ("not a C identifier", "T_amb = 20.0", '"2fast" = 1.0', "parameters.2fast",
     "not a valid name"),
    ("C keyword", "T_amb = 20.0", "T_amb = 20.0\nvolatile = 1.0", "parameters.volatile",
     "keyword"),
    ("reserved math name", "T_amb = 20.0", "T_amb = 20.0\nsqrt = 1.0", "parameters.sqrt",
     "reserved"),
    ("reserved internal prefix", "T_amb = 20.0", "T_amb = 20.0\ntw_x = 1.0", "parameters.tw_x",
     "reserved"),
    ("double underscore", "T_amb = 20.0", "T_amb = 20.0\na__b = 1.0", "parameters.a__b",
     "reserved"),
    ("bad model prefix", 'name = "heater"', 'name = "Heater"', "name", "not a valid C prefix"),
    ("model prefix is a keyword", 'name = "heater"', 'name = "static"', "name", "reserved"),
    ("missing rate", 'rate = "(P*duty - (T - T_amb)/R_th)/C_th", ', "", "states.T.rate",
     "missing"),
    ("wrong type: initial", "initial = 20.0", 'initial = "warm"', "states.T.initial",
     "expected a number"),
    ("wrong type: tunable", "tunable = true", 'tunable = "yes"', "parameters.C_th.tunable",
     "true or false"),
    ("wrong type: rate", 'rate = "(P*duty - (T - T_amb)/R_th)/C_th"', "rate = [1, 2]",
     "states.T.rate", "expected an expression"),
    ("unknown key", 'unit = "W"', 'unit = "W", vlaue = 3', "parameters.P.vlaue", "unknown key"),
    ("unsupported function", "(T - T_amb)", "erf(T - T_amb)", "states.T.rate",
     "function 'erf' is not supported"),
    ("non-finite initial", "initial = 20.0", "initial = inf", "states.T.initial", "finite"),
    ("non-finite value", "R_th = 2.5", "R_th = nan", "parameters.R_th", "finite"),
    ("non-finite literal", "(T - T_amb)", "(T - T_amb*1e999)", "states.T.rate", "finite"),
    ("output loop", 'T_surface = "T - 0.1*P*duty"', 'T_surface = "y2 + 1"\ny2 = "T_surface*2"',
     "outputs.", "loop"),
    ("attribute access", "(T - T_amb)", "(T.real - T_amb)", "states.T.rate",
     "attribute access is not allowed"),
    ("lambda", "(T - T_amb)", "((lambda: 1)() - T_amb)", "states.T.rate", "not allowed"),
    ("import", "(T - T_amb)", "(__import__('os') - T_amb)", "states.T.rate", "not supported"),
    ("call outside whitelist", "(T - T_amb)", "(eval('1') - T_amb)", "states.T.rate",
     "function 'eval' is not supported"),
    ("indexing", "(T - T_amb)", "(T[0] - T_amb)", "states.T.rate", "indexing is not allowed"),
    ("syntax error", "(T - T_amb)", "(T - - * T_amb)", "states.T.rate", "cannot parse"),
    ("range reversed", "range = [0, 1]", "range = [1, 0]", "inputs.duty.range", "above high"),
    ("piecewise without default", "(T - T_amb)", "Piecewise((T, T > 0))", "states.T.rate",
     "(value, True)"),
    ("no states", '[states]\nT = { initial = 20.0, rate = "(P*duty - (T - T_amb)/R_th)/C_th", '
     'unit = "degC", range = [-40, 300] }', "[states]", "states", "at least one state"),
]


@pytest.mark.parametrize("what, old, new, item, fragment", MISTAKES, ids=[m[0] for m in MISTAKES])
def test_every_model_mistake_is_one_clear_line(write_model, tmp_path, what, old, new, item,
                                               fragment):
    assert old in GOOD, what
    path = write_model(GOOD.replace(old, new, 1))
    with pytest.raises(ModelError) as info:
        load_model(path)
    message = str(info.value)
    assert "\n" not in message
    assert message.startswith(str(path)), message
    assert item in message, message
    assert fragment in message, message

    # The command line says the same in one line, exits 1 and writes nothing.
    out = tmp_path / "out"
    result = CliRunner().invoke(main, ["emit", str(path), "--method", "rk4", "--dt", "0.1",
                                       "--out", str(out)])
    assert result.exit_code == 1, result.output
    lines = [line for line in result.output.splitlines() if line.strip()]
    assert len(lines) == 1 and fragment in lines[0], result.output
    assert "Traceback" not in result.output
    assert not out.exists()


def test_missing_file_is_one_line(tmp_path):
    result = CliRunner().invoke(main, ["emit", str(tmp_path / "nope.toml"), "--method", "rk4",
                                       "--dt", "0.1", "--out", str(tmp_path / "o")])
    assert result.exit_code == 1
    lines = [line for line in result.output.splitlines() if line.strip()]
    assert len(lines) == 1 and "file not found" in lines[0], result.output
    assert str(tmp_path / "nope.toml") in lines[0] and "Traceback" not in result.output
    assert not (tmp_path / "o").exists()


def test_python_api_validates_too():
    x = sp.Symbol("x", real=True)
    with pytest.raises(ModelError, match="unknown symbol 'y'"):
        define("m", states=[State("x", rate=sp.Symbol("y", real=True) * x)])
    with pytest.raises(ModelError, match="duplicate name 'x'"):
        define("m", states=[State("x", rate=-x)], parameters=[Parameter("x", value=1.0)])


def test_a_model_built_directly_has_resolved_outputs_and_the_c_computes_them():
    # Regression: a Model constructed directly (not through define or a model file) kept its
    # outputs unresolved, and the generated C silently wrote y = 0.
    x, k, y = sp.symbols("x k y", real=True)
    model = Model(name="direct", states=(State(name="x", initial=1.5, rate=-x),),
                  parameters=(Parameter(name="k", value=3.0),),
                  outputs=(Output(name="y", expr=k * x + 1), Output(name="z", expr=2 * y)))
    resolved = {o.name: o.resolved for o in model.outputs}
    assert sp.simplify(resolved["y"] - (k * x + 1)) == 0
    assert sp.simplify(resolved["z"] - 2 * (k * x + 1)) == 0
    built = build(generate(model, builtin("rk4"), 0.1, precision="double"), model)
    ctx, out = built.ffi.new("direct_ctx_t *"), built.ffi.new("direct_outputs_t *")
    built.lib.direct_reset(ctx)
    for _ in range(3):
        built.lib.direct_outputs(ctx, out)
        # y = k x + 1 and z = 2 y with k = 3, evaluated here on the C's own state.
        assert out.y == pytest.approx(3.0 * ctx.x + 1.0, rel=1e-15)
        assert out.z == pytest.approx(2.0 * (3.0 * ctx.x + 1.0), rel=1e-15)
        assert built.lib.direct_advance(ctx) == built.lib.DIRECT_OK
    assert ctx.x < 1.5  # the state moved, so the outputs were checked at different points


def test_a_model_file_records_the_sha256_of_its_bytes(write_model):
    path = write_model(GOOD)
    assert load_model(path).digest == hashlib.sha256(path.read_bytes()).hexdigest()
    # The digest is of the bytes, not of the meaning: CRLF line ends give the same model and a
    # different digest, again the file's own.
    crlf = write_model(GOOD.replace("\n", "\r\n"), name="crlf.toml")
    model = load_model(crlf)
    assert model.digest == hashlib.sha256(crlf.read_bytes()).hexdigest()
    assert model.digest != load_model(path).digest and model.f == load_model(path).f
    # A model built in Python has no file, hence no digest.
    x = sp.Symbol("x", real=True)
    assert define("m", states=[State("x", rate=-x)]).digest == ""
