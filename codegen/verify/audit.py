"""The coefficient audit: every literal of the generated C against the IR's exact value.

Why an audit and not only a comparison of results: a coefficient one unit in the last place off
changes one term of a step by about one rounding unit of that term, the size of the rounding every
other operation adds. No comparison of trajectories can tell it from honest rounding in general
(the cross-check's bound must allow that much, or it would fail on correct code). Only in special
cases, where every operation of a tick is exact and the bound is 0, does such a change show in the
results (tests/test_crosscheck.py has one). So the audit reads the C text itself: each literal is
matched to the IR value it stands for, by the constant's name (the #define'd coefficients, the
tick in the header, the safeguards' constants: the shortest piece h / 2^depth, the accepted
error, the clamp bounds, Newton's refresh rate), by its position in a printed expression (the
rate function, its Jacobian, df/dt, the outputs), by its row and column (a generation-time
inverse, the exact propagator), by the field it sets (the reset values) or by its role in the
program: the weight of the tick counter's high half is 2^k for the shift k that took that half,
and a retried piece's scale is multiplied by exactly 1/2 where its span halves and by 2 where it
doubles back. Each must equal its exact value correctly rounded to the precision by
rounding.correctly_rounded (Fraction arithmetic, independent of the printer's own rounding). Any
other literal must be 0 or 1 (the emitters' structural constants); anything else is reported.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from fractions import Fraction

import sympy as sp

from ..discretize import INVERSE, NEWTON_REFRESH_RATE, ImplicitStep, StepProgram
from ..emit.printer import StepPrinter
from ..methods import EXACT, LINEARLY_IMPLICIT
from ..rounding import correctly_rounded, exact_fraction

# A floating literal as the printer writes it (an optional sign, digits, exponent, F for float).
LITERAL = r"-?(?:\d+\.\d*|\.\d+|\d+)(?:[eE][+-]?\d+)?F?"
_LITERAL_TOKEN = re.compile(r"(?<![\w.])(" + LITERAL.lstrip("-?") + r")(?![\w.])")
# Literals the emitters write for structure (zero fill, 1 - ..., a cleared maximum).
STRUCTURAL = (Fraction(0), Fraction(1))
_MARK = "\x00"


@dataclass(frozen=True)
class CoefficientAudit:
    """literals: how many literals of the C were checked against the IR; problems: one line each."""

    literals: int
    problems: tuple[str, ...]
    passed: bool


class _MarkingPrinter(StepPrinter):
    """The C printer with every literal replaced by a numbered mark; the exact values kept."""

    def __init__(self, precision: str):
        super().__init__(precision)
        self.values: list = []

    def _lit(self, value) -> str:
        self.values.append(value)
        return f"{_MARK}{len(self.values) - 1}{_MARK}"


def _literal_value(text: str, precision: str) -> float:
    """What a C compiler makes of a literal: its decimal value correctly rounded."""
    return correctly_rounded(Fraction(text.rstrip("F")), precision)


class _Auditor:
    def __init__(self, step, csource):
        self.step, self.csource = step, csource
        self.precision = csource.precision
        self.up = step.model.name.upper()
        self.checked = 0
        self.problems: list[str] = []

    def compare(self, where: str, text: str, exact, what: str) -> None:
        self.checked += 1
        want = correctly_rounded(exact_fraction(exact), self.precision)
        got = _literal_value(text, self.precision)
        if got != want:
            shown = f"{want:.9g}" if self.precision == "float" else repr(want)
            self.problems.append(f"{where}: literal {text} is not {what} correctly rounded to "
                                 f"{self.precision} ({shown})")

    # -- named constants
    def expected_constants(self) -> dict[str, tuple]:
        """#define'd coefficient name -> (exact value, what it is), derived from the IR."""
        step, up = self.step, self.up
        out: dict[str, tuple] = {}

        def put(name, value, what):
            out.setdefault(f"{up}_{name}", (value, what))

        guards = step.safeguards
        if guards.pieces:
            put("FINE_STEP", step.h / 2 ** guards.retry_depth,
                f"h / 2^{guards.retry_depth}, the shortest piece")
        elif not (isinstance(step, ImplicitStep) and step.scheme == EXACT):
            put("STEP", step.h, "h")
        if guards.accept_error is not None:
            put("ACCEPT_ERROR", sp.Rational(repr(float(guards.accept_error))),
                "the accepted error estimate")
        if guards.clamp_states:
            for s in step.model.states:
                if s.range:
                    put(f"MIN_{s.name.upper()}", sp.Rational(repr(float(s.range[0]))),
                        f"the lower bound of {s.name}")
                    put(f"MAX_{s.name.upper()}", sp.Rational(repr(float(s.range[1]))),
                        f"the upper bound of {s.name}")
        if step.error_weights:
            from ..emit import error_scale

            for j, v in step.error_weights:
                put(f"E{j + 1}H", v, f"(b{j + 1} - b_hat{j + 1})*h")
            for i, s in enumerate(step.model.states):
                put(f"ERR_W{i + 1}", 1 / error_scale(s), f"1/full scale of {s.name}")
        for stage in step.stages:
            i = stage.index + 1
            if stage.time_offset != 0:
                put(f"C{i}H", stage.time_offset, f"c{i}*h")
            prefix = "ALPHA" if isinstance(step, ImplicitStep) and \
                step.scheme == LINEARLY_IMPLICIT else "A"
            for j, v in stage.terms:
                put(f"{prefix}{i}{j + 1}H", v, f"{prefix.lower()}{i}{j + 1}*h")
            if getattr(stage, "solve_index", None) is not None:
                put(f"A{i}{i}H", stage.diagonal, f"a{i}{i}*h")
            for j, v in getattr(stage, "coupling", ()):
                put(f"COUPLING{i}{j + 1}", v, f"coupling{i}{j + 1}")
            if getattr(stage, "time_term", 0) != 0:
                put(f"TIME{i}H", stage.time_term, f"time{i}*h")
        for j, v in step.weights:
            put(f"B{j + 1}H", v, f"b{j + 1}*h")
        if isinstance(step, StepProgram):
            return out
        for i, d in step.z_weights:
            put(f"D{i + 1}", d, f"d{i + 1} of b^T A^-1")
        if step.gamma_h is not None:
            put("GAMMAH", step.gamma_h, "gamma*h")
        for s, scale in zip(step.model.states, step.newton.scale):
            put(f"SCALE_{s.name.upper()}", sp.Rational(repr(float(scale))),
                f"the Newton scale of {s.name}")
        tol = step.newton.tolerance_for(self.precision)
        put("NEWTON_TOL", sp.Rational(repr(tol)), "the Newton tolerance")
        if step.newton.monitored:
            put("REFRESH_AT", sp.Rational(repr(NEWTON_REFRESH_RATE)),
                "the contraction rate that refreshes J")
        return out

    def defines(self, text: str) -> dict[str, str]:
        found = {}
        for m in re.finditer(r"^#define\s+(\w+)\s+(.*?)(?:\s*/\*.*)?$", text, flags=re.M):
            found[m.group(1)] = m.group(2).strip()
        return found

    def constants(self) -> None:
        expected = self.expected_constants()
        source = self.defines(self.csource.text(self.csource.source_name))
        header = self.defines(self.csource.text(self.csource.header_name))
        for name, value in source.items():
            inner = value.strip("()")
            if re.fullmatch(r"\d+U", inner):
                if name == f"{self.up}_NSOLVE" and int(inner[:-1]) != self.step.solve.size:
                    self.problems.append(f"{name} = {inner} is not the size of the solve "
                                         f"({self.step.solve.size})")
                continue
            if name not in expected:
                self.problems.append(f"{name} = {inner}: no value of the IR has this name")
                continue
            exact, what = expected[name]
            self.compare(name, inner, exact, f"{what} = {sp.nsimplify(exact)}")
        dt_name = f"{self.up}_DT"
        if dt_name not in header:
            self.problems.append(f"{self.csource.header_name}: no {dt_name}")
        else:
            self.compare(dt_name, header[dt_name], self.step.dt, f"dt = {self.step.dt}")

    # -- function bodies
    def functions(self) -> dict[str, list[str]]:
        text = self.csource.text(self.csource.source_name)
        text = re.sub(r"/\*.*?\*/", "", text, flags=re.S)
        out, name, body = {}, None, []
        for line in text.splitlines():
            m = re.match(r"^(?:static\s+)?[\w ]+?\b(\w+)\(.*\)\s*$", line)
            if m and not line.startswith(" "):
                name, body = m.group(1), []
                continue
            if line == "}" and name:
                out[name] = body
                name = None
            elif name and line.strip() not in ("{", ""):
                body.append(line.strip())
        return out

    def expressions(self, lines: list[str], block, target, fname: str) -> set[int]:
        """Literals of a printed block, by position; returns the indices of the lines matched."""
        by_target = {a.target.name: a.expr for a in block.temporaries}
        by_target.update({target(i, name): e for i, (name, e) in enumerate(block.results)})
        matched = set()
        for n, line in enumerate(lines):
            m = re.match(r"^(?:const \w+ )?([\w\[\]>-]+) = (.*);$", line)
            if not m or m.group(1) not in by_target:
                continue
            matched.add(n)
            printer = _MarkingPrinter(self.precision)
            template = printer.doprint(by_target[m.group(1)])
            parts = template.split(_MARK)
            pattern = "".join(re.escape(p) if k % 2 == 0 else f"({LITERAL})"
                              for k, p in enumerate(parts))
            found = re.fullmatch(pattern, m.group(2))
            where = f"{fname}: {m.group(1)}"
            if not found:
                self.problems.append(f"{where}: the C text differs from the IR's expression "
                                     f"{by_target[m.group(1)]}")
                continue
            for k, text in enumerate(found.groups()):
                value = printer.values[int(parts[2 * k + 1])]
                self.compare(where, text, value, f"{value} in {by_target[m.group(1)]}")
        return matched

    def products(self, lines, fname, rows, operand) -> set[int]:
        """Lines 'target[i] = (lit * operand_j) + ... (+ (lit))' against rows[i] (a list of
        (column key, exact) pairs; the key None for a lone literal)."""
        matched = set()
        for n, line in enumerate(lines):
            m = re.match(r"^(\w+)\[(\d+)\] = (.*);$", line)
            if not m or int(m.group(2)) not in rows or m.group(1) not in ("tw_r", "tw_y"):
                continue
            matched.add(n)
            want = dict(rows[int(m.group(2))])
            got = {}
            for term in re.findall(r"\(([^()]*)\)", m.group(3)):
                pm = re.fullmatch(rf"({LITERAL}) \* (.+)", term)
                if pm:
                    key = operand(pm.group(2))
                    got[key] = pm.group(1)
                elif re.fullmatch(LITERAL, term):
                    got[None] = term
            where = f"{fname}: {m.group(1)}[{m.group(2)}]"
            if set(got) != set(want):
                self.problems.append(f"{where}: the C's terms {sorted(map(str, got))} differ "
                                     f"from the IR's {sorted(map(str, want))}")
                continue
            for key, text in got.items():
                self.compare(where, text, want[key], f"entry {key} = {want[key]}")
        return matched

    def reset(self, lines, fname) -> set[int]:
        model, matched = self.step.model, set()
        values = {model.time: 0}
        values.update({s.name: s.initial for s in model.states})
        values.update({u.name: u.default for u in model.inputs})
        values.update({p.name: p.value for p in model.tunable})
        for n, line in enumerate(lines):
            m = re.match(rf"^tw_ctx->(\w+) = ({LITERAL});$", line)
            if m and m.group(1) in values:
                matched.add(n)
                exact = sp.Rational(repr(float(values[m.group(1)])))
                self.compare(f"{fname}: {m.group(1)}", m.group(2), exact,
                             f"the model's {m.group(1)} = {values[m.group(1)]}")
        return matched

    def bodies(self) -> None:
        step, p = self.step, self.step.model.name
        blocks = {f"{p}_rates": (step.rates, lambda i, name: f"tw_dx[{i}]"),
                  f"{p}_outputs": (step.outputs, lambda i, name: f"tw_out->{name}")}
        if isinstance(step, ImplicitStep) and step.jacobian is not None:
            blocks[f"{p}_jacobian"] = (step.jacobian.block, lambda i, name: f"tw_jac[{i}]")
        if isinstance(step, ImplicitStep) and step.dfdt is not None:
            blocks[f"{p}_dfdt"] = (step.dfdt, lambda i, name: f"tw_ft[{i}]")
        for fname, lines in self.functions().items():
            matched: set[int] = set()
            if fname in blocks:
                matched = self.expressions(lines, *blocks[fname], fname)
            elif fname == f"{p}_reset":
                matched = self.reset(lines, fname)
            elif fname.startswith(f"{p}_solve") and step.solve is not None \
                    and step.solve.kind == INVERSE:
                suffix = fname[len(f"{p}_solve"):]
                which = int(suffix) - 1 if suffix else 0
                rows = {i: [(j, v) for j, v in enumerate(row) if v != 0]
                        for i, row in enumerate(step.solve.inverses[which])}
                matched = self.products(lines, fname, rows,
                                        lambda t: int(re.fullmatch(r"tw_in\[(\d+)\]", t).group(1)))
            elif fname == f"{p}_ticks":
                matched = self.counter(lines, fname)
            elif fname == f"{p}_advance" and isinstance(step, ImplicitStep) \
                    and step.scheme == EXACT:
                matched = self.products(lines, fname, self.propagator_rows(), self.operand)
            if step.safeguards.pieces:
                matched |= self.piece_scale(lines, fname)
            self.leftovers(fname, [line for n, line in enumerate(lines) if n not in matched])

    def propagator_rows(self) -> dict[int, list]:
        ad, bd, ed = self.step.propagator
        model = self.step.model
        rows = {}
        for i in range(model.nx):
            row = [(f"tw_x[{j}]", v) for j, v in enumerate(ad[i]) if v != 0]
            row += [(f"tw_ctx->{u.name}", v) for u, v in zip(model.inputs, bd[i]) if v != 0]
            if ed[i] != 0:
                row.append((None, ed[i]))
            rows[i] = row
        return rows

    @staticmethod
    def operand(text: str) -> str:
        return text

    def counter(self, lines, fname) -> set[int]:
        """The tick counter's conversion: the literal that weighs the high half must be 2^k for
        the shift k that took the high half, and the low half's mask 2^k - 1."""
        real = re.escape(f"{self.step.model.name}_real_t")
        shift = mask = None
        matched = set()
        for n, line in enumerate(lines):
            m = re.fullmatch(r"const uint32_t tw_high = \(uint32_t\)\(tw_n >> (\d+)U\);", line)
            if m:
                shift = int(m.group(1))
                matched.add(n)
            m = re.fullmatch(r"const uint32_t tw_low = \(uint32_t\)\(tw_n & (0x[0-9A-F]+)U\);",
                             line)
            if m:
                mask = int(m.group(1), 16)
                matched.add(n)
            m = re.fullmatch(rf"return \(\({real}\)tw_high \* ({LITERAL})\) \+ "
                             rf"\({real}\)tw_low;", line)
            if m:
                matched.add(n)
                if shift is None or mask != 2 ** shift - 1:
                    self.problems.append(f"{fname}: the counter's halves are not taken by a "
                                         f"shift k and the mask 2^k - 1 (shift {shift}, mask "
                                         f"{mask})")
                    continue
                self.compare(f"{fname}: the weight of the high half", m.group(1),
                             sp.Integer(2) ** shift, f"2^{shift}, the weight of the high half")
        return matched

    def piece_scale(self, lines, fname) -> set[int]:
        """With retries, the piece's scale tw_hs follows its span of shortest pieces: halving
        the span multiplies tw_hs by exactly 1/2, doubling it by exactly 2."""
        matched = set()
        for n, line in enumerate(lines):
            m = re.fullmatch(rf"tw_hs = tw_hs \* ({LITERAL});", line)
            if not m:
                continue
            matched.add(n)
            before = lines[n - 1] if n else ""
            shorter = re.fullmatch(r"tw_span = tw_span / (\d+)U;", before)
            longer = re.fullmatch(r"tw_span = (\d+)U \* tw_span;", before)
            if shorter:
                factor = sp.Rational(1, int(shorter.group(1)))
                what = f"1/{shorter.group(1)}, the scale of a piece whose span was divided by it"
            elif longer:
                factor = sp.Integer(int(longer.group(1)))
                what = f"{factor}, the scale of a piece whose span was multiplied by it"
            else:
                self.problems.append(f"{fname}: '{line}' scales the piece without changing its "
                                     "span")
                continue
            self.compare(f"{fname}: tw_hs", m.group(1), factor, what)
        return matched

    def leftovers(self, fname: str, lines: list[str]) -> None:
        for line in lines:
            for m in _LITERAL_TOKEN.finditer(line):
                text = m.group(1)
                if not re.search(r"[.eEF]", text):
                    continue  # an integer (an index, a size, a status value)
                self.checked += 1
                if Fraction(text.rstrip("F")) not in STRUCTURAL:
                    self.problems.append(f"{fname}: literal {text} in '{line}' stands for no "
                                         "value of the IR")


def audit_coefficients(step, csource) -> CoefficientAudit:
    """Check every literal of csource (generated from the simplified step) against the IR."""
    auditor = _Auditor(step, csource)
    auditor.constants()
    auditor.bodies()
    return CoefficientAudit(literals=auditor.checked, problems=tuple(auditor.problems),
                            passed=not auditor.problems)
