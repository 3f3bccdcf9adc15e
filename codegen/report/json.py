"""Reports for programs: the JSON shapes of `check --json`, `methods --json` and friends.

Each function returns plain data (dicts, lists, numbers, strings); json_text() prints it.
"""

from __future__ import annotations

import json
import math

import numpy as np

# Figures of a lone target run that `check --json` repeats at the top level, for scripts.
TARGET_SUMMARY_KEYS = ("matches_host", "flash_bytes", "stack_bytes", "instructions_per_tick",
                       "double_free", "misra")


def _default(value):
    """numpy values as plain numbers and lists; anything else json cannot write as its text."""
    if isinstance(value, np.ndarray):
        return _finite(value.tolist())
    if isinstance(value, np.floating):
        return float(value) if np.isfinite(value) else None
    if isinstance(value, np.integer):
        return int(value)
    if isinstance(value, np.bool_):
        return bool(value)
    return str(value)


def _finite(value):
    """NaN and infinities as None (JSON has no spelling for them), in nested data too."""
    if isinstance(value, float) and not math.isfinite(value):
        return None
    if isinstance(value, dict):
        return {k: _finite(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_finite(v) for v in value]
    return value


def json_text(data) -> str:
    """data as indented JSON text; non-finite numbers become null."""
    return json.dumps(_finite(data), indent=2, default=_default, allow_nan=False)


def check_data(outcome) -> dict:
    """`check --json` for a report.CheckOutcome: the report's fields, then what the options added.

    Keys: method, model, dt, substeps, strict_compile, cross_checks (each with the tick and time
    of its worst errors), order, scenario, parameters, stability, order_skipped; error_estimate,
    pictures and targets when asked for; with one target, its TARGET_SUMMARY_KEYS also at the top
    level; passed last (every check, options included).
    """
    data = outcome.report.to_dict()
    data.pop("passed")
    for c in data["cross_checks"]:  # the ticks of the worst errors as times too (s)
        c["worst_time"] = c["worst_tick"] * data["dt"]
        c["accuracy_time"] = c["accuracy_tick"] * data["dt"]
    if outcome.estimates:
        data["error_estimate"] = [dict(e.__dict__) for e in outcome.estimates]
    if outcome.pictures:
        data["pictures"] = [str(p) for p in outcome.pictures]
    if outcome.targets:
        targets = [t.to_dict() for t in outcome.targets]
        data["targets"] = targets
        if len(targets) == 1:
            data.update({k: targets[0][k] for k in TARGET_SUMMARY_KEYS})
    data["passed"] = outcome.passed
    return data


def _axis_limit(report, key):
    v = getattr(report, key, None)
    return None if isinstance(v, float) and not math.isfinite(v) else v


def method_rows(methods) -> list[dict]:
    """One row per method with its analysis (methods.analysis.analyse), for the methods table."""
    from ..methods import tolerance_note
    from ..methods.analysis import analyse

    rows = []
    for m in methods:
        report = analyse(m)
        r_inf = report.r_infinity
        rows.append({
            "id": m.id, "name": m.name, "stages": report.stages, "order": report.order,
            "embedded_order": report.embedded_order, "kind": report.kind,
            "explicit": report.kind == "explicit",
            "a_stable": report.a_stable, "l_stable": report.l_stable,
            "r_infinity": None if r_inf is None else float(r_inf),
            "real_axis_limit": _axis_limit(report, "real_axis_limit"),
            "imag_axis_limit": _axis_limit(report, "imag_axis_limit"),
            "stability_function": str(report.stability.function),
            "order_note": tolerance_note(m) or None,
            "source": m.source})
    return rows
