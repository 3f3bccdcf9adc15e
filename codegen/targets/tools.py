"""The tools around a target run: processes, code size, stack depth, double-precision symbols and
cppcheck's MISRA C:2012 addon.
"""

from __future__ import annotations

import hashlib
import re
import shutil
import subprocess
import tempfile
from pathlib import Path

from ..emit import MISRA_DEVIATIONS, CSource
from ..errors import BuildError, TickwrightError
from .spec import Target

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
# cppcheck's MISRA C:2012 addon runs without the rule texts; its rule ids are reliable (measured
# here; docs/toolchains.md).
CPPCHECK_ARGS = ("--addon=misra", "--enable=all", "--std=c99", "-q", "--error-exitcode=2",
                 "--suppress=unusedFunction", "--suppress=missingIncludeSystem",
                 "--template={file}:{line}: {id}: {message}")
# Seconds for one compile or cppcheck run before it counts as hung.
TOOL_TIMEOUT_S = 120


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
    """cppcheck's MISRA C:2012 addon on the generated files (command in docs/toolchains.md).

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
