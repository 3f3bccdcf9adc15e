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


@dataclass(frozen=True)
class InputLog:
    """What a log holds: inputs (n, nu) in the order of model.inputs, and the per-tick values of
    the tunable parameters that have a column (name -> (n,) array, in the order of model.tunable).
    """

    inputs: np.ndarray
    parameters: dict[str, np.ndarray]


def read_input_log(path: str | Path, model: Model, ticks: int | None = None) -> np.ndarray:
    """The inputs of read_log alone: (n, nu) in the order of model.inputs."""
    return read_log(path, model, ticks).inputs


def read_log(path: str | Path, model: Model, ticks: int | None = None) -> InputLog:
    """A CSV with header t,<input names> (inputs in any order), one row per tick -> InputLog.

    A column named like a tunable parameter sets that parameter before each tick (the C's
    context field, the reference's parameter). ticks keeps the first rows only. The time column
    names each row; its values are not used (the tick is dt).
    """
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except (FileNotFoundError, IsADirectoryError, UnicodeDecodeError) as exc:
        raise CheckError(f"{path}: cannot read the input log: {exc}") from None
    reader = csv.reader(io.StringIO(text))
    # (line number in the file, cells) of every row that is not blank
    rows = [(reader.line_num, r) for r in reader if any(cell.strip() for cell in r)]
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
    names = names + tunable
    order = [header.index(n) for n in names]
    data = np.zeros((len(rows) - 1, len(names)))
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
    data = data if ticks is None else data[:ticks]
    nu = len(model.inputs)
    return InputLog(inputs=data[:, :nu],
                    parameters={n: data[:, nu + k] for k, n in enumerate(tunable)})


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
