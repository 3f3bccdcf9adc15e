"""Methods from data: the built-in table rows and users' method files (TOML).

A tableau file has the keys name, a, b, c and optionally order, b_hat, embedded_order, source.
Entries are numbers or exact strings ("1/3", "sqrt(3)/6"). When every entry is exact the
tableau's conditions must hold exactly; when any entry is written in decimals (0.1666...), they
must hold to DECIMAL_DATA_TOL, and the order is decided to that tolerance (the output says so).
"""

from __future__ import annotations

import dataclasses
import hashlib
import tomllib
from pathlib import Path

from ..errors import MethodError, located
from .types import DECIMAL_DATA_TOL, Tableau
from .values import _vector, exact, written_in_decimals

TABLEAU_KEYS = ("name", "a", "b", "c", "order", "b_hat", "embedded_order", "source")


def _whole(data: dict, key: str, where: str):
    value = data.get(key)
    if value is not None and (not isinstance(value, int) or isinstance(value, bool)):
        raise MethodError(located(where, key, "must be a whole number"))
    return value


def tableau_from_data(data: dict, where: str, method_id: str = "",
                      tolerance: float | None = None) -> Tableau:
    """Build a Tableau from a plain dict (a TOML document or a built-in table row).

    tolerance: the data tolerance; None decides it from the data (0 when every entry is exact,
    DECIMAL_DATA_TOL when any entry is written in decimals).
    """
    for key in data:
        if key not in TABLEAU_KEYS and key != "tolerance":
            raise MethodError(located(where, key, f"unknown key; expected one of "
                                      f"{sorted(TABLEAU_KEYS)}"))
    for key in ("name", "a", "b", "c"):
        if key not in data:
            raise MethodError(located(where, key, "missing; a tableau needs name, a, b and c"))
    if not isinstance(data["name"], str) or not data["name"].strip():
        raise MethodError(located(where, "name", "must be a non-empty string"))
    rows = data["a"]
    if not isinstance(rows, list) or not all(isinstance(r, list) for r in rows):
        raise MethodError(located(where, "a", "must be a list of rows, each a list of numbers"))
    a = tuple(tuple(exact(v, where, f"a[{i}][{j}]") for j, v in enumerate(row))
              for i, row in enumerate(rows))
    b = _vector(data["b"], where, "b")
    c = _vector(data["c"], where, "c")
    b_hat = _vector(data["b_hat"], where, "b_hat") if "b_hat" in data else None
    order = _whole(data, "order", where)
    embedded_order = _whole(data, "embedded_order", where)
    if tolerance is None:
        tolerance = data.get("tolerance", DECIMAL_DATA_TOL if any(
            written_in_decimals(data.get(k)) for k in ("a", "b", "c", "b_hat")) else 0.0)
    return Tableau(id=method_id or data["name"], name=data["name"], a=a, b=b, c=c, order=order,
                   b_hat=b_hat, embedded_order=embedded_order,
                   source=data.get("source", "user tableau " + where), tolerance=tolerance,
                   origin=where)


def with_order(tableau: Tableau) -> Tableau:
    """The tableau with its order from the order conditions, or the stated order confirmed.

    The conditions are decided at the tableau's own tolerance (exactly for exact data); a stated
    order that the conditions do not give is refused.
    """
    from .analysis import order_of

    found = order_of(tableau)
    if tableau.order is not None and tableau.order != found:
        raise MethodError(located(tableau.origin or tableau.id, "order",
                                  f"states {tableau.order} but the order conditions give {found}"
                                  + _tolerance_note(tableau)
                                  + "; fix the coefficients or the stated order"))
    embedded = tableau.embedded_order
    if tableau.b_hat is not None:
        found_hat = order_of(tableau, tableau.b_hat)
        if embedded is not None and embedded != found_hat:
            raise MethodError(located(tableau.origin or tableau.id, "embedded_order",
                                      f"states {embedded} but the order conditions on b_hat give "
                                      f"{found_hat}{_tolerance_note(tableau)}"))
        embedded = found_hat
    return dataclasses.replace(tableau, order=found, embedded_order=embedded)


def _tolerance_note(tableau: Tableau) -> str:
    return f" (decimal data: conditions held to {tableau.tolerance:g})" if tableau.tolerance else ""


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


def load_tableau(path: str | Path) -> Tableau:
    """Read a user tableau (keys name, a, b, c, optional order and b_hat), its order checked."""
    path = Path(path)
    data, digest = read_toml(path)
    tableau = tableau_from_data(data, str(path), method_id=path.stem)
    return with_order(dataclasses.replace(tableau, digest=digest))
