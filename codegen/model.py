"""Stage 1 of the pipeline: the model x' = f(t, x, u, p), from a TOML file or from sympy directly.

A model file is parsed with the standard library's tomllib; every expression is translated from
Python's syntax tree into sympy by hand (no eval, no sympify of user text), so only the declared
names and a whitelist of math functions can appear.
"""

from __future__ import annotations

import ast
import difflib
import keyword
import math
import re
import tomllib
from dataclasses import dataclass, field
from pathlib import Path

import sympy as sp

from .errors import ModelError, located

# The C prefix: lower case so that the upper-case macro prefix derived from it is unambiguous.
PREFIX_PATTERN = re.compile(r"[a-z][a-z0-9_]*\Z")
# Names of states, inputs, parameters, outputs and time: C identifiers that cannot be reserved
# (no leading underscore; double underscores are reserved to the implementation in C).
NAME_PATTERN = re.compile(r"[A-Za-z][A-Za-z0-9_]*\Z")
# Internal names in the generated C start with this; model names may not.
INTERNAL_PREFIX = "tw_"

C_KEYWORDS = frozenset("""
auto break case char const continue default do double else enum extern float for goto if inline int
long register restrict return short signed sizeof static struct switch typedef union unsigned void
volatile while _Bool _Complex _Imaginary bool true false NULL
""".split())

# Names the generated C or its headers already use: math.h functions and macros, stdint/stddef
# types, and the Python/sympy constants the expression language reserves.
RESERVED_NAMES = frozenset("""
acos acosh asin asinh atan atan2 atanh cbrt ceil copysign cos cosh erf erfc exp exp2 expm1 fabs fdim
floor fma fmax fmin fmod frexp hypot ilogb ldexp lgamma llrint llround log log10 log1p log2 logb lrint
lround modf nan nearbyint nextafter nexttoward pow remainder remquo rint round scalbln scalbn sin sinh
sqrt tan tanh tgamma trunc j0 j1 jn y0 y1 yn isfinite isnan isinf signbit fpclassify
HUGE_VAL HUGE_VALF INFINITY NAN EOF FLT_EPSILON DBL_EPSILON FLT_MAX DBL_MAX
size_t ptrdiff_t int8_t int16_t int32_t int64_t uint8_t uint16_t uint32_t uint64_t float_t double_t
main errno assert abs min max sign Piecewise pi E
""".split())

# Whitelisted functions of the expression language and their sympy meaning.
FUNCTIONS = {
    "sin": sp.sin, "cos": sp.cos, "tan": sp.tan, "asin": sp.asin, "acos": sp.acos,
    "atan": sp.atan, "atan2": sp.atan2, "sinh": sp.sinh, "cosh": sp.cosh, "tanh": sp.tanh,
    "exp": sp.exp, "log": sp.log, "sqrt": sp.sqrt, "abs": sp.Abs, "min": sp.Min, "max": sp.Max,
    "sign": sp.sign, "floor": sp.floor, "ceil": sp.ceiling, "Piecewise": None,
}
FUNCTION_ARITY = {"atan2": (2, 2), "min": (2, None), "max": (2, None), "Piecewise": (1, None)}
CONSTANTS = {"pi": sp.pi, "E": sp.E}


@dataclass(frozen=True)
class Quantity:
    """Common fields of a named model quantity."""

    name: str
    unit: str = ""
    range: tuple[float, float] | None = None
    description: str = ""

    @property
    def symbol(self) -> sp.Symbol:
        return sp.Symbol(self.name, real=True)


@dataclass(frozen=True)
class State(Quantity):
    """One entry of the state vector: its initial value and its rate dx/dt."""

    initial: float = 0.0
    rate: sp.Expr = sp.Integer(0)

    @property
    def full_scale(self) -> float | None:
        """The largest magnitude of the declared range, or None without a (non-zero) range.

        The one scale every check uses for this state: accuracy targets, Newton tolerances and
        the run-time error estimate are fractions of it.
        """
        if self.range is None:
            return None
        value = max(abs(self.range[0]), abs(self.range[1]))
        return float(value) if value > 0 else None


@dataclass(frozen=True)
class Input(Quantity):
    """A value supplied by the caller every tick and held constant during the tick."""

    default: float = 0.0


@dataclass(frozen=True)
class Parameter(Quantity):
    """A constant: baked into the C as a literal, or a runtime field when tunable."""

    value: float = 0.0
    tunable: bool = False


@dataclass(frozen=True)
class Output(Quantity):
    """An algebraic output; expr may use other outputs, resolved holds only model symbols."""

    expr: sp.Expr = sp.Integer(0)
    resolved: sp.Expr = field(default=sp.Integer(0), compare=False)


@dataclass(frozen=True)
class Model:
    """A validated ODE model x' = f(t, x, u, p) with algebraic outputs y = g(t, x, u, p).

    source names where the model came from (a file path, or '<python>') for diagnostics.
    """

    name: str
    states: tuple[State, ...]
    inputs: tuple[Input, ...] = ()
    parameters: tuple[Parameter, ...] = ()
    outputs: tuple[Output, ...] = ()
    time: str = "t"
    description: str = ""
    source: str = "<python>"

    def __post_init__(self) -> None:
        where = self.source
        if not isinstance(self.name, str) or not PREFIX_PATTERN.match(self.name):
            raise ModelError(located(where, "name", f"{self.name!r} is not a valid C prefix; use "
                                     "lower case letters, digits and '_', starting with a letter"))
        if self.name in C_KEYWORDS or self.name in RESERVED_NAMES or keyword.iskeyword(self.name):
            raise ModelError(located(where, "name", f"'{self.name}' is a reserved word; choose "
                                     "another model name"))
        if not self.states:
            raise ModelError(located(where, "states", "a model needs at least one state"))
        seen: dict[str, str] = {}
        for section, items in (("time", [self.time]), ("states", self.states),
                                ("inputs", self.inputs), ("parameters", self.parameters),
                                ("outputs", self.outputs)):
            for item in items:
                name = item if isinstance(item, str) else item.name
                item_path = section if section == "time" else f"{section}.{name}"
                check_name(name, where, item_path)
                if name in seen:
                    raise ModelError(located(where, item_path, f"duplicate name '{name}', already "
                                             f"used in {seen[name]}; rename one of them"))
                seen[name] = item_path
        for state in self.states:
            check_finite(state.initial, where, f"states.{state.name}.initial")
            check_range(state.range, where, f"states.{state.name}.range")
        for inp in self.inputs:
            check_finite(inp.default, where, f"inputs.{inp.name}.default")
            check_range(inp.range, where, f"inputs.{inp.name}.range")
        for par in self.parameters:
            check_finite(par.value, where, f"parameters.{par.name}.value")
            check_range(par.range, where, f"parameters.{par.name}.range")
        allowed = {s.name for s in self.states} | {u.name for u in self.inputs} | \
            {p.name for p in self.parameters} | {self.time}
        for state in self.states:
            check_symbols(state.rate, allowed, where, f"states.{state.name}.rate")
        check_symbols_outputs(self.outputs, allowed, where)

    # Symbols in state-vector order, as sympy objects.
    @property
    def t(self) -> sp.Symbol:
        return sp.Symbol(self.time, real=True)

    @property
    def x(self) -> tuple[sp.Symbol, ...]:
        return tuple(s.symbol for s in self.states)

    @property
    def u(self) -> tuple[sp.Symbol, ...]:
        return tuple(i.symbol for i in self.inputs)

    @property
    def f(self) -> tuple[sp.Expr, ...]:
        return tuple(s.rate for s in self.states)

    @property
    def tunable(self) -> tuple[Parameter, ...]:
        return tuple(p for p in self.parameters if p.tunable)

    @property
    def baked(self) -> dict[sp.Symbol, sp.Expr]:
        """Substitution of every non-tunable parameter by its exact value."""
        return {p.symbol: sp.Rational(repr(float(p.value))) for p in self.parameters
                if not p.tunable}

    @property
    def nx(self) -> int:
        return len(self.states)

    def parameter_values(self) -> dict[str, float]:
        return {p.name: float(p.value) for p in self.parameters}


def check_name(name, where: str, item: str) -> None:
    """Reject names that are not C identifiers or that collide with reserved names."""
    if not isinstance(name, str) or not NAME_PATTERN.match(name):
        raise ModelError(located(where, item, f"{name!r} is not a valid name; use letters, digits "
                                 "and '_', starting with a letter"))
    if name in C_KEYWORDS or keyword.iskeyword(name):
        raise ModelError(located(where, item, f"'{name}' is a C or Python keyword; rename it"))
    if name in RESERVED_NAMES or name.startswith(INTERNAL_PREFIX) or "__" in name:
        raise ModelError(located(where, item, f"'{name}' is reserved (a math function, a C "
                                 f"library name, '__' or the '{INTERNAL_PREFIX}' prefix); rename it"))


def check_finite(value, where: str, item: str) -> None:
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise ModelError(located(where, item, f"expected a number, got {value!r}"))
    if not math.isfinite(value):
        raise ModelError(located(where, item, f"must be a finite number, got {value!r}"))


def check_range(rng, where: str, item: str) -> None:
    if rng is None:
        return
    if not isinstance(rng, (tuple, list)) or len(rng) != 2:
        raise ModelError(located(where, item, "must be [low, high]"))
    for v in rng:
        check_finite(v, where, item)
    if not rng[0] <= rng[1]:
        raise ModelError(located(where, item, f"low {rng[0]} is above high {rng[1]}; swap them"))


def _suggest(name: str, allowed) -> str:
    hint = difflib.get_close_matches(name, sorted(allowed), n=1)
    return f" (did you mean '{hint[0]}'?)" if hint else ""


def check_symbols(expr, allowed: set[str], where: str, item: str) -> None:
    if not isinstance(expr, sp.Expr):
        raise ModelError(located(where, item, "must be a sympy expression"))
    for sym in sorted(expr.free_symbols, key=lambda s: s.name):
        if sym.name not in allowed:
            raise ModelError(located(where, item, f"unknown symbol '{sym.name}'"
                                     f"{_suggest(sym.name, allowed)}"))


def check_symbols_outputs(outputs, allowed: set[str], where: str) -> None:
    """Outputs may use model symbols and other outputs, but not in a loop."""
    names = {o.name for o in outputs}
    for out in outputs:
        check_symbols(out.expr, allowed | names, where, f"outputs.{out.name}")
    by_name = {o.name: o for o in outputs}

    def visit(name, path):
        if name in path:
            loop = " -> ".join(path[path.index(name):] + [name])
            raise ModelError(located(where, f"outputs.{name}", f"outputs refer to each other in a "
                                     f"loop ({loop}); write one of them without the others"))
        for sym in sorted(by_name[name].expr.free_symbols, key=lambda s: s.name):
            if sym.name in by_name:
                visit(sym.name, path + [name])

    for out in outputs:
        visit(out.name, [])


def resolve_outputs(outputs: tuple[Output, ...]) -> tuple[Output, ...]:
    """Substitute outputs used by other outputs so each resolved expression has model symbols."""
    by_name = {o.name: o for o in outputs}
    done: dict[str, sp.Expr] = {}

    def resolved(name):
        if name not in done:
            expr = by_name[name].expr
            subs = {sym: resolved(sym.name) for sym in sorted(expr.free_symbols, key=lambda s: s.name)
                    if sym.name in by_name}
            done[name] = expr.xreplace(subs) if subs else expr
        return done[name]

    return tuple(Output(name=o.name, unit=o.unit, range=o.range, description=o.description,
                        expr=o.expr, resolved=resolved(o.name)) for o in outputs)


# ---------------------------------------------------------------------------------------------
# Expression language: Python syntax, translated node by node into sympy.
# ---------------------------------------------------------------------------------------------

_BINOPS = {ast.Add: lambda a, b: a + b, ast.Sub: lambda a, b: a - b,
           ast.Mult: lambda a, b: a * b, ast.Div: lambda a, b: a / b,
           ast.Pow: lambda a, b: a ** b}
_COMPARE = {ast.Lt: sp.StrictLessThan, ast.LtE: sp.LessThan, ast.Gt: sp.StrictGreaterThan,
            ast.GtE: sp.GreaterThan}
_FORBIDDEN = {
    ast.Attribute: "attribute access", ast.Lambda: "a lambda", ast.Subscript: "indexing",
    ast.ListComp: "a comprehension", ast.GeneratorExp: "a comprehension",
    ast.DictComp: "a comprehension", ast.SetComp: "a comprehension", ast.Starred: "unpacking",
    ast.JoinedStr: "a string", ast.NamedExpr: "an assignment", ast.IfExp: "'if ... else' "
    "(use Piecewise)", ast.Await: "await", ast.Yield: "yield", ast.Dict: "a dict", ast.Set: "a set",
    ast.List: "a list",
}


def parse_expression(text, symbols: dict[str, sp.Symbol], where: str, item: str) -> sp.Expr:
    """Translate one expression string into sympy, allowing only declared names and FUNCTIONS."""
    if not isinstance(text, str):
        if isinstance(text, (int, float)) and not isinstance(text, bool):
            check_finite(text, where, item)
            return sp.Rational(repr(float(text)))
        raise ModelError(located(where, item, f"expected an expression string, got {text!r}"))
    if not text.strip():
        raise ModelError(located(where, item, "empty expression"))
    try:
        tree = ast.parse(text.strip(), mode="eval")
    except SyntaxError as exc:
        raise ModelError(located(where, item, f"cannot parse {text.strip()!r}: {exc.msg}; "
                                 "write plain math such as 'a*x + b'")) from None
    translator = _Translator(symbols, where, item)
    expr = translator.visit(tree.body)
    if isinstance(expr, (sp.logic.boolalg.Boolean, sp.core.relational.Relational)) \
            and not isinstance(expr, sp.Expr):
        raise ModelError(located(where, item, "is a condition, not a value; use Piecewise((value, "
                                 "condition), (other, True))"))
    if expr.has(sp.zoo, sp.nan, sp.oo, -sp.oo):
        raise ModelError(located(where, item, "evaluates to an infinite or undefined value"))
    return expr


class _Translator:
    def __init__(self, symbols, where, item):
        self.symbols = symbols
        self.where = where
        self.item = item

    def fail(self, message):
        raise ModelError(located(self.where, self.item, message))

    def visit(self, node):
        if type(node) in _FORBIDDEN:
            self.fail(f"{_FORBIDDEN[type(node)]} is not allowed; expressions are plain math")
        method = getattr(self, "visit_" + type(node).__name__, None)
        if method is None:
            self.fail(f"'{type(node).__name__}' syntax is not allowed; expressions are plain math")
        return method(node)

    def visit_Constant(self, node):
        if isinstance(node.value, bool):
            return sp.true if node.value else sp.false
        if isinstance(node.value, int):
            return sp.Integer(node.value)
        if isinstance(node.value, float):
            if not math.isfinite(node.value):
                self.fail("numbers must be finite")
            return sp.Rational(repr(node.value))
        self.fail(f"{node.value!r} is not a number")

    def visit_Name(self, node):
        if node.id in self.symbols:
            return self.symbols[node.id]
        if node.id in CONSTANTS:
            return CONSTANTS[node.id]
        if node.id in FUNCTIONS:
            self.fail(f"'{node.id}' is a function; call it with arguments")
        self.fail(f"unknown symbol '{node.id}'{_suggest(node.id, self.symbols)}")

    def visit_BinOp(self, node):
        op = _BINOPS.get(type(node.op))
        if op is None:
            if isinstance(node.op, ast.BitAnd):
                return sp.And(self.condition(node.left), self.condition(node.right))
            if isinstance(node.op, ast.BitOr):
                return sp.Or(self.condition(node.left), self.condition(node.right))
            if isinstance(node.op, ast.BitXor):
                self.fail("'^' is not a power here; write x**2")
            self.fail(f"operator '{type(node.op).__name__}' is not allowed; use + - * / **")
        left, right = self.value(node.left), self.value(node.right)
        if isinstance(node.op, ast.Div) and right == 0:
            self.fail("division by zero")
        return op(left, right)

    def visit_UnaryOp(self, node):
        if isinstance(node.op, ast.USub):
            return -self.value(node.operand)
        if isinstance(node.op, ast.UAdd):
            return self.value(node.operand)
        if isinstance(node.op, (ast.Not, ast.Invert)):
            return sp.Not(self.condition(node.operand))
        self.fail("unsupported unary operator")

    def visit_Compare(self, node):
        parts = []
        left = self.value(node.left)
        for op, comparator in zip(node.ops, node.comparators):
            if type(op) not in _COMPARE:
                self.fail("only < <= > >= comparisons are allowed in conditions")
            right = self.value(comparator)
            parts.append(_COMPARE[type(op)](left, right))
            left = right
        return sp.And(*parts) if len(parts) > 1 else parts[0]

    def visit_BoolOp(self, node):
        values = [self.condition(v) for v in node.values]
        return sp.And(*values) if isinstance(node.op, ast.And) else sp.Or(*values)

    def visit_Call(self, node):
        if not isinstance(node.func, ast.Name):
            if type(node.func) in _FORBIDDEN:
                self.fail(f"{_FORBIDDEN[type(node.func)]} is not allowed; expressions are plain "
                          "math")
            self.fail("only calls of whitelisted math functions are allowed")
        name = node.func.id
        if name not in FUNCTIONS:
            self.fail(f"function '{name}' is not supported; allowed: "
                      f"{', '.join(sorted(FUNCTIONS))}")
        if node.keywords:
            self.fail(f"'{name}' takes no keyword arguments")
        low, high = FUNCTION_ARITY.get(name, (1, 1))
        n = len(node.args)
        if n < low or (high is not None and n > high):
            want = f"{low}" if low == high else f"at least {low}"
            self.fail(f"'{name}' takes {want} argument(s), got {n}")
        if name == "Piecewise":
            return self.piecewise(node.args)
        return FUNCTIONS[name](*[self.value(a) for a in node.args])

    def piecewise(self, args):
        pieces = []
        for i, arg in enumerate(args):
            if not isinstance(arg, ast.Tuple) or len(arg.elts) != 2:
                self.fail("Piecewise takes (value, condition) pairs")
            pieces.append((self.value(arg.elts[0]), self.condition(arg.elts[1])))
        if pieces[-1][1] is not sp.true:
            self.fail("the last Piecewise pair must be (value, True) so every case has a value")
        return sp.Piecewise(*pieces)

    def value(self, node):
        v = self.visit(node)
        if not isinstance(v, sp.Expr):
            self.fail("a condition is used where a value is expected")
        return v

    def condition(self, node):
        v = self.visit(node)
        if isinstance(v, sp.Expr):
            self.fail("a value is used where a condition (like x > 0) is expected")
        return v

    def visit_Tuple(self, node):
        self.fail("a tuple is only allowed as a (value, condition) pair inside Piecewise")


# ---------------------------------------------------------------------------------------------
# Reading a model file.
# ---------------------------------------------------------------------------------------------

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


def model_from_data(data: dict, where: str) -> Model:
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
    return define(name=name, states=states, inputs=inputs, parameters=parameters,
                  outputs=outputs, time=time, description=description, source=where)


def define(name: str, states, inputs=(), parameters=(), outputs=(), time: str = "t",
           description: str = "", source: str = "<python>") -> Model:
    """Build a Model from sympy expressions directly (the Python API).

    Outputs may refer to other outputs; they are resolved here.
    """
    model = Model(name=name, states=tuple(states), inputs=tuple(inputs),
                  parameters=tuple(parameters), outputs=tuple(outputs), time=time,
                  description=description, source=source)
    return Model(name=model.name, states=model.states, inputs=model.inputs,
                 parameters=model.parameters, outputs=resolve_outputs(model.outputs),
                 time=model.time, description=model.description, source=model.source)


def load_model(path: str | Path) -> Model:
    """Read and validate a model file (TOML)."""
    path = Path(path)
    where = str(path)
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise ModelError(f"{where}: file not found") from None
    except (UnicodeDecodeError, IsADirectoryError, PermissionError) as exc:
        raise ModelError(f"{where}: cannot read the file: {exc}") from None
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ModelError(f"{where}: not valid TOML: {exc} (a name declared twice in one table "
                         "is reported here too)") from None
    return model_from_data(data, where)
