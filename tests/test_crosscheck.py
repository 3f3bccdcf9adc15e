"""The cross-check's bound (verify/bound.py) and the coefficient audit (verify/audit.py).

Outside references: exact rational arithmetic (fractions) for the errors float32 operations
really make; Higham's a priori bound for recursive summation, |s_hat - s| <= gamma_{n-1} sum |x_i|
with gamma_k = k u / (1 - k u) (N. J. Higham, Accuracy and Stability of Numerical Algorithms,
2nd ed., SIAM, 2002, section 4.2, from memory); the independent Python reference; numpy's
nextafter for a value one unit in the last place away.
"""

from __future__ import annotations

import json
import re
from fractions import Fraction

import numpy as np
import pytest
import sympy as sp
from click.testing import CliRunner

from codegen.cli import main
from codegen.discretize import discretize
from codegen.emit import CSource, emit
from codegen.methods import builtin, builtin_ids
from codegen.model import Input, State, define, load_model
from codegen.pipeline import generate
from codegen.rounding import UNIT_ROUNDOFF
from codegen.simplify import simplify
from codegen.verify import bound, check, cross_check, crosscheck
from codegen.verify.audit import audit_coefficients

from conftest import DEMO_MODELS, EXAMPLES, readme_indented_block

# Ticks per example: the demo's tick for the axis, and ticks where every method is stable.
EXAMPLE_DT = {"heater": 0.5, "axis": 2e-4, "battery": 1.0}
# The floor the brief sets for the worst state's observed/bound ratio: a bound a hundred times the
# observed differences would prove little.
TIGHT = 1e-2


# ---- the bound -------------------------------------------------------------------------------

@pytest.mark.parametrize("method_id", ["rk4", "radau-iia2"])
@pytest.mark.parametrize("model_path", DEMO_MODELS, ids=lambda p: p.stem)
def test_the_float_bound_holds_and_is_tight_on_every_example(model_path, method_id):
    model = load_model(model_path)
    c = cross_check(model, builtin(method_id), EXAMPLE_DT[model.name], 1, "float", 300)
    assert c.passed and c.completed == 300, c
    assert TIGHT < c.ratio <= 1.0, c.state_ratios
    assert c.ratio == max(c.state_ratios.values()) and set(c.state_ratios) == \
        {s.name for s in model.states}
    assert c.max_difference <= c.tolerance
    # A bound at the level of float rounding: well under a millionth of each state's scale.
    assert c.tolerance < 1e-6 * max(s.full_scale or 1.0 for s in model.states)


@pytest.mark.parametrize("model_path", DEMO_MODELS, ids=lambda p: p.stem)
def test_the_double_cross_check_uses_double_rounding(model_path):
    model = load_model(model_path)
    c = cross_check(model, builtin("rk4"), EXAMPLE_DT[model.name], 1, "double", 300)
    assert c.passed, c
    assert c.ratio <= 1.0
    assert c.tolerance < 1e-13 * max(s.full_scale or 1.0 for s in model.states)


def test_the_newton_stopping_allowance_is_needed_and_enough(axis, monkeypatch):
    # A hard start (12 V on the axis at rest) with a loose Newton tolerance: the C stops its
    # iteration far from the fixed point, the reference iterates to convergence.
    u = np.full((100, 1), 12.0)
    options = {"newton_tol": 1e-3}
    c = cross_check(axis, builtin("sdirk2"), 1e-3, 1, "float", 100, inputs=u, accuracy=1.0,
                    options=options)
    assert c.passed and TIGHT < c.ratio <= 1.0, c
    monkeypatch.setattr(bound.StepBound, "stop_allowance", lambda self, *args: 0.0)
    without = cross_check(axis, builtin("sdirk2"), 1e-3, 1, "float", 100, inputs=u, accuracy=1.0,
                          options=options)
    assert without.ratio > 10 and not without.passed


def _float_sum_error(values) -> Fraction:
    """|recursive float32 sum - exact sum|, in exact arithmetic."""
    acc = np.float32(0)
    for v in values:
        acc = np.float32(acc + np.float32(v))
    return abs(Fraction(float(acc)) - sum(Fraction(float(v)) for v in values))


def test_the_running_bound_of_a_sum_lies_between_the_true_error_and_higham_s_bound():
    rng = np.random.default_rng(7)
    n = 12
    u = UNIT_ROUNDOFF["float"]
    gamma = (n - 1) * u / (1 - (n - 1) * u)
    ar = bound.Arithmetic("float", 1)
    for _ in range(200):
        xs = rng.normal(size=n).astype(np.float32)
        running = ar.total([ar.known(float(x)) for x in xs]).err[0]
        true = float(_float_sum_error(xs))
        a_priori = gamma * float(np.sum(np.abs(xs.astype(np.float64))))
        assert true <= running <= a_priori, (true, running, a_priori)


def test_products_quotients_and_exact_operations_are_bounded_like_float32_computes_them():
    rng = np.random.default_rng(3)
    ar = bound.Arithmetic("float", 1)
    for _ in range(300):
        a, b = rng.normal(size=2).astype(np.float32) * np.float32(1e3)
        for op, f32, exact in (
                (ar.mul, np.float32(a * b), Fraction(float(a)) * Fraction(float(b))),
                (ar.div, np.float32(a / b), Fraction(float(a)) / Fraction(float(b))),
                (ar.add, np.float32(a + b), Fraction(float(a)) + Fraction(float(b)))):
            result = op(ar.known(float(a)), ar.known(float(b)))
            assert float(abs(Fraction(float(f32)) - exact)) <= result.err[0]
    # Exact operations add nothing: dyadic numbers with few bits.
    half, three = ar.known(0.5), ar.known(3.0)
    assert ar.mul(half, three).err[0] == 0 and ar.add(half, three).err[0] == 0
    assert ar.div(three, half).err[0] == 0 and ar.div(ar.known(1.0), three).err[0] > 0


def test_scaling_by_a_power_of_two_and_adding_zero_add_no_rounding():
    # IEEE 754: x * 2^k is exact unless it leaves the normal range, x + 0 and x * 0 are exact
    # (common practice, no source); the running bound then carries the operand's error alone.
    ar = bound.Arithmetic("float", 1)
    third = ar.literal(sp.Rational(1, 3))  # inexact: carries its representation error
    half = ar.known(0.5)
    scaled = ar.mul(third, half)
    assert scaled.err[0] == third.err[0] / 2 and not scaled.exact[0]
    assert float(np.float32(1 / 3) * np.float32(0.5)) == float(np.float32(1 / 3)) / 2
    assert ar.add(third, ar.known(0.0)).err[0] == third.err[0]
    assert ar.mul(ar.known(0.0), third).err[0] == 0
    # Below the normal range the product loses bits: (1 + 2^-23) 2^-126 / 8 is not a float.
    above_tiny = float(np.nextafter(np.finfo(np.float32).tiny, np.float32(1)))
    assert float(np.float32(above_tiny * 2.0 ** -3)) != above_tiny * 2.0 ** -3
    assert ar.mul(ar.known(above_tiny), ar.known(2.0 ** -3)).err[0] > 0


def quadratic():
    """x' = x^2 + 1 from x = 1: a backward Euler step of 0.5 or 0.25 has no solution (the stage
    equation x1 = 1 + h (x1^2 + 1) has real roots only for h <= (sqrt(2) - 1)/2)."""
    x = sp.Symbol("x", real=True)
    return define("quad", states=[State(name="x", initial=1.0, rate=x ** 2 + 1)])


@pytest.mark.parametrize("precision", ["float", "double"])
def test_a_retried_tick_is_bounded_piece_by_piece(precision):
    # With retries the reference takes the tick as the C does, in 7 pieces after 6 failed
    # attempts (tests/test_stiff.py); the full step of 0.5 has no solution, so the tick can only
    # be bounded along its pieces, each at its own length and position, each starting with the
    # bound the pieces before it left.
    model, method = quadratic(), builtin("backward-euler")
    c = cross_check(model, method, 0.5, 1, precision, 1, inputs=np.zeros((1, 0)), accuracy=1.0,
                    options=dict(retry_depth=4))
    assert c.completed == 1 and c.passed and TIGHT < c.ratio <= 1.0, c
    step = simplify(discretize(model, method, 0.5, 1, retry_depth=4))
    stepper = crosscheck.reference.stepper(
        model, method, {}, newton=crosscheck.generated_newton(model, precision, {}))
    taker = crosscheck._Recorder(stepper)
    crosscheck.reference.TickTaker(model, taker, 0.5, 1, step.safeguards).tick(
        0.0, np.array([1.0]), np.zeros(0))
    pieces = crosscheck.taken_pieces(taker.calls, 0.5, 4)
    # Steps of 0.5 and 0.25 s fail, two of 0.125 s are taken, the next 0.25 s fails and so does
    # its first half, two of 0.0625 s are taken, 0.125 s fails, 0.0625 s is taken, the next
    # fails, and two of 0.03125 s end the tick: positions in shortest pieces of 0.03125 s.
    assert [p.depth for p in pieces] == [2, 2, 3, 3, 3, 4, 4]
    assert [p.position for p in pieces] == [0, 4, 8, 10, 12, 14, 15]
    assert len(taker.calls) == 13
    one = bound.piece_bounds(step, precision, 0.0, pieces[:1], np.zeros(0), {})
    all_of_them = bound.piece_bounds(step, precision, 0.0, pieces, np.zeros(0), {})
    assert np.all(0 < one) and np.all(one < all_of_them)


# ---- the coefficient audit ---------------------------------------------------------------------

@pytest.mark.parametrize("precision", ["float", "double"])
@pytest.mark.parametrize("model_path", DEMO_MODELS, ids=lambda p: p.stem)
def test_the_audit_passes_every_built_in_method(model_path, precision):
    model = load_model(model_path)
    audited = 0
    for method_id in builtin_ids():
        method = builtin(method_id)
        if method.kind == "exact" and model.name != "battery":
            continue  # refused on purpose (test_opcount.py checks the refusal)
        step = simplify(discretize(model, method, EXAMPLE_DT[model.name], 2))
        result = audit_coefficients(step, emit(step, precision))
        assert result.passed, (method_id, result.problems)
        assert result.literals >= 10
        audited += 1
    assert audited >= 21


@pytest.mark.parametrize("options, methods", [
    (dict(retry_depth=3), ("rk4", "sdirk2", "radau-iia3", "ros2")),
    (dict(full_newton=True, clamp_states=True), ("backward-euler", "gauss2", "euler")),
    (dict(newton_refreshes=0), ("sdirk3", "lobatto-iiic2")),
    (dict(accept_error=1e-3, retry_depth=2, clamp_states=True), ("bs3", "dp5", "ros2")),
    (dict(error_estimate=True), ("bs3", "ros2"))])
@pytest.mark.parametrize("precision", ["float", "double"])
def test_the_audit_passes_with_every_safeguard_and_newton_option(options, methods, precision):
    for model_path in DEMO_MODELS:
        model = load_model(model_path)
        for method_id in methods:
            step = simplify(discretize(model, builtin(method_id), EXAMPLE_DT[model.name], 2,
                                       **options))
            result = audit_coefficients(step, emit(step, precision))
            assert result.passed, (model.name, method_id, result.problems)


def one_ulp_up(text: str) -> str:
    """The float literal one unit in the last place above text, as the printer would write it."""
    value = np.float32(text.rstrip("F"))
    return f"{np.nextafter(value, np.float32(np.inf)):.9g}F"


def planted(csource: CSource, old: str, new: str) -> CSource:
    name = csource.source_name
    text = csource.text(name)
    assert text.count(old) >= 1
    files = tuple((n, t.replace(old, new, 1) if n == name else t) for n, t in csource.files)
    return CSource(prefix=csource.prefix, precision=csource.precision, files=files,
                   cdef=csource.cdef)


@pytest.mark.parametrize("literal, named", [
    ("6.66666674e-05F", "AXIS_B2H"),                 # b2*h = 1/15000, a #define'd coefficient
    ("1666.66663F", "axis_rates: tw_dx[0]"),         # 1/L in the rate of i
    ("0.000318000006F", "axis_rates: tw_dx[2]"),     # the lead of the screw
    ("2.40000008e-05F", "axis_reset: J"),            # a tunable parameter's value
])
def test_a_one_ulp_error_in_a_coefficient_is_caught_and_named(axis, literal, named):
    step = simplify(discretize(axis, builtin("rk4"), 2e-4))
    good = emit(step, "float")
    bad = planted(good, literal, one_ulp_up(literal))
    assert audit_coefficients(step, good).passed
    result = audit_coefficients(step, bad)
    assert not result.passed and len(result.problems) == 1
    assert result.problems[0].startswith(named) and one_ulp_up(literal) in result.problems[0]
    assert "\n" not in result.problems[0]


def test_the_check_fails_on_the_planted_error_while_the_trajectories_still_agree(axis):
    step = simplify(discretize(axis, builtin("rk4"), 2e-4))
    bad = planted(emit(step, "float"), "6.66666674e-05F", one_ulp_up("6.66666674e-05F"))
    c = cross_check(axis, builtin("rk4"), 2e-4, 1, "float", 200, csource=bad)
    # The trajectory comparison cannot see one ulp in one weight (module docstring of audit.py);
    # the audit does, and the cross-check fails on it.
    assert c.ratio <= 1.0 and c.accurate
    assert not c.coefficients.passed and not c.passed


def _safeguarded(method_id: str, **options) -> tuple:
    axis = load_model(EXAMPLES / "axis.toml")
    step = simplify(discretize(axis, builtin(method_id), 2e-4, 1, **options))
    return step, emit(step, "float")


@pytest.mark.parametrize("method_id, literal, named", [
    ("sdirk2", "4.2949673e+09F", "axis_ticks: the weight of the high half"),  # 2^32
    ("sdirk2", "(0.25F)", "AXIS_REFRESH_AT"),                         # Newton's refresh rate
    ("sdirk2", "(2.49999994e-05F)", "AXIS_FINE_STEP"),                # h / 2^3
    ("bs3", "(0.00100000005F)", "AXIS_ACCEPT_ERROR"),                 # --accept-error 1e-3
    ("bs3", "(300.0F)", "AXIS_MAX_W"),                                # a clamp bound
    ("sdirk2", "tw_hs * 0.5F", "axis_advance: tw_hs"),                # a retried piece's half
    ("sdirk2", "tw_hs * 2.0F", "axis_advance: tw_hs"),                # its way back
])
def test_the_literals_of_the_safeguards_are_audited_by_what_they_stand_for(method_id, literal,
                                                                          named):
    options = dict(retry_depth=3, clamp_states=True)
    if method_id == "bs3":
        options["accept_error"] = 1e-3
    step, good = _safeguarded(method_id, **options)
    assert audit_coefficients(step, good).passed
    number = re.search(r"\d[\d.e+-]*F", literal).group()
    bad = planted(good, literal, literal.replace(number, one_ulp_up(number)))
    problems = audit_coefficients(step, bad).problems
    assert len(problems) == 1 and problems[0].startswith(named), problems
    assert one_ulp_up(number) in problems[0] and "\n" not in problems[0]


def test_the_piece_scale_is_matched_by_its_role_not_by_its_value():
    # Exact program constants are not whitelisted: 0.5 is right only where a retried piece's
    # span is halved, 2 only where it doubles back, 2^32 only as the weight of the counter's high
    # half taken by a shift of 32.
    step, good = _safeguarded("sdirk2", retry_depth=2)
    swapped = planted(good, "tw_hs = tw_hs * 2.0F;", "tw_hs = tw_hs * 0.5F;")
    problems = audit_coefficients(step, swapped).problems
    assert len(problems) == 1 and problems[0].startswith("axis_advance: tw_hs: literal 0.5F")
    stray = planted(good, "tw_taken = tw_taken + 1U;",
                    "tw_taken = tw_taken + 1U;\n            tw_hs = tw_hs * 0.5F;")
    problems = audit_coefficients(step, stray).problems
    assert len(problems) == 1 and "without changing its span" in problems[0]
    shifted = planted(good, "(tw_n >> 32U)", "(tw_n >> 31U)")
    problems = audit_coefficients(step, shifted).problems
    assert len(problems) == 1 and "shift 31, mask 4294967295" in problems[0]
    double_step = simplify(discretize(load_model(EXAMPLES / "axis.toml"), builtin("rk4"), 2e-4))
    double = emit(double_step, "double")
    assert "tw_high * 4294967296.0)" in double.text("axis.c")
    assert audit_coefficients(double_step, double).passed
    off = planted(double, "tw_high * 4294967296.0)", "tw_high * 4294967296.000001)")
    problems = audit_coefficients(double_step, off).problems
    assert len(problems) == 1 and "2^32" in problems[0]


@pytest.mark.parametrize("method_id", ["sdirk2", "zoh-exact"])
def test_the_audit_reads_inverses_and_propagators_by_row_and_column(method_id):
    battery = load_model(EXAMPLES / "battery.toml")
    step = simplify(discretize(battery, builtin(method_id), 1.0))
    good = emit(step, "float")
    lines = good.text("battery.c").splitlines()
    # The first product with a literal inside the generated solve (or the exact step).
    target = next(line for line in lines if " * tw_in[" in line or " * tw_x[" in line)
    text = target.split("(", 1)[1].split(" * ", 1)[0]
    bad = planted(good, f"({text} * ", f"({one_ulp_up(text)} * ")
    problems = audit_coefficients(step, bad).problems
    assert len(problems) == 1 and one_ulp_up(text) in problems[0]
    assert problems[0].startswith("battery_solve" if method_id == "sdirk2" else "battery_advance")


def test_the_audit_reports_a_changed_expression_and_a_stray_literal(axis):
    step = simplify(discretize(axis, builtin("rk4"), 2e-4))
    good = emit(step, "float")
    changed = planted(good, "tw_dx[2] = (0.000318000006F)*w;", "tw_dx[2] = (0.000318000006F)*i;")
    problem = audit_coefficients(step, changed).problems[0]
    assert problem.startswith("axis_rates: tw_dx[2]: the C text differs from the IR's expression")
    stray = planted(good, "tw_x[tw_i] = tw_x[tw_i] + ((AXIS_B1H",
                    "tw_x[tw_i] = tw_x[tw_i] * 0.5F + ((AXIS_B1H")
    problem = audit_coefficients(step, stray).problems[0]
    assert problem.startswith("axis_advance: literal 0.5F") and "no value of the IR" in problem


# ---- where a trajectory comparison does see one ulp ------------------------------------------

def test_on_exact_arithmetic_the_trajectory_comparison_catches_one_ulp_too():
    # x' = u with dyadic data: u = 0.75, h = 1/16, Heun's weights 1/2: every product and sum of a
    # tick is exact in float, so the running bound is 0 and the C must equal the reference
    # exactly. A weight one ulp off then shows as a non-zero difference. Real models rarely
    # have such data; there the audit is what catches it.
    u = sp.Symbol("u", real=True)
    model = define("ramp", [State("x", initial=0.0, rate=u, range=(0, 100))],
                   inputs=[Input("u", default=0.75)])
    inputs = np.full((64, 1), 0.75)
    method = builtin("heun")
    good = generate(model, method, 0.0625, 1, "float")
    c = cross_check(model, method, 0.0625, 1, "float", 64, inputs=inputs, csource=good)
    assert c.passed and c.ratio == 0 and c.max_difference == 0 and c.tolerance == 0
    literal = next(line.split("(")[1].split(")")[0] for line in good.text("ramp.c").splitlines()
                   if line.startswith("#define RAMP_B1H"))
    bad = planted(good, f"({literal})", f"({one_ulp_up(literal)})")
    c = cross_check(model, method, 0.0625, 1, "float", 64, inputs=inputs, csource=bad)
    assert not c.passed and c.ratio == np.inf and c.max_difference > 0


# ---- reports -------------------------------------------------------------------------------------

def test_check_reports_the_ratio_per_state_and_the_audit_in_text_and_json():
    heater = str(EXAMPLES / "heater.toml")
    runner = CliRunner()
    result = runner.invoke(main, ["check", heater, "--method", "rk4", "--dt", "0.5", "--no-order",
                                  "--precision", "float"])
    assert result.exit_code == 0, result.output
    assert "(bound " in result.stdout and ", ratio " in result.stdout
    assert "observed/bound per state: T " in result.stdout
    assert "coefficients float       ok    every literal of the C" in result.stdout
    result = runner.invoke(main, ["check", heater, "--method", "rk4", "--dt", "0.5", "--no-order",
                                  "--precision", "float", "--json"])
    data = json.loads(result.stdout)["cross_checks"][0]
    assert TIGHT < data["ratio"] <= 1 and set(data["state_ratios"]) == {"T"}
    assert data["coefficients"]["passed"] is True and data["coefficients"]["literals"] > 0


def test_the_whole_check_fails_on_a_planted_error(axis, monkeypatch):
    from codegen import verify

    real = verify.generate

    def with_plant(model, method, dt, substeps=1, precision="float", **options):
        csource = real(model, method, dt, substeps, precision, **options)
        if precision != "float":
            return csource
        return planted(csource, "1666.66663F", one_ulp_up("1666.66663F"))

    monkeypatch.setattr(verify, "generate", with_plant)
    report = check(axis, builtin("rk4"), 2e-4, precisions=("float",), ticks=50, order=False)
    assert not report.passed and not report.cross_checks[0].coefficients.passed


def test_the_readme_shows_what_the_demo_prints():
    runner = CliRunner()
    with runner.isolated_filesystem():
        result = runner.invoke(main, ["demo"])
    assert result.exit_code == 0, result.output
    printed = [line for line in result.stdout.splitlines() if not line.startswith("... ")]
    shown = readme_indented_block("The demo\nprints:")
    assert len(printed) == len(shown)
    # The counts are exact; the measured figures may move in their last digits with the C
    # library, so they are compared as text with every number masked. The README abbreviates
    # the compiler's warning flags.
    number = re.compile(r"\d+(?:\.\d+)?(?:e[-+]\d+)?")
    for got, want in zip(printed, shown):
        if "strict compile" in want:
            head, tail = want.split(" ... ")
            assert got.startswith(head) and got.endswith(tail)
        elif want.startswith(("cost per tick", "files written", "  tickwright-demo", "method")):
            assert got == want
        else:
            assert number.sub("#", got) == number.sub("#", want)
