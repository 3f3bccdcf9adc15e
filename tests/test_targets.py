"""Target descriptions and the run on every target: cross-built C compared bit by bit with the host.

Every target in targets/ runs the same checks. In CI (CI=true) every toolchain must be present and a
missing one fails; locally a target without its toolchain is skipped with the reason.
"""

from __future__ import annotations

import dataclasses
import os
import re
import shutil
import subprocess
from functools import lru_cache
from pathlib import Path

import pytest

from codegen.emit import CSource
from codegen.errors import BuildError, TickwrightError
from codegen.methods import builtin, builtin_ids
from codegen.model import load_model
from codegen.pipeline import generate
from codegen.resources import targets_dir
from codegen.emit import MISRA_DEVIATIONS
from codegen.targets.harness import host_reference
from codegen.targets import (check_on_target, compare_runs,
                             load_target, load_targets, parse_run, parse_target, stack_usage)

ROOT = Path(__file__).resolve().parent.parent
MODELS = sorted((ROOT / "examples").glob("*.toml"))
# A model whose rates need no library call: its advance function is a leaf.
HEATER = str(ROOT / "examples" / "heater.toml")
TARGET_IDS = sorted(p.stem for p in targets_dir().glob("*.toml"))
IN_CI = os.environ.get("CI", "").lower() in ("true", "1", "yes")
# One tick of the demo (the CLI's demo tick): fast enough for the electrical pole of axis.toml to
# stay inside the stability region of every explicit method used here.
DT = 2e-4
TICKS = 200
# Every target runs these methods, plus some of its own, so that all built-ins are covered.
COMMON_METHODS = ("euler", "rk4", "dp5")
EXTRA_METHODS = {"host": ("midpoint", "rk4-38"), "cortex-m4f": ("heun",),
                 "cortex-m3": ("ralston2",), "cortex-m7": ("kutta3",), "rv32imac": ("ssprk3",),
                 "rv32imafc": ("bs3",)}
# Double precision: natively on the host and the M7, as soft double on the M3 and RV32IMAC.
DOUBLE_TARGETS = ("host", "cortex-m7", "cortex-m3", "rv32imac")
# Soft-float helpers: Arm EABI run-time (__aeabi_fadd, __aeabi_i2f, ...) and libgcc (__addsf3,
# __gtsf2, __floatsisf, __fixdfsi, ...), as named by the Arm RTABI and the GCC internals manual
# (from memory).
SOFT_FLOAT_HELPER = re.compile(r"__aeabi_(?:[fd]\w+|\w*2[fd])$|__\w*[sd]f\d?$|__(?:float|fix)\w+$")


def _missing_tools(target) -> list[str]:
    tools = [target.cc, target.nm, target.size, "cppcheck", "timeout"]
    if target.run_command[0] != "{elf}":
        tools.append(target.run_command[0])
    if target.counter_command:
        tools.append(target.counter_command[0])
    return [t for t in tools if shutil.which(t) is None]


def require_toolchain(target_id: str):
    """The target, or a skip (locally) / failure (CI) naming what is missing."""
    target = load_target(target_id)
    missing = _missing_tools(target)
    if missing:
        message = (f"target {target_id}: missing {', '.join(missing)}; "
                   f"run scripts/install-toolchains.sh (packages: {' '.join(target.packages)})")
        if IN_CI:
            pytest.fail(message)
        pytest.skip(message)
    return target


@pytest.fixture(params=TARGET_IDS)
def target(request):
    return require_toolchain(request.param)


@lru_cache(maxsize=None)
def model(path: str):
    return load_model(path)


@lru_cache(maxsize=None)
def source(path: str, method: str, precision: str) -> CSource:
    return generate(model(path), builtin(method), DT, precision=precision)


# ---- the shipped target files ---------------------------------------------------------------------

def test_shipped_targets_are_the_six_cores():
    targets = load_targets()
    assert sorted(targets) == sorted(["host", "cortex-m4f", "cortex-m3", "cortex-m7", "rv32imac",
                                      "rv32imafc"])
    assert {t: targets[t].default_precision for t in targets} == {
        "host": "double", "cortex-m7": "double", "cortex-m4f": "float", "cortex-m3": "float",
        "rv32imac": "float", "rv32imafc": "float"}
    # FPU widths of each core: Arm and RISC-V ISA manuals (M4F single, M7 fpv5-d16 double,
    # M3 none, RV32 F extension single, no F none).
    assert {t: targets[t].hardware_precisions for t in targets} == {
        "host": ("float", "double"), "cortex-m7": ("float", "double"), "cortex-m4f": ("float",),
        "cortex-m3": (), "rv32imac": (), "rv32imafc": ("float",)}
    for t in targets.values():
        # Bit-identical results need C99 without contraction: GCC's GNU modes default to
        # -ffp-contract=fast, which fuses a*b + c (GCC manual, -ffp-contract; from memory);
        # measured here across every target (docs/toolchains.md).
        assert {"-std=c99", "-O2", "-ffp-contract=off"} <= set(t.cflags), t.id
        assert t.exact


def test_boards_and_flags_follow_the_recipes():
    # Outside reference: QEMU's documentation of the Arm MPS2 boards (mps2-an385 Cortex-M3,
    # mps2-an386 Cortex-M4, mps2-an500 Cortex-M7) and of the RISC-V virt board, and GCC's Arm and
    # RISC-V options (-mcpu, -mfpu, -mfloat-abi, -march, -mabi) (from memory); measured here:
    # these boards run these images (docs/toolchains.md).
    recipe = {
        "cortex-m3": ({"-mcpu=cortex-m3", "-mthumb", "-mfloat-abi=soft"}, "mps2-an385"),
        "cortex-m4f": ({"-mcpu=cortex-m4", "-mthumb", "-mfloat-abi=hard", "-mfpu=fpv4-sp-d16"},
                       "mps2-an386"),
        "cortex-m7": ({"-mcpu=cortex-m7", "-mthumb", "-mfloat-abi=hard", "-mfpu=fpv5-d16"},
                      "mps2-an500"),
        "rv32imac": ({"-march=rv32imac", "-mabi=ilp32"}, "virt"),
        "rv32imafc": ({"-march=rv32imafc", "-mabi=ilp32f"}, "virt"),
    }
    for tid, (flags, board) in recipe.items():
        t = load_target(tid)
        assert flags <= set(t.cflags), tid
        assert t.run_command[t.run_command.index("-M") + 1] == board
        # Without -icount QEMU's counters follow the host clock (QEMU documentation of -icount,
        # from memory; measured here: the SysTick figure changed from run to run).
        assert "-icount" in t.run_command


# ---- user target files ----------------------------------------------------------------------------

def _user_file(tmp_path: Path, name: str = "board.toml", **changes) -> Path:
    text = (targets_dir() / "cortex-m4f.toml").read_text(encoding="utf-8")
    text = text.replace('id = "cortex-m4f"', 'id = "my-board"')
    for old, new in changes.items():
        assert old in text or old == "append"
        text = text + new if old == "append" else text.replace(old, new)
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


def test_user_folder_adds_a_target(tmp_path):
    _user_file(tmp_path)
    targets = load_targets(tmp_path)
    assert "my-board" in targets and "cortex-m4f" in targets
    assert load_target("my-board", extra_dir=tmp_path).path == tmp_path / "board.toml"
    assert load_target(str(tmp_path / "board.toml")).id == "my-board"


@pytest.mark.parametrize("change, expected", [
    ({'cc = "arm-none-eabi-gcc"\n': ""}, r"board\.toml: cc: missing"),
    ({'timeout_s = 60': 'timeout_s = "slow"'}, r"board\.toml: run\.timeout_s: must be a number"),
    ({'default_precision = "float"': 'default_precision = "half"'},
     r"board\.toml: default_precision: must be float or double"),
    ({'kind = "systick"': 'kind = "stopwatch"'}, r"board\.toml: counter\.kind: unknown kind"),
    ({'nm = ': 'nmm = '}, r"board\.toml: nmm: unknown key \(did you mean 'nm'\?\)"),
    ({'"-kernel", "{elf}"': '"-kernel"'}, r"board\.toml: run\.command: .*'\{elf\}'"),
    # The cost tables are gone (the measured instructions per tick replace them): refused.
    ({"append": "\n[cost.float]\nadd = 1\n"}, r"board\.toml: cost: unknown key; allowed: "),
])
def test_invalid_target_file_names_file_and_key(tmp_path, change, expected):
    path = _user_file(tmp_path, **change)
    with pytest.raises(TickwrightError, match=expected) as info:
        parse_target(path)
    assert "\n" not in str(info.value)


def test_duplicate_and_unknown_ids_are_clear(tmp_path):
    _user_file(tmp_path, **{'id = "my-board"': 'id = "cortex-m3"'})
    with pytest.raises(TickwrightError, match=r"board\.toml: id: 'cortex-m3' is already defined"):
        load_targets(tmp_path)
    with pytest.raises(TickwrightError, match=r"unknown target 'cortex-m4'; did you mean"):
        load_target("cortex-m4")


def test_missing_toolchain_names_the_package(tmp_path):
    path = _user_file(tmp_path, **{'cc = "arm-none-eabi-gcc"': 'cc = "no-such-cross-gcc"'})
    csource = source(str(MODELS[0]), "euler", "float")
    with pytest.raises(BuildError, match=r"board\.toml: 'no-such-cross-gcc' not found; install "
                                         r"gcc-arm-none-eabi picolibc-arm-none-eabi"):
        check_on_target(csource, model(str(MODELS[0])), load_target(str(path)), ticks=5)


# ---- stack figures from a call graph --------------------------------------------------------------

def test_stack_is_the_worst_chain_of_frames():
    # A hand-written graph in gcc's -fcallgraph-info=su format (VCG): a -> b -> c and a -> d.
    ci = '''graph: { title: "m.c"
node: { title: "m_advance" label: "m_advance\\nm.c:1:1\\n40 bytes (static)" }
node: { title: "m_rates" label: "m_rates\\nm.c:9:1\\n24 bytes (static)" }
node: { title: "m_small" label: "m_small\\nm.c:20:1\\n8 bytes (static)" }
node: { title: "expf" label: "expf\\n<built-in>" shape : ellipse }
edge: { sourcename: "m_advance" targetname: "m_rates" }
edge: { sourcename: "m_advance" targetname: "m_small" }
edge: { sourcename: "m_rates" targetname: "expf" }
}'''
    assert stack_usage(ci, "m_advance") == (64, ("expf",))
    with pytest.raises(TickwrightError, match="recursion"):
        stack_usage(ci + '\nedge: { sourcename: "m_rates" targetname: "m_advance" }', "m_advance")


# ---- every target, every demo model ---------------------------------------------------------------

# Implicit, linearly implicit and exact methods run on the two FPU cores in their own precision.
IMPLICIT_TARGETS = {"cortex-m4f": "float", "cortex-m7": "double"}
# zoh-exact refuses nonlinear models and tunable matrix entries: only the linear demo applies.
EXACT_ONLY_ON = ("battery",)


def _cases():
    for tid in TARGET_IDS:
        methods = COMMON_METHODS + EXTRA_METHODS[tid]
        precisions = ("float", "double") if tid in DOUBLE_TARGETS else ("float",)
        for path in MODELS:
            for method in methods:
                for precision in precisions:
                    yield pytest.param(tid, str(path), method, precision,
                                       id=f"{tid}-{path.stem}-{method}-{precision}")
    implicit = [i for i in builtin_ids() if not builtin(i).is_explicit]
    for tid, precision in IMPLICIT_TARGETS.items():
        for path in MODELS:
            for method in implicit:
                if method == "zoh-exact" and path.stem not in EXACT_ONLY_ON:
                    continue
                yield pytest.param(tid, str(path), method, precision,
                                   id=f"{tid}-{path.stem}-{method}-{precision}")


@pytest.mark.parametrize("target_id, model_path, method, precision", list(_cases()))
def test_generated_code_runs_identically_on_target(target_id, model_path, method, precision):
    target = require_toolchain(target_id)
    csource = source(model_path, method, precision)
    report = check_on_target(csource, model(model_path), target, ticks=TICKS)
    assert report.target == target_id and report.precision == precision
    assert report.ticks == TICKS, report.problems
    assert report.matches_host, report.problems
    assert report.warnings == ()
    for figure in (report.flash_bytes, report.instructions_per_tick, report.image_bytes):
        assert isinstance(figure, int) and figure > 0
    # A leaf function that keeps everything in registers has a zero-byte frame on Arm and RISC-V
    # (the return address stays in a register), so zero is a true figure there.
    assert isinstance(report.stack_bytes, int) and report.stack_bytes >= 0
    if target_id == "host":
        assert report.stack_bytes >= 8  # x86-64 and arm64 count the saved return address
        assert report.sanitizers is True
    if precision == "float":
        assert report.double_free is True and report.double_symbols == ()
    else:
        assert report.double_free is None
    # Soft-float helpers are called exactly when the precision is not in hardware, and their
    # frames are then reported as not included.
    helpers = [s for s in report.stack_excludes if SOFT_FLOAT_HELPER.match(s)]
    assert bool(helpers) == (precision not in target.hardware_precisions), report.stack_excludes
    assert set(report.to_dict()) >= {"passed", "matches_host", "flash_bytes", "stack_bytes",
                                      "instructions_per_tick", "double_free", "misra", "target",
                                      "precision"}
    assert report.passed, report.problems


def test_the_cases_cover_every_built_in_method_target_and_precision():
    # The selections in _cases() must not silently drop a method or a target.
    cases = [tuple(p.values) for p in _cases()]
    assert sorted({c[2] for c in cases}) == sorted(builtin_ids())
    assert sorted(EXTRA_METHODS) == TARGET_IDS
    assert set(DOUBLE_TARGETS) <= set(TARGET_IDS)
    # Every core with a double-precision FPU runs the double builds.
    assert {t for t in TARGET_IDS if "double" in load_target(t).hardware_precisions} <= \
        {c[0] for c in cases if c[3] == "double"}
    for stem in EXACT_ONLY_ON:
        assert any(c[2] == "zoh-exact" and Path(c[1]).stem == stem for c in cases), stem


# ---- the checks can fail --------------------------------------------------------------------------

def _planted(csource: CSource, body: str) -> CSource:
    """The same files with one extra function appended to the source."""
    p = csource.prefix
    extra = (f"\n{p}_real_t {p}_planted({p}_real_t tw_v);\n"
             f"{p}_real_t {p}_planted({p}_real_t tw_v)\n{{\n    return {body};\n}}\n")
    files = tuple((name, text + extra if name == csource.source_name else text)
                  for name, text in csource.files)
    return dataclasses.replace(csource, files=files)


@pytest.mark.parametrize("target_id", ["cortex-m4f", "cortex-m3", "rv32imac", "rv32imafc"])
def test_double_literal_in_float_build_is_found(target_id):
    target = require_toolchain(target_id)
    csource = source(str(MODELS[0]), "rk4", "float")
    m = model(str(MODELS[0]))
    # A double literal promotes the product to double: the compiler warns, and the object needs
    # soft-double helpers (Arm EABI __aeabi_d*, libgcc __*df3).
    report = check_on_target(_planted(csource, "tw_v * 0.1"), m, target, ticks=5)
    assert report.double_free is False and not report.passed
    assert any(re.match(r"__aeabi_d|__\w*df", s) for s in report.double_symbols)
    assert any("-Wdouble-promotion" in w for w in report.warnings)
    # With explicit casts the compiler is silent; the symbol check alone must still see it.
    silent = check_on_target(_planted(csource, f"({csource.prefix}_real_t)((double)tw_v * 0.1)"),
                             m, target, ticks=5)
    assert silent.warnings == ()
    assert silent.double_free is False and not silent.passed


def test_double_literal_is_a_warning_on_the_host():
    target = require_toolchain("host")
    csource = source(str(MODELS[0]), "rk4", "float")
    report = check_on_target(_planted(csource, "tw_v * 0.1"), model(str(MODELS[0])), target,
                             ticks=5)
    assert any("-Wdouble-promotion" in w for w in report.warnings)
    assert not report.passed


def test_corrupted_bit_in_target_output_is_a_mismatch():
    target = require_toolchain("cortex-m4f")
    path = str(MODELS[0])
    csource, m = source(path, "rk4", "float"), model(path)
    report = check_on_target(csource, m, target, ticks=TICKS)
    nfields = 1 + m.nx
    rows = [row for row in _default_rows(m)]
    host = host_reference(csource, m, rows)
    good = parse_run(report.run_output, nfields)
    assert compare_runs(host, good, "float", exact=True) == (True, 0, "")
    lines = report.run_output.splitlines()
    k = next(i for i, ln in enumerate(lines) if ln.startswith("TW-ROW 100 "))
    fields = lines[k].split()
    fields[-1] = f"{int(fields[-1], 16) ^ 1:08x}"  # lowest mantissa bit of the last state
    lines[k] = " ".join(fields)
    bad = parse_run("\n".join(lines), nfields)
    matches, max_ulp, first = compare_runs(host, bad, "float", exact=True)
    assert not matches and max_ulp == 1 and first.startswith("tick 100,")
    # One ulp is inside the tolerance used when bits may legitimately differ; an exponent bit is not.
    assert compare_runs(host, bad, "float", exact=False)[0]
    fields[-1] = f"{int(fields[-1], 16) ^ (1 << 23):08x}"
    lines[k] = " ".join(fields)
    assert not compare_runs(host, parse_run("\n".join(lines), nfields), "float", exact=False)[0]


def _default_rows(m):
    from codegen.targets.harness import _checked_inputs

    return _checked_inputs(m, TICKS, None, "float")


def test_truncated_run_is_an_error():
    with pytest.raises(TickwrightError, match="ended before its summary line"):
        parse_run("TW-ROW 0 0 0 00000000 41a00000\nARM fault\n", 2, "heater.c on cortex-m4f")


# ---- figures against outside references -----------------------------------------------------------

def test_flash_figure_fits_the_text_section(target, tmp_path):
    # The generated functions live in .text of the object; size -A is the outside measure.
    path = str(MODELS[0])
    csource, m = source(path, "rk4", "float"), model(path)
    report = check_on_target(csource, m, target, ticks=3, workdir=tmp_path)
    out = subprocess.run([target.size, "-A", f"{csource.prefix}.o"], cwd=tmp_path,
                         capture_output=True, text=True, check=True).stdout
    text = sum(int(ln.split()[1]) for ln in out.splitlines() if ln.startswith(".text"))
    assert 0 < report.flash_bytes <= text


def test_systick_count_agrees_with_an_instruction_trace(tmp_path):
    # An independent count: with -singlestep -d exec,nochain QEMU logs one line per executed
    # instruction with the symbol name (QEMU documentation of -d, from memory; measured here);
    # the lines inside the advance function, per tick, must match the SysTick figure up to
    # the few instructions of the call and the input store that SysTick also sees.
    target = require_toolchain("cortex-m4f")
    csource, m = source(HEATER, "rk4", "float"), model(HEATER)
    ticks = 4
    report = check_on_target(csource, m, target, ticks=ticks, workdir=tmp_path)
    log = tmp_path / "exec.log"
    cmd = ["timeout", "60", "qemu-system-arm", "-M", "mps2-an386", "-nographic", "-semihosting",
           "-singlestep", "-d", "exec,nochain", "-D", str(log), "-kernel",
           str(tmp_path / "harness.elf")]
    proc = subprocess.run(cmd, capture_output=True, text=True, stdin=subprocess.DEVNULL)
    assert proc.returncode == 0 and "TW-DONE" in proc.stdout + proc.stderr
    traced = sum(1 for ln in log.read_text(errors="replace").splitlines()
                 if ln.rstrip().endswith(f"{csource.prefix}_advance"))
    per_tick = traced / ticks
    assert per_tick > 0
    assert abs(report.instructions_per_tick - per_tick) <= 8, (report.instructions_per_tick,
                                                               per_tick)


def test_misra_deviations_have_reasons_in_every_preamble_and_the_readme():
    csource = source(HEATER, "rk4", "float")
    preamble = csource.text(csource.source_name).split("*/", 1)[0]
    readme = (ROOT / "README.md").read_text(encoding="utf-8")
    listed = re.findall(r"^- \*\*(\d+\.\d+)\*\*: ", readme.split("**MISRA C:2012 deviations**")[1],
                        flags=re.M)
    assert sorted(listed) == sorted(r.removeprefix("misra-c2012-") for r in MISRA_DEVIATIONS)
    for rule, reason in MISRA_DEVIATIONS.items():
        assert re.fullmatch(r"misra-c2012-\d+\.\d+", rule)
        assert len(reason) > 20 and "\n" not in reason
        assert f" rule {rule.removeprefix('misra-c2012-')}: {reason}\n" in preamble, rule


def test_model_without_inputs_runs(tmp_path):
    # No input table in the harness and an empty input buffer on the host side.
    target = require_toolchain("cortex-m4f")
    path = tmp_path / "decay.toml"
    path.write_text('name = "decay"\n[states]\ny = { initial = 1.0, rate = "-0.5*y" }\n',
                    encoding="utf-8")
    m = load_model(path)
    report = check_on_target(generate(m, builtin("rk4"), 0.1, precision="float"), m, target,
                             ticks=50)
    assert report.matches_host and report.ticks == 50
    # y(5 s) = exp(-2.5) to RK4 accuracy at h = 0.1 (local error ~ h^5): an outside value.
    last = parse_run(report.run_output, 2).rows[-1][1]
    import math
    import struct

    assert math.isclose(struct.unpack("<f", struct.pack("<I", last))[0], math.exp(-2.5),
                        rel_tol=1e-5)
