"""The scenario a check runs: the inputs it applies and the scale each state is measured on."""

from __future__ import annotations

import numpy as np

from ..model import Input, Model


def tunable_as_inputs(model: Model) -> Model:
    """The model with every tunable parameter moved to the end of its inputs.

    The reference then takes a tunable parameter's value per tick from the same row as the
    inputs, the way the C reads its context field before each tick (run.run_built). The symbols
    keep their names, so every expression of the model stays as it is.
    """
    if not model.tunable:
        return model
    moved = tuple(Input(name=p.name, unit=p.unit, range=p.range, description=p.description,
                        default=p.value) for p in model.tunable)
    return Model(name=model.name, states=model.states, inputs=model.inputs + moved,
                 parameters=tuple(p for p in model.parameters if not p.tunable),
                 outputs=model.outputs, time=model.time, description=model.description,
                 source=model.source, digest=model.digest)


def excitation(model: Model, ticks: int) -> np.ndarray:
    """A deterministic excitation: each ranged input sweeps its range; others keep their default.

    Shape (ticks, nu). The frequencies differ per input so inputs are not collinear.
    """
    u = np.zeros((ticks, len(model.inputs)))
    k = np.arange(ticks)
    for j, inp in enumerate(model.inputs):
        if inp.range:
            lo, hi = inp.range
            u[:, j] = lo + (hi - lo) * (0.5 + 0.4 * np.sin(2 * np.pi * (j + 1) * k / max(ticks, 1)))
        else:
            u[:, j] = inp.default
    return u


# Where in its range each input sits during the order study: off-centre, so that a symmetric range
# (a voltage of -12..12 V) still drives the model away from rest.
ORDER_INPUT_POSITION = 0.75


def constant_inputs(model: Model) -> np.ndarray:
    """Constant inputs for the order study: 3/4 up each range, or the default."""
    return np.array([i.range[0] + ORDER_INPUT_POSITION * (i.range[1] - i.range[0]) if i.range
                     else i.default for i in model.inputs], dtype=np.float64)



# Default accuracy target of a check: 1 % of each state's full scale (the largest magnitude of its
# declared range, else the largest magnitude it reaches); a firmware model is rarely trusted to
# better than that.
DEFAULT_ACCURACY = 1e-2


def state_scales(model: Model, run: np.ndarray | None = None) -> np.ndarray:
    """Per-state scale: State.full_scale, else the largest finite |x| of the run, else 1."""
    scales = []
    for i, s in enumerate(model.states):
        value = s.full_scale or 0.0
        if not value and run is not None and run.size:
            finite = run[:, i][np.isfinite(run[:, i])]
            value = float(np.max(np.abs(finite))) if finite.size else 0.0
        scales.append(value if value > 0 else 1.0)
    return np.array(scales)
