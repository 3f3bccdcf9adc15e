"""Running the compiled C over whole input arrays: one call into a C loop, not one per tick.

The cffi module of build.build carries a test-only loop (templates/run_loop.c.j2, not part of the
firmware files) that runs N ticks over a buffer of inputs and stores the time, the states and the
outputs (from the C's own outputs function) before the first tick and after every tick.
``run_built`` drives it with numpy arrays, ``replay`` generates, builds and runs in one call, and
``run_c`` keeps the states alone as a reference.Trajectory for the checks.
"""

from __future__ import annotations

import csv
import difflib
import io
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from .emit import STATUS_CODES
from .emit.printer import FLOAT
from .errors import CheckError
from .model import Model
from .output import write_files
from .reference import Trajectory

# Status value -> name, as the generated header spells it after the prefix (HEATER_NONFINITE).
STATUS_NAMES = {value: name for name, value, _ in STATUS_CODES}
# Replay.tick_status of a tick after the one that failed: the run stopped before it. Negative, so
# that it is none of the generated header's status values (emit.STATUS_CODES, all >= 0).
NOT_RUN = -1


def status_name(value: int) -> str:
    """The name of a status value of the generated advance function ('OK', 'NONFINITE', ...)."""
    return STATUS_NAMES.get(int(value), f"{int(value)} (unknown)")


@dataclass(frozen=True)
class Replay:
    """The compiled C run over a log of inputs: a row before the first tick and one per tick taken.

    t: (rows,) in s; states: (rows, nx); outputs: (rows, ny), from the C's outputs function with
    the inputs of the tick just taken (the reset values in row 0); rows = completed + 1.
    ticks: the ticks asked for; completed: the ticks taken; status: the status of the tick that
    stopped the run (0, 'OK', when every tick was taken).
    """

    time_name: str
    state_names: tuple[str, ...]
    output_names: tuple[str, ...]
    t: np.ndarray
    states: np.ndarray
    outputs: np.ndarray
    ticks: int
    completed: int
    status: int

    def __post_init__(self):
        rows = self.completed + 1
        if not 0 <= self.completed <= self.ticks:
            raise CheckError(f"replay: {self.completed} ticks taken of {self.ticks} asked for")
        if (self.completed < self.ticks) == (self.status == 0):
            raise CheckError(f"replay: status {self.status} after {self.completed} of "
                             f"{self.ticks} ticks; a run stops early exactly when a tick fails")
        shapes = {"t": (np.shape(self.t), (rows,)),
                  "states": (np.shape(self.states), (rows, len(self.state_names))),
                  "outputs": (np.shape(self.outputs), (rows, len(self.output_names)))}
        for name, (got, want) in shapes.items():
            if got != want:
                raise CheckError(f"replay: {name} has shape {got}, expected {want}")

    @property
    def status_name(self) -> str:
        return status_name(self.status)

    @property
    def finished(self) -> bool:
        """Whether every tick asked for was taken."""
        return self.completed == self.ticks

    @property
    def tick_status(self) -> np.ndarray:
        """(ticks,) int: the status of every tick asked for: 0 (OK) for a tick taken, the failed
        tick's status, NOT_RUN (-1) for the ticks after it."""
        status = np.full(self.ticks, NOT_RUN, dtype=int)
        status[: self.completed] = 0
        if self.completed < self.ticks:
            status[self.completed] = self.status
        return status

    @property
    def columns(self) -> tuple[str, ...]:
        """The column names of table(): time, then the states, then the outputs."""
        return (self.time_name, *self.state_names, *self.output_names)

    def __getitem__(self, name: str) -> np.ndarray:
        """One column by name: the time (rows,), a state's or an output's values (rows,)."""
        if name == self.time_name:
            return self.t
        if name in self.state_names:
            return self.states[:, self.state_names.index(name)]
        if name in self.output_names:
            return self.outputs[:, self.output_names.index(name)]
        hint = difflib.get_close_matches(str(name), self.columns, n=1)
        raise CheckError(f"run: no column '{name}'" + (f" (did you mean '{hint[0]}'?)" if hint
                                                       else f"; the columns are "
                                                            f"{', '.join(self.columns)}"))

    def table(self) -> np.ndarray:
        """(rows, 1 + nx + ny): time, states and outputs side by side, in the order of columns."""
        return np.column_stack([self.t, self.states, self.outputs])

    def csv_text(self) -> str:
        """The table as CSV with a header line; every value in round-trip text (repr)."""
        buf = io.StringIO()
        writer = csv.writer(buf, lineterminator="\n")
        writer.writerow(self.columns)
        writer.writerows([repr(float(v)) for v in row] for row in self.table())
        return buf.getvalue()

    def to_csv(self, path: str | Path | None = None) -> str | Path:
        """The table as CSV (see csv_text): its text when path is None, else the file written
        whole (see save_csv) and its path."""
        return self.csv_text() if path is None else self.save_csv(path)

    def save_csv(self, path: str | Path) -> Path:
        """Write csv_text() to path whole (output.write_files): never half a file."""
        path = Path(path)
        write_files([(path, self.csv_text())], CheckError, "choose a writable path for --out")
        return path


def run_built(built, model: Model, inputs, x0=None, parameters=None) -> Replay:
    """Run the built C over inputs in one call of the test-only loop.

    inputs: (ticks, nu) array, one row per tick, columns in the order of model.inputs (held during
    the tick); x0: initial states instead of the model's (nx values), or None; parameters:
    (ticks, len(model.tunable)) values of the tunable parameters set before each tick, or None
    for the values the reset function sets.
    """
    ffi, lib = built.ffi, built.lib
    dtype = np.float32 if built.csource.precision == FLOAT else np.float64
    real_t = f"{model.name}_real_t"
    nu, nx, ny = len(model.inputs), model.nx, len(model.outputs)
    rows_in = np.asarray(inputs, dtype=np.float64)
    if rows_in.ndim != 2 or rows_in.shape[1] != nu:
        raise CheckError(f"{model.name}: inputs have shape {rows_in.shape}, expected (ticks, {nu})"
                         f" with the columns {', '.join(u.name for u in model.inputs) or '(none)'}")
    n = len(rows_in)
    ctx = ffi.new(f"{model.name}_ctx_t *")
    getattr(lib, f"{model.name}_reset")(ctx)
    if x0 is not None:
        for s, v in zip(model.states, x0):
            setattr(ctx, s.name, float(v))
    if parameters is None:
        parameters = np.tile([float(getattr(ctx, p.name)) for p in model.tunable], (n, 1))
    params = np.asarray(parameters, dtype=np.float64)
    if params.shape != (n, len(model.tunable)):
        raise CheckError(f"{model.name}: tunable parameter values have shape "
                         f"{np.shape(parameters)}, expected ({n}, {len(model.tunable)}) with the "
                         f"columns {', '.join(p.name for p in model.tunable) or '(none)'}")
    u = np.ascontiguousarray(np.hstack([rows_in, params]), dtype=dtype).reshape(-1)
    ts = np.zeros(n + 1, dtype=dtype)
    xs = np.zeros((n + 1) * nx, dtype=dtype)
    ys = np.zeros((n + 1) * ny, dtype=dtype)
    status = ffi.new("int *")

    def buffer(arr):
        return ffi.from_buffer(f"{real_t}[]", arr) if arr.size else ffi.NULL

    done = int(lib.tw_run(ctx, n, buffer(u), buffer(ts), buffer(xs), buffer(ys), status))
    rows = done + 1
    return Replay(time_name=model.time, state_names=tuple(s.name for s in model.states),
                  output_names=tuple(o.name for o in model.outputs),
                  t=ts[:rows].astype(np.float64),
                  states=xs.reshape(n + 1, nx)[:rows].astype(np.float64),
                  outputs=ys.reshape(n + 1, ny)[:rows].astype(np.float64),
                  ticks=n, completed=done, status=int(status[0]))


def replay(model: Model, method, dt: float, inputs, substeps: int = 1,
           precision: str = "float", x0=None, parameters=None, **implicit_options) -> Replay:
    """Generate, build and run the C of model and method over inputs ((ticks, nu) array).

    parameters: per-tick values of the tunable parameters as for run_built, or None;
    implicit_options (newton_iterations, newton_tol, solver) as for pipeline.generate.
    """
    from .build import build
    from .pipeline import generate

    csource = generate(model, method, dt, substeps, precision, **implicit_options)
    return run_built(build(csource, model), model, inputs, x0, parameters)


def run_c(built, model: Model, inputs, x0=None, parameters=None) -> Trajectory:
    """The states of run_built as a Trajectory of ticks + 1 rows (NaN after the failed tick)."""
    return trajectory(run_built(built, model, inputs, x0, parameters), model)


def trajectory(run: Replay, model: Model) -> Trajectory:
    """The states of a Replay as a Trajectory of ticks + 1 rows (NaN after the failed tick)."""
    rows = run.completed + 1
    ts = np.zeros(run.ticks + 1)
    xs = np.full((run.ticks + 1, model.nx), np.nan)
    ts[:rows] = run.t
    xs[:rows] = run.states
    return Trajectory(ts=ts, xs=xs, completed=run.completed)


def as_precision(values, precision: str):
    """Round values to the build's precision, so the reference starts from the same numbers."""
    arr = np.asarray(values, dtype=np.float64)
    return arr.astype(np.float32).astype(np.float64) if precision == FLOAT else arr
