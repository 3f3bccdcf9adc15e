"""Every way a tick can fail, forced on every method kind: the documented status, and the context
left bit for bit as it was.

Kinds: explicit (rk4), explicit with the run-time error estimate (dp5), diagonally implicit
(backward-euler, sdirk2), fully implicit (radau-iia2), Rosenbrock (ros2) and the exact zero-order
hold (zoh-exact), in float and in double. Failures: a NaN input, an overflow, a division by zero
inside f, Newton without a solution, and a singular iteration matrix (an exactly zero pivot, and
a non-finite one). The same table runs through cffi on the host and, in float, on an emulated
Cortex-M4F.
"""

from __future__ import annotations

import math
import re
import subprocess

import numpy as np
import pytest
import sympy as sp

from codegen.build import build
from codegen.emit.printer import LARGEST
from codegen.errors import ModelError
from codegen.methods import builtin
from codegen.model import Input, Parameter, State, define
from codegen.pipeline import generate
from codegen.targets import load_target

x, y, u, w, a, c = sp.symbols("x y u w a c", real=True)
# The tick of every case: h = 1 makes backward Euler's pivot 1 - h*a exactly zero at a = 1 in
# both precisions, and x' = x^2 + 1 from x = 1 has no backward-Euler, sdirk2 or Radau IIA step
# (the stage equation's discriminant is negative).
DT = 1.0
EXPLICIT = ("rk4", "dp5")
DIAGONAL = ("backward-euler", "sdirk2")
FULLY = ("radau-iia2",)
ROSENBROCK = ("ros2",)
KINDS = EXPLICIT + DIAGONAL + FULLY + ROSENBROCK + ("zoh-exact",)


def rich_model(name: str):
    """x' = a x + c x^2 + 1e6 u + 1/w - 1, y' = x - y: every failure is one setting away.

    At the defaults (a = -1, c = 0, u = 0, w = 1) the tick is an ordinary decay.
    """
    return define(name, states=[State("x", initial=0.5, rate=a * x + c * x ** 2 + 10 ** 6 * u
                                      + 1 / w - 1),
                                State("y", initial=0.25, rate=x - y)],
                  inputs=[Input("u", default=0.0), Input("w", default=1.0)],
                  parameters=[Parameter("a", value=-1.0, tunable=True),
                              Parameter("c", value=0.0, tunable=True)])


def linear_model(name: str):
    """x' = -2x + y + 1e6 u, y' = -y + u/2: linear in states and input, for zoh-exact."""
    return define(name, states=[State("x", initial=0.5, rate=-2 * x + y + 10 ** 6 * u),
                                State("y", initial=0.25, rate=-y + u / 2)],
                  inputs=[Input("u", default=0.0)])


def scenarios(method_id: str, precision: str) -> list[tuple[str, dict, str]]:
    """(name, context fields to set after reset, expected status) for one kind.

    A non-finite value inside f (a NaN input, an overflow, 1/0) ends an implicit Runge-Kutta
    method's Newton iteration at once with a non-finite iterate: NO_CONVERGENCE, "Newton
    diverged" (README, implicit methods); every other kind computes the new state and finds it
    non-finite: NONFINITE.
    """
    bad_f = "NO_CONVERGENCE" if method_id in DIAGONAL + FULLY else "NONFINITE"
    cases = [("nan input", {"u": math.nan}, bad_f),
             ("overflow", {"u": LARGEST[precision]}, bad_f)]
    if method_id == "zoh-exact":
        return cases
    cases.append(("division by zero in f", {"w": 0.0}, bad_f))
    if method_id in DIAGONAL + FULLY:
        # x' = x^2 + 1 (a = 0, c = 1, 1e6 u = 1) from x = 1: no real stage value exists.
        cases.append(("newton without a solution", {"a": 0.0, "c": 1.0, "u": 1e-6, "x": 1.0},
                      "NO_CONVERGENCE"))
    if method_id == "backward-euler":
        cases.append(("zero pivot", {"a": 1.0}, "SINGULAR"))  # 1 - h a = 0 exactly
    if method_id in DIAGONAL + FULLY + ROSENBROCK:
        cases.append(("non-finite pivot", {"a": math.nan}, "SINGULAR"))
    return cases


def model_for(method_id: str, name: str):
    return linear_model(name) if method_id == "zoh-exact" else rich_model(name)


def built_kind(method_id: str, precision: str):
    model = model_for(method_id, "fk")
    csource = generate(model, builtin(method_id), DT, precision=precision,
                       error_estimate=method_id == "dp5")
    return model, build(csource, model)


@pytest.mark.parametrize("precision", ["float", "double"])
@pytest.mark.parametrize("method_id", KINDS)
def test_every_failure_returns_its_status_and_keeps_the_context(method_id, precision):
    model, built = built_kind(method_id, precision)
    ffi, lib = built.ffi, built.lib
    ctx = ffi.new("fk_ctx_t *")
    advances = [lambda: lib.fk_advance(ctx)]
    if method_id == "dp5":
        err = ffi.new("fk_real_t *")
        advances.append(lambda: lib.fk_advance_with_error(ctx, err))
    # The control: at the defaults every advance takes the tick and moves the state.
    for advance in advances:
        lib.fk_reset(ctx)
        before = bytes(ffi.buffer(ctx))
        assert advance() == lib.FK_OK and bytes(ffi.buffer(ctx)) != before
    for name, fields, status in scenarios(method_id, precision):
        for advance in advances:
            lib.fk_reset(ctx)
            for field, value in fields.items():
                setattr(ctx, field, value)
            before = bytes(ffi.buffer(ctx))
            assert advance() == getattr(lib, f"FK_{status}"), name
            assert bytes(ffi.buffer(ctx)) == before, f"{name}: the context changed"


def test_zoh_exact_refuses_a_rate_that_divides_by_an_input():
    with pytest.raises(ModelError) as info:
        generate(rich_model("fk"), builtin("zoh-exact"), DT, precision="float")
    assert "\n" not in str(info.value) and "states.x.rate" in str(info.value)


# ---- the same table on an emulated Cortex-M4F ----------------------------------------------------

def c_value(value: float) -> str:
    if math.isnan(value):
        return "NAN"
    return f"{value!r}F"


def target_program(kinds) -> str:
    """A bare-metal main() that runs every scenario of every kind and prints one line each:
    '<kind> <case> <status> <same|changed>'."""
    lines = ["#include <math.h>", "#include <stdio.h>", "#include <string.h>"]
    lines += [f'#include "{prefix}.h"' for prefix, _ in kinds]
    lines += ["int main(void);", "int main(void)", "{"]
    for prefix, method_id in kinds:
        lines += ["    {", f"        {prefix}_ctx_t ctx;", f"        {prefix}_ctx_t before;",
                  "        int status;"]
        cases = [("control", {}, "OK")] + scenarios(method_id, "float")
        for index, (_, fields, _) in enumerate(cases):
            lines.append(f"        {prefix}_reset(&ctx);")
            lines += [f"        ctx.{field} = {c_value(value)};" for field, value in fields.items()]
            lines += ["        before = ctx;",
                      f"        status = (int){prefix}_advance(&ctx);",
                      f'        (void)printf("{prefix} {index} %d %s\\n", status, '
                      f'memcmp(&before, &ctx, sizeof ctx) == 0 ? "same" : "changed");']
        lines.append("    }")
    lines += ['    (void)printf("TW-END\\n");', "    return 0;", "}"]
    return "\n".join(lines) + "\n"


def test_every_failure_on_an_emulated_cortex_m4f(tmp_path):
    target = load_target("cortex-m4f")
    kinds = [(f"k{i}", method_id) for i, method_id in enumerate(KINDS)]
    sources = []
    for prefix, method_id in kinds:
        csource = generate(model_for(method_id, prefix), builtin(method_id), DT,
                           precision="float")
        for name, text in csource.files:
            (tmp_path / name).write_text(text, encoding="utf-8")
        sources.append(csource.source_name)
    (tmp_path / "failures.c").write_text(target_program(kinds), encoding="utf-8")
    subprocess.run([target.cc, *target.cflags, "-Wall", "-Wextra", "-Werror", "failures.c",
                    *sources, *target.ldflags, "-o", "failures.elf"], cwd=tmp_path, check=True,
                   capture_output=True, text=True)
    command = [arg.replace("{elf}", str(tmp_path / "failures.elf")) for arg in target.run_command]
    run = subprocess.run(["timeout", str(int(target.timeout_s)), *command], cwd=tmp_path,
                         capture_output=True, text=True, stdin=subprocess.DEVNULL)
    output = run.stdout + run.stderr  # QEMU's semihosting console may be either stream
    assert "TW-END" in output, output
    got = {tuple(line.split()[:2]): tuple(line.split()[2:])
           for line in output.splitlines() if re.match(r"k\d+ \d+ ", line)}
    codes = {"OK": "0", "NONFINITE": "1", "NO_CONVERGENCE": "2", "SINGULAR": "3"}
    expected = {}
    for prefix, method_id in kinds:
        cases = [("control", {}, "OK")] + scenarios(method_id, "float")
        for index, (_, _, status) in enumerate(cases):
            expected[(prefix, str(index))] = (codes[status], "changed" if status == "OK"
                                              else "same")
    assert got == expected


def test_the_status_values_the_target_test_assumes_are_the_generated_ones():
    _, built = built_kind("rk4", "float")
    values = {name: getattr(built.lib, f"FK_{name}") for name in
              ("OK", "NONFINITE", "NO_CONVERGENCE", "SINGULAR")}
    assert values == {"OK": 0, "NONFINITE": 1, "NO_CONVERGENCE": 2, "SINGULAR": 3}
    assert np.isfinite(LARGEST["float"]) and LARGEST["float"] == float(np.finfo(np.float32).max)
