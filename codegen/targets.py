"""Stage 8: generated C -> run on a target (cross-compiled, emulated) and compared with the host.

A target is data: one TOML file in targets/ (or a user's own folder) giving the compiler and its
flags, the link recipe, the emulator command line, the instruction counter and a rough cost table.
check_on_target() builds the generated C for the target, runs a harness that prints every state
after every tick as exact bit patterns, and compares them with the host build of the same C
(cffi, build.build) fed with the same inputs. It also measures code size, worst-case stack, and
instructions per tick, looks for soft-double helpers in float builds, and runs cppcheck's MISRA
C:2012 addon on the generated files.
"""

from __future__ import annotations

import concurrent.futures
import difflib
import hashlib
import math
import os
import re
import shutil
import struct
import subprocess
import tempfile
import tomllib
from dataclasses import asdict, dataclass, field
from pathlib import Path

from . import build as host_build
from .emit import MISRA_DEVIATIONS, CSource, comment_text, render
from .errors import BuildError, TickwrightError, located
from .printer import DOUBLE, FLOAT, PRECISIONS
from .resources import targets_dir

# MISRA C:2012 rules the generated code departs from on purpose: MISRA_DEVIATIONS, defined beside
# the generator (codegen/emit.py). Findings of these rules are dropped from TargetReport.misra.

# Measurement kinds the harness knows: a counter read around each tick, or a count taken outside.
COUNTER_KINDS = ("systick", "instret", "callgrind")
COST_KEYS = ("add", "mul", "div", "sqrt", "transcendental")
# SysTick is a 24-bit down counter; the harness reloads it at its maximum and counts wraps.
SYSTICK_RELOAD = 0xFFFFFF
# CTRL = ENABLE | TICKINT | CLKSOURCE (processor clock): count, and interrupt on every wrap.
SYSTICK_CTRL = 7

# "csrr rd, minstret" (CSR 0xB02) spelled as a raw I-type instruction (opcode SYSTEM, funct3 CSRRS,
# rs1 x0; the 12-bit field holds 0xB02 = -1278 signed), so -march needs no _zicsr, whose spelling
# differs between GCC versions.
INSTRET_ASM = ".insn i 0x73, 2, %0, x0, -1278"
# Tags of the harness output lines (printed by templates/harness.c.j2, parsed here).
ROW_TAG = "TW-ROW"
DONE_TAG = "TW-DONE"

# Without -ffp-contract=off, or with library functions that are not correctly rounded (expf,
# sinf, ...), two correct builds may differ in the last bits, and the difference can grow over a
# run. Relative tolerance, scaled by the largest magnitude of the state over the host run: a few
# hundred units in the last place of float, a few thousand of double. Common practice, no source.
RELATIVE_TOLERANCE = {FLOAT: 2.0 ** -15, DOUBLE: 2.0 ** -40}
# math.h functions whose results IEEE 754 requires correctly rounded, so every libm agrees on them.
CORRECTLY_ROUNDED = frozenset({"sqrt", "fabs", "floor", "ceil", "fmin", "fmax", "copysign",
                               "trunc", "round", "rint", "fmod"})
# Every math.h function the printer may call (double names; float adds 'f').
MATH_FUNCTIONS = frozenset({"sin", "cos", "tan", "asin", "acos", "atan", "atan2", "sinh", "cosh",
                            "tanh", "exp", "log", "sqrt", "pow", "fabs", "floor", "ceil", "fmin",
                            "fmax", "copysign", "trunc", "round", "rint", "fmod", "hypot", "cbrt",
                            "expm1", "log1p", "log10", "log2", "exp2", "erf", "erfc"})
# Soft-double helpers of the Arm EABI run-time (__aeabi_dadd, __aeabi_f2d, ...) and of libgcc on
# other cores (__adddf3, __extendsfdf2, __fixdfsi, ...): any of them means double arithmetic.
SOFT_DOUBLE = re.compile(r"^__aeabi_(d[a-z0-9]+|[a-z0-9]*2d)$|^__[a-z]*df[a-z0-9]*$")
# Stimulus when the caller gives no inputs: each input holds a level for this many ticks.
HOLD_TICKS = 10
# Step between successive input levels (fraction of the range): the golden ratio's fractional part
# visits the range evenly without repeating.
LEVEL_STEP = 0.6180339887498949
# The cppcheck command line of EMBEDDED.md (its MISRA addon runs without the rule texts).
CPPCHECK_ARGS = ("--addon=misra", "--enable=all", "--std=c99", "-q", "--error-exitcode=2",
                 "--suppress=unusedFunction", "--suppress=missingIncludeSystem",
                 "--template={file}:{line}: {id}: {message}")
# Flags of the host sanitizer run: stop at the first report.
SANITIZER_FLAGS = ("-fsanitize=address,undefined", "-fno-sanitize-recover=all", "-g", "-O1")
# The harness is ours: it must compile without warnings too.
HARNESS_WARNINGS = ("-Wall", "-Wextra", "-Werror")
# Seconds for one compile or cppcheck run before it counts as hung.
TOOL_TIMEOUT_S = 120


@dataclass(frozen=True)
class Cost:
    """Rough cycles per operation in one precision (see the comment in each target file)."""

    add: float
    mul: float
    div: float
    sqrt: float
    transcendental: float


@dataclass(frozen=True)
class Target:
    """One target description, validated on construction from its TOML file."""

    id: str
    description: str
    path: Path
    cc: str
    nm: str
    size: str
    packages: tuple[str, ...]
    cflags: tuple[str, ...]
    ldflags: tuple[str, ...]
    default_precision: str
    hardware_precisions: tuple[str, ...]
    run_command: tuple[str, ...]
    run_packages: tuple[str, ...]
    timeout_s: float
    counter_kind: str
    instructions_per_count: float
    counter_command: tuple[str, ...]
    counter_packages: tuple[str, ...]
    cost: tuple[tuple[str, Cost], ...]
    fingerprint: str = field(default="", compare=False, repr=False)

    @property
    def exact(self) -> bool:
        """Whether this target's flags promise results bit-identical with the host build."""
        return "-ffp-contract=off" in self.cflags

    @property
    def is_host(self) -> bool:
        return self.counter_kind == "callgrind"

    def cost_for(self, precision: str) -> Cost:
        return dict(self.cost)[precision]

    def estimate_cycles(self, counts, precision: str) -> float:
        """Rough cycles of an operation count (add, mul, div, sqrt, call attributes)."""
        c = self.cost_for(precision)
        return (counts.add * c.add + counts.mul * c.mul + counts.div * c.div
                + counts.sqrt * c.sqrt + counts.call * c.transcendental)

    def to_dict(self) -> dict:
        return dict(id=self.id, description=self.description, path=str(self.path), cc=self.cc,
                    cflags=list(self.cflags), ldflags=list(self.ldflags),
                    default_precision=self.default_precision,
                    hardware_precisions=list(self.hardware_precisions),
                    emulator=list(self.run_command), counter=self.counter_kind,
                    cost={p: asdict(c) for p, c in self.cost})


# ---- loading and validation ---------------------------------------------------------------------

_TOP_KEYS = {"id": str, "description": str, "cc": str, "nm": str, "size": str, "packages": list,
             "cflags": list, "ldflags": list, "default_precision": str,
             "hardware_precisions": list, "run": dict, "counter": dict, "cost": dict}
_RUN_KEYS = {"command": list, "packages": list, "timeout_s": (int, float)}
_COUNTER_KEYS = {"kind": str, "instructions_per_count": (int, float), "command": list,
                 "packages": list}
_ID_PATTERN = re.compile(r"[a-z0-9][a-z0-9_.-]*\Z")


def _fail(path: Path, key: str, message: str) -> TickwrightError:
    return TickwrightError(located(path.name, key, message))


def _check_keys(path: Path, table: dict, spec: dict, prefix: str, optional=()) -> None:
    for key in table:
        if key not in spec:
            close = difflib.get_close_matches(key, list(spec), n=1)
            hint = f" (did you mean '{close[0]}'?)" if close else \
                f"; allowed: {', '.join(spec)}"
            raise _fail(path, prefix + key, f"unknown key{hint}")
    for key, kind in spec.items():
        if key not in table:
            if key in optional:
                continue
            raise _fail(path, prefix + key, "missing; every target file needs it "
                        "(see targets/cortex-m4f.toml)")
        value = table[key]
        if not isinstance(value, kind) or isinstance(value, bool):
            want = kind.__name__ if isinstance(kind, type) else "number"
            want = {"str": "a string", "list": "a list of strings", "dict": "a table",
                    "number": "a number"}.get(want, want)
            raise _fail(path, prefix + key, f"must be {want}, got {value!r}")
        if kind is list and not all(isinstance(v, str) for v in value):
            raise _fail(path, prefix + key, "must be a list of strings")


def _precisions(path: Path, key: str, values) -> tuple[str, ...]:
    for v in values:
        if v not in PRECISIONS:
            raise _fail(path, key, f"unknown precision {v!r}; use {' or '.join(PRECISIONS)}")
    return tuple(values)


def parse_target(path: str | Path) -> Target:
    """Read and validate one target file; errors name the file and the key."""
    path = Path(path)
    try:
        raw = path.read_bytes()
        data = tomllib.loads(raw.decode("utf-8"))
    except OSError as exc:
        raise TickwrightError(f"{path}: cannot read the target file: {exc.strerror}") from None
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise TickwrightError(f"{path.name}: not valid TOML: {exc}") from None
    _check_keys(path, data, _TOP_KEYS, "")
    _check_keys(path, data["run"], _RUN_KEYS, "run.", optional=("packages",))
    _check_keys(path, data["counter"], _COUNTER_KEYS, "counter.",
                optional=("command", "packages"))
    if not _ID_PATTERN.match(data["id"]):
        raise _fail(path, "id", f"{data['id']!r} is not a valid id; use lower case letters, "
                    "digits, '-', '_' and '.'")
    default = data["default_precision"]
    if default not in PRECISIONS:
        raise _fail(path, "default_precision", f"must be {' or '.join(PRECISIONS)}, "
                    f"got {default!r}")
    hardware = _precisions(path, "hardware_precisions", data["hardware_precisions"])
    run = data["run"]
    if not run["command"] or "{elf}" not in run["command"]:
        raise _fail(path, "run.command", "must be a non-empty list with the placeholder "
                    "'{elf}' where the program goes")
    if run["timeout_s"] <= 0:
        raise _fail(path, "run.timeout_s", "must be a positive number of seconds")
    counter = data["counter"]
    if counter["kind"] not in COUNTER_KINDS:
        raise _fail(path, "counter.kind", f"unknown kind {counter['kind']!r}; use one of "
                    f"{', '.join(COUNTER_KINDS)}")
    if not counter["instructions_per_count"] > 0:
        raise _fail(path, "counter.instructions_per_count", "must be positive")
    command = tuple(counter.get("command", ()))
    joined = " ".join(command)
    if counter["kind"] == "callgrind" and ("{elf}" not in joined or "{advance}" not in joined):
        raise _fail(path, "counter.command", "a callgrind counter needs a command with the "
                    "placeholders '{elf}' and '{advance}'")
    cost = []
    for precision in PRECISIONS:
        table = data["cost"].get(precision)
        if not isinstance(table, dict):
            raise _fail(path, f"cost.{precision}", "missing; give rough cycles for "
                        f"{', '.join(COST_KEYS)}")
        _check_keys(path, table, {k: (int, float) for k in COST_KEYS}, f"cost.{precision}.")
        for k in COST_KEYS:
            if table[k] <= 0:
                raise _fail(path, f"cost.{precision}.{k}", "must be a positive number of cycles")
        cost.append((precision, Cost(**{k: float(table[k]) for k in COST_KEYS})))
    for extra in data["cost"]:
        if extra not in PRECISIONS:
            raise _fail(path, f"cost.{extra}", f"unknown precision; use {' or '.join(PRECISIONS)}")
    return Target(
        id=data["id"], description=data["description"], path=path, cc=data["cc"],
        nm=data["nm"], size=data["size"], packages=tuple(data["packages"]),
        cflags=tuple(data["cflags"]), ldflags=tuple(data["ldflags"]),
        default_precision=default, hardware_precisions=hardware,
        run_command=tuple(run["command"]), run_packages=tuple(run.get("packages", ())),
        timeout_s=float(run["timeout_s"]), counter_kind=counter["kind"],
        instructions_per_count=float(counter["instructions_per_count"]),
        counter_command=command, counter_packages=tuple(counter.get("packages", ())),
        cost=tuple(cost), fingerprint=hashlib.sha256(raw).hexdigest())


def load_targets(extra_dir: str | Path | None = None) -> dict[str, Target]:
    """Every target: the shipped files in targets/ plus the *.toml files of extra_dir, by id.

    An id defined twice is an error naming both files.
    """
    folders = [targets_dir()]
    if extra_dir is not None:
        extra = Path(extra_dir)
        if not extra.is_dir():
            raise TickwrightError(f"{extra}: target folder not found; give a folder of "
                                  "*.toml target files")
        folders.append(extra)
    targets: dict[str, Target] = {}
    for folder in folders:
        for path in sorted(folder.glob("*.toml")):
            target = parse_target(path)
            if target.id in targets:
                raise _fail(path, "id", f"'{target.id}' is already defined by "
                            f"{targets[target.id].path}; choose another id")
            targets[target.id] = target
    return targets


def load_target(id_or_path: str | Path, extra_dir: str | Path | None = None) -> Target:
    """One target by id (shipped or in extra_dir), or from the path of a target file."""
    if isinstance(id_or_path, Target):
        return id_or_path
    text = str(id_or_path)
    if text.endswith(".toml") or os.sep in text:
        return parse_target(text)
    targets = load_targets(extra_dir)
    if text not in targets:
        close = difflib.get_close_matches(text, list(targets), n=1)
        hint = f"did you mean '{close[0]}'? " if close else ""
        raise TickwrightError(f"--target: unknown target '{text}'; {hint}known targets: "
                              f"{', '.join(targets)} (or give the path of a target file)")
    return targets[text]


# ---- the report -----------------------------------------------------------------------------------

@dataclass(frozen=True)
class TargetReport:
    """What one target run found. passed is True only when every check below holds.

    flash_bytes: code of the generated functions (nm -S of the object, text symbols of the prefix).
    stack_bytes: worst frame sum along the call chain from P_advance (gcc -fstack-usage, callgraph
    info); library callees such as soft-float helpers are not included (listed in stack_excludes).
    instructions_per_tick: worst tick over the run (mean in instructions_mean); on the host, the
    callgrind total divided by the ticks.
    """

    target: str
    precision: str
    passed: bool
    matches_host: bool
    comparison: str
    max_ulp: int
    ticks: int
    flash_bytes: int
    stack_bytes: int
    stack_excludes: tuple[str, ...]
    instructions_per_tick: int | None
    instructions_mean: float | None
    image_bytes: int
    double_free: bool | None
    double_symbols: tuple[str, ...]
    warnings: tuple[str, ...]
    misra: tuple[str, ...]
    misra_deviations: tuple[str, ...]
    sanitizers: bool | None
    problems: tuple[str, ...]
    commands: tuple[str, ...]
    run_output: str = field(default="", repr=False, compare=False)

    def to_dict(self) -> dict:
        """The stable JSON shape (run_output left out)."""
        data = asdict(self)
        data.pop("run_output")
        for key, value in data.items():
            if isinstance(value, tuple):
                data[key] = list(value)
        return data


# ---- harness --------------------------------------------------------------------------------------

def _round(value: float, precision: str) -> float:
    if precision == DOUBLE:
        return float(value)
    return struct.unpack("<f", struct.pack("<f", value))[0]


def _c_literal(value: float, precision: str) -> str:
    """An exact hexadecimal C99 literal of a value already rounded to the precision."""
    return value.hex() + ("F" if precision == FLOAT else "")


def default_inputs(model, ticks: int) -> list[list[float]]:
    """A deterministic staircase over each input's range (its default where it has no range).

    Rows: ticks x len(model.inputs); each level is held HOLD_TICKS ticks.
    """
    rows = []
    for k in range(ticks):
        level_index = k // HOLD_TICKS
        row = []
        for j, u in enumerate(model.inputs):
            if u.range is None:
                row.append(float(u.default))
                continue
            lo, hi = float(u.range[0]), float(u.range[1])
            level = (level_index * LEVEL_STEP + 0.5 * j) % 1.0
            row.append(lo + (hi - lo) * level)
        rows.append(row)
    return rows


def _checked_inputs(model, ticks: int, inputs, precision: str) -> list[list[float]]:
    rows = default_inputs(model, ticks) if inputs is None else [list(r) for r in inputs]
    nu = len(model.inputs)
    if len(rows) != ticks:
        raise TickwrightError(f"inputs: {len(rows)} rows given for {ticks} ticks; give one row "
                              "per tick")
    for k, row in enumerate(rows):
        if len(row) != nu:
            raise TickwrightError(f"inputs: row {k} has {len(row)} values but model "
                                  f"'{model.name}' has {nu} inputs")
        for v in row:
            if not math.isfinite(float(v)):
                raise TickwrightError(f"inputs: row {k} holds {v!r}; every input must be finite")
    try:
        return [[_round(float(v), precision) for v in row] for row in rows]
    except OverflowError:
        raise TickwrightError(f"inputs: a value does not fit in {precision}") from None


def _fields(model) -> list[str]:
    """The context members printed after every tick: time, then the states."""
    return [model.time] + [s.name for s in model.states]


def harness_context(csource: CSource, model, target: Target, rows) -> dict:
    """Every name and number the harness template lays out."""
    p = csource.prefix
    precision = csource.precision
    counter = "none" if target.counter_kind == "callgrind" else target.counter_kind
    return dict(
        preamble=[f"Test harness for model '{comment_text(model.name)}' on target "
                  f"'{comment_text(target.id)}', written by tickwright's target check.",
                  "Not part of the firmware: it prints every state as bits after every tick."],
        header=csource.header_name, ctx_t=f"{p}_ctx_t", real_t=f"{p}_real_t",
        reset=f"{p}_reset", advance=f"{p}_advance",
        bits_t="uint64_t" if precision == DOUBLE else "uint32_t", wide=precision == DOUBLE,
        fields=_fields(model), inputs=[u.name for u in model.inputs],
        rows=[[_c_literal(v, precision) for v in row] for row in rows], ticks=len(rows),
        counter=counter, instret_asm=INSTRET_ASM,
        instret_note="csrr %0, minstret, encoded by hand (CSRRS from CSR 0xB02, rs1 = x0).",
        systick_reload=f"0x{SYSTICK_RELOAD:06X}UL",
        systick_ctrl=f"{SYSTICK_CTRL}UL", row_tag=ROW_TAG, done_tag=DONE_TAG)


@dataclass(frozen=True)
class Run:
    """States as bit patterns after reset (row 0) and after every successful tick.

    rows: tuple of bit tuples (time, states...); status: the last status (0 when all ticks ran);
    counts: counter delta per tick, baseline already subtracted (empty when not counted here).
    """

    rows: tuple[tuple[int, ...], ...]
    status: int
    counts: tuple[int, ...] = ()


def parse_run(text: str, nfields: int, where: str = "harness") -> Run:
    """Read the harness output; the summary line must be present (the run completed)."""
    rows, counts, status, done = [], [], 0, None
    for line in text.splitlines():
        parts = line.split()
        if not parts:
            continue
        if parts[0] == ROW_TAG:
            try:
                tick, st, count = int(parts[1]), int(parts[2]), int(parts[3])
                bits = tuple(int(b, 16) for b in parts[4:])
            except (ValueError, IndexError):
                raise TickwrightError(f"{where}: unreadable output line {line!r}") from None
            if len(bits) != nfields or tick != len(rows):
                raise TickwrightError(f"{where}: output line {line!r} is out of order or has "
                                      f"{len(bits)} values instead of {nfields}")
            if st != 0:
                status = st  # the context is unchanged on failure: not a new row
                continue
            rows.append(bits)
            if tick > 0:
                counts.append(count)
        elif parts[0] == DONE_TAG:
            done = dict(kv.split("=", 1) for kv in parts[1:])
    if done is None:
        tail = " | ".join(text.strip().splitlines()[-3:]) or "(no output)"
        raise TickwrightError(f"{where}: the run ended before its summary line; last output: "
                              f"{tail}")
    if int(done["ticks"]) != len(rows) - 1 or int(done["status"]) != status:
        raise TickwrightError(f"{where}: summary line {done} disagrees with the rows printed")
    return Run(rows=tuple(rows), status=status, counts=tuple(counts))


def host_reference(csource: CSource, model, rows) -> Run:
    """The same ticks through the host build (cffi module of build.build), as bit patterns."""
    built = host_build.build(csource, model)
    ffi, lib = built.ffi, built.lib
    real = "double" if csource.precision == DOUBLE else "float"
    fmt = "<d" if csource.precision == DOUBLE else "<f"
    unsigned = "<Q" if csource.precision == DOUBLE else "<I"
    n, nu, nx = len(rows), len(model.inputs), model.nx
    ctx = ffi.new(f"{csource.prefix}_ctx_t *")
    getattr(lib, f"{csource.prefix}_reset")(ctx)
    u = ffi.new(f"{real}[]", [v for row in rows for v in row] or [0.0])
    xs = ffi.new(f"{real}[]", (n + 1) * nx)
    ts = ffi.new(f"{real}[]", n + 1)
    status = ffi.new("int *")
    done = lib.tw_run(ctx, n, u, xs, ts, status)

    def bits(v: float) -> int:
        return struct.unpack(unsigned, struct.pack(fmt, v))[0]

    out = [tuple([bits(ts[k])] + [bits(xs[k * nx + i]) for i in range(nx)])
           for k in range(done + 1)]
    return Run(rows=tuple(out), status=status[0] if done < n else 0)


def _ordered(bits: int, precision: str) -> int:
    """Bit pattern -> integer that orders like the value (difference = distance in ulps)."""
    width = 64 if precision == DOUBLE else 32
    sign = 1 << (width - 1)
    return -(bits & (sign - 1)) if bits & sign else bits


def _value(bits: int, precision: str) -> float:
    if precision == DOUBLE:
        return struct.unpack("<d", struct.pack("<Q", bits))[0]
    return struct.unpack("<f", struct.pack("<I", bits))[0]


def compare_runs(host: Run, target: Run, precision: str, exact: bool) -> tuple[bool, int, str]:
    """(matches, largest difference in ulps, first mismatch or '').

    exact: every bit pattern equal; else each value within RELATIVE_TOLERANCE of the host value,
    scaled by the largest magnitude of that column over the host run.
    """
    max_ulp = 0
    first = ""
    if len(host.rows) != len(target.rows) or host.status != target.status:
        first = (f"host ran {len(host.rows) - 1} ticks (status {host.status}), target "
                 f"{len(target.rows) - 1} ticks (status {target.status})")
    ncols = len(host.rows[0]) if host.rows else 0
    scale = [max((abs(_value(r[i], precision)) for r in host.rows), default=0.0)
             for i in range(ncols)]
    for k, (a, b) in enumerate(zip(host.rows, target.rows)):
        for i, (x, y) in enumerate(zip(a, b)):
            ulp = abs(_ordered(x, precision) - _ordered(y, precision))
            max_ulp = max(max_ulp, ulp)
            if exact:
                bad = x != y
            else:
                vx, vy = _value(x, precision), _value(y, precision)
                finite = math.isfinite(vx) and math.isfinite(vy)
                bad = (x != y) if not finite else \
                    abs(vx - vy) > RELATIVE_TOLERANCE[precision] * max(scale[i], abs(vx), 1e-30)
            if bad and not first:
                first = (f"tick {k}, value {i}: host {x:x}, target {y:x} ({ulp} ulp)")
    return (not first, max_ulp, first)


# ---- tools ----------------------------------------------------------------------------------------

def _need(tool: str, target: Target, packages) -> str:
    path = shutil.which(tool)
    if path is None:
        pk = " ".join(packages) if packages else "the package that provides it"
        raise BuildError(f"{target.path.name}: '{tool}' not found; install {pk} "
                         f"(apt-get install --no-install-recommends {pk}, or run "
                         "scripts/install-toolchains.sh)", [tool], "")
    return path


def _run(cmd: list[str], cwd: Path, commands: list[str], what: str, timeout: float = TOOL_TIMEOUT_S,
         env=None, check: bool = True) -> subprocess.CompletedProcess:
    commands.append(" ".join(cmd))
    try:
        proc = subprocess.run(cmd, cwd=cwd, capture_output=True, text=True, timeout=timeout + 5,
                              env=env, errors="replace", stdin=subprocess.DEVNULL)
    except subprocess.TimeoutExpired:
        raise BuildError(f"{what}: did not finish within {timeout:g} s", cmd, "") from None
    if check and proc.returncode != 0:
        out = (proc.stderr + proc.stdout).strip()
        first = next((ln for ln in out.splitlines() if "error" in ln.lower()),
                     out.splitlines()[-1] if out else "(no output)")
        raise BuildError(f"{what}: failed (exit {proc.returncode}): {first.strip()}", cmd, out)
    return proc


def _flash_bytes(nm_output: str, prefix: str) -> int:
    total = 0
    for line in nm_output.splitlines():
        parts = line.split()
        if len(parts) == 4 and parts[2] in "tT" and parts[3].startswith(prefix + "_"):
            total += int(parts[1], 16)
    return total


_CI_NODE = re.compile(r'node: \{ title: "([^"]+)" label: "([^"]*)"')
_CI_EDGE = re.compile(r'edge: \{ sourcename: "([^"]+)" targetname: "([^"]+)"')
_CI_BYTES = re.compile(r"(\d+) bytes \(([a-z,]+)\)")


def stack_usage(ci_text: str, root: str) -> tuple[int, tuple[str, ...]]:
    """Worst sum of frames along any call chain from root (gcc -fcallgraph-info=su).

    Returns (bytes, callees without stack figures). Raises on recursion or dynamic frames, which
    the generated code must not have.
    """
    frames: dict[str, int] = {}
    for name, label in _CI_NODE.findall(ci_text):
        m = _CI_BYTES.search(label)
        if m:
            if m.group(2) != "static":
                raise TickwrightError(f"stack: function '{name}' has a {m.group(2)} frame; the "
                                      "generated code must use fixed-size frames only")
            frames[name] = int(m.group(1))
    callees: dict[str, list[str]] = {}
    for src, dst in _CI_EDGE.findall(ci_text):
        callees.setdefault(src, []).append(dst)
    if root not in frames:
        raise TickwrightError(f"stack: no stack figure for '{root}' in the call graph")
    unknown: set[str] = set()
    best: dict[str, int] = {}

    def walk(name: str, path: tuple[str, ...]) -> int:
        if name in path:
            raise TickwrightError(f"stack: recursion {' -> '.join(path + (name,))}")
        if name not in frames:
            unknown.add(name)
            return 0
        if name not in best:
            best[name] = frames[name] + max((walk(c, path + (name,)) for c in callees.get(name, [])),
                                            default=0)
        return best[name]

    return walk(root, ()), tuple(sorted(unknown))


def _double_symbols(undefined: list[str]) -> tuple[str, ...]:
    return tuple(sorted(s for s in undefined if SOFT_DOUBLE.match(s) or s in MATH_FUNCTIONS))


def _uses_rounded_libm(csource: CSource) -> bool:
    """Whether the C calls a math function whose result may differ between libraries."""
    text = csource.text(csource.source_name)
    for name in re.findall(r"\b([a-z][a-z0-9]*)\s*\(", text):
        base = name[:-1] if name.endswith("f") and name[:-1] in MATH_FUNCTIONS else name
        if base in MATH_FUNCTIONS and base not in CORRECTLY_ROUNDED:
            return True
    return False


_MISRA_CACHE: dict[str, tuple[tuple[str, ...], tuple[str, ...], str]] = {}
_FINDING = re.compile(r"^(.+?):(\d+): (\S+): (.*)$")


def misra_findings(csource: CSource) -> tuple[tuple[str, ...], tuple[str, ...], str]:
    """cppcheck's MISRA C:2012 addon on the generated files, command of EMBEDDED.md.

    Returns (findings not deviated, deviated findings, command). Each finding reads
    'file:line: id: message'. Cached by the content of the files.
    """
    key = hashlib.sha256("".join(n + t for n, t in csource.files).encode()).hexdigest()
    if key in _MISRA_CACHE:
        return _MISRA_CACHE[key]
    if shutil.which("cppcheck") is None:
        raise BuildError("cppcheck not found; install cppcheck (apt-get install "
                         "--no-install-recommends cppcheck, or run scripts/install-toolchains.sh)",
                         ["cppcheck"], "")
    with tempfile.TemporaryDirectory(prefix="tickwright-misra-") as tmp:
        folder = Path(tmp)
        for name, text in csource.files:
            (folder / name).write_text(text, encoding="utf-8")
        (folder / "cppcheck-build").mkdir()
        cmd = ["cppcheck", *CPPCHECK_ARGS, "--cppcheck-build-dir=cppcheck-build",
               csource.source_name]
        commands: list[str] = []
        proc = _run(cmd, folder, commands, "cppcheck", check=False)
        if proc.returncode not in (0, 2):
            raise BuildError(f"{csource.source_name}: cppcheck failed (exit {proc.returncode})",
                             cmd, proc.stderr + proc.stdout)
    kept, deviated = [], []
    for line in (proc.stderr + proc.stdout).splitlines():
        m = _FINDING.match(line.strip())
        if not m:
            continue
        file, lineno, rule, message = m.groups()
        message = message.replace(" (use --rule-texts=<file> to get proper output)", "")
        text = f"{Path(file).name}:{lineno}: {rule}: {message}"
        (deviated if rule in MISRA_DEVIATIONS else kept).append(text)
    result = (tuple(sorted(set(kept))), tuple(sorted(set(deviated))), " ".join(commands))
    _MISRA_CACHE[key] = result
    return result


# ---- the check ------------------------------------------------------------------------------------

_REPORT_CACHE: dict[str, TargetReport] = {}


def check_on_target(csource: CSource, model, target: Target | str, ticks: int = 200,
                    inputs=None, workdir: str | Path | None = None) -> TargetReport:
    """Build the generated C for a target, run it, and compare every tick with the host build.

    inputs: ticks rows of len(model.inputs) values (default: default_inputs). workdir keeps the
    build files there (default: a temporary folder, removed afterwards). Raises BuildError when a
    tool is missing, a compile fails or the run does not complete; everything else the run finds
    is in the report.
    """
    target = load_target(target)
    if ticks < 1:
        raise TickwrightError(f"ticks: must be at least 1, got {ticks}")
    rows = _checked_inputs(model, ticks, inputs, csource.precision)
    harness = render("harness.c.j2", **harness_context(csource, model, target, rows))
    key = hashlib.sha256(repr((csource.files, target.fingerprint, harness)).encode()).hexdigest()
    if key in _REPORT_CACHE and workdir is None:
        return _REPORT_CACHE[key]
    for tool in (target.cc, target.nm, target.size):
        _need(tool, target, target.packages)
    if target.run_command[0] != "{elf}":
        _need(target.run_command[0], target, target.run_packages)
    if target.counter_command:
        _need(target.counter_command[0], target, target.counter_packages)
    with concurrent.futures.ThreadPoolExecutor(max_workers=1) as pool:
        misra_job = pool.submit(misra_findings, csource)
        if workdir is None:
            with tempfile.TemporaryDirectory(prefix=f"tickwright-{target.id}-") as tmp:
                report = _check_in(Path(tmp), csource, model, target, rows, harness, misra_job)
        else:
            folder = Path(workdir)
            folder.mkdir(parents=True, exist_ok=True)
            report = _check_in(folder.resolve(), csource, model, target, rows, harness, misra_job)
    _REPORT_CACHE[key] = report
    return report


def _check_in(folder: Path, csource: CSource, model, target: Target, rows, harness: str,
              misra_job) -> TargetReport:
    p = csource.prefix
    commands: list[str] = []
    problems: list[str] = []
    for name, text in csource.files:
        (folder / name).write_text(text, encoding="utf-8")
    (folder / "harness.c").write_text(harness, encoding="utf-8")
    where = f"{csource.source_name} on {target.id}"

    # Generated C -> object, with the strict warning set (reported, not fatal) and stack figures.
    strict = [f for f in host_build.STRICT_FLAGS if f != "-Werror"]
    obj = f"{p}.o"
    proc = _run([target.cc, *target.cflags, *strict, "-fstack-usage", "-fcallgraph-info=su",
                 "-c", csource.source_name, "-o", obj], folder, commands, f"{where}: compile")
    warnings = tuple(ln.strip() for ln in proc.stderr.splitlines() if "warning:" in ln)
    if warnings:
        problems.append(f"{len(warnings)} compiler warning(s), first: {warnings[0]}")

    # Object -> size, stack, undefined symbols.
    nm_sizes = _run([target.nm, "-S", obj], folder, commands, f"{where}: nm").stdout
    flash = _flash_bytes(nm_sizes, p)
    ci_file = folder / f"{p}.ci"
    if not ci_file.exists():
        raise BuildError(f"{where}: {target.cc} wrote no call graph ({p}.ci); the target "
                         "compiler must be GCC 10 or newer (-fcallgraph-info)", [target.cc], "")
    stack, stack_excludes = stack_usage(ci_file.read_text(encoding="utf-8"), f"{p}_advance")
    undefined = _run([target.nm, "-u", obj], folder, commands, f"{where}: nm -u").stdout.split()
    doubles = _double_symbols([s for s in undefined if s != "U"])
    double_free = None if csource.precision == DOUBLE else not doubles
    if double_free is False:
        problems.append(f"float build uses double precision: {', '.join(doubles)}")

    # Harness + object -> program -> run.
    _run([target.cc, *target.cflags, *HARNESS_WARNINGS, "-c", "harness.c", "-o", "harness.o"],
         folder, commands, f"harness for {target.id}: compile")
    _run([target.cc, *target.cflags, "harness.o", obj, *target.ldflags, "-o", "harness.elf"],
         folder, commands, f"harness for {target.id}: link")
    size_out = _run([target.size, "harness.elf"], folder, commands, f"{where}: size").stdout
    image = _image_bytes(size_out)
    elf = str(folder / "harness.elf")
    nfields = len(_fields(model))
    run_cmd = [a.replace("{elf}", elf) for a in target.run_command]
    proc = _run(["timeout", f"{target.timeout_s:g}", *run_cmd], folder, commands,
                f"{where}: run", timeout=target.timeout_s, check=False)
    if proc.returncode != 0:
        tail = " | ".join((proc.stdout + proc.stderr).strip().splitlines()[-3:]) or "(no output)"
        reason = "timed out" if proc.returncode == 124 else f"exited with {proc.returncode}"
        raise BuildError(f"{where}: the harness {reason}: {tail}", run_cmd,
                         proc.stdout + proc.stderr)
    # QEMU writes semihosting output to stderr; the parser only reads the tagged lines.
    output = proc.stdout + proc.stderr
    run = parse_run(output, nfields, where)
    host = host_reference(csource, model, rows)

    exact = target.exact and not _uses_rounded_libm(csource)
    matches, max_ulp, mismatch = compare_runs(host, run, csource.precision, exact)
    comparison = "exact bits" if exact else \
        f"relative {RELATIVE_TOLERANCE[csource.precision]:.3g} of each state's largest magnitude"
    if not matches:
        problems.append(f"differs from the host build ({comparison}): {mismatch}")

    # Instructions per tick: from the harness counter, or callgrind on the host.
    ticks_done = len(run.rows) - 1
    per_tick: list[float] = []
    if target.counter_kind == "callgrind":
        out = folder / "callgrind.out"
        cmd = [a.replace("{elf}", elf).replace("{advance}", f"{p}_advance")
               .replace("{out}", str(out)) for a in target.counter_command]
        cg = _run(["timeout", f"{10 * target.timeout_s:g}", *cmd], folder, commands,
                  f"{where}: callgrind", timeout=10 * target.timeout_s)
        m = re.search(r"Collected\s*:\s*(\d+)", cg.stderr)
        if m and ticks_done:
            per_tick = [int(m.group(1)) / ticks_done]
    else:
        per_tick = [c * target.instructions_per_count for c in run.counts]
    if per_tick and min(per_tick) > 0:
        instructions = int(round(max(per_tick)))
        mean = round(sum(per_tick) / len(per_tick), 1)
    else:
        instructions, mean = None, None
        problems.append(f"no instruction count: the {target.counter_kind} counter did not "
                        "advance (the emulator must run with -icount)")

    # The host also runs the harness under the address and undefined-behaviour sanitizers.
    sanitizers = None
    if target.is_host:
        sanitizers = _sanitizer_run(folder, csource, target, run, nfields, commands)
        if not sanitizers:
            problems.append("the sanitizer build reported a problem or printed other results")

    misra, deviated, misra_cmd = misra_job.result()
    commands.append(misra_cmd)
    if misra:
        problems.append(f"{len(misra)} MISRA C:2012 finding(s) outside the deviation list, "
                        f"first: {misra[0]}")
    passed = not problems
    return TargetReport(
        target=target.id, precision=csource.precision, passed=passed, matches_host=matches,
        comparison=comparison, max_ulp=max_ulp, ticks=ticks_done, flash_bytes=flash,
        stack_bytes=stack, stack_excludes=stack_excludes, instructions_per_tick=instructions,
        instructions_mean=mean, image_bytes=image, double_free=double_free,
        double_symbols=doubles, warnings=warnings, misra=misra, misra_deviations=deviated,
        sanitizers=sanitizers, problems=tuple(problems), commands=tuple(commands),
        run_output=output)


def _image_bytes(size_output: str) -> int:
    """text + data of the whole program (Berkeley format of size)."""
    lines = size_output.strip().splitlines()
    if len(lines) < 2:
        return 0
    text, data = lines[1].split()[:2]
    return int(text) + int(data)


def _sanitizer_run(folder: Path, csource: CSource, target: Target, run: Run, nfields: int,
                   commands: list[str]) -> bool:
    """Build harness + generated C with ASan and UBSan, run it, and expect the same bits."""
    where = f"{csource.source_name} on {target.id} (sanitizers)"
    _run([target.cc, *target.cflags, *SANITIZER_FLAGS, "harness.c", csource.source_name,
          *target.ldflags, "-o", "harness-san"], folder, commands, f"{where}: build")
    # Leak checking needs ptrace, which containers often forbid; the generated code has no heap.
    env = dict(os.environ, ASAN_OPTIONS="detect_leaks=0:abort_on_error=0",
               UBSAN_OPTIONS="print_stacktrace=1:halt_on_error=1")
    proc = _run(["timeout", f"{target.timeout_s:g}", str(folder / "harness-san")], folder,
                commands, f"{where}: run", timeout=target.timeout_s, env=env, check=False)
    if proc.returncode != 0 or "runtime error" in proc.stderr or "Sanitizer" in proc.stderr:
        return False
    try:
        san = parse_run(proc.stdout, nfields, where)
    except TickwrightError:
        return False
    return san.rows == run.rows and san.status == run.status
