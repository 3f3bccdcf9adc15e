"""Writing output files whole: every file of one run is written or none is.

Each file goes first to a temporary file in its own folder, then all are renamed over their
targets (a rename within one folder is atomic on POSIX file systems). Until the last rename, the
old targets are kept as hard links; on any failure (a full disk, a read-only folder, SIGTERM or
Ctrl-C) the renamed targets are put back, the temporary files and any folder this run created are
removed, and the folder is as it was. Only SIGKILL between writing and renaming can leave a
temporary file (``.<name>.<random>.tw-tmp``, never a partial target); the next write of the same
file removes it.
"""

from __future__ import annotations

import contextlib
import os
import shutil
import signal
import tempfile
import threading
from pathlib import Path

from .errors import TickwrightError

# Suffix of the temporary and backup files of a write in progress (hidden, named after the target).
TEMPORARY_SUFFIX = ".tw-tmp"
# Signals that end a write cleanly (rolled back) instead of killing it half done.
INTERRUPTS = (signal.SIGTERM, signal.SIGHUP)


class Interrupted(KeyboardInterrupt):
    """A write was stopped by a signal; it has been rolled back (click reports it as aborted)."""


@contextlib.contextmanager
def _interrupts_raise():
    """SIGTERM and SIGHUP raise Interrupted while the block runs (main thread only)."""
    if threading.current_thread() is not threading.main_thread():
        yield
        return

    def stop(signum, _frame):
        raise Interrupted(f"signal {signum}")

    previous = {sig: signal.signal(sig, stop) for sig in INTERRUPTS}
    try:
        yield
    finally:
        for sig, handler in previous.items():
            signal.signal(sig, handler)


def _stale(target: Path) -> list[Path]:
    """Temporary files a killed write of target left behind."""
    return sorted(target.parent.glob(f".{target.name}.*{TEMPORARY_SUFFIX}"))


def _missing_folders(folder: Path) -> list[Path]:
    """The folders mkdir(parents=True) would create for folder, outermost first."""
    missing = []
    while not folder.exists():
        missing.append(folder)
        if folder.parent == folder:
            break
        folder = folder.parent
    return list(reversed(missing))


def write_files(files, error: type[TickwrightError], fix: str) -> list[Path]:
    """Write (path, text or bytes) pairs all or nothing; return the paths.

    error: the exception class of the failure (one line naming the path and fix);
    fix: what the user can do, appended to the message ('choose a writable --out folder').
    """
    files = [(Path(path), data.encode("utf-8") if isinstance(data, str) else data)
             for path, data in files]
    for path, _ in files:
        if path.is_dir():
            raise error(f"{path}: is a folder; {fix}")
    created: list[Path] = []
    temporaries: list[Path] = []
    backups: dict[Path, Path] = {}
    renamed: list[Path] = []
    current = files[0][0] if files else Path()
    try:
        with _interrupts_raise():
            for path, data in files:
                current = path
                missing = _missing_folders(path.parent)
                if missing:
                    path.parent.mkdir(parents=True, exist_ok=True)
                    created.append(missing[0])
                for stale in _stale(path):
                    stale.unlink(missing_ok=True)
                handle, name = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.",
                                                suffix=TEMPORARY_SUFFIX)
                temporaries.append(Path(name))
                with os.fdopen(handle, "wb") as stream:
                    stream.write(data)
                if path.exists():
                    backups[path] = _keep(path)
            for (path, _), temporary in zip(files, temporaries):
                current = path
                os.replace(temporary, path)
                renamed.append(path)
            for backup in backups.values():
                backup.unlink(missing_ok=True)
    except OSError as exc:
        _roll_back(renamed, backups, temporaries, created)
        raise error(f"{current}: cannot write: {exc.strerror or exc}; {fix}") from None
    except BaseException:
        _roll_back(renamed, backups, temporaries, created)
        raise
    return [path for path, _ in files]


def check_writable(path: str | Path, error: type[TickwrightError], fix: str,
                   is_file: bool = False) -> None:
    """Refuse early (before a long run) a path whose nearest existing folder cannot be written.

    path: the folder to be written into, or with is_file the file to be written. A read-only
    file system, an immutable folder, a folder without write permission or a file in the way is
    one line; the final write can still fail (a full disk), and then rolls back.
    """
    path = Path(path)
    if is_file and path.is_dir():
        raise error(f"{path}: is a folder; {fix}")
    folder = path.parent if is_file else path
    while not folder.exists() and folder.parent != folder:
        folder = folder.parent
    if folder.exists() and not folder.is_dir():
        raise error(f"{path}: {folder} is a file, not a folder; {fix}")
    if not os.access(folder, os.W_OK | os.X_OK):
        raise error(f"{path}: {folder} is not writable (read-only or no permission); {fix}")
    # access() says yes to root even on an immutable folder or a file system that takes no new
    # files: a probe file, removed at once, asks the file system itself.
    try:
        handle, name = tempfile.mkstemp(dir=folder, prefix=".tw-probe.", suffix=TEMPORARY_SUFFIX)
    except OSError as exc:
        raise error(f"{path}: cannot write in {folder}: {exc.strerror or exc}; {fix}") from None
    os.close(handle)
    os.unlink(name)


def _keep(path: Path) -> Path:
    """A hard link (else a copy) of path under a temporary name, to put back on failure."""
    handle, name = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.",
                                    suffix=TEMPORARY_SUFFIX)
    os.close(handle)
    backup = Path(name)
    backup.unlink()
    try:
        os.link(path, backup)
    except OSError:
        shutil.copy2(path, backup)
    return backup


def _roll_back(renamed, backups, temporaries, created) -> None:
    """Put back every target as it was and remove what this write created. Never raises."""
    for path in renamed:
        with contextlib.suppress(OSError):
            if path in backups:
                os.replace(backups.pop(path), path)
            else:
                path.unlink(missing_ok=True)
    for leftover in [*temporaries, *backups.values()]:
        with contextlib.suppress(OSError):
            leftover.unlink(missing_ok=True)
    for folder in reversed(created):
        with contextlib.suppress(OSError):
            shutil.rmtree(folder)
