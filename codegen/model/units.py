"""Unit checking of a model: every rate in its state's unit per second, every expression consistent.

The units library is pint, a maintained general-purpose library: it reads unit strings as people
write them ("N*m/A", "kg*m^2", "A*h", "degC", "ohm"), knows the SI prefixes, the derived units and
the common non-SI ones (hour, degree, rpm), converts between them with their exact factors, and
keeps offset scales such as degC apart from their differences (delta_degC). sympy.physics.units
would avoid the dependency but has no parser for unit strings and no offset temperatures, so the
model files' units would need a second, hand-written unit language.

How an expression is checked, node by node of its sympy tree:

- a symbol carries its quantity's unit; time carries seconds; a number is dimensionless, except
  a literal zero, which fits any unit (0 is 0 in every unit: `Piecewise((k*w, w > 0), (0, True))`);
- a sum, the branches of a Piecewise, the arguments of min and max, and the two sides of a
  comparison need the same unit: the same dimension and a conversion factor of 1 (adding A to mA
  is a factor-1000 mistake even though both are currents);
- products, quotients and integer powers combine units; a fractional power is allowed only where
  the result is a whole power of every dimension (the square root of an area is a length, the
  square root of a length is refused); a power with a symbolic exponent needs a dimensionless
  base and exponent;
- sin, cos, tan, their inverses, the hyperbolic functions, exp and log need a dimensionless
  argument with factor 1 (radians count as dimensionless; degrees are refused because the C
  functions take radians); atan2 needs two arguments in one unit; abs, floor and ceil keep the
  unit; sign returns a plain number; any other function is treated like exp;
- a rate must have the unit of its state per second, an output the unit it declares (if it
  declares one), each with a conversion factor of 1 within FACTOR_TOL.

Offset scales (degC, degF): a state, input or parameter in degC is a reading on the scale. The
difference of two readings is a temperature difference (delta_degC, the same size as K); a
reading plus or minus differences is a reading. A sum is checked by the total weight of the
readings in it (T - T_amb: weight 0, a difference; (T1 + T2)/2: weight 1, a reading); a weight
other than 0 or 1, a reading multiplied by a quantity, raised to a power or passed to a function
is refused. The rate of a state in degC must be in delta_degC/s (K/s is the same).

Quantities without a unit: an expression that uses one (or an output whose unit cannot be
found) is skipped, not guessed at; a rate is compared with its state's unit only when the state
has one. A model in which no quantity has a unit is not checked at all.

References
----------
BIPM, The International System of Units (SI), 9th edition, 2019 (the SI brochure): the seven base
units (section 2.3.3, Table 2), the coherent derived units with special names, among them the
radian, m/m = 1, a dimensionless unit (section 2.3.4, Table 4), and the degree Celsius, whose
temperature differences equal those in kelvin while its readings are offset by 273.15 (section
2.3.4). From memory.
"""

from __future__ import annotations

import difflib
import functools
from dataclasses import dataclass

import pint
import sympy as sp
from pint.util import to_units_container

from ..errors import ModelError, located
from .types import Model

# Relative distance from 1 below which a conversion factor counts as 1: pint's factors are
# products of exact decimal definitions evaluated in binary64, so a true factor of 1 comes out
# within a few units of roundoff (about 1e-16), far below any real scale mistake (>= 1e-3).
FACTOR_TOL = 1e-12
# Weights of readings on an offset scale that have a meaning: a difference, or one reading.
_MEANINGFUL_WEIGHTS = (0, 1)
# Why a number written to convert units does not count as a conversion.
_NUMBERS_NOTE = "numbers in expressions carry no unit: convert through the quantities' units"
# What each kind of shared-unit mismatch needs, for the end of its message.
_SAME_UNIT = {"adds": "every term of a sum needs the same unit",
              "compares": "both sides of a comparison need the same unit",
              "has branches": "every branch of a Piecewise needs the same unit",
              "picks between": "every argument of min and max needs the same unit",
              "takes atan2 of": "both arguments of atan2 need the same unit"}
# Functions that keep the unit of their single argument.
_KEEP_UNIT = (sp.Abs, sp.floor, sp.ceiling)
# pint's unit symbols that are not ASCII, spelled as a model file would write them.
_ASCII_SYMBOLS = (("\N{GREEK CAPITAL LETTER DELTA}", "delta_"), ("\N{DEGREE SIGN}", "deg"),
                  ("\N{OHM SIGN}", "ohm"), ("\N{GREEK CAPITAL LETTER OMEGA}", "ohm"),
                  ("\N{MICRO SIGN}", "u"), ("\N{GREEK SMALL LETTER MU}", "u"))


@functools.cache
def registry() -> pint.UnitRegistry:
    """The one unit registry (pint's default definitions), built on first use."""
    return pint.UnitRegistry()


@dataclass(frozen=True)
class Dim:
    """The unit of a (sub)expression; weight counts readings on an offset scale such as degC.

    weight is 0 for every ordinary quantity (and for temperature differences); a reading in degC
    has weight 1, 2*T weight 2, T1 - T2 weight 0 (a difference, whose unit is then delta_degC).
    """

    unit: pint.Unit
    weight: sp.Rational | int = 0


def parse_unit(text: str, where: str, item: str) -> pint.Unit:
    """Read one unit string, or raise one line naming the item and a likely correction."""
    reg = registry()
    try:
        return reg.parse_units(text)
    except pint.UndefinedUnitError as exc:
        names = exc.unit_names if isinstance(exc.unit_names, (tuple, list)) else (exc.unit_names,)
        name = str(names[0]) if names else text
        inside = "" if name == text.strip() else f" in '{text}'"
        hint = _unit_suggestion(name) or "; write units such as 'N*m/A', 'kg*m^2', 'degC' or '1'"
        raise ModelError(located(where, item, f"unknown unit '{name}'{inside}{hint}")) from None
    # pint's parser reports malformed text with several exception types (ValueError for a number
    # in the unit, AssertionError and tokenize errors for broken syntax): each is bad input here.
    except Exception:  # noqa: BLE001
        raise ModelError(located(where, item, f"cannot read the unit '{text}'; write a product "
                                 "of units without numbers, such as 'N*m/A', 'kg*m^2' or '1'")) \
            from None


def _unit_suggestion(name: str) -> str:
    names = sorted(n for n in dir(registry()) if not n.startswith("_") and n in registry())
    same = [n for n in names if n.lower() == name.lower() and n != name]
    hint = same or [n for n in difflib.get_close_matches(name, names, n=2) if n != name]
    return f" (did you mean '{hint[0]}'?)" if hint else ""


def unit_text(unit: pint.Unit) -> str:
    """A unit as a model file writes it: symbols, '*', '/', '^' ('N*m/A', 'kg*m^2', '1')."""
    reg = registry()
    up, down = [], []
    for name, exponent in to_units_container(unit).items():
        symbol = reg.get_symbol(name)
        for fancy, plain in _ASCII_SYMBOLS:
            symbol = symbol.replace(fancy, plain)
        power = abs(exponent)
        power_text = f"{int(power)}" if float(power).is_integer() else f"{power:g}"
        (up if exponent > 0 else down).append(symbol if power == 1 else f"{symbol}^{power_text}")
    text = "*".join(up) or "1"
    if down:
        text += "/" + (down[0] if len(down) == 1 else "(" + "*".join(down) + ")")
    return text


def _base_text(unit: pint.Unit) -> str:
    return unit_text(registry().Quantity(1, unit).to_base_units().units)


def _with_base(unit: pint.Unit) -> str:
    """'V (= kg*m^2/(A*s^3))': the unit and, when it reads differently, its SI base form."""
    return unit_text(unit) + _base_note(unit)


def _base_note(unit: pint.Unit) -> str:
    """' (= kg*m^2/(A*s^3))' when the SI base form reads differently, else ''."""
    text, base = unit_text(unit), _base_text(unit)
    return "" if text == base else f" (= {base})"


def is_offset(unit: pint.Unit) -> bool:
    """Whether the unit is an offset scale (degC, degF): its zero is not zero kelvin."""
    return registry().Quantity(0, unit).to_base_units().magnitude != 0


def _difference_unit(unit: pint.Unit) -> pint.Unit:
    """delta_degC for degC: the unit of a difference of two readings."""
    return registry().Unit("delta_" + str(unit))


def factor(got: pint.Unit, want: pint.Unit) -> float:
    """How many `want` one `got` is (both of one dimension, neither an offset scale)."""
    return float(registry().Quantity(1, got).to(want).magnitude)


def factor_text(value: float) -> str:
    """A conversion factor as people write it: '1000', '1/3600', '0.0174533'."""
    if value < 1 and abs(1 / value - round(1 / value)) <= FACTOR_TOL * (1 / value):
        return f"1/{round(1 / value)}"
    return f"{value:.6g}"


def _is_one(value: float) -> bool:
    return abs(value - 1.0) <= FACTOR_TOL


def _quantity_dim(unit: pint.Unit) -> Dim:
    return Dim(unit, sp.Integer(1)) if is_offset(unit) else Dim(unit)


def check_units(model: Model) -> None:
    """Check a model's units; raise ModelError with one line at the first mistake.

    Unit strings must be known units; every rate must be in its state's unit per second and
    every output in the unit it declares; every expression must be dimensionally consistent.
    A model without any unit passes unchecked.
    """
    where = model.source
    quantities = [("states", q) for q in model.states] + [("inputs", q) for q in model.inputs] + \
        [("parameters", q) for q in model.parameters] + [("outputs", q) for q in model.outputs]
    declared: dict[str, pint.Unit] = {}
    for section, q in quantities:
        if q.unit.strip():
            declared[q.name] = parse_unit(q.unit, where, f"{section}.{q.name}.unit")
    if not declared:
        return
    known: dict[str, Dim | None] = {name: _quantity_dim(unit) for name, unit in declared.items()}
    known[model.time] = Dim(registry().second)
    for state in model.states:
        item = f"states.{state.name}.rate"
        if not _all_known(state.rate, known):
            continue
        walker = _Walker(known, where, item)
        got = walker.settled(walker.walk(state.rate), state.rate)
        if state.name in declared:
            _check_rate(got, state.name, declared[state.name], walker)
    by_name = {o.name: o for o in model.outputs}
    for name in _output_order(model):
        out = by_name[name]
        if not _all_known(out.expr, known):
            continue
        walker = _Walker(known, where, f"outputs.{name}")
        got = walker.settled(walker.walk(out.expr), out.expr)
        if name in declared:
            _check_output(got, declared[name], walker)
        else:
            known[name] = got


def _all_known(expr: sp.Expr, known) -> bool:
    return all(sym.name in known for sym in expr.free_symbols)


def _output_order(model: Model) -> list[str]:
    """Output names with every output after the outputs it uses (the model has no loops)."""
    by_name = {o.name: o for o in model.outputs}
    order: list[str] = []

    def visit(name):
        if name in order:
            return
        for sym in sorted(by_name[name].expr.free_symbols, key=lambda s: s.name):
            if sym.name in by_name:
                visit(sym.name)
        order.append(name)

    for out in model.outputs:
        visit(out.name)
    return order


def _check_rate(got: Dim | None, state: str, unit: pint.Unit, walker: _Walker) -> None:
    """A rate must be in its state's unit per second (a difference per second for degC)."""
    base = _difference_unit(unit) if is_offset(unit) else unit
    want = base / registry().second
    need = f"a rate of {state} (in {unit_text(unit)}) must be in {unit_text(want)}"
    if got is None:
        return
    if got.weight != 0:
        walker.fail(f"is a reading in {unit_text(got.unit)}, not a rate; {need}")
    if got.unit.dimensionality != want.dimensionality:
        walker.fail(f"has unit {_with_base(got.unit)}, but {need}"
                    f"{_base_note(want)}; check the expression and the units of its quantities")
    f = factor(got.unit, want)
    if not _is_one(f):
        walker.fail(f"has unit {unit_text(got.unit)}, but {need}; {unit_text(got.unit)} is "
                    f"{factor_text(f)} times {unit_text(want)}, so the rate is off by that factor "
                    f"({_NUMBERS_NOTE})")


def _check_output(got: Dim | None, unit: pint.Unit, walker: _Walker) -> None:
    """An output with a declared unit must be in it (a reading for degC, a difference for K)."""
    declared = unit_text(unit)
    if got is None:
        return
    if is_offset(unit) and not (got.weight != 0 and got.unit == unit):
        walker.fail(f"is in {unit_text(got.unit)}, but declares {declared}, a reading on an "
                    f"offset scale; write a reading of {declared} or declare the unit it has")
    if got.weight != 0 and not is_offset(unit):
        walker.fail(f"is a reading in {unit_text(got.unit)}, but declares {declared}; declare "
                    f"{unit_text(got.unit)} or subtract a reference reading")
    if got.weight != 0:
        return
    if got.unit.dimensionality != unit.dimensionality:
        walker.fail(f"has unit {_with_base(got.unit)}, but declares {declared}{_base_note(unit)}; "
                    "fix the expression or the declared unit")
    f = factor(got.unit, unit)
    if not _is_one(f):
        walker.fail(f"has unit {unit_text(got.unit)}, but declares {declared}; "
                    f"{unit_text(got.unit)} is {factor_text(f)} times {declared}, so the value is "
                    f"off by that factor; declare {unit_text(got.unit)} or fix the units "
                    f"({_NUMBERS_NOTE})")


class _Walker:
    """Finds the unit of each node of one item's expression; fail() names the item."""

    def __init__(self, known: dict, where: str, item: str):
        self.known = known
        self.where = where
        self.item = item
        self.plain = Dim(registry().dimensionless)

    def fail(self, message: str) -> None:
        raise ModelError(located(self.where, self.item, message))

    # ---- helpers ----

    def settled(self, dim: Dim | None, expr) -> Dim | None:
        """dim, once it is known to be a plain quantity, a difference or a single reading."""
        if dim is not None and dim.weight not in _MEANINGFUL_WEIGHTS:
            self.fail(f"'{expr}' counts readings in {unit_text(dim.unit)} with total weight "
                      f"{dim.weight}; on an offset scale only a difference (T1 - T2) or one "
                      "reading plus differences has a meaning; use K for absolute temperatures")
        return dim

    def same(self, pairs, what) -> Dim | None:
        """The one unit shared by (expr, dim) pairs; None (a zero) fits any."""
        first = None
        for expr, dim in pairs:
            if dim is None:
                continue
            if first is None:
                first = (expr, dim)
            else:
                self.agree(what, first[0], first[1], expr, dim)
        return None if first is None else first[1]

    def agree(self, what, a, da: Dim, b, db: Dim, ref: Dim | None = None) -> None:
        """Refuse b unless it has a's unit (or ref's, when a stands for a reading's difference).

        The message names both subexpressions with the units as written (a's, not ref's).
        """
        ref = ref or da
        if ref.weight != db.weight or (ref.weight != 0 and ref.unit != db.unit) or \
                ref.unit.dimensionality != db.unit.dimensionality:
            self.mismatch(what, a, da, b, db, "")
        f = factor(db.unit, ref.unit) if ref.weight == 0 else 1.0
        if not _is_one(f):
            self.mismatch(what, a, da, b, db, f", which differ by a factor {factor_text(1 / f)}")

    def mismatch(self, what, a, da: Dim, b, db: Dim, note: str) -> None:
        if what == "adds" and sp.Add(a, b).as_ordered_terms()[0] == b:
            a, da, b, db = b, db, a, da  # name the units in the order the sum is printed
        ua, ub = unit_text(da.unit), unit_text(db.unit)
        if what == "adds":
            text = f"'{sp.Add(a, b)}' adds {ua} and {ub}"
        elif what == "has branches":
            text = f"Piecewise branches '{a}' and '{b}' are in {ua} and {ub}"
        else:
            text = f"'{a}' {what} {ua} and {ub}"
        self.fail(f"{text}{note}; {_SAME_UNIT[what]}")

    def dimensionless(self, expr, dim: Dim | None, what: str) -> None:
        """Refuse an argument (of a function or an exponent) that is not a plain number."""
        if dim is None:
            return
        unit = unit_text(dim.unit)
        if dim.weight != 0 or not dim.unit.dimensionless:
            self.fail(f"'{what}' needs a dimensionless argument, but '{expr}' is in {unit}; "
                      "divide it by a quantity in the same unit")
        f = factor(dim.unit, registry().dimensionless)
        if not _is_one(f):
            self.fail(f"'{what}' needs a plain number or radians, but '{expr}' is in {unit} "
                      f"(1 {unit} = {factor_text(f)}); convert it to radians or a fraction")

    # ---- nodes ----

    def walk(self, e) -> Dim | None:
        """The unit of e; None for a literal zero (it fits any unit)."""
        if e.is_Number or isinstance(e, sp.NumberSymbol):
            return None if e == 0 else self.plain
        if e.is_Symbol:
            return self.known[e.name]
        if e.is_Add:
            return self.add(e)
        if e.is_Mul:
            return self.mul(e)
        if e.is_Pow:
            return self.power(e)
        if isinstance(e, sp.Piecewise):
            pairs = []
            for value, condition in e.args:
                self.condition(condition)
                pairs.append((value, self.settled(self.walk(value), value)))
            return self.same(pairs, "has branches")
        if isinstance(e, (sp.Min, sp.Max)):
            return self.same([(e, self.settled(self.walk(a), a)) for a in e.args],
                             "picks between")
        if isinstance(e, _KEEP_UNIT):
            return self.walk(e.args[0])
        if isinstance(e, sp.sign):
            self.settled(self.walk(e.args[0]), e.args[0])
            return self.plain
        if isinstance(e, sp.atan2):
            dims = [(e, self.settled(self.walk(a), a)) for a in e.args]
            dim = self.same(dims, "takes atan2 of")
            if dim is not None and dim.weight != 0:
                self.fail(f"'{e}' takes atan2 of readings in {unit_text(dim.unit)}; use "
                          "differences")
            return self.plain
        if isinstance(e, sp.Function):
            for a in e.args:
                self.dimensionless(a, self.walk(a), str(e))
            return self.plain
        self.fail(f"cannot check the units of '{e}'; rewrite it with + - * / ** and the "
                  "supported functions")
        return None

    def condition(self, c) -> None:
        if isinstance(c, sp.core.relational.Relational):
            sides = [(c, self.settled(self.walk(s), s)) for s in (c.lhs, c.rhs)]
            self.same(sides, "compares")
        elif isinstance(c, (sp.And, sp.Or, sp.Not)):
            for a in c.args:
                self.condition(a)

    def add(self, e) -> Dim | None:
        readings, plain = [], []
        for term in e.args:
            dim = self.walk(term)
            if dim is not None:
                (readings if dim.weight != 0 else plain).append((term, dim))
        if not readings:
            return self.same(plain, "adds")
        scale = readings[0][1].unit
        for term, dim in readings[1:]:
            if dim.unit != scale:
                self.mismatch("adds", readings[0][0], readings[0][1], term, dim, "")
        difference = Dim(_difference_unit(scale))
        for term, dim in plain:
            self.agree("adds", readings[0][0], readings[0][1], term, dim, ref=difference)
        weight = sum((dim.weight for _, dim in readings), sp.Integer(0))
        return difference if weight == 0 else Dim(scale, weight)

    def mul(self, e) -> Dim | None:
        number = sp.Integer(1)
        dims = []
        for a in e.args:
            if a.is_Number:
                number *= a
            else:
                dims.append((a, self.walk(a)))
        if any(dim is None for _, dim in dims):
            return None
        readings = [(a, dim) for a, dim in dims if dim.weight != 0]
        if readings:
            if len(dims) > 1:
                a, dim = readings[0]
                self.fail(f"'{e}' multiplies '{a}', a reading in {unit_text(dim.unit)} (an "
                          "offset scale); multiply a difference such as (T - T_ref), or use K")
            return Dim(readings[0][1].unit, readings[0][1].weight * number)
        unit = registry().dimensionless
        for _, dim in dims:
            unit = unit * dim.unit
        return Dim(unit)

    def power(self, e) -> Dim | None:
        base, exponent = e.args
        dim = self.walk(base)
        if exponent.is_Number:
            if dim is None:
                return None
            if dim.weight != 0:
                self.fail(f"'{e}' raises '{base}', a reading in {unit_text(dim.unit)} (an offset "
                          "scale), to a power; use K for absolute temperatures")
            if exponent.is_Integer:
                return Dim(dim.unit ** int(exponent))
            unit = dim.unit ** float(exponent)
            if any(not float(p).is_integer() for p in unit.dimensionality.values()):
                self.fail(f"'{e}' takes the power {exponent} of {unit_text(dim.unit)}, which is "
                          "not a whole power of every dimension (only exact roots, such as the "
                          "square root of an area, have a unit)")
            return Dim(unit)
        if dim is not None and (dim.weight != 0 or not dim.unit.dimensionless):
            self.fail(f"'{e}' raises '{base}' (in {unit_text(dim.unit)}) to the power "
                      f"'{exponent}'; a quantity with a unit needs a number as its exponent")
        self.dimensionless(base, dim, str(e))
        self.dimensionless(exponent, self.walk(exponent), str(e))
        return self.plain
