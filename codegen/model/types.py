"""Stage 1 of the pipeline, the model type: x' = f(t, x, u, p) with algebraic outputs.

The frozen, validated Model and its named quantities; every check of names, numbers and ranges
that a model built from a file or from Python must pass.
"""

from __future__ import annotations

import difflib
import keyword
import math
import re
from dataclasses import dataclass, field

import sympy as sp

from ..errors import ModelError, located

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
# C99's <math.h> reserves every function name above with an f and an l suffix (sinf, expl; the
# float build calls the f ones), and these macros and functions besides; <stddef.h> and
# <stdint.h> define the rest. A model name equal to one would shadow or be replaced by it.
C_LIBRARY_NAMES = frozenset(
    {name + suffix for name in RESERVED_NAMES if name.islower() for suffix in ("f", "l")}
    | set("""
isgreater isgreaterequal isless islessequal islessgreater isunordered isnormal math_errhandling
MATH_ERRNO MATH_ERREXCEPT HUGE_VALL offsetof wchar_t max_align_t static_assert signgam
""".split()))
# Identifier families that C99's <stdint.h>, <float.h> and <math.h> use for macros and types
# (C99 7.18, 7.7 / 5.2.4.2.2, 7.12): a model name in one of them could be replaced by a macro.
RESERVED_PATTERN = re.compile(
    r"(u?int(_least|_fast)?[0-9]+_t|u?int(max|ptr)_t"
    r"|U?INT(_LEAST|_FAST)?[0-9]+_(MAX|MIN|C)|U?INT(MAX|PTR)_(MAX|MIN|C)"
    r"|(SIZE|PTRDIFF|SIG_ATOMIC|WCHAR|WINT)_(MAX|MIN)"
    r"|(FLT|DBL|LDBL|FP|DECIMAL)_[A-Z0-9_]*)\Z")

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
    """An algebraic output; expr may use other outputs, resolved holds only model symbols.

    resolved is filled in by the Model that holds the output (outputs used by other outputs are
    substituted); an Output on its own has resolved None.
    """

    expr: sp.Expr = sp.Integer(0)
    resolved: sp.Expr | None = field(default=None, compare=False)


@dataclass(frozen=True)
class Model:
    """A validated ODE model x' = f(t, x, u, p) with algebraic outputs y = g(t, x, u, p).

    source names where the model came from (a file path, or '<python>') for diagnostics;
    digest is the SHA-256 (hex) of the model file's bytes ('' for a model built in Python), which
    the generated files record instead of any machine path.
    """

    name: str
    states: tuple[State, ...]
    inputs: tuple[Input, ...] = ()
    parameters: tuple[Parameter, ...] = ()
    outputs: tuple[Output, ...] = ()
    time: str = "t"
    description: str = ""
    source: str = "<python>"
    digest: str = field(default="", compare=False)

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
                check_prefixed(name, self.name, where, item_path)
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
        check_values_defined(self, where)
        # Resolve outputs that use other outputs here, so every Model has resolved outputs,
        # however it was built (Model(...) directly, define, or a model file).
        object.__setattr__(self, "outputs", resolve_outputs(self.outputs))

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
    if name in RESERVED_NAMES or name in C_LIBRARY_NAMES or RESERVED_PATTERN.match(name) \
            or name.startswith(INTERNAL_PREFIX) or "__" in name:
        raise ModelError(located(where, item, f"'{name}' is reserved (a math function, a C "
                                 f"library name, '__' or the '{INTERNAL_PREFIX}' prefix); rename it"))


def check_prefixed(name: str, prefix: str, where: str, item: str) -> None:
    """Reject a quantity named like the generated code's public names ('<prefix>_...', in any
    case): HEATER_OK is a macro of the heater's header, heater_reset one of its functions."""
    if name.lower().startswith(prefix.lower() + "_"):
        raise ModelError(located(where, item, f"'{name}' looks like a name of the generated code "
                                 f"('{prefix}_...', '{prefix.upper()}_...'); rename it"))


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


def _undefined(expr: sp.Expr) -> str:
    """What is wrong with an expression once every parameter has its value, or ''.

    Division by zero (1/0 is zoo in sympy), an infinite or undefined value, or a number that is
    not real (the square root or the logarithm of a negative parameter) cannot be printed as C.
    """
    if expr.has(sp.zoo, sp.nan):
        return "divides by zero"
    if expr.has(sp.oo, -sp.oo):
        return "is infinite"
    if expr.has(sp.I) or any(a.is_number and a.is_real is False for a in expr.atoms(sp.Pow)):
        return "is not a real number"
    return ""


def check_values_defined(model: "Model", where: str) -> None:
    """Every rate and output, with every parameter at its value, must be a finite real expression.

    The baked parameters become literals of the C (a rate x/L with L = 0 would make the printer
    write 1/0); a tunable one starts at its value. The message names the parameters involved.
    """
    values = {p.symbol: sp.Rational(repr(float(p.value))) for p in model.parameters}
    if not values:
        return
    items = [(f"states.{s.name}.rate", s.rate) for s in model.states] + \
        [(f"outputs.{o.name}", o.expr) for o in model.outputs]
    for item, expr in items:
        problem = _undefined(expr.xreplace(values))
        if not problem:
            continue
        used = [p for p in model.parameters if p.symbol in expr.free_symbols]
        culprits = [p for p in used if _undefined(expr.xreplace({p.symbol: values[p.symbol]}))]
        named = culprits or used
        shown = ", ".join(f"{p.name} = {p.value:g}" for p in named)
        raise ModelError(located(where, item, f"{problem} with {shown}; give "
                                 f"{'that parameter' if len(named) == 1 else 'those parameters'}"
                                 " a value where the expression is defined"))


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



def define(name: str, states, inputs=(), parameters=(), outputs=(), time: str = "t",
           description: str = "", source: str = "<python>") -> Model:
    """Build a Model from sympy expressions directly (the Python API).

    Outputs may refer to other outputs; the Model resolves them.
    """
    return Model(name=name, states=tuple(states), inputs=tuple(inputs),
                 parameters=tuple(parameters), outputs=tuple(outputs), time=time,
                 description=description, source=source)


# Functions whose derivative jumps somewhere: a trajectory through the jump loses a method's order
# (the error expansions behind order studies and step-size estimates assume a smooth right-hand
# side). Common practice, no source.
NON_SMOOTH_FUNCTIONS = (sp.Piecewise, sp.Abs, sp.Min, sp.Max, sp.sign, sp.floor, sp.ceiling,
                        sp.Heaviside)


def non_smooth(model: Model) -> tuple[str, ...]:
    """Where the rates use a non-smooth function, as 'Piecewise in states.v.rate' (state order)."""
    found = []
    for s in model.states:
        names = sorted({type(node).__name__ for node in sp.preorder_traversal(s.rate)
                        if isinstance(node, NON_SMOOTH_FUNCTIONS)})
        found += [f"{name} in states.{s.name}.rate" for name in names]
    return tuple(found)
