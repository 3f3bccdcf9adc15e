"""The review report: one self-contained HTML page that a design review signs off.

`tickwright report` gathers the model, the method and tick with the stability picture, the
advice table, the check with its pictures, the target figures, the cautions, the command line
and the fingerprints into a ``Review``; ``review_html`` lays it out with templates/review.html.j2.
The page needs nothing else: pictures are inline data URIs of SVG files, equations are MathML,
the style sheet is in the page, and it uses no script and no font file. It prints readably
(one column, tables not split across pages where they fit).
"""

from __future__ import annotations

import base64
import hashlib
import math
import re
from dataclasses import dataclass
from pathlib import Path

import jinja2
import sympy as sp
from markupsafe import Markup
from sympy.printing.mathml import MathMLPresentationPrinter

from .. import __version__
from ..resources import templates_dir
from . import CheckOutcome
from .text import Row, check_body

# What every review must read, whatever the run found (the README's cautions, in short).
CAUTIONS = (
    "A passing check proves that the C computes the chosen method correctly on this model; it "
    "does not prove that the model is right. Validate the generated code and the chosen tick on "
    "the real hardware, in its real operating range.",
    "tickwright is not qualified or certified for safety functions. Do not use its output in a "
    "safety function without your own qualified review, and follow the standards that apply "
    "(for example IEC 61508, ISO 26262 or IEC 62304).",
    "Keep the model file, the command line and the generated files under version control "
    "together; the fingerprints below tie them to this report.",
)
# MIME type of the pictures (plots.py writes SVG for the report).
PICTURE_TYPE = "image/svg+xml"


@dataclass(frozen=True)
class Picture:
    """One picture of the report: a caption and the file it was written to (SVG)."""

    caption: str
    path: Path


@dataclass(frozen=True)
class Review:
    """Everything one review page shows.

    outcome: the check (report.CheckOutcome, targets included); gate: the stability gate
    (advice.gate.StabilityGate); advice: advice.Advice, or None when it was not run; pictures:
    the stability region first, then the check's; files: (label, text) of every generated file
    the check built; command: the exact command line; regenerate: the emit commands that write
    the files (one per precision); units_checked: whether the model's units were checked.
    """

    model: object
    method: object
    dt: float
    substeps: int
    outcome: CheckOutcome
    gate: object
    advice: object | None
    pictures: tuple[Picture, ...]
    files: tuple[tuple[str, str], ...]
    command: str
    regenerate: tuple[str, ...]
    units_checked: bool = True

    @property
    def passed(self) -> bool:
        """The verdict the page shows: the check's (targets included)."""
        return self.outcome.passed


class _EquationPrinter(MathMLPresentationPrinter):
    """sympy's presentation MathML with the model language's Piecewise as cases and atan2 by its
    C name (sympy's default prints a 'piecewise(...)' call and a two-argument arctan)."""

    def _text(self, tag: str, text: str):
        node = self.dom.createElement(tag)
        node.appendChild(self.dom.createTextNode(text))
        return node

    def _print_Piecewise(self, expr):
        row = self.dom.createElement("mrow")
        row.appendChild(self._text("mo", "{"))
        table = self.dom.createElement("mtable")
        for value, condition in expr.args:
            line = self.dom.createElement("mtr")
            cell = self.dom.createElement("mtd")
            cell.appendChild(self._print(value))
            line.appendChild(cell)
            cell = self.dom.createElement("mtd")
            if condition == sp.true:
                cell.appendChild(self._text("mtext", "otherwise"))
            else:
                cell.appendChild(self._text("mtext", "if\u00a0"))
                cell.appendChild(self._print(condition))
            line.appendChild(cell)
            table.appendChild(line)
        row.appendChild(table)
        return row

    def _print_atan2(self, expr):
        row = self.dom.createElement("mrow")
        row.appendChild(self._text("mi", "atan2"))
        args = self.dom.createElement("mrow")
        args.appendChild(self._text("mo", "("))
        args.appendChild(self._print(expr.args[0]))
        args.appendChild(self._text("mo", ","))
        args.appendChild(self._print(expr.args[1]))
        args.appendChild(self._text("mo", ")"))
        row.appendChild(args)
        return row


def equation(lhs: str, expr) -> Markup:
    """lhs = expr as MathML (a <math> element), e.g. lhs 'dT/dt' rendered as a fraction."""
    printer = _EquationPrinter()
    body = printer.doprint(expr)
    # sympy writes the comparison operators unescaped; HTML wants them as references.
    body = body.replace("<mo><</mo>", "<mo>&lt;</mo>").replace("<mo>></mo>", "<mo>&gt;</mo>")
    if lhs.startswith("d/dt "):
        name = printer.doprint(sp.Symbol(lhs.removeprefix("d/dt "), real=True))
        left = f"<mfrac><mrow><mi>d</mi>{name}</mrow><mrow><mi>d</mi><mi>t</mi></mrow></mfrac>"
    else:
        left = printer.doprint(sp.Symbol(lhs, real=True))
    return Markup(f'<math display="block"><mrow>{left}<mo>=</mo>{body}</mrow></math>')


def data_uri(path: Path) -> str:
    """The file as a data URI (base64), so the page needs no other file."""
    return f"data:{PICTURE_TYPE};base64," + base64.b64encode(Path(path).read_bytes()).decode()


def _number(value) -> str:
    return "" if value is None else f"{value:g}"


def _range(q) -> str:
    rng = getattr(q, "range", None)
    return "" if not rng else f"{rng[0]:g} .. {rng[1]:g}"


def _seconds(value) -> str:
    return "unbounded" if value is None or not math.isfinite(value) else f"{value:.4g} s"


def model_section(model) -> dict:
    """The model's tables: states with their rate equations, inputs, parameters, outputs."""
    t = model.time
    return dict(
        name=model.name, description=model.description.rstrip(". "),
        source=Path(model.source).name, time=t,
        states=[dict(name=s.name, unit=s.unit, initial=_number(s.initial), range=_range(s),
                     description=s.description, equation=equation(f"d/dt {s.name}", s.rate),
                     text=f"d{s.name}/d{t} = {s.rate}") for s in model.states],
        inputs=[dict(name=u.name, unit=u.unit, default=_number(u.default), range=_range(u),
                     description=u.description) for u in model.inputs],
        parameters=[dict(name=p.name, unit=p.unit, value=_number(p.value), range=_range(p),
                         tunable="tunable" if p.tunable else "fixed in the C",
                         description=p.description) for p in model.parameters],
        outputs=[dict(name=o.name, unit=o.unit, description=o.description,
                      equation=equation(o.name, o.expr), text=f"{o.name} = {o.expr}")
                 for o in model.outputs])


def method_section(review: Review) -> dict:
    """The method's facts, the tick and the stability gate with its margin."""
    from .json import method_rows

    (row,) = method_rows([review.method])
    gate = review.gate
    h = review.dt / review.substeps
    if gate.limit is None:
        margin = "not computed"
    elif math.isinf(gate.limit):
        margin = "unbounded (A-stable method)"
    else:
        margin = f"the limit is {gate.limit / review.dt:.3g} times dt"
    return dict(row=row, dt=f"{review.dt:g} s", rate=f"{1 / review.dt:g} Hz",
                substeps=review.substeps, h=f"{h:g} s",
                a_stable="yes" if row["a_stable"] else "no",
                l_stable="yes" if row["l_stable"] else "no",
                gate=dict(verdict=_verdict(gate.passed if gate.decided else None),
                          summary=gate.summary, limit=_seconds(gate.limit)
                          if gate.limit is not None else "not computed", margin=margin))


def advice_section(advice) -> dict | None:
    """The advice table (one row per method) with the recommendation, or None when not run."""
    if advice is None:
        return None
    rows = []
    for r in advice.methods:
        e = r.estimate if r.dt else None
        rows.append(dict(id=r.id, kind=r.kind, max_stable=_seconds(r.max_stable_dt),
                         dt="-" if r.dt is None else f"{r.dt:g} s",
                         error="-" if e is None else f"{e.truncation:.2g}",
                         source="-" if e is None else e.source, ops=r.ops_per_step,
                         ops_per_second="-" if r.cost_per_second is None
                         else f"{r.cost_per_second:.3g}", note=r.note))
    rec = advice.recommended
    recommended = None if not rec else (f"{rec['method']} at dt = {rec['dt']:g} s in "
                                        f"{rec['precision']}")
    return dict(rows=rows, recommended=recommended, tolerance=f"{advice.tolerance:g}",
                horizon=f"{advice.horizon:.4g} s", points=advice.points,
                warnings=list(advice.warnings))


def _verdict(passed: bool | None) -> str:
    return "" if passed is None else ("ok" if passed else "FAIL")


def check_rows(outcome: CheckOutcome) -> list[dict]:
    """The check's lines as table rows (check, verdict, figures): what `tickwright check`
    prints, without the picture lines (the pictures are in the page)."""
    return [dict(label=line.label, verdict=line.verdict, text=line.figures)
            for line in check_body(outcome) if isinstance(line, Row)]


def target_rows(outcome: CheckOutcome) -> list[dict]:
    """One row per target run: the figures of targets.TargetReport."""
    return [dict(target=t.target, precision=t.precision, verdict=_verdict(t.passed),
                 matches="yes" if t.matches_host else "no", comparison=t.comparison,
                 flash=t.flash_bytes, stack=t.stack_bytes,
                 instructions="n/a" if t.instructions_per_tick is None
                 else t.instructions_per_tick,
                 double_free="n/a" if t.double_free is None else
                 ("yes" if t.double_free else "no"),
                 misra=len(t.misra), deviations=", ".join(sorted(
                     set(re.findall(r"misra-c2012-(\d+\.\d+)", " ".join(t.misra_deviations))),
                     key=lambda rule: tuple(int(n) for n in rule.split(".")))) or "none",
                 problems=list(t.problems)) for t in outcome.targets]


def fingerprints(review: Review) -> list[dict]:
    """SHA-256 of the model file (and the method file) and of every generated file."""
    model = review.model
    rows = [dict(what="model file", name=Path(model.source).name,
                 sha256=model.digest or "(built in Python: no file)")]
    digest = getattr(review.method, "digest", "")
    if digest:
        rows.append(dict(what="method file",
                         name=Path(getattr(review.method, "origin", "") or "").name,
                         sha256=digest))
    for label, text in review.files:
        rows.append(dict(what="generated file", name=label,
                         sha256=hashlib.sha256(text.encode("utf-8")).hexdigest()))
    return rows


def cautions(review: Review) -> list[str]:
    """What the review must weigh: the run's own findings first, then CAUTIONS."""
    found = []
    if not review.gate.passed:
        found.append(f"Stability: {review.gate.summary}.")
    elif not review.gate.decided:
        found.append(f"Stability not decided: {review.gate.summary}.")
    if not review.outcome.passed:
        found.append("The check FAILED: see the failed lines under 'Checks'.")
    if review.advice is not None:
        found += [f"Advice: {w}." for w in review.advice.warnings]
    for t in review.outcome.targets:
        found += [f"Target {t.target}: {p}" for p in t.problems]
    if not review.units_checked:
        found.append("The model's units were not checked (--no-units).")
    return found + list(CAUTIONS)


def _environment() -> jinja2.Environment:
    """The HTML templates' environment: the house settings plus autoescaping of every value."""
    return jinja2.Environment(
        loader=jinja2.FileSystemLoader(str(templates_dir())), undefined=jinja2.StrictUndefined,
        trim_blocks=True, lstrip_blocks=True, keep_trailing_newline=True, autoescape=True)


def review_html(review: Review) -> str:
    """The review page of a Review as HTML text (UTF-8, no external resources)."""
    report = review.outcome.report
    title = (f"{review.model.name}: {review.method.name} at dt = {review.dt:g} s, design "
             "review")
    return _environment().get_template("review.html.j2").render(
        title=title, version=__version__, verdict="PASS" if review.passed else "FAIL",
        passed=review.passed, model=model_section(review.model),
        method=method_section(review), advice=advice_section(review.advice),
        checks=check_rows(review.outcome), scenario=report.scenario,
        targets=target_rows(review.outcome),
        pictures=[dict(caption=p.caption, src=data_uri(p.path)) for p in review.pictures],
        cautions=cautions(review), command=review.command, regenerate=review.regenerate,
        fingerprints=fingerprints(review))
