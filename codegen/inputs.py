"""Input logs for a replay: a CSV file with a header t,<inputs> and one row per tick, as an array.

Every mistake is one line naming the file, the line and the column.
"""

from __future__ import annotations

import csv
import io
import math
from pathlib import Path

import numpy as np

from .errors import CheckError
from .model import Model


def read_input_log(path: str | Path, model: Model, ticks: int | None = None) -> np.ndarray:
    """A CSV with header t,<input names> (inputs in any order), one row per tick -> (n, nu).

    The columns come back in the order of model.inputs; ticks keeps the first rows only.
    The time column names each row; its values are not used (the tick is dt).
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
    if header[0] != model.time:
        raise CheckError(f"{path}: header: first column must be '{model.time}', got "
                         f"'{header[0]}'")
    if sorted(header[1:]) != sorted(names) or len(set(header)) != len(header):
        raise CheckError(f"{path}: header: expected the columns {model.time},{','.join(names)} "
                         f"(any order after '{model.time}'), got {','.join(header)}")
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
    return data if ticks is None else data[:ticks]


def held_defaults(model: Model, ticks: int) -> np.ndarray:
    """(ticks, nu): every input at its model default on every tick."""
    return np.tile(np.array([float(u.default) for u in model.inputs]), (ticks, 1))
