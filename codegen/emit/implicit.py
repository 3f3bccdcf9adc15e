"""The emitter of implicit steps: simplified ImplicitStep -> template context.

Reuses common.py's context and helpers (names, reset/rates/outputs functions, commit). Adds the
Jacobian function, the factor and solve functions of the planned linear solve, and an advance
function that computes into locals and commits to the context only after every check passed:
a zero or non-finite pivot returns SINGULAR, a Newton iteration that does not meet its
tolerance within the fixed iteration limit (or diverges to a non-finite iterate) returns
NO_CONVERGENCE, a non-finite new state returns NONFINITE; the context is then untouched.

Newton's iteration watches its contraction: when a correction is larger than NEWTON_REFRESH_RATE
times the one before, J is re-evaluated at the iterate (after stepping back from an iterate a
stale J diverged to) and the matrix refactored, at most NEWTON_REFRESHES times per step; full
Newton refreshes after every iteration. A fully implicit step that refreshes keeps one J per
stage, so its matrix is Newton's own, I - h [a_pq J(Y_q)].
"""

from __future__ import annotations

import sympy as sp

from ..discretize import (DENSE_LU, ELIMINATION, G, INVERSE, NEWTON_REFRESH_RATE, ImplicitStep,
                          LinearSolve)
from ..discretize.linear_solve import GENERATION_DIGITS
from ..methods import DIAGONALLY_IMPLICIT, EXACT, FULLY_IMPLICIT, LINEARLY_IMPLICIT
from .common import (Names, accept_check, advance_body, base_context, block_lines, coefficient,
                     error_estimate_functions, error_estimate_lines, fail_on, free_names,
                     grouped, outputs_function, per_h, rates_function, reset_function,
                     set_time_function, step_error_variable, sum_of_products, ticks_function,
                     unpack_lines)
from .printer import FLOAT, Printer
from .statements import (Blank, Comment, DenseFactor, DenseSolve, EliminationFactor,
                         EliminationSolve, EliminationStep, If, Line, Loop, LuNames, Sections,
                         VectorLoop, lines)

# The C names inside the generated factor and solve functions (and the arrays passed to them).
LU_NAMES = LuNames()


class _Writer:
    """Shared state while writing one file: names, printer, constants and C spellings."""

    def __init__(self, step: ImplicitStep, ctx: dict, precision: str):
        self.step = step
        self.model = step.model
        self.names: Names = ctx["names"]
        self.printer: Printer = ctx["printer"]
        self.real_t = self.names.real_t
        self.up = self.names.upper
        self.p = self.model.name
        self.nx = self.names.macro("NX")
        self.fabs = "fabsf" if precision == FLOAT else "fabs"
        self.zero = self.printer.literal(0)
        self.one = self.printer.literal(1)
        self.constants: list = []
        step_solve = step.solve
        # A fully implicit step that refreshes J keeps one J per stage (block column q of M).
        self.per_stage = step.scheme == FULLY_IMPLICIT and not step.linear and \
            step.newton.refreshing
        self.nnz = len(step.jacobian.pattern) if step.jacobian is not None else 0
        # With retries a fully implicit matrix (entries h a_pq, no run-time G) takes the piece's
        # scale as an argument.
        self.scaled_matrix = step.safeguards.pieces and step_solve is not None and \
            not step_solve.needs_scale and step_solve.kind != INVERSE

    def const(self, name: str, value, note: str) -> str:
        return coefficient(self.constants, f"{self.up}_{name}", value, self.printer, note)

    def hconst(self, name: str, value, note: str) -> str:
        """A constant proportional to h, as the current piece uses it (scaled with retries)."""
        return per_h(self.const(name, value, note), self.step)

    def raw(self, name: str, value: str, note: str) -> str:
        self.constants.append(dict(name=f"{self.up}_{name}", value=value, comment=note))
        return f"{self.up}_{name}"

    def time(self, offset, label: str) -> str:
        if offset == 0:
            return "tw_t"
        return f"tw_t + {self.hconst(label, offset, label.lower().replace('h', '*h'))}"


# ---------------------------------------------------------------------------------------------
# Functions shared by the schemes
# ---------------------------------------------------------------------------------------------

def block_function(w: _Writer, block, fname: str, out: str, doc: str) -> dict:
    """A static function computing a block from (t, x, ctx) into the array out."""
    model = w.model
    used = free_names(block)
    body = unpack_lines(w.names, w.step, used, from_x=True)
    if model.time not in used:
        body.append(Line(f"(void){model.time};"))
    if not used & {s.name for s in model.states}:
        body.append(Line("(void)tw_x;"))
    if not used & ({u.name for u in model.inputs} | {p.name for p in model.tunable}):
        body.append(Line("(void)tw_ctx;"))
    body += block_lines(block, w.printer, w.real_t, lambda i, name: f"{out}[{i}]")
    return dict(doc=doc, signature=f"static void {w.p}_{fname}(const {w.real_t} {model.time}, "
                f"const {w.real_t} *restrict tw_x, const {w.names.ctx_t} *restrict tw_ctx, "
                f"{w.real_t} *restrict {out})", body=body)


def _entry_value(w: _Writer, entry, nx: int) -> str:
    terms = []
    for coeff, k in entry.terms:
        if coeff == G:
            name = "tw_g"
        else:
            p, q = entry.row // nx + 1, entry.col // nx + 1
            name = w.const(f"A{p}{q}H", coeff, f"a{p}{q}*h")
            if w.scaled_matrix:
                name = f"({name} * tw_g)"
        slot = (entry.col // nx) * w.nnz + k if w.per_stage else k
        terms.append(f"{name} * tw_jac[{slot}]")
    if not terms:
        return w.one if entry.one else w.zero
    total = grouped(terms)
    return f"{w.one} - {total}" if entry.one else f"-{total}"


def _elimination_steps(solve: LinearSolve) -> tuple[EliminationStep, ...]:
    """Per pivot in elimination order: its slot and, per row below, the slots it updates."""
    slot, n = solve.slot(), solve.size
    filled = set(solve.filled)
    position = {v: k for k, v in enumerate(solve.order)}
    steps = []
    for k in solve.order:
        below = [i for i in range(n) if (i, k) in filled and position[i] > position[k]]
        right = [j for j in range(n) if (k, j) in filled and position[j] > position[k]]
        steps.append(EliminationStep(
            pivot=slot[(k, k)], first=k == solve.order[0],
            rows=tuple((slot[(i, k)], tuple((slot[(i, j)], slot[(k, j)]) for j in right))
                       for i in below)))
    return tuple(steps)


def factor_function(w: _Writer, solve: LinearSolve) -> dict | None:
    """Assemble M = I - (C (x) J) and factor it: straight-line elimination or looped dense LU."""
    if solve.kind == INVERSE:
        return None
    nx = w.model.nx
    n = solve.size
    lu = LU_NAMES
    scale_arg = f"const {w.real_t} tw_g, " if solve.needs_scale or w.scaled_matrix else ""
    if solve.kind == ELIMINATION:
        slot = solve.slot()
        given = {(e.row, e.col): e for e in solve.entries}
        body = [Line(f"int {lu.bad} = 0;"), Blank(),
                Comment(f"assemble the {len(solve.entries)} structural non-zeros; fill-in starts "
                        "at 0")]
        body += lines(*(f"{lu.lu}[{slot[rc]}] = "
                        f"{_entry_value(w, given[rc], nx) if rc in given else w.zero};"
                        for rc in solve.filled))
        body += [Comment("eliminate in reverse Cuthill-McKee order; no pivoting, pivots guarded"),
                 EliminationFactor(names=lu, steps=_elimination_steps(solve), fabs=w.fabs,
                                   zero=w.zero),
                 Line(f"return {lu.bad};")]
        return dict(doc=f"Assemble and factor the {n} x {n} iteration matrix by straight-line "
                    "elimination along its sparsity pattern. Returns 1 on a zero or non-finite "
                    "pivot.",
                    signature=f"static int {w.p}_factor(const {w.real_t} *restrict tw_jac, "
                              f"{scale_arg}{w.real_t} *restrict {lu.lu})",
                    body=body)
    size = w.raw("NSOLVE", f"{n}U", "size of the linear system of one solve")
    body = [*lines(f"size_t {lu.row};", f"size_t {lu.col};", f"size_t {lu.pivot};",
                   f"{w.real_t} {lu.scratch};", f"int {lu.bad} = 0;"), Blank(),
            VectorLoop(f"({size} * {size})", (Line(f"{lu.lu}[{lu.row}] = {w.zero};"),),
                       index=lu.row)]
    body += lines(*(f"{lu.lu}[{e.row * n + e.col}] = {_entry_value(w, e, nx)};"
                    for e in solve.entries))
    body += [DenseFactor(names=lu, size=size, real_t=w.real_t, fabs=w.fabs, zero=w.zero),
             Line(f"return {lu.bad};")]
    return dict(doc=f"Assemble the {n} x {n} iteration matrix and factor it by LU with partial "
                f"pivoting (row swaps in {lu.piv}). Returns 1 on a zero or non-finite pivot.",
                signature=f"static int {w.p}_factor(const {w.real_t} *restrict tw_jac, {scale_arg}"
                          f"{w.real_t} *restrict {lu.lu}, size_t *restrict {lu.piv})",
                body=body)


def solve_functions(w: _Writer, solve: LinearSolve) -> list[dict]:
    """In-place solve M d = r with the factors (or with the generation-time inverse)."""
    n = solve.size
    lu = LU_NAMES
    if solve.kind == INVERSE:
        functions = []
        for which, inverse in enumerate(solve.inverses):
            suffix = f"{which + 1}" if len(solve.inverses) > 1 else ""
            body = [*lines(f"{w.real_t} tw_in[{n}];", "size_t tw_i;"), Blank(),
                    VectorLoop(f"{n}U", (Line(f"tw_in[tw_i] = {lu.rhs}[tw_i];"),))]
            for i in range(n):
                terms = [f"{w.printer.literal(v)} * tw_in[{j}]" for j, v in enumerate(inverse[i])
                         if v != 0]
                body.append(Line(f"{lu.rhs}[{i}] = "
                                 + (sum_of_products(terms) if terms else w.zero) + ";"))
            note = f" (h*a = {solve.diagonals[which]})" if solve.diagonals else ""
            functions.append(dict(
                doc=f"Solve M d = r in place with the inverse of the constant iteration matrix"
                    f"{note}, computed at generation time in {GENERATION_DIGITS}-digit arithmetic.",
                signature=f"static void {w.p}_solve{suffix}({w.real_t} *restrict {lu.rhs})",
                body=body))
        return functions
    if solve.kind == ELIMINATION:
        slot = solve.slot()
        filled = set(solve.filled)
        position = {v: k for k, v in enumerate(solve.order)}
        forward, back = [], []
        for i in solve.order:
            terms = [f"{lu.lu}[{slot[(i, k)]}] * {lu.rhs}[{k}]" for k in solve.order
                     if (i, k) in filled and position[k] < position[i]]
            if terms:
                forward.append((i, grouped(terms)))
        for i in reversed(solve.order):
            terms = [f"{lu.lu}[{slot[(i, j)]}] * {lu.rhs}[{j}]" for j in solve.order
                     if (i, j) in filled and position[j] > position[i]]
            numerator = f"({lu.rhs}[{i}] - {grouped(terms)})" if terms else f"{lu.rhs}[{i}]"
            back.append((i, numerator, slot[(i, i)]))
        return [dict(doc="Solve M d = r in place with the straight-line factors.",
                     signature=f"static void {w.p}_solve(const {w.real_t} *restrict {lu.lu}, "
                               f"{w.real_t} *restrict {lu.rhs})",
                     body=[EliminationSolve(names=lu, forward=tuple(forward), back=tuple(back))])]
    size = f"{w.up}_NSOLVE"
    body = [*lines(f"size_t {lu.row};", f"size_t {lu.col};", f"size_t {lu.pivot};",
                   f"{w.real_t} {lu.total};"), Blank(),
            DenseSolve(names=lu, size=size)]
    return [dict(doc="Solve M d = r in place with the pivoted LU factors.",
                 signature=f"static void {w.p}_solve(const {w.real_t} *restrict {lu.lu}, "
                           f"const size_t *restrict {lu.piv}, {w.real_t} *restrict {lu.rhs})",
                 body=body)]


class _Solver:
    """C spellings of factor and solve calls for one planned linear solve."""

    def __init__(self, w: _Writer, solve: LinearSolve):
        self.w, self.solve = w, solve

    def declarations(self) -> list[str]:
        s, w, lu = self.solve, self.w, LU_NAMES
        if s.kind == ELIMINATION:
            return [f"{w.real_t} {lu.lu}[{len(s.filled)}];"]
        if s.kind == DENSE_LU:
            return [f"{w.real_t} {lu.lu}[{s.size * s.size}];", f"size_t {lu.piv}[{s.size}];"]
        return []

    def factor(self, body: Sections, g_name: str | None) -> None:
        """Factor at run time (nothing for a generation-time inverse); SINGULAR on a bad pivot."""
        s, w = self.solve, self.w
        if s.kind == INVERSE:
            return
        fail_on(body, w.names, f"{self.factor_call(g_name)} != 0", "SINGULAR")

    def factor_call(self, g_name: str | None) -> str:
        """The call of the factor function (it returns 1 on a bad pivot)."""
        s, w, lu = self.solve, self.w, LU_NAMES
        scale = g_name if s.needs_scale else ("tw_hs" if w.scaled_matrix else None)
        args = "tw_jac, " + (f"{scale}, " if scale else "") + lu.lu + \
            (f", {lu.piv}" if s.kind == DENSE_LU else "")
        return f"{w.p}_factor({args})"

    def call(self, vector: str, which: int = 0) -> Line:
        """Solve in place into vector; which selects the inverse of one diagonal (IR solve_index)."""
        s, w, lu = self.solve, self.w, LU_NAMES
        if s.kind == INVERSE:
            suffix = f"{which + 1}" if len(s.inverses) > 1 else ""
            return Line(f"{w.p}_solve{suffix}({vector});")
        if s.kind == DENSE_LU:
            return Line(f"{w.p}_solve({lu.lu}, {lu.piv}, {vector});")
        return Line(f"{w.p}_solve({lu.lu}, {vector});")


def _scale_lines(w: _Writer) -> list[Line]:
    body = []
    for i, (s, scale) in enumerate(zip(w.model.states, w.step.newton.scale)):
        name = w.const(f"SCALE_{s.name.upper()}", sp.Rational(repr(float(scale))),
                       f"Newton scale floor of {s.name}")
        body.append(Line(f"tw_scale[{i}] = {name} + {w.fabs}(tw_x[{i}]);"))
    return body


def _loop(bound: str, *texts: str) -> VectorLoop:
    """A loop over the states (or the stage vector) with one statement per text."""
    return VectorLoop(bound, tuple(lines(*texts)))


def _newton_test(w: _Writer, size: int, z: str, per_state: bool) -> list:
    """Apply the correction tw_r to z and set tw_err to max |correction| / scale (NaN sticks)."""
    index = "tw_i % " + w.nx if per_state else "tw_i"
    return [Line(f"tw_err = {w.zero};"),
            VectorLoop(f"{size}U", (
                Line(f"const {w.real_t} tw_e = {w.fabs}(tw_r[tw_i]) / tw_scale[{index}];"),
                Line(f"{z}[tw_i] = {z}[tw_i] + tw_r[tw_i];"),
                If((("(tw_e > tw_err) || (isnan(tw_e) != 0)", (Line("tw_err = tw_e;"),)),))))]


def _newton_declarations(w: _Writer) -> list[str]:
    decl = [f"{w.real_t} tw_scale[{w.nx}];", f"{w.real_t} tw_err;", "uint32_t tw_it;",
            "uint32_t tw_done;"]
    if w.step.newton.monitored:
        decl += [f"{w.real_t} tw_prev;", "uint32_t tw_fresh;"]
    return decl


REFRESH_BUDGET = "uint32_t tw_refreshes = 0U;  /* Jacobian refreshes in this step */"


def _solves(step: ImplicitStep) -> int:
    """Newton solves in one step: one per implicit stage, or one for a fully implicit step."""
    if step.scheme == FULLY_IMPLICIT:
        return 1
    return sum(1 for stage in step.stages if stage.solve_index is not None)


def _newton_start(w: _Writer) -> list:
    """Statements at the start of a step that uses Newton: the scales, and the refresh budget
    when several solves share it (a single solve declares it where it is used)."""
    body = _scale_lines(w)
    if w.step.newton.monitored and _solves(w.step) > 1:
        body.append(Line(REFRESH_BUDGET))
    return body


def _newton_loop(w: _Writer, body: Sections, residual: list, size: int, z: str,
                 per_state: bool, refresh: list) -> None:
    """The bounded Newton loop around one residual evaluation + solve.

    refresh: statements that re-evaluate J at the iterate z and refactor, setting tw_done to 3
    on a bad pivot (used by monitored and full Newton; J stays frozen without refreshes).
    """
    newton = w.step.newton
    branches = [(f"tw_err <= {w.up}_NEWTON_TOL", (Line("tw_done = 1U;"),)),
                ("isfinite(tw_err) == 0", (Line("tw_done = 2U;"),))]
    after = []
    if newton.full:
        otherwise = (Comment("full Newton: J at the new iterate"), *refresh)
    elif newton.monitored:
        step_back = If((("(tw_err >= tw_prev) && (tw_fresh == 0U)", (
            Comment("diverging from a stale J: back to the iterate before"),
            _loop(f"{size}U", f"{z}[tw_i] = {z}[tw_i] - tw_r[tw_i];"),
            Line("tw_err = tw_prev;"))),))
        branches.append((
            f"(tw_prev > {w.zero}) && (tw_err > ({w.up}_REFRESH_AT * tw_prev)) && "
            f"(tw_refreshes < {w.up}_NEWTON_REFRESHES)",
            (Comment("contracting too slowly: J at the iterate, refactor"), step_back, *refresh,
             *lines("tw_refreshes = tw_refreshes + 1U;", "tw_fresh = 1U;"))))
        otherwise = (Line("tw_fresh = 0U;"),)
        after = [Line("tw_prev = tw_err;")]
    else:
        otherwise = (Comment("not yet converged: iterate again"),)
    start = [Line("tw_done = 0U;  /* 0: iterating, 1: converged, 2: diverged, 3: singular */"
                  if newton.refreshing else
                  "tw_done = 0U;  /* 0: iterating, 1: converged, 2: diverged */")]
    if newton.monitored:
        start += lines(f"tw_prev = {w.zero};", "tw_fresh = 0U;")
        if _solves(w.step) == 1:
            start.append(Line(REFRESH_BUDGET))
    body.add(*start,
             Loop("tw_it", "0U", f"(tw_it < {w.up}_NEWTON_ITERATIONS) && (tw_done == 0U)",
                  (*residual, *_newton_test(w, size, z, per_state),
                   If(tuple(branches), otherwise=otherwise), *after)))
    if newton.refreshing:
        body.add(If((("tw_done == 3U", (Line(f"tw_status = {w.names.status('SINGULAR')};"),)),
                     ("tw_done != 1U",
                      (Line(f"tw_status = {w.names.status('NO_CONVERGENCE')};"),))),
                    otherwise=(Comment("converged"),)))
        body.parts.append([])
    else:
        fail_on(body, w.names, "tw_done != 1U", "NO_CONVERGENCE")


def _refactor(w: _Writer, solver: _Solver, g_name: str | None) -> If:
    return If(((f"{solver.factor_call(g_name)} != 0", (Line("tw_done = 3U;"),)),))


# ---------------------------------------------------------------------------------------------
# Advance bodies, one per scheme
# ---------------------------------------------------------------------------------------------

def _dirk_body(w: _Writer, solver: _Solver, inner: Sections) -> list[str]:
    step = w.step
    decl = [f"{w.real_t} tw_k[{len(step.stages)}][{w.nx}];", f"{w.real_t} tw_w[{w.nx}];",
            f"{w.real_t} tw_y[{w.nx}];", f"{w.real_t} tw_f[{w.nx}];", f"{w.real_t} tw_r[{w.nx}];"]
    nonlinear = not step.linear
    if nonlinear:
        decl += _newton_declarations(w)
        inner.add(*_newton_start(w))
    for stage in step.stages:
        i = stage.index
        inner.add(Comment(f"stage {i + 1}: c = {stage.c}"))
        terms = [f"{w.hconst(f'A{i + 1}{j + 1}H', v, f'a{i + 1}{j + 1}*h')}"
                 f" * tw_k[{j}][tw_i]" for j, v in stage.terms]
        inner.add(_loop(w.nx, "tw_w[tw_i] = tw_x[tw_i]" + (f" + {grouped(terms)};" if terms
                                                           else ";")))
        time = w.time(stage.time_offset, f"C{i + 1}H")
        if stage.solve_index is None:
            inner.add(Line(f"{w.p}_rates({time}, tw_w, tw_ctx, tw_k[{i}]);"))
            continue
        g_name = w.hconst(f"A{i + 1}{i + 1}H", stage.diagonal, f"a{i + 1}{i + 1}*h")
        if stage.refactor:
            solver.factor(inner, g_name)
        if nonlinear:
            inner.add(_loop(w.nx, "tw_y[tw_i] = tw_w[tw_i];"))
            residual = [Line(f"{w.p}_rates({time}, tw_y, tw_ctx, tw_f);"),
                        _loop(w.nx, f"tw_r[tw_i] = (tw_w[tw_i] + ({g_name} * tw_f[tw_i])) - "
                                    "tw_y[tw_i];"),
                        solver.call("tw_r", stage.solve_index)]
            refresh = [Line(f"{w.p}_jacobian({time}, tw_y, tw_ctx, tw_jac);"),
                       _refactor(w, solver, g_name)]
            _newton_loop(w, inner, residual, w.model.nx, "tw_y", False, refresh)
        else:
            inner.add(Comment("f is linear in x: one Newton step from the stage base is exact"),
                      Line(f"{w.p}_rates({time}, tw_w, tw_ctx, tw_f);"),
                      _loop(w.nx, f"tw_r[tw_i] = {g_name} * tw_f[tw_i];"),
                      solver.call("tw_r", stage.solve_index),
                      _loop(w.nx, "tw_y[tw_i] = tw_w[tw_i] + tw_r[tw_i];"))
        inner.add(_loop(w.nx, f"tw_k[{i}][tw_i] = (tw_y[tw_i] - tw_w[tw_i]) / {g_name};"))
    terms = [f"{w.hconst(f'B{j + 1}H', v, f'b{j + 1}*h')} * tw_k[{j}][tw_i]"
             for j, v in step.weights]
    inner.add(Comment("update"), _loop(w.nx, f"tw_x[tw_i] = tw_x[tw_i] + {grouped(terms)};"))
    return decl


def _fully_implicit_body(w: _Writer, solver: _Solver, inner: Sections) -> list[str]:
    step = w.step
    s, nx = len(step.stages), w.model.nx
    size = s * nx
    decl = [f"{w.real_t} tw_z[{size}];", f"{w.real_t} tw_f[{s}][{w.nx}];",
            f"{w.real_t} tw_y[{w.nx}];", f"{w.real_t} tw_r[{size}];"]
    times = [w.time(stage.time_offset, f"C{p + 1}H") for p, stage in enumerate(step.stages)]
    residual = []
    for p in range(s):
        residual += [_loop(w.nx, f"tw_y[tw_i] = tw_x[tw_i] + tw_z[{p * nx}U + tw_i];"),
                     Line(f"{w.p}_rates({times[p]}, tw_y, tw_ctx, tw_f[{p}]);")]
    for p, stage in enumerate(step.stages):
        terms = [f"{w.hconst(f'A{p + 1}{q + 1}H', v, f'a{p + 1}{q + 1}*h')}"
                 f" * tw_f[{q}][tw_i]" for q, v in stage.terms]
        residual.append(_loop(w.nx, f"tw_r[{p * nx}U + tw_i] = "
                                    f"{grouped(terms) if terms else w.zero} - "
                                    f"tw_z[{p * nx}U + tw_i];"))
    residual.append(solver.call("tw_r"))
    if not step.linear:
        decl += _newton_declarations(w)
        inner.add(*_newton_start(w))
    if w.per_stage:
        inner.add(Comment("one J per stage, all at (t, x) to start with"),
                  _loop(f"{w.nnz}U", *(f"tw_jac[{q * w.nnz}U + tw_i] = tw_jac[tw_i];"
                                       for q in range(1, s))))
    inner.add(_loop(f"{size}U", f"tw_z[tw_i] = {w.zero};"))
    solver.factor(inner, None)
    if step.linear:
        inner.add(Comment("f is linear in x: one Newton step from Z = 0 is exact"), *residual,
                  _loop(f"{size}U", "tw_z[tw_i] = tw_r[tw_i];"))
    else:
        refresh = []
        for p in range(s):
            refresh += [_loop(w.nx, f"tw_y[tw_i] = tw_x[tw_i] + tw_z[{p * nx}U + tw_i];"),
                        Line(f"{w.p}_jacobian({times[p]}, tw_y, tw_ctx, "
                             f"&tw_jac[{p * w.nnz}U]);")]
        refresh.append(_refactor(w, solver, None))
        _newton_loop(w, inner, residual, size, "tw_z", True, refresh)
    inner.add(Comment("update"))
    if step.z_weights:
        terms = [f"{w.const(f'D{i + 1}', d, f'd{i + 1} (b^T A^-1)')} * tw_z[{i * nx}U + tw_i]"
                 for i, d in step.z_weights]
        inner.add(_loop(w.nx, f"tw_x[tw_i] = tw_x[tw_i] + {grouped(terms)};"))
    else:
        for p, _ in step.weights:
            inner.add(_loop(w.nx, f"tw_y[tw_i] = tw_x[tw_i] + tw_z[{p * nx}U + tw_i];"),
                      Line(f"{w.p}_rates({times[p]}, tw_y, tw_ctx, tw_f[{p}]);"))
        terms = [f"{w.hconst(f'B{j + 1}H', v, f'b{j + 1}*h')} * tw_f[{j}][tw_i]"
                 for j, v in step.weights]
        inner.add(_loop(w.nx, f"tw_x[tw_i] = tw_x[tw_i] + {grouped(terms)};"))
    return decl


def _rosenbrock_body(w: _Writer, solver: _Solver, inner: Sections) -> list[str]:
    step = w.step
    decl = [f"{w.real_t} tw_k[{len(step.stages)}][{w.nx}];"]
    if any(stage.terms for stage in step.stages):  # a stage evaluates f away from x
        decl.append(f"{w.real_t} tw_y[{w.nx}];")
    if step.dfdt is not None:
        decl.append(f"{w.real_t} tw_ft[{w.nx}];")
    g_name = w.hconst("GAMMAH", step.gamma_h, "gamma*h")
    solver.factor(inner, g_name)
    if step.dfdt is not None:
        inner.add(Line(f"{w.p}_dfdt(tw_t, tw_x, tw_ctx, tw_ft);"))
    for stage in step.stages:
        i = stage.index
        inner.add(Comment(f"stage {i + 1}"))
        terms = [f"{w.hconst(f'ALPHA{i + 1}{j + 1}H', v, f'alpha{i + 1}{j + 1}*h')}"
                 f" * tw_k[{j}][tw_i]" for j, v in stage.terms]
        source = "tw_x"
        if terms:
            inner.add(_loop(w.nx, f"tw_y[tw_i] = tw_x[tw_i] + {grouped(terms)};"))
            source = "tw_y"
        inner.add(Line(f"{w.p}_rates({w.time(stage.time_offset, f'C{i + 1}H')}, {source}, "
                       f"tw_ctx, tw_k[{i}]);"))
        extra = [f"{w.const(f'COUPLING{i + 1}{j + 1}', v, f'coupling{i + 1}{j + 1}')}"
                 f" * tw_k[{j}][tw_i]" for j, v in stage.coupling]
        if stage.time_term != 0:
            extra.append(f"{w.hconst(f'TIME{i + 1}H', stage.time_term, f'time{i + 1}*h')}"
                         " * tw_ft[tw_i]")
        if extra:
            inner.add(_loop(w.nx, f"tw_k[{i}][tw_i] = tw_k[{i}][tw_i] + {grouped(extra)};"))
        inner.add(solver.call(f"tw_k[{i}]"))
    if step.error_weights:
        per_step = step_error_variable(step)
        estimate, estimate_decl = error_estimate_lines(
            step, w.names, w.printer, w.constants, {j: j for j in range(len(step.stages))},
            per_step)
        decl += estimate_decl
        inner.add(*estimate)
        if step.safeguards.accept_error is not None:
            accept_check(inner, step, w.names, w.printer, w.constants, per_step)
    terms = [f"{w.hconst(f'B{j + 1}H', v, f'b{j + 1}*h')} * tw_k[{j}][tw_i]"
             for j, v in step.weights]
    inner.add(Comment("update"), _loop(w.nx, f"tw_x[tw_i] = tw_x[tw_i] + {grouped(terms)};"))
    return decl


def _exact_body(w: _Writer, inner: Sections) -> list[str]:
    ad, bd, ed = w.step.propagator
    model = w.model
    lit = w.printer.literal
    for i in range(model.nx):
        terms = [f"{lit(v)} * tw_x[{j}]" for j, v in enumerate(ad[i]) if v != 0]
        terms += [f"{lit(v)} * tw_ctx->{u.name}" for u, v in zip(model.inputs, bd[i]) if v != 0]
        if ed[i] != 0:
            terms.append(lit(ed[i]))
        inner.add(Line(f"tw_y[{i}] = {sum_of_products(terms) or w.zero};"))
    inner.add(_loop(w.nx, "tw_x[tw_i] = tw_y[tw_i];"))
    return [f"{w.real_t} tw_y[{w.nx}];"]


# ---------------------------------------------------------------------------------------------
# The whole file
# ---------------------------------------------------------------------------------------------

def _newton_note(step: ImplicitStep, precision: str) -> str:
    newton = step.newton
    if newton.full:
        how = "full Newton (J and the factorization renewed after every iteration)"
    elif newton.monitored:
        how = (f"simplified Newton, J refreshed at the iterate when a correction exceeds "
               f"{NEWTON_REFRESH_RATE:g} of the one before (at most {newton.refreshes} times "
               "per step)")
    else:
        how = "simplified Newton (J frozen at the start of the step)"
    return (f"{how}, at most {newton.max_iterations} iterations, tolerance "
            f"{newton.tolerance_for(precision):.3g} of each state's scale")


def _kind_note(step: ImplicitStep, precision: str) -> str:
    if step.scheme == EXACT:
        return "exact zero-order-hold discretization (matrix exponential at generation time)"
    solve = step.solve
    how = {ELIMINATION: "straight-line sparse elimination", DENSE_LU: "dense LU with partial "
           "pivoting", INVERSE: "iteration matrix inverted at generation time"}[solve.kind]
    if step.scheme == LINEARLY_IMPLICIT:
        return f"linearly implicit (Rosenbrock), one linear solve per stage, {how}"
    if step.linear:
        return f"{step.scheme} Runge-Kutta, model linear in x: direct solve, {how}"
    if not step.newton.refreshing:  # the wording of builds without refreshes, kept as it was
        return (f"{step.scheme} Runge-Kutta, simplified Newton (at most "
                f"{step.newton.max_iterations} iterations, tolerance "
                f"{step.newton.tolerance_for(precision):.3g} of each state's scale), {how}")
    return f"{step.scheme} Runge-Kutta, {_newton_note(step, precision)}, {how}"


def implicit_context(step: ImplicitStep, precision: str) -> dict:
    """Context for the templates: the explicit context's layout plus the solver functions."""
    ctx = base_context(step, precision, _kind_note(step, precision))
    w = _Writer(step, ctx, precision)
    model, names = step.model, w.names
    functions = [reset_function(step, names, w.printer), set_time_function(step, names),
                 ticks_function(step, names, w.printer, w.constants)]
    if step.scheme != EXACT:  # the exact step never evaluates f
        functions.append(rates_function(step, names, w.printer))
    newton_loop = step.scheme in (DIAGONALLY_IMPLICIT, FULLY_IMPLICIT) and not step.linear
    if newton_loop:
        ctx["defines"].append(dict(name=names.macro("NEWTON_ITERATIONS"),
                                   value=f"{step.newton.max_iterations}U",
                                   comment="Newton iterations per solve, at most"))
        if step.newton.monitored:
            ctx["defines"].append(dict(name=names.macro("NEWTON_REFRESHES"),
                                       value=f"{step.newton.refreshes}U",
                                       comment="Jacobian refreshes per step, at most"))
        ctx["define_width"] = max(len(d["name"]) for d in ctx["defines"])
        tol = step.newton.tolerance_for(precision)
        w.constants.append(dict(
            name=f"{w.up}_NEWTON_TOL", value=w.printer.literal(sp.Rational(repr(tol))),
            comment=f"converged when max |correction| / scale <= {tol:.6g}"))
        if step.newton.monitored:
            w.constants.append(dict(
                name=f"{w.up}_REFRESH_AT",
                value=w.printer.literal(sp.Rational(repr(NEWTON_REFRESH_RATE))),
                comment="refresh J when a correction exceeds this share of the one before"))
    solver = None
    if step.scheme != EXACT:
        solver = _Solver(w, step.solve)
        if not step.prefactored:
            functions.append(block_function(
                w, step.jacobian.block, "jacobian", "tw_jac",
                f"Structural non-zeros of df/dx ({len(step.jacobian.pattern)} of "
                f"{model.nx * model.nx}), row by row: "
                + ", ".join(f"[{i}][{j}]" for i, j in step.jacobian.pattern) + "."))
        if step.dfdt is not None:
            functions.append(block_function(w, step.dfdt, "dfdt", "tw_ft",
                                            "Explicit time derivative df/dt."))
        factor = factor_function(w, step.solve)
        if factor:
            functions.append(factor)
        functions += solve_functions(w, step.solve)
    body_builders = {DIAGONALLY_IMPLICIT: _dirk_body, FULLY_IMPLICIT: _fully_implicit_body,
                     LINEARLY_IMPLICIT: _rosenbrock_body}
    inner = Sections()
    if solver is not None and not step.prefactored:
        inner.add(Line(f"{model.name}_jacobian(tw_t, tw_x, tw_ctx, tw_jac);"))
    if step.scheme == EXACT:
        decl = _exact_body(w, inner)
    else:
        decl = body_builders[step.scheme](w, solver, inner)
    if solver is not None:
        if not step.prefactored:
            count = len(step.jacobian.pattern) * (len(step.stages) if w.per_stage else 1)
            decl.append(f"{names.real_t} tw_jac[{count}];")
        decl += solver.declarations()
    uses_time = step.scheme != EXACT
    step_name = w.const("STEP", step.h, "h") if uses_time and not step.safeguards.pieces \
        else None
    per_step = step_error_variable(step)
    largest = (per_step, "tw_err_max") if per_step and step.error_function and \
        step.safeguards.pieces else None
    doc = f"One tick: {step.substeps} step(s) of {step.method.name}; the context is written only " \
          "after every check passed."
    if step.error_function:
        body = advance_body(step, names, w.printer, w.constants, decl, inner, step_name,
                            on_success=("*tw_err = tw_err_max;",), estimate=largest)
        functions += error_estimate_functions(step, names, body, ctx)
    else:
        body = advance_body(step, names, w.printer, w.constants, decl, inner, step_name)
        functions.append(dict(doc=doc, signature=f"{names.status_t} {model.name}_advance("
                              f"{names.ctx_t} *tw_ctx)", body=body))
    if model.outputs:
        functions.append(outputs_function(step, names, w.printer))
    ctx["constants"] = w.constants
    ctx["functions"] = functions
    return ctx
