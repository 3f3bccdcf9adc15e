"""Property-based fuzzing of everything a user hands the tool: model files, tableau files, input
logs and the whole emit path.

Each generated case must end in a valid result (a model, a method, a log, C that passes the
checks below) or in exactly one TickwrightError whose message is one line naming the file: never
another exception (a traceback), never a hang (each case runs under an alarm), never a partial
write. Hypothesis runs derandomized (the same cases in every CI run) and each test records how
many cases it ran; conftest.py prints the sum at the end of the session.

The cheap layers (loader, expressions, tableau files, logs, comments) take most of the cases; the
whole emit path runs on a bounded number of small models, and only a sample is compiled with the
strict flags.
"""

from __future__ import annotations

import contextlib
import functools
import os
import re
import signal

import numpy as np
import sympy as sp
from click.testing import CliRunner
from hypothesis import HealthCheck, given, settings, strategies as st

from codegen.build import strict_compile
from codegen.cli import main
from codegen.emit import comment_text
from codegen.errors import TickwrightError
from codegen.inputs import read_log
from codegen.methods import builtin, load_method_file
from codegen.model import load_model, model_from_data, parse_expression
from codegen.pipeline import generate

from conftest import FUZZ_PROPERTY

# Seconds one generated case may take before it counts as a hang (the slowest cases, a command
# line run or a 5000-term sum, take a few seconds on a busy machine).
CASE_SECONDS = 60
# Cases per layer: together at least 10,000 per CI run (the count), most of them in the
# loader and expression layers, which cost about a millisecond each.
CASES = {"documents": 3000, "raw": 1200, "expressions": 2500, "long": 12, "tableaux": 1200,
         "logs": 1600, "comments": 600, "emit": 120, "cli": 40, "compile": 8}
# TICKWRIGHT_FUZZ_SCALE=10 runs ten times as many cases of every layer (a longer local search);
# CI runs the counts above.
SCALE = float(os.environ.get("TICKWRIGHT_FUZZ_SCALE", "1"))
CASES = {layer: max(1, round(count * SCALE)) for layer, count in CASES.items()}

# Text a hostile model puts into descriptions and units; it must never reach C outside a comment.
MARKER = "INJECTED_MARKER"
INJECTIONS = [f"*/ int {MARKER}; /*", f"end */ {MARKER}", f"??/\n{MARKER}", f"\\\n{MARKER}",
              f"// {MARKER}", f"\x00{MARKER}\x1b[2J", f"#define {MARKER} 1", "?" * 4 + MARKER,
              f"*\\\n/ {MARKER}", f"/\\\n* {MARKER}", f"\u202e{MARKER}", f"{MARKER}\r\n*/"]


def run_cases(count: int, strategy, body, record_property) -> None:
    """Run body on count cases of strategy (derandomized), each under an alarm; record the count."""
    ran = [0]

    @settings(max_examples=count, derandomize=True, database=None, deadline=None,
              suppress_health_check=list(HealthCheck), print_blob=False)
    @given(strategy)
    def check(case):
        ran[0] += 1
        with alarm(CASE_SECONDS):
            body(case)

    check()
    record_property(FUZZ_PROPERTY, ran[0])
    assert ran[0] >= count, f"hypothesis ran {ran[0]} cases, {count} asked for"


class Hang(Exception):
    """A case ran longer than CASE_SECONDS."""


@contextlib.contextmanager
def alarm(seconds: float):
    def stop(_signum, _frame):
        raise Hang(f"a case took more than {seconds} s")

    previous = signal.signal(signal.SIGALRM, stop)
    signal.setitimer(signal.ITIMER_REAL, seconds)
    try:
        yield
    finally:
        signal.setitimer(signal.ITIMER_REAL, 0)
        signal.signal(signal.SIGALRM, previous)


def one_line(error: TickwrightError, *sources) -> None:
    """A diagnostic of the tool: one non-empty line starting with the file (or option) it is
    about."""
    message = str(error)
    assert message.strip() and "\n" not in message and "\r" not in message, repr(message)
    assert message.startswith(tuple(str(s) for s in sources)), message


# ---- TOML text of generated documents ------------------------------------------------------------

def toml_string(text: str) -> str:
    out = []
    for ch in text:
        if ch in '"\\':
            out.append("\\" + ch)
        elif ord(ch) < 32 or ord(ch) == 127:
            out.append(f"\\u{ord(ch):04x}")
        else:
            out.append(ch)
    return '"' + "".join(out) + '"'


def toml_key(key: str) -> str:
    return key if re.fullmatch(r"[A-Za-z0-9_-]+", key) else toml_string(key)


def toml_value(value) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        if value != value:
            return "nan"
        if value in (float("inf"), float("-inf")):
            return "inf" if value > 0 else "-inf"
        return repr(value)
    if isinstance(value, str):
        return toml_string(value)
    if isinstance(value, list):
        return "[" + ", ".join(toml_value(v) for v in value) + "]"
    return "{" + ", ".join(f"{toml_key(k)} = {toml_value(v)}" for k, v in value.items()) + "}"


def toml_text(doc: dict) -> str:
    lines = [f"{toml_key(k)} = {toml_value(v)}" for k, v in doc.items()
             if not isinstance(v, dict)]
    for key, value in doc.items():
        if isinstance(value, dict):
            lines.append(f"[{toml_key(key)}]")
            lines += [f"{toml_key(k)} = {toml_value(v)}" for k, v in value.items()]
    return "\n".join(lines) + "\n"


# ---- what a hostile model file is made of --------------------------------------------------------

GOOD_NAMES = ["x", "v", "T", "i_d", "omega2", "Va", "k", "R_th", "q"]
BAD_NAMES = [
    "int", "for", "return", "restrict", "inline", "_Bool", "sizeof",           # C keywords
    "sin", "sinf", "expl", "fabsf", "NAN", "INFINITY", "errno", "FLT_MAX", "DBL_MIN",
    "int32_t", "UINT8_C", "INT64_MAX", "size_t", "main", "assert", "isnan", "y0", "NULL",
    "lambda", "import", "None", "True", "class", "def",                          # Python
    "tw_x", "a__b", "_x", "__import__", "__builtins__",                          # reserved
    "\u0445", "\uff58", "\u00e9", "\u2160", "x\u200b", "K\u212a",                # look-alikes
    "", " ", "1x", "x-y", "x y", "x.y", "x;y", "x*/", "a" * 300,                 # not names
    "m_x", "M_OK", "m_reset", "M_NX",                                            # generated API
]
CASE_NAMES = ["X", "Sin", "SIN", "Int", "T_", "t_"]
PYTHONISH = ["I", "S", "N", "oo", "zoo", "nan", "select", "where", "numpy", "math", "builtins",
             "exp2", "Abs", "Symbol"]
NAMES = st.sampled_from(GOOD_NAMES + BAD_NAMES + CASE_NAMES + PYTHONISH)
MODEL_NAMES = st.sampled_from(["m", "m", "m", "heater", "int", "Heater", "tw", "m1", "", "1m",
                               "a" * 100, "main", "sin", "m__x", "tw_m", "\u043c"])

NUMBERS = st.one_of(
    st.floats(), st.integers(-2**63, 2**63 - 1), st.sampled_from([0, 0.0, -0.0, 1e-320, 5e-324,
                                                                  1e308, -1e308, 3.5e38, 1e-45]))
ANY_VALUE = st.one_of(NUMBERS, st.booleans(), st.text(max_size=8), st.lists(NUMBERS, max_size=3),
                      st.just({}), st.just({"a": 1}))

HOSTILE_EXPRESSIONS = [
    "__import__('os').system('echo pwned')", "x.real", "(lambda: 1)()", "f'{x}'",
    "[i for i in range(3)]", "x if x > 0 else 1", "x[0]", "{1: 2}", "'abc'", "b'x'", "...",
    "(x := 1)", "x, v", "*x", "getattr(x, 'y')", "eval('1')", "open('f')", "print(1)",
    "x.__class__.__bases__", "().__class__", "globals()", "x @ x", "x // 2", "x % 2", "x ^ 2",
    "x << 1", "x == 1", "x != 1", "x is x", "x in x", "not x", "~x", "x and v",
    "1/0", "x/0", "x/(x - x)", "0**-1", "2**2**2**2**2**2", "10**400", "1e400", "-1e400",
    "exp(1000)", "log(0)", "sqrt(-1)", "acos(2)", "exp(-1e308)", "1e-400", "x**1e100",
    "9" * 5000, "x\n+1", "x #comment", "x;1", "x = 1", "\x00", "\u200bx", "\uff58 + 1",
    "Piecewise((x, x > 0))", "Piecewise((x, x > 0), (1, True))", "Piecewise(x)",
    "Piecewise((x, x), (1, True))", "Piecewise((x > 0, True))", "min(x)", "max()", "atan2(x)",
    "sin(x, v)", "sin(x=1)", "sign(x) * abs(x) + floor(x) - ceil(x)", "x > 0", "(x > 0) + 1",
    "pi*E", "E**x", "x**-1", "x**0.5", "(-8)**(1/3)", "x" * 400, "", "   ", "(" * 300 + "x" +
    ")" * 300, "sin(" * 80 + "x" + ")" * 80, "-" * 200 + "x", "x" + "**x" * 200,
    " + ".join(["x"] * 300), "*".join(["x"] * 300), "x" + "/2" * 300,
]


@functools.lru_cache(maxsize=None)
def expressions(names: tuple[str, ...]):
    """Expression text over names: a random tree of operators and calls, or a hostile string.

    Cached per name tuple: building a recursive strategy costs far more than drawing from it.
    """
    names = list(names)
    atoms = st.one_of(st.sampled_from(names + ["pi", "E", "t", "unknown", "sin"]),
                      NUMBERS.map(repr), st.sampled_from(["0", "1", "2", "1e308", "1e-308"]))
    functions = ["sin", "cos", "exp", "log", "sqrt", "abs", "tanh", "atan2", "min", "max",
                 "sign", "floor", "ceil", "eval", "__import__", "getattr", "erf", "Piecewise"]

    def grow(inner):
        return st.one_of(
            st.tuples(inner, st.sampled_from(["+", "-", "*", "/", "**", " < ", " >= ", "//",
                                              "%", "^", "&", "|", " and ", " or "]), inner,
                      st.booleans()).map(lambda p: f"({p[0]}{p[1]}{p[2]})" if p[3]
                                         else f"{p[0]}{p[1]}{p[2]}"),
            st.tuples(st.sampled_from(["-", "+", "not ", "~"]), inner).map("".join),
            st.tuples(st.sampled_from(functions), st.lists(inner, max_size=3)).map(
                lambda p: f"{p[0]}({', '.join(p[1])})"),
            st.tuples(inner, inner, inner).map(
                lambda p: f"Piecewise(({p[0]}, {p[1]} > {p[2]}), ({p[2]}, True))"))

    tree = st.recursive(atoms, grow, max_leaves=10)
    return st.one_of(tree, tree, tree, st.sampled_from(HOSTILE_EXPRESSIONS))


@st.composite
def model_documents(draw, hostile_text=True):
    """A model document: mostly model-shaped, with wrong types, names, numbers and expressions."""
    names = draw(st.lists(NAMES, min_size=1, max_size=6))
    usable = tuple(sorted({n for n in names if re.fullmatch(r"[A-Za-z]\w*", n)})) or ("x",)
    text = st.text(max_size=20) if hostile_text else st.sampled_from(["", "ok"])
    sections = ["states", "inputs", "parameters", "outputs"]
    doc: dict = {}
    if draw(st.integers(0, 19)):
        doc["name"] = draw(st.one_of(MODEL_NAMES, MODEL_NAMES, ANY_VALUE))
    if not draw(st.integers(0, 9)):
        doc[draw(st.sampled_from(["time", "description", "version", "Name"]))] = \
            draw(st.one_of(NAMES, ANY_VALUE))
    for name in names:
        section = draw(st.sampled_from(sections + ["states"]))
        table = doc.setdefault(section, {})
        if not isinstance(table, dict):
            continue
        if draw(st.integers(0, 9)) == 0:
            table[name] = draw(ANY_VALUE)
            continue
        entry: dict = {}
        if section == "states":
            entry["rate"] = draw(expressions(usable))
            entry["initial"] = draw(NUMBERS)
        elif section == "inputs":
            entry["default"] = draw(NUMBERS)
        elif section == "parameters":
            entry["value"] = draw(NUMBERS)
            entry["tunable"] = draw(st.one_of(st.booleans(), st.booleans(), ANY_VALUE))
        else:
            entry["expr"] = draw(expressions(usable))
        if draw(st.booleans()):
            entry["unit"] = draw(st.one_of(st.sampled_from(["", "1", "V", "A", "m/s", "degC",
                                                            "K/s", "rad/s", "bogus", "m**"]),
                                           text))
        if draw(st.booleans()):
            entry["range"] = draw(st.one_of(st.lists(NUMBERS, min_size=2, max_size=2),
                                            ANY_VALUE))
        if draw(st.booleans()):
            entry["description"] = draw(st.one_of(text, st.sampled_from(INJECTIONS)))
        if draw(st.integers(0, 14)) == 0:
            entry[draw(st.sampled_from(["rate", "initial", "bogus", "Unit", "expr"]))] = \
                draw(ANY_VALUE)
        table[name] = entry
    if not draw(st.integers(0, 14)):
        doc[draw(st.sampled_from(sections))] = draw(ANY_VALUE)
    return doc


# ---- the layers ----------------------------------------------------------------------------------

def test_fuzz_model_files(tmp_path, record_property):
    path = tmp_path / "fuzz.toml"

    def body(case):
        doc, units = case
        path.write_text(toml_text(doc), encoding="utf-8")
        try:
            model = load_model(path, check_units=units)
        except TickwrightError as error:
            one_line(error, path)
            return
        assert model.nx >= 1 and model.source == str(path)

    run_cases(CASES["documents"], st.tuples(model_documents(), st.booleans()), body,
              record_property)


VALID = toml_text({"name": "m", "states": {"x": {"initial": 1.0, "rate": "-k*x + u"}},
                   "inputs": {"u": {"default": 0.0, "range": [0, 1]}},
                   "parameters": {"k": {"value": 2.0, "unit": "1/s"}},
                   "outputs": {"y": "2*x"}}).encode()


@st.composite
def damaged_bytes(draw):
    """A valid model file with bytes inserted, deleted or replaced (broken TOML and UTF-8)."""
    data = bytearray(VALID)
    for _ in range(draw(st.integers(1, 4))):
        at = draw(st.integers(0, len(data)))
        what = draw(st.sampled_from([b'"', b"'", b"[", b"]", b"=", b"\n", b"{", b"}", b"\\",
                                     b"\x00", b"\xff", b"\xc3", b"#", b"x", b" = 1\n", b"[[",
                                     b'"""', b"\r", b"inf", b"nan"]))
        if draw(st.booleans()):
            data[at:at] = what
        else:
            del data[at:at + draw(st.integers(1, 5))]
    return bytes(data)


def test_fuzz_damaged_model_files(tmp_path, record_property):
    path = tmp_path / "damaged.toml"

    def body(data):
        path.write_bytes(data)
        try:
            load_model(path, check_units=True)
        except TickwrightError as error:
            one_line(error, path)

    run_cases(CASES["raw"], damaged_bytes(), body, record_property)


SYMBOLS = {n: sp.Symbol(n, real=True) for n in ["x", "v", "T", "k", "t"]}


def test_fuzz_expressions(record_property):
    def body(text):
        try:
            expr = parse_expression(text, SYMBOLS, "m.toml", "states.x.rate")
        except TickwrightError as error:
            one_line(error, "m.toml")
            return
        assert isinstance(expr, sp.Expr)
        assert not expr.has(sp.zoo, sp.nan, sp.oo, -sp.oo)
        assert {s.name for s in expr.free_symbols} <= set(SYMBOLS)

    run_cases(CASES["expressions"], expressions(("x", "v", "T", "k", "t")), body,
              record_property)


def test_fuzz_long_flat_sums_and_deep_nesting(record_property):
    """Long flat sums and products translate; only deep nesting is refused, in one line; a model
    of thousands of states loads and emits."""
    shapes = ("states", "sum", "product", "quotient", "nest", "minus")
    seen = []

    def body(n):
        shape = shapes[len(seen) % len(shapes)]  # in turn: each shape gets its share
        seen.append(shape)
        if shape == "states":  # a chain x_i' = x_(i-1) - x_i of up to 3000 states
            n = min(n, 3000)
            doc = {"name": "chain", "states": {f"x{i}": {"initial": 1.0, "rate": f"x{i - 1} - x{i}"
                                                         if i else "-x0"} for i in range(n)}}
            csource = generate(model_from_data(doc, "chain.toml"), builtin("euler"), 0.01)
            assert re.search(rf"#define CHAIN_NX +{n}U", csource.text("chain.h"))
            assert f"tw_dx[{n - 1}] = " in csource.text("chain.c")  # the last state's rate
            return
        text = {"sum": " + ".join(f"{i % 7}*x" if i % 2 else "sin(x)" for i in range(n)),
                "product": "*".join(["x"] * n), "quotient": "x" + "/v" * n,
                "nest": "sin(" * (n % 200) + "x" + ")" * (n % 200),
                "minus": "-" * (n % 300) + "x"}[shape]
        try:
            expr = parse_expression(text, SYMBOLS, "m.toml", "r")
        except TickwrightError as error:
            one_line(error, "m.toml")
            assert shape in ("nest", "minus") and "nested" in str(error)
            return
        x = SYMBOLS["x"]
        if shape == "sum":  # sum of sin(x) ceil(n/2) times and (i % 7)*x over the odd i
            assert sp.expand(expr - (((n + 1) // 2) * sp.sin(x)
                                     + sum(i % 7 for i in range(1, n, 2)) * x)) == 0
        elif shape == "product":
            assert expr == x ** n

    run_cases(CASES["long"], st.integers(1, 5000), body, record_property)
    assert set(seen) == set(shapes)


EXACT_ENTRIES = st.one_of(
    st.sampled_from([0, 1, "1/2", "1/3", "2/3", "sqrt(3)/6", "1/2 + sqrt(3)/6", "Rational(1, 6)",
                     0.5, 0.25, "-1/2", "1 - 1/sqrt(2)", "1 + 1/sqrt(2)"]),
    st.sampled_from(["__import__('os')", "x", "1/0", "Rational(1, 0)", "sqrt(-1)",
                     "2**2**2**2**2**2", "10**400", "1e400", "sqrt(1, 2)", "Rational()", "",
                     "(" * 100 + "1" + ")" * 100, "-" * 100 + "1", "1" * 5000, "\u00bd",
                     "0.1 + 0.2", "nan", "inf", "[1]", "lambda: 1", "1e-400"]),
    NUMBERS, st.booleans(), st.just([]), st.just({}))


@st.composite
def tableau_documents(draw):
    s = draw(st.integers(1, 4))
    rows = draw(st.integers(max(1, s - 1), s + 1))
    doc = {"name": draw(st.one_of(st.just("fuzz"), st.text(max_size=10), ANY_VALUE))}
    kind = draw(st.sampled_from([None, "tableau", "rosenbrock", "explicit", 1]))
    if kind is not None:
        doc["kind"] = kind
    matrix = "alpha" if kind == "rosenbrock" else "a"
    doc[matrix] = [[draw(EXACT_ENTRIES) if j < i or draw(st.integers(0, 3)) == 0 else 0
                    for j in range(s)] for i in range(rows)]
    doc["b"] = [draw(EXACT_ENTRIES) for _ in range(draw(st.integers(s - 1, s + 1)))]
    if kind == "rosenbrock":
        doc["gamma"] = draw(EXACT_ENTRIES)
        doc["coupling"] = [[draw(EXACT_ENTRIES) if j < i else 0 for j in range(s)]
                           for i in range(s)]
    elif draw(st.booleans()):
        doc["c"] = [draw(EXACT_ENTRIES) for _ in range(s)]
    if draw(st.booleans()):
        doc["b_hat"] = [draw(EXACT_ENTRIES) for _ in range(s)]
    if draw(st.booleans()):
        doc["order"] = draw(st.one_of(st.integers(-1, 12), ANY_VALUE))
    if not draw(st.integers(0, 9)):
        doc[draw(st.sampled_from(["bogus", "stages", "source", "time"]))] = draw(ANY_VALUE)
    return doc


def test_fuzz_tableau_files(tmp_path, record_property):
    path = tmp_path / "fuzz_method.toml"

    def body(doc):
        path.write_text(toml_text(doc), encoding="utf-8")
        try:
            method = load_method_file(path)
        except TickwrightError as error:
            one_line(error, path)
            return
        assert method.order >= 1

    run_cases(CASES["tableaux"], tableau_documents(), body, record_property)


LOG_MODEL = model_from_data({"name": "m", "states": {"x": {"rate": "-x + u*k"}},
                             "inputs": {"u": {"default": 0.0, "range": [0.0, 1.0]},
                                        "w": 1.0},
                             "parameters": {"k": {"value": 1.0, "tunable": True}}}, "m.toml")
CELLS = st.one_of(st.floats().map(repr), st.integers(-10, 10).map(str),
                  st.sampled_from(["", "abc", "nan", "inf", "-inf", "1e999", "0x10", " 1 ",
                                   "1,5", '"1"', "\x00", "1e-320", "\u0661"]))


@st.composite
def logs(draw):
    header = ["t"] + draw(st.permutations(["u", "w"]))
    if draw(st.booleans()):
        header.append("k")
    if not draw(st.integers(0, 9)):
        header = draw(st.lists(st.sampled_from(["t", "u", "w", "k", "R", "", "time", "u "]),
                               max_size=5))
    n = draw(st.integers(0, 30))
    dt = draw(st.sampled_from([1e-3, 0.1, 1.0, 5e-5, 3e-5, 1e-9]))
    spacing = draw(st.sampled_from([dt, dt, dt, 2 * dt, dt / 20, 1.0, 0.0, -dt]))
    jitter = draw(st.sampled_from([0.0, 0.0, 1e-3, 0.2]))
    rows = []
    for i in range(n):
        t = i * spacing + jitter * dt * ((i * 7919) % 3 - 1)
        cells = [repr(t)] + [draw(CELLS) if not draw(st.integers(0, 7)) else
                             repr(draw(st.floats(-2, 2))) for _ in header[1:]]
        if not draw(st.integers(0, 19)):
            cells = cells[:-1]
        rows.append(",".join(cells))
    text = ",".join(header) + "\n" + "\n".join(rows) + draw(st.sampled_from(["\n", "", "\n\n"]))
    return text, dt, draw(st.booleans()), draw(st.one_of(st.none(), st.integers(1, 40)))


def test_fuzz_input_logs(tmp_path, record_property):
    path = tmp_path / "log.csv"

    def body(case):
        text, dt, resample, ticks = case
        path.write_text(text, encoding="utf-8")
        try:
            log = read_log(path, LOG_MODEL, ticks, dt=dt, resample=resample)
        except TickwrightError as error:
            one_line(error, path)
            return
        n = len(log.inputs)
        assert n >= 1 and log.inputs.shape == (n, 2) and len(log.lines) == n
        assert np.all(np.isfinite(log.inputs)) and (ticks is None or n <= ticks)
        # every tick sits on the --dt grid within the stated tolerance, or was held onto it
        offsets = (log.times - log.times[0]) / dt
        assert np.all(offsets <= np.arange(n) + 0.01 + 1e-9)

    run_cases(CASES["logs"], logs(), body, record_property)


def test_fuzz_comment_text_cannot_leave_a_comment(record_property):
    def body(text):
        safe = comment_text(text)
        assert "*/" not in safe and "/*" not in safe and "??" not in safe and "\\" not in safe
        assert all(32 <= ord(ch) < 127 for ch in safe)

    run_cases(CASES["comments"], st.one_of(st.text(), st.sampled_from(INJECTIONS)), body,
              record_property)


# ---- the whole emit path ------------------------------------------------------------------------

def code_outside_comments(text: str) -> str:
    """C text with comments removed by a scanner (strings and characters do not occur)."""
    out, i = [], 0
    while i < len(text):
        if text.startswith("/*", i):
            end = text.find("*/", i + 2)
            assert end >= 0, "an unterminated comment"
            i = end + 2
            out.append(" ")
        elif text.startswith("//", i):
            i = text.find("\n", i)
            i = len(text) if i < 0 else i
        else:
            out.append(text[i])
            i += 1
    return "".join(out)


def assert_clean_c(csource) -> None:
    for name, text in csource.files:
        assert MARKER not in code_outside_comments(text), name
        assert "??" not in text and "\\\n" not in text and "\r" not in text, name
        assert all(ch == "\n" or 32 <= ord(ch) < 127 for ch in text), name
        assert not re.search(r"\b(inf|nan|INF|NAN)\b", code_outside_comments(text)), name


# One method of each kind; the emit layers take them in turn (a drawn method would favour the
# first one: hypothesis starts from the simplest choices).
METHOD_CYCLE = ("euler", "rk4", "dp5", "backward-euler", "sdirk2", "radau-iia2", "gauss2", "ros2",
                "zoh-exact")
TICKS = st.sampled_from([1e-3, 0.01, 0.1, 0.5, 1e-300, 1e-40, 1e39, 5e-324, 3e38])
EMIT_EXPRESSIONS = ["-x", "-k*x + u", "-x/k", "sin(x) - x", "u - x**3", "-x + 1e30*u",
                    "-x/L", "-x*1e39", "Piecewise((-x, x > 0), (-2*x, True))", "exp(x) - 1",
                    "-x + " + " + ".join(f"{i}*u" for i in range(1, 200)), "sqrt(k)*-x",
                    "min(x, u) - x", "atan2(x, 1) - x", "log(L) - x"]


@st.composite
def small_models(draw):
    states = draw(st.lists(st.sampled_from(["x", "v", "T"]), min_size=1, max_size=3,
                           unique=True))
    doc = {"name": "m", "description": draw(st.sampled_from(INJECTIONS)),
           "states": {}, "inputs": {"u": {"default": draw(NUMBERS.filter(
               lambda v: v == v and abs(v) < 1e300)), "unit": draw(st.sampled_from(INJECTIONS)),
                                   "description": draw(st.sampled_from(INJECTIONS))}},
           "parameters": {"k": {"value": draw(st.sampled_from([2.0, 0.5, 1e-30, 3e38, 1e39])),
                                "tunable": draw(st.booleans())},
                          "L": draw(st.sampled_from([1.0, 0.0, -1.0]))}}
    for name in states:
        rate = draw(st.sampled_from(EMIT_EXPRESSIONS)).replace("x", name) \
            .replace("e" + name, "ex").replace("m" + name, "mx")
        doc["states"][name] = {"initial": draw(st.sampled_from([0.5, 1e-39, 1e39, -2.0])),
                               "rate": rate, "unit": draw(st.sampled_from(INJECTIONS)),
                               "description": draw(st.sampled_from(INJECTIONS))}
    if draw(st.booleans()):
        doc["outputs"] = {"y": {"expr": f"2*{states[0]}",
                                "description": draw(st.sampled_from(INJECTIONS))}}
    return doc, draw(TICKS), draw(st.sampled_from(["float", "double"]))


def in_turn():
    """The next method of METHOD_CYCLE at each call."""
    turn = iter(range(10 ** 9))
    return lambda: METHOD_CYCLE[next(turn) % len(METHOD_CYCLE)]


def emit_case(case, method_id):
    """Load and generate; a CSource, or None after one clear error line."""
    doc, dt, precision = case
    try:
        model = model_from_data(doc, "m.toml")
        return generate(model, builtin(method_id), dt, 1, precision)
    except TickwrightError as error:
        one_line(error, "m.toml", "--dt", "the substep", method_id)
        return None


def test_fuzz_the_whole_emit_path(record_property):
    made, method = [], in_turn()

    def body(case):
        method_id = method()
        csource = emit_case(case, method_id)
        if csource is not None:
            assert_clean_c(csource)
            made.append(method_id)

    run_cases(CASES["emit"], small_models(), body, record_property)
    # the layer is exercised: a good part of the cases reach C, with several method kinds
    assert len(made) >= CASES["emit"] // 4 and len(set(made)) >= min(4, len(made)), made


def test_fuzz_a_sample_compiles_with_the_strict_flags(record_property):
    built, method = [], in_turn()

    def body(case):
        method_id = method()
        csource = emit_case(case, method_id)
        if csource is not None:
            assert_clean_c(csource)
            strict_compile(csource)  # raises BuildError on any warning
            built.append(method_id)

    run_cases(CASES["compile"], small_models(), body, record_property)
    assert built, "no sample reached the compiler"


def test_fuzz_the_command_line(tmp_path, record_property):
    """emit through click: exit 0 with both files, or exit 1, one line, nothing written."""
    model = tmp_path / "cli.toml"
    out = tmp_path / "out"
    method = in_turn()

    def body(case):
        doc, dt, precision = case
        method_id = method()
        model.write_text(toml_text(doc), encoding="utf-8")
        result = CliRunner().invoke(main, ["emit", str(model), "--method", method_id, "--dt",
                                           repr(dt), "--precision", precision, "--out", str(out),
                                           "--no-units"])
        assert result.exception is None or isinstance(result.exception, SystemExit), \
            result.exception
        assert "Traceback" not in result.output
        if result.exit_code == 0:
            assert sorted(p.name for p in out.iterdir()) == ["m.c", "m.h"]
            for path in out.iterdir():
                path.unlink()
            out.rmdir()
        else:
            assert result.exit_code == 1, result.output
            errors = [line for line in result.output.splitlines()
                      if not line.startswith("tickwright: warning")]
            assert len(errors) == 1 and errors[0].startswith("tickwright: error: "), errors
            assert not out.exists()

    run_cases(CASES["cli"], small_models(), body, record_property)
