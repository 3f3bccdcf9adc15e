"""Stage 6: C text -> built module (cffi), plus the strict warning-free compile of the C alone.

The cffi module adds one test-only loop (templates/run_loop.c.j2, not part of the firmware files)
that runs N ticks over a buffer of inputs and stores time, states and outputs after every tick, so
a whole run costs one Python call (driven by run.run_built).
"""

from __future__ import annotations

import hashlib
import importlib.util
import os
import re
import shutil
import subprocess
import tempfile
from dataclasses import dataclass
from pathlib import Path

from . import __version__
from .emit import GENERATED_MARKER, STATUS_CODES, CSource, comment_text, file_note, render
from .errors import BuildError, EmitError

# The warning set every generated file must pass (a superset of the one promised in the README).
STRICT_FLAGS = ("-std=c99", "-Wall", "-Wextra", "-Wpedantic", "-Wconversion", "-Wsign-conversion",
                "-Wdouble-promotion", "-Wfloat-equal", "-Wshadow", "-Wstrict-prototypes",
                "-Wmissing-prototypes", "-Wcast-qual", "-Wundef", "-Wvla", "-Wredundant-decls",
                "-Werror")
# No fused multiply-add: keeps host and target results bit-identical (see DEVELOPERS.md).
FP_FLAGS = ("-ffp-contract=off",)
# -O2 -g0 roughly halves cffi build time compared with its inherited -O3 -g.
BUILD_FLAGS = ("-std=c99", "-O2", "-g0") + FP_FLAGS
# The test-only loop's C signature (templates/run_loop.c.j2); its cdef is the same text plus ';'.
RUN_LOOP_SIGNATURE = ("long tw_run({ctx_t} *ctx, long n, const {real_t} *u, {real_t} *ts, "
                      "{real_t} *xs, {real_t} *ys, int *status)")

_CACHE: dict[str, object] = {}


@dataclass(frozen=True)
class BuiltModule:
    """A loaded cffi module for one CSource: ffi, lib and the source it was built from."""

    csource: CSource
    ffi: object
    lib: object
    path: Path


def run_loop_context(csource: CSource, model) -> dict:
    """Every name and number templates/run_loop.c.j2 lays out, for one model's generated C."""
    p = csource.prefix
    signature = RUN_LOOP_SIGNATURE.format(ctx_t=f"{p}_ctx_t", real_t=f"{p}_real_t")
    return dict(
        header=csource.header_name, signature=signature, ctx_t=f"{p}_ctx_t",
        real_t=f"{p}_real_t", outputs_t=f"{p}_outputs_t", time=model.time,
        advance_function=f"{p}_advance", outputs_function=f"{p}_outputs",
        clamped=dict((name, value) for name, value, _ in STATUS_CODES)["CLAMPED"],
        nx=model.nx, nu=len(model.inputs) + len(model.tunable), ny=len(model.outputs),
        states=list(enumerate(s.name for s in model.states)),
        # The tunable parameters follow the inputs in each tick's row, so a run can change them
        # tick by tick like the firmware may (run.run_built fills them).
        inputs=list(enumerate([u.name for u in model.inputs] + [p.name for p in model.tunable])),
        outputs=list(enumerate(o.name for o in model.outputs)))


def build(csource: CSource, model, workdir: str | Path | None = None) -> BuiltModule:
    """Compile the generated C with cffi into a temporary module and load it (cached by content)."""
    import cffi

    context = run_loop_context(csource, model)
    loop = render("run_loop.c.j2", **context)
    key = hashlib.sha256((csource.cdef + loop + "".join(t for _, t in csource.files)).encode())
    name = f"_tw_{csource.prefix}_{key.hexdigest()[:16]}"
    if name in _CACHE:
        return _CACHE[name]
    folder = Path(workdir) if workdir else Path(tempfile.mkdtemp(prefix="tickwright-build-"))
    folder.mkdir(parents=True, exist_ok=True)
    for fname, text in csource.files:
        (folder / fname).write_text(text, encoding="utf-8")
    ffi = cffi.FFI()
    ffi.cdef(csource.cdef + context["signature"] + ";\n")
    ffi.set_source(name, loop, sources=[str(folder / csource.source_name)],
                   include_dirs=[str(folder)], extra_compile_args=list(BUILD_FLAGS),
                   libraries=["m"])
    try:
        so_path = ffi.compile(tmpdir=str(folder), verbose=False)
    except Exception as exc:  # cffi raises distutils/setuptools errors of several kinds
        raise BuildError(f"{csource.source_name}: the C compiler failed while building the check "
                         f"module: {exc}", ["cffi", name], str(exc)) from None
    spec = importlib.util.spec_from_file_location(name, so_path)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    built = BuiltModule(csource=csource, ffi=module.ffi, lib=module.lib, path=Path(so_path))
    _CACHE[name] = built
    return built


def compiler() -> str:
    """The host C compiler: $CC, else gcc, else cc."""
    for candidate in (os.environ.get("CC"), "gcc", "cc"):
        if candidate and shutil.which(candidate):
            return candidate
    raise BuildError("no C compiler found; install gcc (Debian: apt-get install gcc libc6-dev)")


def strict_compile(csource: CSource, cc: str | None = None, extra: tuple[str, ...] = ()) -> str:
    """Compile the generated source alone with the strict warning set; return the command line.

    Raises BuildError carrying the command and the compiler output on any warning.
    """
    cc = cc or compiler()
    with tempfile.TemporaryDirectory(prefix="tickwright-strict-") as tmp:
        for fname, text in csource.files:
            Path(tmp, fname).write_text(text, encoding="utf-8")
        cmd = [cc, *STRICT_FLAGS, *FP_FLAGS, "-O2", *extra, "-c", csource.source_name,
               "-o", "out.o"]
        proc = subprocess.run(cmd, cwd=tmp, capture_output=True, text=True)
        if proc.returncode != 0 or proc.stderr.strip():
            first = (proc.stderr.strip().splitlines() or ["(no output)"])[0]
            raise BuildError(f"{csource.source_name}: does not compile cleanly with "
                             f"{' '.join(cmd)}: {first}", cmd, proc.stderr)
    return " ".join(cmd)



# ---- build-system files --------------------------------------------------------------------------

# The CMake fragment's name: add_subdirectory() reads this name, so one model per folder.
CMAKE_FRAGMENT = "CMakeLists.txt"
# Flags of the generated source in the users' builds: the strict set and the no-contraction flag
# the checks compile with (optimization is the user's choice).
USER_FLAGS = STRICT_FLAGS + FP_FLAGS
# The model a generated build file was made for, from its first line.
_FRAGMENT_MODEL = re.compile(r"from model '([a-z][a-z0-9_]*)'")


def build_system_files(csource: CSource, model) -> tuple[tuple[str, str], ...]:
    """The build files of one model's generated C: CMAKE_FRAGMENT (a static library target) and
    <name>.mk (a Make fragment with sources, objects and flags), as (file name, text) pairs.

    They name the model file and its SHA-256 like the C preamble, never a folder.
    """
    prefix = csource.prefix
    preamble = [f"{GENERATED_MARKER} {__version__} from model '{prefix}'.",
                file_note("Model", model.source, model.digest)
                or "Model built in Python (no model file).",
                "Do not edit: regenerate with tickwright emit --build-files."]
    variable = prefix.upper()
    cmake = render("cmake.txt.j2", preamble=preamble, library=prefix,
                   source=csource.source_name, header=csource.header_name,
                   flags=list(USER_FLAGS), flags_variable=f"{variable}_C_FLAGS",
                   flags_reference=f"${{{variable}_C_FLAGS}}")
    make = render("make.mk.j2", preamble=preamble, v=variable, prefix=prefix,
                  fragment=f"{prefix}.mk", source=csource.source_name,
                  header=csource.header_name, object=f"{prefix}.o", flags=list(USER_FLAGS))
    return ((CMAKE_FRAGMENT, cmake), (f"{prefix}.mk", make))


def refuse_other_model(out_dir: str | Path, prefix: str) -> None:
    """Raise EmitError when out_dir holds the CMake fragment of another model: each model's
    build files go to a folder of their own (add_subdirectory reads one CMakeLists.txt)."""
    path = Path(out_dir) / CMAKE_FRAGMENT
    try:
        head = path.read_text(encoding="utf-8", errors="replace")[:400]
    except (FileNotFoundError, IsADirectoryError, NotADirectoryError):
        return
    found = _FRAGMENT_MODEL.search(head) if GENERATED_MARKER in head else None
    if found and found.group(1) != prefix:
        raise EmitError(f"{path}: is the build file of model '{found.group(1)}'; emit the build "
                        f"files of '{prefix}' into a folder of its own")


def toolchain_file(target) -> str:
    """A CMake toolchain file for a cross-compiling target (targets.Target): its compiler and its
    flags (but -std and -O, which the build file and the build type give)."""
    if target.is_host:
        raise EmitError(f"--cmake-toolchain: '{target.id}' builds with this computer's own "
                        "compiler and needs no toolchain file")
    preamble = [f"{GENERATED_MARKER} {__version__}: CMake toolchain file of target "
                f"'{target.id}'.",
                comment_text(target.description) + "."]
    cflags = [f for f in target.cflags if not f.startswith(("-std=", "-O"))]
    return render("toolchain.cmake.j2", preamble=preamble, cc=target.cc, cflags=cflags,
                  ldflags=list(target.ldflags))
