"""Reading a model file (TOML, parsed with the standard library's tomllib) into a Model."""

from __future__ import annotations

import hashlib
import tomllib
from pathlib import Path

import sympy as sp

from ..errors import ModelError, located
from . import units
from .expressions import parse_expression
from .types import Input, Model, Output, Parameter, State, _suggest, check_finite, check_name, \
    check_range

_TOP_KEYS = {"name", "description", "time", "states", "inputs", "parameters", "outputs"}
_STATE_KEYS = {"initial", "rate", "unit", "range", "description"}
_INPUT_KEYS = {"default", "unit", "range", "description"}
_PARAM_KEYS = {"value", "unit", "range", "tunable", "description"}
_OUTPUT_KEYS = {"expr", "unit", "description"}


def _table(data, key, where, required=False):
    value = data.get(key, {})
    if key not in data and required:
        raise ModelError(located(where, key, f"missing [{key}] table"))
    if not isinstance(value, dict):
        raise ModelError(located(where, key, f"must be a table ([{key}])"))
    return value


def _check_keys(entry, allowed, where, item):
    for key in entry:
        if key not in allowed:
            hint = _suggest(key, allowed)
            raise ModelError(located(where, f"{item}.{key}", f"unknown key{hint}; allowed: "
                                     f"{', '.join(sorted(allowed))}"))


def _text(entry, key, where, item):
    value = entry.get(key, "")
    if not isinstance(value, str):
        raise ModelError(located(where, f"{item}.{key}", "must be a string"))
    return value


def _range(entry, where, item):
    if "range" not in entry:
        return None
    rng = entry["range"]
    check_range(rng, where, f"{item}.range")
    return (float(rng[0]), float(rng[1]))


def _number(entry, key, where, item, default=None):
    if key not in entry:
        if default is None:
            raise ModelError(located(where, f"{item}.{key}", "missing"))
        return default
    value = entry[key]
    check_finite(value, where, f"{item}.{key}")
    return float(value)


def model_from_data(data: dict, where: str, digest: str = "") -> Model:
    """Build and validate a Model from a parsed TOML document."""
    _check_keys(data, _TOP_KEYS, where, "")
    if "name" not in data:
        raise ModelError(located(where, "name", "missing; give the model a C prefix like "
                                 "name = \"heater\""))
    name = data["name"]
    if not isinstance(name, str):
        raise ModelError(located(where, "name", "must be a string"))
    time = data.get("time", "t")
    if not isinstance(time, str):
        raise ModelError(located(where, "time", "must be a string naming the time symbol"))
    check_name(time, where, "time")
    states_t = _table(data, "states", where, required=True)
    if not states_t:
        raise ModelError(located(where, "states", "a model needs at least one state"))
    inputs_t = _table(data, "inputs", where)
    params_t = _table(data, "parameters", where)
    outputs_t = _table(data, "outputs", where)

    symbols: dict[str, sp.Symbol] = {}
    for section, table in (("states", states_t), ("inputs", inputs_t),
                           ("parameters", params_t)):
        for key in table:
            check_name(key, where, f"{section}.{key}")
            if key in symbols or key == time:
                raise ModelError(located(where, f"{section}.{key}", f"duplicate name '{key}'; "
                                         "each name may be declared once"))
            symbols[key] = sp.Symbol(key, real=True)
    symbols[time] = sp.Symbol(time, real=True)

    states = []
    for key, entry in states_t.items():
        item = f"states.{key}"
        if not isinstance(entry, dict):
            raise ModelError(located(where, item, "must be a table like { initial = 0.0, rate = "
                                     "\"...\" }"))
        _check_keys(entry, _STATE_KEYS, where, item)
        if "rate" not in entry:
            raise ModelError(located(where, f"{item}.rate", "missing; every state needs a rate "
                                     "expression"))
        rate = parse_expression(entry["rate"], symbols, where, f"{item}.rate")
        states.append(State(name=key, unit=_text(entry, "unit", where, item),
                            range=_range(entry, where, item),
                            description=_text(entry, "description", where, item),
                            initial=_number(entry, "initial", where, item, 0.0), rate=rate))
    inputs = []
    for key, entry in inputs_t.items():
        item = f"inputs.{key}"
        if not isinstance(entry, dict):
            entry = {"default": entry}
        _check_keys(entry, _INPUT_KEYS, where, item)
        inputs.append(Input(name=key, unit=_text(entry, "unit", where, item),
                            range=_range(entry, where, item),
                            description=_text(entry, "description", where, item),
                            default=_number(entry, "default", where, item, 0.0)))
    parameters = []
    for key, entry in params_t.items():
        item = f"parameters.{key}"
        if not isinstance(entry, dict):
            entry = {"value": entry}
        _check_keys(entry, _PARAM_KEYS, where, item)
        tunable = entry.get("tunable", False)
        if not isinstance(tunable, bool):
            raise ModelError(located(where, f"{item}.tunable", "must be true or false"))
        parameters.append(Parameter(name=key, unit=_text(entry, "unit", where, item),
                                    range=_range(entry, where, item),
                                    description=_text(entry, "description", where, item),
                                    value=_number(entry, "value", where, item), tunable=tunable))
    out_symbols = dict(symbols)
    for key in outputs_t:
        check_name(key, where, f"outputs.{key}")
        if key in out_symbols:
            raise ModelError(located(where, f"outputs.{key}", f"duplicate name '{key}'; each name "
                                     "may be declared once"))
        out_symbols[key] = sp.Symbol(key, real=True)
    outputs = []
    for key, entry in outputs_t.items():
        item = f"outputs.{key}"
        if not isinstance(entry, dict):
            entry = {"expr": entry}
        _check_keys(entry, _OUTPUT_KEYS, where, item)
        if "expr" not in entry:
            raise ModelError(located(where, f"{item}.expr", "missing"))
        expr = parse_expression(entry["expr"], out_symbols, where, item)
        outputs.append(Output(name=key, unit=_text(entry, "unit", where, item),
                              description=_text(entry, "description", where, item), expr=expr))
    description = data.get("description", "")
    if not isinstance(description, str):
        raise ModelError(located(where, "description", "must be a string"))
    return Model(name=name, states=tuple(states), inputs=tuple(inputs),
                 parameters=tuple(parameters), outputs=tuple(outputs), time=time,
                 description=description, source=where, digest=digest)


def load_model(path: str | Path, check_units: bool = False) -> Model:
    """Read and validate a model file (TOML); with check_units, also check its units.

    The unit check (``units.check_units``) refuses unknown unit strings, rates that are not in
    their state's unit per second and dimensionally inconsistent expressions. The command line
    runs it on every model it loads unless given --no-units.
    """
    path = Path(path)
    where = str(path)
    try:
        raw = path.read_bytes()
        text = raw.decode("utf-8")
    except FileNotFoundError:
        raise ModelError(f"{where}: file not found") from None
    except (UnicodeDecodeError, IsADirectoryError, PermissionError) as exc:
        raise ModelError(f"{where}: cannot read the file: {exc}") from None
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ModelError(f"{where}: not valid TOML: {exc} (a name declared twice in one table "
                         "is reported here too)") from None
    model = model_from_data(data, where, hashlib.sha256(raw).hexdigest())
    if check_units:
        units.check_units(model)
    return model
