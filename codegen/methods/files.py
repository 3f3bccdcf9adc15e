"""Methods from data: the built-in table rows and users' method files (TOML).

A method file holds one method of one of two kinds, chosen by the key ``kind``:

- ``kind = "tableau"`` (the default): a Runge-Kutta method, keys name, a, b, c and optionally
  order, b_hat, embedded_order, source;
- ``kind = "rosenbrock"``: a linearly implicit method in the form of types.LinearlyImplicit, keys
  name, gamma, alpha, coupling, b and optionally b_hat, order, embedded_order, source. The stage
  times and the time weights are derived (time_i = gamma times the row sums of
  (I - coupling)^-1); a ``time`` entry, if given, must equal them.

Entries are numbers or exact strings ("1/3", "sqrt(3)/6"). When every entry is exact the method's
conditions must hold exactly; when any entry is written in decimals (0.1666...), they must hold to
DECIMAL_DATA_TOL, the order is decided to that tolerance, and the output says so.
"""

from __future__ import annotations

import dataclasses
import hashlib
import tomllib
from pathlib import Path

from ..errors import MethodError, located
from .types import (DECIMAL_DATA_TOL, EXACT, LINEARLY_IMPLICIT, LinearlyImplicit, Tableau,
                    negligible)
from .values import _vector, exact, written_in_decimals

# The kinds a method file may declare, and the keys of each.
TABLEAU = "tableau"
ROSENBROCK = "rosenbrock"
FILE_KINDS = (TABLEAU, ROSENBROCK)
TABLEAU_KEYS = ("kind", "name", "a", "b", "c", "order", "b_hat", "embedded_order", "source",
                "tolerance")
ROSENBROCK_KEYS = ("kind", "name", "gamma", "alpha", "coupling", "b", "b_hat", "order",
                   "embedded_order", "source", "time", "tolerance")
# Order conditions of Rosenbrock methods are checked up to this order (Hairer & Wanner II,
# section IV.7, Table 7.1, from memory).
ROSENBROCK_MAX_ORDER = 3


def _whole(data: dict, key: str, where: str):
    value = data.get(key)
    if value is not None and (not isinstance(value, int) or isinstance(value, bool)):
        raise MethodError(located(where, key, "must be a whole number"))
    return value


def _check_keys(data: dict, where: str, allowed: tuple, required: tuple, what: str) -> None:
    for key in data:
        if key not in allowed:
            raise MethodError(located(where, key, f"unknown key for a {what}; expected one of "
                                      f"{sorted(allowed)}"))
    for key in required:
        if key not in data:
            raise MethodError(located(where, key, f"missing; a {what} needs "
                                      f"{', '.join(required[:-1])} and {required[-1]}"))
    if not isinstance(data["name"], str) or not data["name"].strip():
        raise MethodError(located(where, "name", "must be a non-empty string"))


def _rows(data: dict, key: str, where: str) -> tuple[tuple, ...]:
    rows = data[key]
    if not isinstance(rows, list) or not all(isinstance(r, list) for r in rows):
        raise MethodError(located(where, key, "must be a list of rows, each a list of numbers"))
    return tuple(tuple(exact(v, where, f"{key}[{i}][{j}]") for j, v in enumerate(row))
                 for i, row in enumerate(rows))


def _data_tolerance(data: dict, keys: tuple) -> float:
    """0 when every entry is exact, DECIMAL_DATA_TOL when any is written in decimals."""
    decimal = any(written_in_decimals(data.get(k)) for k in keys)
    return data.get("tolerance", DECIMAL_DATA_TOL if decimal else 0.0)


def tableau_from_data(data: dict, where: str, method_id: str = "",
                      tolerance: float | None = None) -> Tableau:
    """Build a Tableau from a plain dict (a TOML document or a built-in table row).

    tolerance: the data tolerance; None decides it from the data (0 when every entry is exact,
    DECIMAL_DATA_TOL when any entry is written in decimals).
    """
    _check_keys(data, where, TABLEAU_KEYS, ("name", "a", "b", "c"), "tableau")
    a = _rows(data, "a", where)
    b = _vector(data["b"], where, "b")
    c = _vector(data["c"], where, "c")
    b_hat = _vector(data["b_hat"], where, "b_hat") if "b_hat" in data else None
    order = _whole(data, "order", where)
    embedded_order = _whole(data, "embedded_order", where)
    if tolerance is None:
        tolerance = _data_tolerance(data, ("a", "b", "c", "b_hat"))
    return Tableau(id=method_id or data["name"], name=data["name"], a=a, b=b, c=c, order=order,
                   b_hat=b_hat, embedded_order=embedded_order,
                   source=data.get("source", "user tableau " + where), tolerance=tolerance,
                   origin=where)


def rosenbrock_from_data(data: dict, where: str, method_id: str = "",
                         tolerance: float | None = None) -> LinearlyImplicit:
    """Build a LinearlyImplicit method from a plain dict (a TOML document or a built-in row).

    A ``time`` entry is checked against the derived time weights (gamma times the row sums of
    (I - coupling)^-1); tolerance as in tableau_from_data.
    """
    _check_keys(data, where, ROSENBROCK_KEYS, ("name", "gamma", "alpha", "coupling", "b"),
                "Rosenbrock method")
    gamma = exact(data["gamma"], where, "gamma")
    alpha = _rows(data, "alpha", where)
    coupling = _rows(data, "coupling", where)
    b = _vector(data["b"], where, "b")
    b_hat = _vector(data["b_hat"], where, "b_hat") if "b_hat" in data else None
    if tolerance is None:
        tolerance = _data_tolerance(data, ("gamma", "alpha", "coupling", "b", "b_hat", "time"))
    method = LinearlyImplicit(
        id=method_id or data["name"], name=data["name"], gamma=gamma, alpha=alpha,
        coupling=coupling, b=b, order=_whole(data, "order", where),
        source=data.get("source", "user Rosenbrock method " + where), b_hat=b_hat,
        embedded_order=_whole(data, "embedded_order", where), tolerance=tolerance, origin=where)
    if "time" in data:
        given = _vector(data["time"], where, "time")
        derived = method.time
        if len(given) != len(derived) or not all(
                negligible(g - d, tolerance) for g, d in zip(given, derived)):
            raise MethodError(located(where, "time", f"must equal gamma times the row sums of "
                                      f"(I - coupling)^-1, that is {list(map(str, derived))}; "
                                      "fix it or leave it out"))
    return method


def method_from_data(data: dict, where: str, method_id: str = "") -> Tableau | LinearlyImplicit:
    """A tableau or a Rosenbrock method from a plain dict, by its ``kind`` (default tableau)."""
    kind = data.get("kind", TABLEAU)
    if kind == TABLEAU:
        return tableau_from_data(data, where, method_id)
    if kind == ROSENBROCK:
        return rosenbrock_from_data(data, where, method_id)
    raise MethodError(located(where, "kind", f"{kind!r} is not a method kind a file can hold; "
                              f"use one of {', '.join(repr(k) for k in FILE_KINDS)}"))


def tolerance_note(method) -> str:
    """How the method's conditions were decided: '' when exactly, else the tolerance and why."""
    if not method.tolerance:
        return ""
    what = "decimal data" if method.tolerance == DECIMAL_DATA_TOL else "rounded data"
    return f"{what}: conditions to {method.tolerance:g}"


def _with_note(method) -> str:
    note = tolerance_note(method)
    return f" ({note})" if note else ""


def with_order(method):
    """The method with its order from the order conditions, or the stated order confirmed.

    Tableaux: the Runge-Kutta order conditions (rooted trees); Rosenbrock methods: their order
    conditions up to ROSENBROCK_MAX_ORDER (a stated order above it is refused). The conditions
    are decided at the method's own tolerance (exactly for exact data); a stated order that the
    conditions do not give is refused. The exact discretization has no order to check.
    """
    from .analysis import order_of, rosenbrock_order

    if method.kind == EXACT:
        return method
    where = method.origin or method.id
    rosenbrock = method.kind == LINEARLY_IMPLICIT
    if rosenbrock:
        for key, stated in (("order", method.order), ("embedded_order", method.embedded_order)):
            if stated is not None and stated > ROSENBROCK_MAX_ORDER:
                raise MethodError(located(where, key, f"states {stated}, but the order conditions "
                                          "of Rosenbrock methods are checked up to order "
                                          f"{ROSENBROCK_MAX_ORDER}; state {ROSENBROCK_MAX_ORDER} "
                                          "or less"))
    find = rosenbrock_order if rosenbrock else order_of
    found = find(method)
    if found == 0:
        raise MethodError(located(where, "b", "the weights fail the order-1 condition (for a "
                                  "Rosenbrock method: sum of b (I - coupling)^-1 = 1)"
                                  + _with_note(method) + "; fix b"))
    if method.order is not None and method.order != found:
        raise MethodError(located(where, "order",
                                  f"states {method.order} but the order conditions give {found}"
                                  + _with_note(method)
                                  + "; fix the coefficients or the stated order"))
    embedded = method.embedded_order
    if method.b_hat is not None:
        found_hat = find(method, method.b_hat)
        if embedded is not None and embedded != found_hat:
            raise MethodError(located(where, "embedded_order",
                                      f"states {embedded} but the order conditions on b_hat give "
                                      f"{found_hat}{_with_note(method)}"))
        embedded = found_hat
    return dataclasses.replace(method, order=found, embedded_order=embedded)


def read_toml(path: str | Path) -> tuple[dict, str]:
    """A method file's TOML document and the SHA-256 of its bytes, or one MethodError line."""
    path = Path(path)
    try:
        raw = path.read_bytes()
        return tomllib.loads(raw.decode("utf-8")), hashlib.sha256(raw).hexdigest()
    except FileNotFoundError:
        raise MethodError(f"{path}: file not found") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise MethodError(f"{path}: cannot read the file: {exc}") from None
    except tomllib.TOMLDecodeError as exc:
        raise MethodError(f"{path}: not valid TOML: {exc}") from None


def load_method_file(path: str | Path) -> Tableau | LinearlyImplicit:
    """Read a method file (a tableau, or ``kind = "rosenbrock"``), its order checked."""
    path = Path(path)
    data, digest = read_toml(path)
    method = method_from_data(data, str(path), method_id=path.stem)
    return with_order(dataclasses.replace(method, digest=digest))
