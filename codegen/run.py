"""Running the compiled C over whole input arrays: one call into a C loop, not one per tick.

The cffi module of build.build carries a test-only loop (not part of the firmware files) that
runs N ticks over a buffer of inputs; this module drives it with numpy arrays.
"""

from __future__ import annotations

import numpy as np

from .emit.printer import FLOAT
from .model import Model
from .reference import Trajectory


def run_c(built, model: Model, inputs: np.ndarray, x0=None) -> Trajectory:
    """Run the compiled step over the inputs with the test-only C loop."""
    ffi, lib = built.ffi, built.lib
    dtype = np.float32 if built.csource.precision == FLOAT else np.float64
    real_t = f"{model.name}_real_t"
    n = len(inputs)
    u = np.ascontiguousarray(inputs, dtype=dtype).reshape(-1)
    xs = np.zeros((n + 1) * model.nx, dtype=dtype)
    ts = np.zeros(n + 1, dtype=dtype)
    ctx = ffi.new(f"{model.name}_ctx_t *")
    getattr(lib, f"{model.name}_reset")(ctx)
    if x0 is not None:
        for s, v in zip(model.states, x0):
            setattr(ctx, s.name, float(v))
    status = ffi.new("int *")
    done = lib.tw_run(ctx, n, ffi.from_buffer(f"{real_t}[]", u) if u.size else ffi.NULL,
                      ffi.from_buffer(f"{real_t}[]", xs), ffi.from_buffer(f"{real_t}[]", ts),
                      status)
    xs = xs.reshape(n + 1, model.nx).astype(np.float64)
    xs[done + 1:] = np.nan
    return Trajectory(ts=ts.astype(np.float64), xs=xs, completed=int(done))


def as_precision(values, precision: str):
    """Round values to the build's precision, so the reference starts from the same numbers."""
    arr = np.asarray(values, dtype=np.float64)
    return arr.astype(np.float32).astype(np.float64) if precision == FLOAT else arr
