"""Counting the floating-point operators one tick of the generated C executes, from its text.

An independent witness for advice/cost.py, which counts on the IR: this module reads only the
generated header and source. It understands the subset of C99 the emitters write (straight-line
statements, declarations, for loops with a counter, if / else if / else, calls of the file's own
static functions, the conditional operator, integer shifts and masks) and nothing more; anything
else is refused with an error rather than guessed.

How it counts (the same rules as advice/cost.py):

- an operator + - * / between floating operands is one add/mul/div, unless both operands are
  constants (literals or the #define'd coefficients: the compiler folds them); integer arithmetic
  (indices, counters, the tick counter's halves) and comparisons are not counted; a unary minus
  on a floating operand that is not a constant is one 'add' (a negation);
- sqrt/sqrtf is one 'sqrt', the other C library functions of cost.LIBRARY_CALLS one 'call';
  fabs, isfinite and isnan are not counted;
- a call of a function defined in the file is counted as its body (inlined into the caller);
- the conditional operator (the model's own conditionals) counts its costlier operand.

Which path: the count follows one path through the tick, the nominal one, stated here:

- integer variables, the status (its enumerators have their values) and floating variables set
  from a literal are tracked through their assignments, so loops run as their counters say
  (``tw_i < AXIS_NX``, ``tw_j < tw_i``, the pieces of a tick with retries, ...) and the checks
  of the status decide themselves;
- every value is finite: isfinite() is 1 and isnan() is 0;
- the Newton loop, bounded by ``<P>_NEWTON_ITERATIONS``, converges on the last of the number of
  iterations given (``tw_err <= <P>_NEWTON_TOL`` is true on that iteration only, and the macro
  is read as that number): the count of a Newton method is a count for a stated number of
  iterations;
- any other if whose condition cannot be decided (it compares floating values: a pivot, the
  contraction of Newton's iteration, a state against its range, an error estimate against the
  accepted one) is false: pivots are good, the frozen Jacobian contracts fast enough (no
  refresh; full Newton, which refreshes unconditionally, refreshes after every iteration but
  the last), no state is clamped, every step's error is accepted, so no step is retried.

A loop condition part that still reads an unknown value is taken as true, so the loop runs until
its counter ends it.
"""

from __future__ import annotations

import copy
import re
from dataclasses import dataclass, field

from ..advice.cost import LIBRARY_CALLS, OperationCount
from ..errors import CheckError

# Largest number of iterations one loop may run here: far above any generated loop; a loop that
# reaches it has a condition this counter cannot bound.
MAX_LOOP_TRIPS = 100_000
# Calls that cost nothing here: a sign-bit operation and the two classifications.
FREE_CALLS = frozenset({"fabs", "fabsf", "isfinite", "isnan"})
# Integer types of the generated code (status enums are added per file).
INTEGER_TYPES = {"size_t", "uint32_t", "uint64_t", "int", "unsigned"}
# Library predicates on the nominal path (module docstring): every value is finite.
NOMINAL_PREDICATES = {"isfinite": 1, "isnan": 0}

_TOKEN = re.compile(r"""
    (?P<number>0[xX][0-9A-Fa-f]+[uUlL]*|(?:\d+\.\d*|\.\d+|\d+)(?:[eE][+-]?\d+)?[fFuUlL]*)
  | (?P<name>[A-Za-z_]\w*)
  | (?P<op>->|\+\+|--|&&|\|\||<<|>>|<=|>=|==|!=|[-+*/%<>=!?:;,(){}\[\].&|^~])
  | (?P<space>\s+)
""", re.VERBOSE)


def _strip(text: str) -> tuple[str, dict[str, str]]:
    """The text without comments and preprocessor lines, and the #define'd names -> values."""
    text = re.sub(r"/\*.*?\*/", " ", text, flags=re.S)
    text = re.sub(r"//[^\n]*", " ", text)
    text = re.sub(r"#ifdef __cplusplus.*?#endif", " ", text, flags=re.S)  # extern "C" guards
    defines, kept = {}, []
    for line in text.splitlines():
        stripped = line.strip()
        if stripped.startswith("#"):
            m = re.match(r"#\s*define\s+(\w+)\s+(.*)$", stripped)
            if m:
                defines[m.group(1)] = m.group(2).strip()
            continue
        kept.append(line)
    return "\n".join(kept), defines


def _tokens(text: str) -> list[str]:
    out, pos = [], 0
    while pos < len(text):
        m = _TOKEN.match(text, pos)
        if not m:
            raise CheckError(f"operation count: cannot read the C near {text[pos:pos + 30]!r}")
        if m.lastgroup != "space":
            out.append(m.group())
        pos = m.end()
    return out


def _is_real_literal(token: str) -> bool:
    return bool(re.fullmatch(r"(?:\d+\.\d*|\.\d+|\d+)(?:[eE][+-]?\d+)?[fFlL]?", token)) and (
        "." in token or "e" in token.lower() or token[-1] in "fF")


# ---- parsing ---------------------------------------------------------------------------------

class _Parser:
    """Recursive descent over the token list: statements and expressions as small tuples."""

    def __init__(self, tokens: list[str], types: set[str]):
        self.t, self.i, self.types = tokens, 0, types

    def peek(self, k: int = 0) -> str | None:
        j = self.i + k
        return self.t[j] if j < len(self.t) else None

    def take(self, expected: str | None = None) -> str:
        tok = self.peek()
        if tok is None or (expected is not None and tok != expected):
            raise CheckError(f"operation count: expected {expected!r}, found {tok!r} in the C")
        self.i += 1
        return tok

    # -- statements
    def compound(self) -> tuple:
        self.take("{")
        body = []
        while self.peek() != "}":
            body.append(self.statement())
        self.take("}")
        return ("block", body)

    def statement(self) -> tuple:
        tok = self.peek()
        if tok == "{":
            return self.compound()
        if tok == "for":
            self.take("for")
            self.take("(")
            init = None if self.peek() == ";" else self.expression()
            self.take(";")
            cond = None if self.peek() == ";" else self.expression()
            self.take(";")
            step = None if self.peek() == ")" else self.expression()
            self.take(")")
            return ("for", init, cond, step, self.statement())
        if tok == "if":
            self.take("if")
            self.take("(")
            cond = self.expression()
            self.take(")")
            then = self.statement()
            other = None
            if self.peek() == "else":
                self.take("else")
                other = self.statement()
            return ("if", cond, then, other)
        if tok == "return":
            self.take("return")
            value = None if self.peek() == ";" else self.expression()
            self.take(";")
            return ("expr", value)
        if self.is_declaration():
            return self.declaration()
        value = self.expression()
        self.take(";")
        return ("expr", value)

    def is_declaration(self) -> bool:
        return self.peek() == "const" or (self.peek() in self.types and self.peek(1) != ")")

    def declaration(self) -> tuple:
        if self.peek() == "const":
            self.take("const")
        ctype = self.take()
        pointer = False
        while self.peek() in ("*", "restrict", "const"):
            pointer = pointer or self.take() == "*"
        name = self.take()
        dims = []
        while self.peek() == "[":
            self.take("[")
            dims.append(self.expression())
            self.take("]")
        init = None
        if self.peek() == "=":
            self.take("=")
            if self.peek() == "{":
                self.take("{")
                items = [self.expression()]
                while self.peek() == ",":
                    self.take(",")
                    items.append(self.expression())
                self.take("}")
                init = ("list", items)
            else:
                init = self.expression()
        self.take(";")
        return ("decl", ctype, name, bool(dims) or pointer, init)

    # -- expressions, by precedence
    BINARY = [("||",), ("&&",), ("|",), ("^",), ("&",), ("==", "!="), ("<", ">", "<=", ">="),
              ("<<", ">>"), ("+", "-"), ("*", "/", "%")]

    def expression(self) -> tuple:
        left = self.conditional()
        if self.peek() == "=":
            self.take("=")
            return ("assign", left, self.expression())
        return left

    def conditional(self) -> tuple:
        cond = self.binary(0)
        if self.peek() == "?":
            self.take("?")
            a = self.expression()
            self.take(":")
            b = self.conditional()
            return ("ternary", cond, a, b)
        return cond

    def binary(self, level: int) -> tuple:
        if level == len(self.BINARY):
            return self.unary()
        left = self.binary(level + 1)
        while self.peek() in self.BINARY[level]:
            op = self.take()
            left = ("binary", op, left, self.binary(level + 1))
        return left

    def unary(self) -> tuple:
        tok = self.peek()
        if tok in ("-", "+", "!", "~", "*", "&"):
            self.take()
            return ("unary", tok, self.unary())
        if tok in ("++", "--"):
            self.take()
            return ("incr", tok, self.unary())
        if tok == "(" and self.peek(1) in self.types and self.peek(2) == ")":
            self.take("(")
            ctype = self.take()
            self.take(")")
            return ("cast", ctype, self.unary())
        return self.postfix()

    def postfix(self) -> tuple:
        node = self.primary()
        while True:
            tok = self.peek()
            if tok == "[":
                self.take("[")
                index = self.expression()
                self.take("]")
                node = ("index", node, index)
            elif tok == "(":
                self.take("(")
                args = []
                if self.peek() != ")":
                    args.append(self.expression())
                    while self.peek() == ",":
                        self.take(",")
                        args.append(self.expression())
                self.take(")")
                node = ("call", node, args)
            elif tok in ("->", "."):
                self.take()
                node = ("member", node, self.take())
            elif tok in ("++", "--"):
                self.take()
                node = ("incr", tok, node)
            else:
                return node

    def primary(self) -> tuple:
        tok = self.take()
        if tok == "(":
            node = self.expression()
            self.take(")")
            return node
        if re.match(r"[\d.]", tok):
            return ("number", tok)
        if re.match(r"[A-Za-z_]", tok):
            return ("name", tok)
        raise CheckError(f"operation count: unexpected {tok!r} in the C")


# ---- evaluation ------------------------------------------------------------------------------

@dataclass
class _Value:
    """An operand: floating or integer, constant (folded by the compiler) or not, and its value
    when it is known on the path counted (an integer, or a floating value set from a literal)."""

    real: bool
    const: bool = False
    value: int | float | None = None


@dataclass
class _Function:
    params: list[tuple[str, str, bool]]
    body: tuple
    real: bool = False  # whether it returns a floating value


_COMPARE = {"<": lambda x, y: x < y, ">": lambda x, y: x > y, "<=": lambda x, y: x <= y,
            ">=": lambda x, y: x >= y, "==": lambda x, y: x == y, "!=": lambda x, y: x != y}
_INTEGER_OPS = {"+": lambda x, y: x + y, "-": lambda x, y: x - y, "*": lambda x, y: x * y,
                "/": lambda x, y: x // y, "%": lambda x, y: x % y, "&": lambda x, y: x & y,
                "|": lambda x, y: x | y, "^": lambda x, y: x ^ y, "<<": lambda x, y: x << y,
                ">>": lambda x, y: x >> y}


def _mentions(node, suffix: str) -> bool:
    """Whether an expression tree reads a name ending in suffix."""
    if not isinstance(node, tuple):
        return False
    if node[0] == "name":
        return node[1].endswith(suffix)
    return any(_mentions(part, suffix) for part in node[1:])


def _assigned(node) -> set[str]:
    """The variables a statement assigns to by name, at any depth."""
    kind, out = node[0], set()
    if kind == "block":
        for s in node[1]:
            out |= _assigned(s)
    elif kind == "if":
        out |= _assigned(node[2]) | (_assigned(node[3]) if node[3] is not None else set())
    elif kind == "for":
        out |= _assigned(node[4])
    elif kind == "expr" and node[1] is not None and node[1][0] == "assign" \
            and node[1][1][0] == "name":
        out.add(node[1][1][1])
    return out


class _Counter:
    def __init__(self, functions: dict[str, _Function], defines: dict[str, str],
                 real_types: set[str], members: set[str], enumerators: dict[str, int],
                 newton_iterations: int):
        self.functions, self.defines = functions, defines
        self.real_types, self.members = real_types, members
        self.enumerators = enumerators
        self.newton_iterations = newton_iterations
        self.cache: dict[str, OperationCount] = {}

    # -- functions
    def function(self, name: str) -> OperationCount:
        if name not in self.cache:
            fn = self.functions[name]
            env = {"vars": {}}
            for ctype, pname, array in fn.params:
                env["vars"][pname] = (ctype in self.real_types, array, None)
            tally = [OperationCount()]
            self.statement(fn.body, env, tally)
            self.cache[name] = tally[0]
        return self.cache[name]

    # -- statements
    def statement(self, node, env, tally) -> None:
        kind = node[0]
        if kind == "block":
            for s in node[1]:
                self.statement(s, env, tally)
        elif kind == "decl":
            _, ctype, name, array, init = node
            value = None
            if init is not None and init[0] == "list":
                for item in init[1]:
                    self.expr(item, env, tally)
            elif init is not None:
                value = self.expr(init, env, tally).value
            env["vars"][name] = (ctype in self.real_types, array, None if array else value)
        elif kind == "expr":
            if node[1] is not None:
                self.expr(node[1], env, tally)
        elif kind == "for":
            self.loop(node, env, tally)
        elif kind == "if":
            _, cond, then, other = node
            decided = self.expr(cond, env, tally).value
            # Undecided: a comparison of floating values, false on the nominal path; a floating
            # variable the branch not taken would set holds a value that depends on the data.
            chosen = then if decided else other
            if decided is None:
                for name in _assigned(then):
                    real, array, _ = env["vars"].get(name, (False, False, None))
                    if real:
                        env["vars"][name] = (real, array, None)
            if chosen is not None:
                self.statement(chosen, env, tally)
        else:  # pragma: no cover - the parser makes no other statement
            raise CheckError(f"operation count: unknown statement {kind}")

    def loop(self, node, env, tally) -> None:
        _, init, cond, step, body = node
        newton = cond is not None and _mentions(cond, "_NEWTON_ITERATIONS")
        outer = env.get("newton")
        if init is not None:
            self.expr(init, env, tally)
        for trip in range(MAX_LOOP_TRIPS):
            if cond is not None and self.expr(cond, env, tally, loop=True).value == 0:
                env["newton"] = outer
                return
            if newton:
                env["newton"] = trip
            self.statement(body, env, tally)
            if step is not None:
                self.expr(step, env, tally)
        raise CheckError("operation count: a loop of the C has no bound this counter can follow")

    # -- expressions
    def expr(self, node, env, tally, loop: bool = False) -> _Value:
        kind = node[0]
        if kind == "number":
            tok = node[1]
            if _is_real_literal(tok):
                return _Value(real=True, const=True, value=float(tok.rstrip("fFlL")))
            return _Value(real=False, const=True, value=int(re.sub(r"[uUlL]+$", "", tok), 0))
        if kind == "name":
            return self.name(node[1], env)
        if kind == "member":
            base = node[1]
            self.expr(base, env, tally)
            return _Value(real=node[2] in self.members)
        if kind == "index":
            base = self.expr(node[1], env, tally)
            self.expr(node[2], env, tally)
            return _Value(real=base.real)
        if kind == "cast":
            inner = self.expr(node[2], env, tally)
            if node[1] in self.real_types:
                return _Value(real=True, const=inner.const)
            return _Value(real=False, value=inner.value if not inner.real else None)
        if kind == "call":
            return self.call(node, env, tally)
        if kind == "unary":
            inner = self.expr(node[2], env, tally)
            op = node[1]
            if op == "*":  # a pointer's target has the pointer's element type
                return _Value(real=inner.real)
            if op == "&":
                return _Value(real=False)
            if op == "!":
                negated = None if inner.value is None else int(not inner.value)
                return _Value(real=False, value=negated)
            if op == "~":
                return _Value(real=False, const=inner.const)
            if inner.real and op == "-" and not inner.const:
                tally[0] = tally[0] + OperationCount(add=1)
            value = inner.value
            return _Value(real=inner.real, const=inner.const,
                          value=-value if value is not None and op == "-" else value)
        if kind == "incr":
            target = node[2]
            current = self.expr(target, env, tally)
            if current.real:
                raise CheckError("operation count: ++/-- on a floating value is not generated")
            new = None if current.value is None else current.value + (1 if node[1] == "++" else -1)
            self.store(target, new, env)
            return _Value(real=False, value=new)
        if kind == "assign":
            value = self.expr(node[2], env, tally)
            self.expr(node[1], env, tally)
            self.store(node[1], value.value, env)
            return value
        if kind == "ternary":
            decided = self.expr(node[1], env, tally).value
            if decided is not None:
                return self.expr(node[2] if decided else node[3], env, tally)
            # The model's own conditional: the costlier operand, as advice/cost.py counts it.
            ta, tb = [OperationCount()], [OperationCount()]
            va = self.expr(node[2], copy.deepcopy(env), ta)
            vb = self.expr(node[3], copy.deepcopy(env), tb)
            tally[0] = tally[0] + (ta[0] if ta[0].total >= tb[0].total else tb[0])
            return _Value(real=va.real or vb.real)
        if kind == "binary":
            return self.binary(node, env, tally, loop)
        raise CheckError(f"operation count: unknown expression {kind}")  # pragma: no cover

    def binary(self, node, env, tally, loop: bool) -> _Value:
        _, op, left, right = node
        a = self.expr(left, env, tally, loop)
        if op == "&&" and a.value == 0 and a.value is not None:
            return _Value(real=False, value=0)
        if op == "||" and a.value and a.value is not None:
            return _Value(real=False, value=1)
        b = self.expr(right, env, tally, loop)
        if op in ("&&", "||"):
            if op == "&&":
                if loop:  # a loop runs while its counter allows: unknown flags are taken as true
                    known = [v.value for v in (a, b) if v.value is not None]
                    return _Value(real=False, value=None if not known else int(all(known)))
                if a.value == 0 or b.value == 0:
                    return _Value(real=False, value=0)
                both = a.value is not None and b.value is not None
                return _Value(real=False, value=1 if both else None)
            if a.value or b.value:
                return _Value(real=False, value=1)
            both = a.value is not None and b.value is not None
            return _Value(real=False, value=0 if both else None)
        if op in _COMPARE:
            if _mentions(right, "_NEWTON_TOL") or _mentions(left, "_NEWTON_TOL"):
                return _Value(real=False, value=self.converged(op, left, right, env))
            if a.value is None or b.value is None:
                return _Value(real=False)
            return _Value(real=False, value=int(_COMPARE[op](a.value, b.value)))
        if a.real or b.real:
            if a.const and b.const:
                return _Value(real=True, const=True)
            column = {"+": "add", "-": "add", "*": "mul", "/": "div"}.get(op)
            if column is None:
                raise CheckError(f"operation count: operator {op!r} on floating values")
            tally[0] = tally[0] + OperationCount(**{column: 1})
            return _Value(real=True)
        if a.value is None or b.value is None:
            return _Value(real=False, const=a.const and b.const)
        return _Value(real=False, const=a.const and b.const,
                      value=_INTEGER_OPS[op](a.value, b.value))

    def converged(self, op: str, left, right, env) -> int:
        """Newton's test 'error <= <P>_NEWTON_TOL': true on the last iteration counted only."""
        trip = env.get("newton")
        if trip is None or op != "<=" or right[0] != "name" or left[0] != "name":
            raise CheckError("operation count: the Newton tolerance is read outside the Newton "
                             "test 'tw_err <= <P>_NEWTON_TOL' of a Newton loop")
        return int(trip == self.newton_iterations - 1)

    def name(self, name: str, env) -> _Value:
        if name in env["vars"]:
            real, _, value = env["vars"][name]
            return _Value(real=real, value=value)
        if name in self.enumerators:
            return _Value(real=False, const=True, value=self.enumerators[name])
        if name in self.defines:
            if name.endswith("_NEWTON_ITERATIONS"):
                return _Value(real=False, const=True, value=self.newton_iterations)
            text = self.defines[name].strip("() ")
            if _is_real_literal(text.lstrip("-")):
                return _Value(real=True, const=True, value=float(text.rstrip("fFlL")))
            if re.fullmatch(r"-?\d+[uUlL]*", text):
                return _Value(real=False, const=True, value=int(re.sub(r"[uUlL]+$", "", text)))
            raise CheckError(f"operation count: cannot read the macro {name} = {text!r}")
        raise CheckError(f"operation count: '{name}' is not declared in the C")

    def store(self, target, value, env) -> None:
        if target[0] != "name":
            return
        name = target[1]
        if name in env["vars"]:
            real, array, _ = env["vars"][name]
            env["vars"][name] = (real, array, None if array else value)

    def call(self, node, env, tally) -> _Value:
        callee = node[1]
        if callee[0] != "name":
            raise CheckError("operation count: a call through an expression is not generated")
        fname = callee[1]
        for arg in node[2]:
            self.expr(arg, env, tally)
        if fname in self.functions:
            tally[0] = tally[0] + self.function(fname)
            return _Value(real=self.functions[fname].real)
        if fname in NOMINAL_PREDICATES:
            return _Value(real=False, value=NOMINAL_PREDICATES[fname])
        if fname in FREE_CALLS:
            return _Value(real=True)
        base = fname[:-1] if fname.endswith("f") and fname[:-1] in LIBRARY_CALLS | {"sqrt"} \
            else fname
        if base == "sqrt":
            tally[0] = tally[0] + OperationCount(sqrt=1)
        elif base in LIBRARY_CALLS:
            tally[0] = tally[0] + OperationCount(call=1)
        else:
            raise CheckError(f"operation count: unknown function {fname}() in the C")
        return _Value(real=True)


def _read_file(text: str, defines: dict, real_types: set, int_types: set, struct_types: set,
               members: set, enumerators: dict, functions: dict) -> None:
    body, more = _strip(text)
    defines.update(more)
    for m in re.finditer(r"typedef\s+(float|double)\s+(\w+)\s*;", body):
        real_types.add(m.group(2))
    for m in re.finditer(r"typedef\s+enum\s*\{([^}]*)\}\s*(\w+)\s*;", body):
        int_types.add(m.group(2))
        value = 0
        for item in m.group(1).split(","):
            named = re.fullmatch(r"\s*(\w+)\s*(?:=\s*(\d+)[uU]?)?\s*", item)
            if not named:
                raise CheckError(f"operation count: cannot read the enumerator {item.strip()!r}")
            value = int(named.group(2)) if named.group(2) else value
            enumerators[named.group(1)] = value
            value += 1
    for m in re.finditer(r"typedef\s+struct\s*\{([^}]*)\}\s*(\w+)\s*;", body):
        int_types.discard(m.group(2))
        struct_types.add(m.group(2))
        for member in re.finditer(r"(\w+)\s+(\w+)\s*;", m.group(1)):
            if member.group(1) in real_types:
                members.add(member.group(2))
    tokens = _tokens(body)
    types = real_types | int_types | struct_types | INTEGER_TYPES | {"void", "char"}
    i = 0
    while i < len(tokens):
        if tokens[i] in ("typedef", "extern"):
            depth = 0
            while not (tokens[i] == ";" and depth == 0):
                depth += tokens[i] in "{(["
                depth -= tokens[i] in "})]"
                i += 1
            i += 1
            continue
        j = tokens.index("(", i)
        name = tokens[j - 1]
        depth, k = 0, j
        while True:
            depth += tokens[k] == "("
            depth -= tokens[k] == ")"
            if depth == 0:
                break
            k += 1
        params = _params(tokens[j + 1:k], types)
        if tokens[k + 1] == ";":
            i = k + 2
            continue
        parser = _Parser(tokens, types)
        parser.i = k + 1
        functions[name] = _Function(params=params, body=parser.compound(),
                                    real=tokens[j - 2] in real_types)
        i = parser.i


def _params(tokens: list[str], types: set[str]) -> list[tuple[str, str, bool]]:
    """(type, name, pointer) of each parameter."""
    out, current = [], []
    for tok in tokens + [","]:
        if tok == ",":
            words = [t for t in current if t not in ("const", "restrict")]
            if words and words != ["void"]:
                ctype = next(t for t in words if t in types)
                out.append((ctype, words[-1], "*" in words))
            current = []
        else:
            current.append(tok)
    return out


def count_c(csource, newton_iterations: int = 3) -> OperationCount:
    """Floating-point operations of one call of ``<prefix>_advance`` in a generated CSource, with
    every Newton loop running newton_iterations times (module docstring)."""
    defines: dict[str, str] = {}
    real_types, int_types, struct_types, members = {"float", "double"}, set(), set(), set()
    enumerators: dict[str, int] = {}
    functions: dict[str, _Function] = {}
    for name, into in ((csource.header_name, {}), (csource.source_name, functions)):
        _read_file(csource.text(name), defines, real_types, int_types, struct_types, members,
                   enumerators, into)
    counter = _Counter(functions, defines, real_types, members, enumerators, newton_iterations)
    name = f"{csource.prefix}_advance"
    if name not in functions:
        raise CheckError(f"operation count: {csource.source_name} defines no {name}()")
    return counter.function(name)
