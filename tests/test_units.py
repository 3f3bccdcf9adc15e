"""The unit check: unit strings, rates in their state's unit per second, consistent expressions.

Unit facts used below come from the SI brochure (BIPM, The International System of Units, 9th
edition, 2019; from memory): the henry is V*s/A and the ohm V/A (section 2.3.4, Table 4), the
radian is m/m = 1, a dimensionless derived unit (Table 4), the hour is 3600 s (Table 8), and
temperature differences in degC equal those in K (section 2.3.4).
"""

from __future__ import annotations

import pytest
from click.testing import CliRunner

from codegen.cli import main
from codegen.errors import ModelError
from codegen.model import Input, State, check_units, define, load_model
from codegen.model.units import factor, parse_unit, unit_text

from conftest import DEMO_MODELS

# A DC motor: armature current i and speed w, voltage V in, load torque T_load. Invented numbers.
MOTOR = """
name = "motor"
[states]
i = {{ rate = "{i_rate}", unit = "{i_unit}" }}
w = {{ rate = "{w_rate}", unit = "rad/s" }}
[inputs]
V = {{ unit = "V" }}
T_load = {{ unit = "N*m" }}
i_ref = {{ unit = "mA" }}
[parameters]
R = {{ value = 1.8, unit = "ohm" }}
L = {{ value = 0.6e-3, unit = "H" }}
Ke = {{ value = 0.035, unit = "V*s/rad" }}
Kt = {{ value = 0.035, unit = "N*m/A" }}
J = {{ value = 2.4e-5, unit = "kg*m^2" }}
tau = {{ value = 0.01, unit = "s" }}
[outputs]
power = {{ expr = "{power}", unit = "{power_unit}" }}
"""
GOOD = dict(i_rate="(V - R*i - Ke*w)/L", i_unit="A", w_rate="(Kt*i - T_load)/J",
            power="V*i", power_unit="W")


def motor(write_model, **changes) -> str:
    return str(write_model(MOTOR.format(**{**GOOD, **changes}), "drive.toml"))


def refusal(path: str) -> str:
    with pytest.raises(ModelError) as info:
        load_model(path, check_units=True)
    return str(info.value)


def test_the_motor_passes_and_its_rates_have_their_states_units_per_second(write_model):
    # V/H = A/s and N*m/A*A/(kg*m^2) = 1/s^2 = rad/s^2 (SI brochure, Table 4; from memory).
    load_model(motor(write_model), check_units=True)
    assert factor(parse_unit("V/H", "f", "i"), parse_unit("A/s", "f", "i")) == pytest.approx(1)
    assert factor(parse_unit("N*m/(kg*m^2)", "f", "i"),
                  parse_unit("rad/s^2", "f", "i")) == pytest.approx(1)


def test_a_voltage_added_to_a_torque_is_refused_with_one_line(write_model):
    path = motor(write_model, w_rate="(Kt*i + T_load + V)/J")
    assert refusal(path) == (f"{path}: states.w.rate: 'T_load + V' adds N*m and V; every term "
                             "of a sum needs the same unit")


def test_a_rate_in_volts_for_a_state_in_amperes_is_refused(write_model):
    path = motor(write_model, i_rate="V - R*i - Ke*w")
    assert refusal(path) == (f"{path}: states.i.rate: has unit V (= kg*m^2/(s^3*A)), but a rate "
                             "of i (in A) must be in A/s; check the expression and the units of "
                             "its quantities")


def test_a_rate_in_milliamperes_per_second_is_a_factor_1000_error(write_model):
    path = motor(write_model, i_rate="i_ref/tau")
    message = refusal(path)
    assert message.startswith(f"{path}: states.i.rate: has unit mA/s, but a rate of i (in A) "
                              "must be in A/s; mA/s is 1/1000 times A/s")
    # The same rate for a state declared in mA is right.
    load_model(motor(write_model, i_rate="i_ref/tau", i_unit="mA", w_rate="-w/tau",
                     power_unit="mW"), check_units=True)


def test_a_sum_of_amperes_and_milliamperes_is_refused_for_its_factor(write_model):
    path = motor(write_model, i_rate="(i - i_ref)/tau")
    assert "'i - i_ref' adds A and mA, which differ by a factor 1000" in refusal(path)


def test_hours_are_converted_exactly_so_a_plain_3600_is_reported(write_model):
    # 1 h = 3600 s (SI brochure, Table 8; from memory): A/(A*h) is 1/3600 of 1/s.
    text = ('name = "cell"\n[states]\nsoc = { rate = "-I/(3600*Q)", unit = "1" }\n'
            '[inputs]\nI = { unit = "A" }\n[parameters]\nQ = { value = 2.5, unit = "A*h" }\n')
    assert "1/h is 1/3600 times 1/s" in refusal(str(write_model(text)))
    fixed = text.replace('value = 2.5, unit = "A*h"', 'value = 9000.0, unit = "A*s"') \
        .replace("3600*Q", "Q")
    load_model(write_model(fixed), check_units=True)


def test_an_unknown_unit_is_named_with_a_suggestion(write_model):
    path = motor(write_model, i_unit="Ampere")
    assert refusal(path) == (f"{path}: states.i.unit: unknown unit 'Ampere' (did you mean "
                             "'ampere'?)")
    text = MOTOR.format(**GOOD).replace('"rad/s"', '"degc"')
    path = str(write_model(text, "temp.toml"))
    assert refusal(path) == f"{path}: states.w.unit: unknown unit 'degc' (did you mean 'degC'?)"


@pytest.mark.parametrize("unit, fragment", [
    ("N*m/Amp", "unknown unit 'Amp' in 'N*m/Amp' (did you mean 'amp'?)"),
    ("2*A", "cannot read the unit '2*A'"),
    ("A+", "cannot read the unit 'A+'"),
])
def test_malformed_unit_strings_are_one_line(write_model, unit, fragment):
    path = motor(write_model, i_unit=unit)
    message = refusal(path)
    assert message.startswith(f"{path}: states.i.unit: ") and fragment in message
    assert "\n" not in message


def test_piecewise_branches_in_different_units_are_refused(write_model):
    path = motor(write_model, i_rate="Piecewise(((V - R*i)/L, i > 0), (V, True))")
    assert refusal(path) == (f"{path}: states.i.rate: Piecewise branches '(-R*i + V)/L' and 'V' "
                             "are in V/H and V; every branch of a Piecewise needs the same unit")


def test_zero_fits_any_unit_and_comparisons_need_one_unit(write_model):
    load_model(motor(write_model, i_rate="Piecewise(((V - R*i)/L, i > 0), (0, True))"),
               check_units=True)
    path = motor(write_model, i_rate="Piecewise(((V - R*i)/L, i > V), (0, True))")
    assert "'V < i' compares V and A; both sides of a comparison need the same unit" in \
        refusal(path)


def test_exp_of_a_voltage_is_refused_and_radians_count_as_plain_numbers(write_model):
    path = motor(write_model, i_rate="(V - R*i*exp(V))/L")
    assert refusal(path) == (f"{path}: states.i.rate: 'exp(V)' needs a dimensionless argument, "
                             "but 'V' is in V; divide it by a quantity in the same unit")
    # w*t is in rad, dimensionless (SI brochure, Table 4; from memory): sin accepts it.
    load_model(motor(write_model, i_rate="(V*sin(w*t) - R*i)/L"), check_units=True)


def test_angles_in_degrees_are_refused_by_the_trigonometric_functions(write_model):
    text = MOTOR.format(**GOOD).replace('[outputs]', '[outputs]\ns = "sin(th)"') \
        .replace('[inputs]', '[inputs]\nth = { unit = "deg" }')
    message = refusal(str(write_model(text)))
    assert "outputs.s: 'sin(th)' needs a plain number or radians, but 'th' is in deg" in message


def test_only_exact_roots_keep_a_unit(write_model):
    base = MOTOR.format(**GOOD).replace("[inputs]", '[inputs]\narea = { unit = "m^2" }\n'
                                        'len = { unit = "m" }')
    load_model(write_model(base.replace("[outputs]", '[outputs]\nd = { expr = "sqrt(area)", '
                                        'unit = "m" }')), check_units=True)
    path = write_model(base.replace("[outputs]", '[outputs]\nd = "sqrt(len)"'))
    assert "'sqrt(len)' takes the power 1/2 of m, which is not a whole power" in refusal(path)


def test_an_output_is_checked_against_its_declared_unit(write_model):
    path = motor(write_model, power="V*i", power_unit="kW")
    assert refusal(path).startswith(f"{path}: outputs.power: has unit V*A, but declares kW; V*A "
                                    "is 1/1000 times kW")
    path = motor(write_model, power="V*i", power_unit="N*m")
    assert f"{path}: outputs.power: has unit V*A" in refusal(path)


# A heated enclosure in degC with its surroundings. Invented numbers.
OVEN = """
name = "oven"
[states]
T = {{ initial = 20.0, rate = "{rate}", unit = "degC" }}
[inputs]
P = {{ unit = "W" }}
[parameters]
T_amb = {{ value = 20.0, unit = "degC" }}
T_fahrenheit = {{ value = 68.0, unit = "degF" }}
R_th = {{ value = 2.5, unit = "K/W" }}
C_th = {{ value = 120.0, unit = "J/K" }}
[outputs]
y = {{ expr = "{out}", unit = "{out_unit}" }}
"""


def oven(write_model, rate="(P - (T - T_amb)/R_th)/C_th", out="(T + T_amb)/2", out_unit="degC"):
    return str(write_model(OVEN.format(rate=rate, out=out, out_unit=out_unit), "oven.toml"))


def test_a_celsius_state_has_its_rate_in_kelvin_per_second(write_model):
    # T - T_amb is a difference in delta_degC = K (SI brochure, section 2.3.4; from memory), so
    # (W - K/(K/W))/(J/K) = K/s, the rate of a degC state.
    load_model(oven(write_model), check_units=True)
    assert unit_text(parse_unit("delta_degC/s", "f", "i")) == "delta_degC/s"


@pytest.mark.parametrize("rate, out, out_unit, fragment", [
    ("(P - (T - T_amb)/R_th)/C_th", "T + T_amb", "degC",
     "outputs.y: 'T + T_amb' counts readings in degC with total weight 2"),
    ("(P - (T - T_amb)/R_th)/C_th", "T - T_fahrenheit", "degC",
     "outputs.y: 'T - T_fahrenheit' adds degC and degF"),
    ("(P - T/R_th)/C_th", "T", "degC",
     "states.T.rate: '-T/R_th' multiplies 'T', a reading in degC (an offset scale)"),
    ("(P - (T - T_amb)/R_th)/C_th", "T - T_amb", "degC",
     "outputs.y: is in delta_degC, but declares degC"),
    ("(P - (T - T_amb)/R_th)/C_th", "T", "K",
     "outputs.y: is a reading in degC, but declares K"),
    ("T/C_th", "T", "degC", "states.T.rate: 'T/C_th' multiplies 'T'"),
])
def test_offset_temperatures_are_readings_and_their_differences(write_model, rate, out,
                                                                 out_unit, fragment):
    assert fragment in refusal(oven(write_model, rate, out, out_unit))


def test_quantities_without_units_skip_the_expressions_they_appear_in(write_model):
    # k has no unit: the rate that uses it is skipped, the output (all with units) is checked.
    text = ('name = "part"\n[states]\nx = { rate = "-k*x + v", unit = "m" }\n'
            '[inputs]\nv = { unit = "V" }\n[parameters]\nk = 2.0\n'
            '[outputs]\ny = "x + v"\n')
    path = str(write_model(text))
    assert refusal(path) == (f"{path}: outputs.y: 'v + x' adds V and m; every term of a sum "
                             "needs the same unit")
    load_model(write_model(text.replace('y = "x + v"', 'y = "x + k*v"')), check_units=True)


def test_a_model_without_any_unit_is_not_checked(write_model):
    text = 'name = "bare"\n[states]\nx = { rate = "exp(x) + y" }\ny = { rate = "x" }\n'
    model = load_model(write_model(text), check_units=True)
    check_units(model)
    assert model.nx == 2


def test_models_built_in_python_are_checked_on_request():
    import sympy as sp

    v = sp.Symbol("v", real=True)
    model = define("py", [State("i", unit="A", rate=v)], inputs=[Input("v", unit="V")])
    with pytest.raises(ModelError, match=r"<python>: states.i.rate: has unit V"):
        check_units(model)


def test_load_model_checks_only_when_asked(write_model):
    path = motor(write_model, i_rate="V")
    assert load_model(path).nx == 2
    assert "states.i.rate: has unit V" in refusal(path)


@pytest.mark.parametrize("path", DEMO_MODELS, ids=lambda p: p.name)
def test_the_example_models_pass(path):
    model = load_model(path, check_units=True)
    assert any(s.unit for s in model.states)


def run(*args):
    return CliRunner().invoke(main, [str(a) for a in args])


@pytest.mark.parametrize("command, extra", [
    ("emit", ["--method", "rk4", "--dt", "1e-4", "--out", "gen"]),
    ("check", ["--method", "rk4", "--dt", "1e-4"]),
    ("replay", ["--method", "rk4", "--dt", "1e-4", "--steps", "3", "--out", "r.csv"]),
    ("advise", []),
])
def test_every_command_that_loads_a_model_checks_its_units(write_model, tmp_path, command,
                                                           extra):
    path = motor(write_model, w_rate="(Kt*i + T_load + V)/J")
    out = [str(tmp_path / a) if a in ("gen", "r.csv") else a for a in extra]
    result = run(command, path, *out)
    assert result.exit_code == 1
    assert result.output == (f"tickwright: error: {path}: states.w.rate: 'T_load + V' adds N*m "
                             "and V; every term of a sum needs the same unit\n")
    assert not (tmp_path / "gen").exists() and not (tmp_path / "r.csv").exists()
    assert "--no-units" in run(command, "--help").output


def test_no_units_skips_the_check(write_model, tmp_path):
    path = motor(write_model, w_rate="(Kt*i + T_load + V)/J")
    result = run("emit", path, "--method", "rk4", "--dt", "1e-4", "--out", tmp_path / "gen",
                 "--no-units")
    assert result.exit_code == 0, result.output
    assert sorted(p.name for p in (tmp_path / "gen").iterdir()) == ["motor.c", "motor.h"]
    result = run("replay", path, "--method", "rk4", "--dt", "1e-4", "--steps", "3", "--out",
                 tmp_path / "r.csv", "--no-units")
    assert result.exit_code == 0, result.output
