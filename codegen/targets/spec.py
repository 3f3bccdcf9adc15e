"""Target descriptions: one TOML file per target (compiler, flags, emulator, counter).

A target is data: the compiler and its flags, the link recipe, the emulator command line and the
instruction counter. Every mistake in a file is one line naming the file and the key.
"""

from __future__ import annotations

import difflib
import hashlib
import os
import re
import tomllib
from dataclasses import dataclass, field
from pathlib import Path

from ..errors import TickwrightError, located
from ..emit.printer import PRECISIONS
from ..resources import targets_dir

# Measurement kinds the harness knows: a counter read around each tick, or a count taken outside.
COUNTER_KINDS = ("systick", "instret", "callgrind")


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
    fingerprint: str = field(default="", compare=False, repr=False)

    @property
    def exact(self) -> bool:
        """Whether this target's flags promise results bit-identical with the host build."""
        return "-ffp-contract=off" in self.cflags

    @property
    def is_host(self) -> bool:
        return self.counter_kind == "callgrind"

    def to_dict(self) -> dict:
        return dict(id=self.id, description=self.description, path=str(self.path), cc=self.cc,
                    cflags=list(self.cflags), ldflags=list(self.ldflags),
                    default_precision=self.default_precision,
                    hardware_precisions=list(self.hardware_precisions),
                    emulator=list(self.run_command), counter=self.counter_kind)


# ---- loading and validation ---------------------------------------------------------------------

_TOP_KEYS = {"id": str, "description": str, "cc": str, "nm": str, "size": str, "packages": list,
             "cflags": list, "ldflags": list, "default_precision": str,
             "hardware_precisions": list, "run": dict, "counter": dict}
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
    return Target(
        id=data["id"], description=data["description"], path=path, cc=data["cc"],
        nm=data["nm"], size=data["size"], packages=tuple(data["packages"]),
        cflags=tuple(data["cflags"]), ldflags=tuple(data["ldflags"]),
        default_precision=default, hardware_precisions=hardware,
        run_command=tuple(run["command"]), run_packages=tuple(run.get("packages", ())),
        timeout_s=float(run["timeout_s"]), counter_kind=counter["kind"],
        instructions_per_count=float(counter["instructions_per_count"]),
        counter_command=command, counter_packages=tuple(counter.get("packages", ())),
        fingerprint=hashlib.sha256(raw).hexdigest())


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
