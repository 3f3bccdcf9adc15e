"""Stage 8: generated C -> run on a target (cross-compiled, emulated) and compared with the host.

check_on_target() builds the generated C for the target, runs a harness that prints every state
after every tick as exact bit patterns, and compares them with the host build of the same C
(cffi, build.build) fed with the same inputs. It also measures code size, worst-case stack, and
instructions per tick, looks for soft-double helpers in float builds, and runs cppcheck's MISRA
C:2012 addon on the generated files.
"""

from __future__ import annotations

import concurrent.futures
import hashlib
import os
import re
import tempfile
from dataclasses import asdict, dataclass, field
from pathlib import Path

from .. import build as host_build
from ..emit import CSource, render
from ..emit.printer import DOUBLE
from ..errors import BuildError, TickwrightError
from .harness import (RELATIVE_TOLERANCE, Run, _checked_inputs, _fields, compare_runs,
                      harness_context, host_reference, parse_run)
from .spec import Target, load_target
from .tools import (_double_symbols, _flash_bytes, _need, _run, _uses_rounded_libm,
                    misra_findings, stack_usage)

# Flags of the host sanitizer run: stop at the first report.
SANITIZER_FLAGS = ("-fsanitize=address,undefined", "-fno-sanitize-recover=all", "-g", "-O1")
# The harness is ours: it must compile without warnings too.
HARNESS_WARNINGS = ("-Wall", "-Wextra", "-Werror")
# Seconds for one compile or cppcheck run before it counts as hung.


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


def check_on_targets(model, method, dt: float, substeps: int, precisions, ticks: int, targets,
                     options: dict | None = None, progress=None) -> list[TargetReport]:
    """check_on_target for each target in each precision, on the C that pipeline.generate writes.

    options: generation options of implicit methods (newton_iterations, newton_tol, solver).
    """
    from ..pipeline import generate

    say = progress or (lambda message: None)
    reports = []
    for target in targets:
        target = load_target(target)
        for precision in precisions:
            say(f"target {target.id} ({precision}): cross-compile, run {ticks} ticks on the "
                "emulator")
            csource = generate(model, method, dt, substeps, precision, **(options or {}))
            reports.append(check_on_target(csource, model, target, ticks=ticks))
    return reports


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
