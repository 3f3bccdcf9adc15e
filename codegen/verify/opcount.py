"""Counting the floating-point operators one tick of the generated C executes, from its text.

An independent witness for advice/cost.py, which counts on the IR: this module reads only the
generated header and source. It understands the subset of C99 the emitters write (straight-line
statements, declarations, for loops with a counter, if / else if / else, calls of the file's own
static functions, the conditional operator) and nothing more; anything else is refused with an
error rather than guessed.

How it counts (the same rules as advice/cost.py):

- an operator + - * / between floating operands is one add/mul/div, unless both operands are
  constants (literals or the #define'd coefficients: the compiler folds them); integer arithmetic
  (indices, counters) and comparisons are not counted; a unary minus on a floating operand that
  is not a constant is one 'add' (a negation);
- sqrt/sqrtf is one 'sqrt', the other C library functions of cost.LIBRARY_CALLS one 'call';
  fabs, isfinite and isnan are not counted;
- a call of a function defined in the file is counted as its body (inlined into the caller);
- loops are run: integer variables are tracked through their assignments, so a loop's trip count
  follows from its counter (``tw_i < AXIS_NX``, ``tw_j < tw_i``, ...); a condition part that reads
  an untracked variable (a status or done flag, a pivot index chosen by value) is taken as true,
  so the loop runs until its counter ends it;
- the Newton loop, bounded by ``<P>_NEWTON_ITERATIONS``, runs the number of iterations given (the
  macro is read as that number): the count of a Newton method is a count for a stated number of
  iterations;
- an if whose condition cannot be decided (it reads floating values or untracked flags) counts
  its costliest branch; in the generated code that is the path taken when every check passes (the
  failure branches only set a status), so guarded sections count as executed.

An integer variable assigned inside an if branch is untracked (its value depends on the branch).
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
INTEGER_TYPES = {"size_t", "uint32_t", "int", "unsigned"}

_TOKEN = re.compile(r"""
    (?P<number>(?:\d+\.\d*|\.\d+|\d+)(?:[eE][+-]?\d+)?[fFuUlL]*)
  | (?P<name>[A-Za-z_]\w*)
  | (?P<op>->|\+\+|--|&&|\|\||<=|>=|==|!=|[-+*/%<>=!?:;,(){}\[\].&|^~])
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
              ("+", "-"), ("*", "/", "%")]

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
    """An operand: floating or integer, constant or not, and an integer's value when known."""

    real: bool
    const: bool = False
    value: int | None = None


@dataclass
class _Function:
    params: list[tuple[str, str, bool]]
    body: tuple
    untracked: set[str] = field(default_factory=set)


class _Counter:
    def __init__(self, functions: dict[str, _Function], defines: dict[str, str],
                 real_types: set[str], members: set[str], newton_iterations: int):
        self.functions, self.defines = functions, defines
        self.real_types, self.members = real_types, members
        self.newton_iterations = newton_iterations
        self.cache: dict[str, OperationCount] = {}

    # -- functions
    def function(self, name: str) -> OperationCount:
        if name not in self.cache:
            fn = self.functions[name]
            env = {"vars": {}, "untracked": fn.untracked}
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
            tracked = name not in env["untracked"] and ctype not in self.real_types
            env["vars"][name] = (ctype in self.real_types, array, value if tracked else None)
        elif kind == "expr":
            if node[1] is not None:
                self.expr(node[1], env, tally)
        elif kind == "for":
            self.loop(node, env, tally)
        elif kind == "if":
            _, cond, then, other = node
            decided = self.expr(cond, env, tally).value
            if decided is not None:
                chosen = then if decided else other
                if chosen is not None:
                    self.statement(chosen, env, tally)
                return
            branches = []
            for branch in (then, other):
                benv, btally = copy.deepcopy(env), [OperationCount()]
                if branch is not None:
                    self.statement(branch, benv, btally)
                branches.append((btally[0], benv))
            (a, aenv), (b, benv) = branches
            cost, chosen_env = (a, aenv) if a.total >= b.total else (b, benv)
            tally[0] = tally[0] + cost
            env["vars"] = chosen_env["vars"]
        else:  # pragma: no cover - the parser makes no other statement
            raise CheckError(f"operation count: unknown statement {kind}")

    def loop(self, node, env, tally) -> None:
        _, init, cond, step, body = node
        if init is not None:
            self.expr(init, env, tally)
        for _ in range(MAX_LOOP_TRIPS):
            if cond is not None and self.expr(cond, env, tally, loop=True).value == 0:
                return
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
                return _Value(real=True, const=True)
            return _Value(real=False, const=True, value=int(re.sub(r"[uUlL]+$", "", tok)))
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
            return _Value(real=False, value=inner.value)
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
            if inner.real:
                if op == "-" and not inner.const:
                    tally[0] = tally[0] + OperationCount(add=1)
                return inner
            return _Value(real=False, const=inner.const,
                          value=None if inner.value is None else (-inner.value if op == "-"
                                                                  else inner.value))
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
            self.store(node[1], value.value if not value.real else None, env)
            return value
        if kind == "ternary":
            decided = self.expr(node[1], env, tally).value
            if decided is not None:
                return self.expr(node[2] if decided else node[3], env, tally)
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
        if op in ("<", ">", "<=", ">=", "==", "!="):
            if a.real or b.real or a.value is None or b.value is None:
                return _Value(real=False)
            result = {"<": a.value < b.value, ">": a.value > b.value, "<=": a.value <= b.value,
                      ">=": a.value >= b.value, "==": a.value == b.value,
                      "!=": a.value != b.value}[op]
            return _Value(real=False, value=int(result))
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
        result = {"+": lambda x, y: x + y, "-": lambda x, y: x - y, "*": lambda x, y: x * y,
                  "/": lambda x, y: x // y, "%": lambda x, y: x % y, "&": lambda x, y: x & y,
                  "|": lambda x, y: x | y, "^": lambda x, y: x ^ y}[op](a.value, b.value)
        return _Value(real=False, const=a.const and b.const, value=result)

    def name(self, name: str, env) -> _Value:
        if name in env["vars"]:
            real, _, value = env["vars"][name]
            return _Value(real=real, value=value)
        if name in self.defines:
            if name.endswith("_NEWTON_ITERATIONS"):
                return _Value(real=False, const=True, value=self.newton_iterations)
            text = self.defines[name].strip("() ")
            if _is_real_literal(text.lstrip("-")):
                return _Value(real=True, const=True)
            if re.fullmatch(r"-?\d+[uUlL]*", text):
                return _Value(real=False, const=True, value=int(re.sub(r"[uUlL]+$", "", text)))
            raise CheckError(f"operation count: cannot read the macro {name} = {text!r}")
        if name.isupper():  # an enumerator of the status type
            return _Value(real=False, const=True)
        raise CheckError(f"operation count: '{name}' is not declared in the C")

    def store(self, target, value, env) -> None:
        if target[0] != "name":
            return
        name = target[1]
        if name in env["vars"]:
            real, array, _ = env["vars"][name]
            env["vars"][name] = (real, array, None if name in env["untracked"] else value)

    def call(self, node, env, tally) -> _Value:
        callee = node[1]
        if callee[0] != "name":
            raise CheckError("operation count: a call through an expression is not generated")
        fname = callee[1]
        for arg in node[2]:
            self.expr(arg, env, tally)
        if fname in self.functions:
            tally[0] = tally[0] + self.function(fname)
            return _Value(real=False)
        if fname in FREE_CALLS:
            return _Value(real=fname.startswith("fabs"))
        base = fname[:-1] if fname.endswith("f") and fname[:-1] in LIBRARY_CALLS | {"sqrt"} \
            else fname
        if base == "sqrt":
            tally[0] = tally[0] + OperationCount(sqrt=1)
        elif base in LIBRARY_CALLS:
            tally[0] = tally[0] + OperationCount(call=1)
        else:
            raise CheckError(f"operation count: unknown function {fname}() in the C")
        return _Value(real=True)


def _assigned_in_branches(node, inside: bool, out: set[str]) -> None:
    """Names assigned by a statement inside an if branch (at any depth): their value is unknown."""
    kind = node[0]
    if kind == "block":
        for s in node[1]:
            _assigned_in_branches(s, inside, out)
    elif kind == "if":
        _assigned_in_branches(node[2], True, out)
        if node[3] is not None:
            _assigned_in_branches(node[3], True, out)
    elif kind == "for":
        _assigned_in_branches(node[4], inside, out)
    elif kind == "expr" and inside and node[1] is not None and node[1][0] == "assign" \
            and node[1][1][0] == "name":
        out.add(node[1][1][1])


def _read_file(text: str, defines: dict, real_types: set, int_types: set, struct_types: set,
               members: set, functions: dict) -> None:
    body, more = _strip(text)
    defines.update(more)
    for m in re.finditer(r"typedef\s+(float|double)\s+(\w+)\s*;", body):
        real_types.add(m.group(2))
    for m in re.finditer(r"typedef\s+enum\s*\{[^}]*\}\s*(\w+)\s*;", body):
        int_types.add(m.group(1))
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
        fn_body = parser.compound()
        untracked: set[str] = set()
        _assigned_in_branches(fn_body, False, untracked)
        functions[name] = _Function(params=params, body=fn_body, untracked=untracked)
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
    functions: dict[str, _Function] = {}
    for name, into in ((csource.header_name, {}), (csource.source_name, functions)):
        _read_file(csource.text(name), defines, real_types, int_types, struct_types, members,
                   into)
    counter = _Counter(functions, defines, real_types, members, newton_iterations)
    name = f"{csource.prefix}_advance"
    if name not in functions:
        raise CheckError(f"operation count: {csource.source_name} defines no {name}()")
    return counter.function(name)
