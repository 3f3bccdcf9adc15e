"""Input logs for a replay or a check: a CSV file with a header t,<inputs>[,<tunable parameters>]
and one row per tick, as arrays; and the tunable parameter values a run sets (--set).

Every mistake is one line naming the file, the line and the column.
"""

from __future__ import annotations

import csv
import difflib
import io
import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from .errors import CheckError
from .model import Model


# How far a row's time may be from its tick, as a fraction of dt: logs print times rounded
# (3e-05, 6e-05, ...), and a row a whole tick off is a log at another rate.
TIME_TOLERANCE = 0.01
# Ticks a resampled log may have: ten million rows of a few inputs are some hundred MB of
# numbers, more than any bench log needs at its own tick.
MAX_RESAMPLED_TICKS = 10_000_000


@dataclass(frozen=True)
class InputLog:
    """What a log holds: inputs (n, nu) in the order of model.inputs, and the per-tick values of
    the tunable parameters that have a column (name -> (n,) array, in the order of model.tunable).

    lines: (n,) the file's line number of each tick's row (a resampled log repeats a row);
    times: (n,) the time column of those rows, in s.
    """

    inputs: np.ndarray
    parameters: dict[str, np.ndarray]
    lines: np.ndarray | None = None
    times: np.ndarray | None = None


def read_input_log(path: str | Path, model: Model, ticks: int | None = None) -> np.ndarray:
    """The inputs of read_log alone: (n, nu) in the order of model.inputs."""
    return read_log(path, model, ticks).inputs


def read_log(path: str | Path, model: Model, ticks: int | None = None, dt: float | None = None,
             resample: bool = False) -> InputLog:
    """A CSV with header t,<input names> (inputs in any order), one row per tick -> InputLog.

    A column named like a tunable parameter sets that parameter before each tick (the C's
    context field, the reference's parameter). ticks keeps the first ticks only. The time column
    must increase; with dt, row i must be at t_0 + i*dt (within TIME_TOLERANCE of a tick), or with
    resample the rows are held onto the tick grid (each tick takes the last row at or before its
    start, as a sample-and-hold would).
    """
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise CheckError(f"{path}: cannot read the input log: "
                         f"{getattr(exc, 'strerror', None) or exc}") from None
    reader = csv.reader(io.StringIO(text))
    # (line number in the file, cells) of every row that is not blank
    try:
        rows = [(reader.line_num, r) for r in reader if any(cell.strip() for cell in r)]
    except csv.Error as exc:
        raise CheckError(f"{path}: line {reader.line_num}: not CSV: {exc}") from None
    if not rows:
        raise CheckError(f"{path}: empty; expected a header '{model.time},<inputs>' and one row "
                         "per tick")
    header = [h.strip() for h in rows[0][1]]
    names = [u.name for u in model.inputs]
    tunable = [p.name for p in model.tunable if p.name in header[1:]]
    if header[0] != model.time:
        raise CheckError(f"{path}: header: first column must be '{model.time}', got "
                         f"'{header[0]}'")
    if sorted(header[1:]) != sorted(names + tunable) or len(set(header)) != len(header):
        extra = sorted(set(header[1:]) - set(names) - set(tunable))
        fixed = [p.name for p in model.parameters if p.name in extra]
        hint = f"; parameter '{fixed[0]}' is not tunable (set parameters.{fixed[0]}.tunable = " \
            "true in the model to drive it from a log)" if fixed else ""
        raise CheckError(f"{path}: header: expected the columns {model.time},{','.join(names)} "
                         f"(any order after '{model.time}', then any tunable parameters), got "
                         f"{','.join(header)}{hint}")
    if len(rows) < 2:
        raise CheckError(f"{path}: no rows after the header; write one row per tick")
    names = names + tunable
    order = [0] + [header.index(n) for n in names]
    data = np.zeros((len(rows) - 1, len(names) + 1))
    lines = np.array([r for r, _ in rows[1:]])
    for i, (r, row) in enumerate(rows[1:]):
        if len(row) != len(header):
            raise CheckError(f"{path}: line {r}: {len(row)} values, expected {len(header)}")
        for j, col in enumerate(order):
            try:
                v = float(row[col])
            except ValueError:
                raise CheckError(f"{path}: line {r}: column '{header[col]}': '{row[col]}' is not "
                                 "a number") from None
            if not math.isfinite(v):
                raise CheckError(f"{path}: line {r}: column '{header[col]}': must be finite")
            data[i, j] = v
    times = data[:, 0]
    later = np.flatnonzero(np.diff(times) <= 0)
    if later.size:
        k = int(later[0]) + 1
        raise CheckError(f"{path}: line {lines[k]}: {model.time} = {times[k]:g} is not after the "
                         f"row before ({times[k - 1]:g}); rows must be in time order")
    if dt is not None:
        rows_at = _ticks_of(times, float(dt), resample)
        if rows_at is None:
            _refuse_spacing(path, model, times, lines, float(dt))
        if not len(rows_at):
            raise CheckError(f"{path}: resampling {times[-1] - times[0]:g} s of log at --dt "
                             f"{float(dt):g} s would make more than {MAX_RESAMPLED_TICKS} ticks; "
                             "use a longer --dt or a shorter log")
        data, lines = data[rows_at], lines[rows_at]
    data = data if ticks is None else data[:ticks]
    lines = lines if ticks is None else lines[:ticks]
    nu = len(model.inputs)
    return InputLog(inputs=data[:, 1:1 + nu],
                    parameters={n: data[:, 1 + nu + k] for k, n in enumerate(tunable)},
                    lines=lines, times=data[:, 0])


def _ticks_of(times: np.ndarray, dt: float, resample: bool) -> np.ndarray | None:
    """The row of each tick: every row when the rows are one tick apart (None when they are not
    and resample is off), else the last row at or before each tick's start."""
    offsets = (times - times[0]) / dt
    if np.all(np.abs(offsets - np.arange(len(times))) <= TIME_TOLERANCE):
        return np.arange(len(times))
    if not resample:
        return None
    if not offsets[-1] < MAX_RESAMPLED_TICKS:
        return np.zeros(0, dtype=int)
    count = int(np.floor(offsets[-1] + TIME_TOLERANCE)) + 1
    return np.searchsorted(offsets, np.arange(count) + TIME_TOLERANCE, side="right") - 1


def _refuse_spacing(path, model: Model, times, lines, dt: float) -> None:
    """One line: the first row off its tick, the log's own spacing and the two ways out."""
    offsets = (times - times[0]) / dt
    k = int(np.flatnonzero(np.abs(offsets - np.arange(len(times))) > TIME_TOLERANCE)[0])
    spacing = float(np.median(np.diff(times)))
    raise CheckError(f"{path}: line {lines[k]}: {model.time} = {times[k]:g} s, but row {k} of a "
                     f"log at --dt {dt:g} s would be at {times[0] + k * dt:g} s (the log's rows "
                     f"are {spacing:g} s apart); pass --dt {spacing:g}, or --resample to hold "
                     "each row until the next")


def range_problem(log: InputLog, model: Model, path) -> str:
    """The first tick whose input or parameter is outside its declared range, as one line, or ''.

    Names the line of the file, the column, the value and the range, and how many ticks are
    outside in all.
    """
    columns = [(u.name, u.range, log.inputs[:, j]) for j, u in enumerate(model.inputs)]
    by_name = {p.name: p for p in model.parameters}
    columns += [(name, by_name[name].range, values) for name, values in log.parameters.items()]
    first = None
    outside_any = np.zeros(len(log.inputs), dtype=bool)
    for name, rng, values in columns:
        if rng is None or not len(values):
            continue
        outside = (values < rng[0]) | (values > rng[1])
        outside_any |= outside
        if outside.any():
            k = int(np.argmax(outside))
            if first is None or k < first[0]:
                first = (k, name, float(values[k]), rng)
    if first is None:
        return ""
    k, name, value, rng = first
    count = int(outside_any.sum())
    line = f"line {log.lines[k]}" if log.lines is not None else f"tick {k}"
    return (f"{path}: {line}: {name} = {value:g} is outside its declared range [{rng[0]:g}, "
            f"{rng[1]:g}] ({count} of {len(log.inputs)} ticks are outside)")


def parameter_settings(model: Model, pairs) -> dict[str, float]:
    """--set NAME=VALUE pairs -> {tunable parameter name: value}; one line for each mistake."""
    settings: dict[str, float] = {}
    tunable = [p.name for p in model.tunable]
    for pair in pairs:
        name, sep, text = (part.strip() for part in pair.partition("="))
        where = f"{model.source}: --set {pair}"
        if not sep or not name:
            raise CheckError(f"{where}: expected NAME=VALUE with a tunable parameter's name")
        if name not in tunable:
            raise CheckError(f"{where}: {not_tunable(model, name)}")
        try:
            value = float(text)
        except ValueError:
            raise CheckError(f"{where}: '{text}' is not a number") from None
        if not math.isfinite(value):
            raise CheckError(f"{where}: the value must be finite")
        if name in settings:
            raise CheckError(f"{where}: '{name}' is set twice; keep one --set {name}=...")
        settings[name] = value
    return settings


def not_tunable(model: Model, name: str) -> str:
    """Why name cannot be set per run (it is no tunable parameter of model), with the fix."""
    tunable = [p.name for p in model.tunable]
    if any(p.name == name for p in model.parameters):
        return (f"parameter '{name}' is not tunable (its value is baked into the C); set "
                f"parameters.{name}.tunable = true in the model, or change its value there")
    hint = difflib.get_close_matches(name, tunable, n=1) or \
        difflib.get_close_matches(name, [p.name for p in model.parameters], n=1)
    fixed = f" It is not tunable: set parameters.{hint[0]}.tunable = true in the model" \
        if hint and hint[0] not in tunable else ""
    known = f"did you mean '{hint[0]}'?{fixed}" if hint else \
        f"the tunable parameters are {', '.join(tunable)}" if tunable else \
        "the model has no tunable parameter"
    return f"no tunable parameter '{name}' ({known})"


def parameter_table(model: Model, ticks: int, settings: dict[str, float] | None = None,
                    columns: dict[str, np.ndarray] | None = None,
                    source: str = "the input log") -> np.ndarray | None:
    """(ticks, len(model.tunable)): each tick's value of every tunable parameter, or None.

    A log's column gives a parameter per tick, --set (settings) for every tick, else the model's
    value; None when neither sets anything (the C and the reference keep the model's values).
    """
    settings, columns = settings or {}, columns or {}
    both = sorted(set(settings) & set(columns))
    if both:
        raise CheckError(f"{source}: parameter '{both[0]}' has a column and a --set value; drop "
                         "one of them")
    if not settings and not columns:
        return None
    table = np.zeros((ticks, len(model.tunable)))
    for k, p in enumerate(model.tunable):
        table[:, k] = columns[p.name][:ticks] if p.name in columns else \
            settings.get(p.name, float(p.value))
    return table


def held_defaults(model: Model, ticks: int) -> np.ndarray:
    """(ticks, nu): every input at its model default on every tick."""
    return np.tile(np.array([float(u.default) for u in model.inputs]), (ticks, 1))
