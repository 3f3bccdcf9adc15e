"""Step-size advice: which method, which tick and which precision suit a model.

Model -> Advice. The stages:
1. envelope: operating points from the `range` of states, inputs and parameters (corners, the
   centre, a few interior points; the initial point when nothing has a range);
2. eigenvalues of the Jacobian df/dx at every point;
3. per candidate method: the largest stable step (every h*lambda in the stability region, decided
   exactly on each ray), the error at a step size (embedded pair or step doubling per step, step
   doubling of the whole run for the global error), and the operations per simulated second;
4. the recommendation: the cheapest method and tick that are stable with a margin and meet the
   tolerance, and whether float32 is enough.

Error measures are relative to each state's full scale: max(|low|, |high|) of its range, or the
largest |x| of the simulated run for a state without a range.

The simulation here is a numerical model of each method in numpy (explicit stages, Newton on the
stage equations of implicit tableaux, the linear solves of Rosenbrock methods, the matrix
exponential of the exact method); the generated C is checked against it by the tests.

References
----------
HNW: Hairer, Norsett & Wanner, Solving ODEs I, 2nd ed., 1993, II.4 (step doubling and embedded
pairs, from memory). HW: Hairer & Wanner, Solving ODEs II, 2nd ed., 1996, IV.2-IV.3 (stability
regions), IV.7 (Rosenbrock), IV.8 (simplified Newton iterations) (from memory).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
import sympy as sp

from ..discretize import linear_parts as exact_linear_parts
from ..errors import CheckError, ModelError, TickwrightError
from ..methods import EXACT, EXPLICIT, LINEARLY_IMPLICIT, Tableau
from ..methods import analysis
from ..model import Model
from ..verify.scenario import excitation, state_scales
from .cost import operations_per_step
from .envelope import _directions, decaying, eigenvalues, envelope


# Default accuracy target: 0.1 % of each state's full scale over the horizon (common practice, no
# source: a tenth of a percent of full scale is the resolution of a 10-bit converter).
DEFAULT_TOLERANCE = 1e-3
# Use at most this fraction of the stability limit: the eigenvalues are sampled, not bounded, and
# nonlinear models move them (common practice, no source).
DEFAULT_MARGIN = 0.8
# Share of the tolerance given to truncation and to round-off each, so that together they meet it.
TRUNCATION_SHARE = 0.5
ROUNDOFF_SHARE = 0.5
# The advice horizon: this many of the slowest non-zero time constants of the envelope.
HORIZON_TIME_CONSTANTS = 2.0
# Fewer steps than this over the horizon do not resolve the dynamics the error is measured on.
MIN_STEPS = 10
# More steps than this per simulated run make the advice slow; such a tick is extrapolated instead.
MAX_STEPS = 2000
# At most this many attempts to find the largest tick that meets the tolerance.
MAX_ATTEMPTS = 5
# Tick periods are rounded down to these mantissas (times a power of ten), like firmware timers.
NICE_MANTISSAS = (1.0, 1.25, 1.5, 2.0, 2.5, 3.0, 4.0, 5.0, 6.0, 8.0)
# Simplified Newton on implicit stages: converged when the update is below this relative size.
NEWTON_TOL = 1e-12
NEWTON_MAX = 50
# Rounding units per stage and step, as the cross-check's rounding bound (verify.ULPS_PER_STAGE).
ULPS_PER_STAGE = 4
EPS = {"float": 2.0 ** -24, "double": 2.0 ** -53}


# Geometric grid of h*|lambda| for the numerical pre-filter of the ray limits.
_RAY_GRID = np.geomspace(1e-6, 1e4, 4001)
def max_stable_dt(method, values, margin: float = 1.0) -> float:
    """Largest h with every h*lambda in the stability region of any method kind (math.inf if none).

    A numerical scan of each ray picks the eigenvalues that could bind (within 2 % of the smallest
    scanned limit); the limit is then decided exactly on those rays as in analysis.max_stable_dt.
    Growing modes (Re lambda > 0) must be filtered out by the caller (see `decaying`).
    """
    values = _directions(np.asarray(values, dtype=complex))
    pq = analysis.stability_coefficients(method)
    if pq is None or values.size == 0:
        return math.inf
    if analysis.analyse(method).a_stable and np.all(values.real <= 0):
        return math.inf
    region = analysis.analyse(method).stability.function
    numeric = []
    for lam in values:
        z = _RAY_GRID * lam / abs(lam)
        stable = analysis.in_stability_region(region, z)
        bad = np.flatnonzero(~stable)
        numeric.append(_RAY_GRID[bad[0]] / abs(lam) if bad.size else math.inf)
    numeric = np.array(numeric)
    finite = numeric[np.isfinite(numeric)]
    bound = 1.02 * float(finite.min()) if finite.size else math.inf
    candidates = [lam for lam, h in zip(values, numeric) if h <= bound or not np.isfinite(h)]
    limit = math.inf
    for lam in candidates[:64]:
        h = analysis.ray_limit(pq, lam)
        if h is not None:
            limit = min(limit, h)
    return limit * margin


def nice_floor(dt: float) -> float:
    """Round a tick period down to a firmware-friendly value (NICE_MANTISSAS times 10^k)."""
    if not math.isfinite(dt) or dt <= 0:
        return dt
    exponent = math.floor(math.log10(dt))
    for _ in range(2):
        for m in reversed(NICE_MANTISSAS):
            value = float(f"{m}e{exponent}")
            if value <= dt * (1 + 1e-12):
                return value
        exponent -= 1
    return dt  # pragma: no cover - a mantissa of 1 always fits one decade down


# ---------------------------------------------------------------------------------------------
# Numerical model of each method kind, for the error estimates
# ---------------------------------------------------------------------------------------------

_FUNCTIONS: dict = {}


def _model_functions(model: Model):
    """f(t, x, u) and df/dx(t, x, u) as fast scalar functions at the parameter values.

    Made once per model object; the same expressions as reference.rate_function, lambdified
    with the math module on scalars (the advice runs many small steps).
    """
    entry = _FUNCTIONS.get(id(model))
    if entry is not None and entry[0] is model:
        return entry[1], entry[2]
    values = {p.symbol: sp.Rational(repr(float(p.value))) for p in model.parameters}
    args = [model.t, *model.x, *model.u]
    rates = [e.xreplace(values) for e in model.f]
    J = sp.Matrix(model.f).jacobian(sp.Matrix(model.x)).xreplace(values)
    f_fn = sp.lambdify(args, rates, modules="math")
    j_fn = sp.lambdify(args, list(J), modules="math")
    nx = model.nx

    def f(t, x, u):
        try:
            return np.array(f_fn(t, *x, *u), dtype=np.float64)
        except (OverflowError, ValueError, ZeroDivisionError):
            return np.full(nx, np.nan)

    def jac(t, x, u):
        try:
            return np.array(j_fn(t, *x, *u), dtype=np.float64).reshape(nx, nx)
        except (OverflowError, ValueError, ZeroDivisionError):
            return np.full((nx, nx), np.nan)

    _FUNCTIONS[id(model)] = (model, f, jac)
    return f, jac


class Stepper:
    """One step of a method on the model in float64: step(t, x, u, h) -> (x_next, local_err).

    local_err is the embedded difference h * sum (b_j - b_hat_j) k_j when the method has an
    embedded pair, else None. iterations counts the Newton iterations of implicit stages.
    """

    def __init__(self, model: Model, method):
        self.model = model
        self.method = method
        self.kind = method.kind
        self.f, self.jac = _model_functions(model)
        self.iterations = 0
        self.solves = 0
        if isinstance(method, Tableau):
            self.a, self.b, self.c = method.floats()
            self.b_hat = None if method.b_hat is None else \
                np.array([float(v) for v in method.b_hat])
        elif self.kind == LINEARLY_IMPLICIT:
            self.gamma = float(method.gamma)
            self.alpha = np.array([[float(v) for v in r] for r in method.alpha])
            self.coupling = np.array([[float(v) for v in r] for r in method.coupling])
            self.b = np.array([float(v) for v in method.b])
            self.time = np.array([float(v) for v in getattr(method, "time", [0] * len(self.b))])
        elif self.kind == EXACT:
            self.linear = linear_parts(model)
            if self.linear is None:
                raise CheckError(f"{model.source}: the exact method needs a model that is linear "
                                 "in its states and inputs and does not use time")
            self._cache: dict = {}

    def step(self, t, x, u, h):
        if self.kind == EXPLICIT:
            return self._explicit(t, x, u, h)
        if isinstance(self.method, Tableau):
            return self._implicit(t, x, u, h)
        if self.kind == LINEARLY_IMPLICIT:
            return self._rosenbrock(t, x, u, h), None
        return self._exact(x, u, h), None

    def _explicit(self, t, x, u, h):
        a, b, c = self.a, self.b, self.c
        k = np.zeros((len(b), len(x)))
        for i in range(len(b)):
            y = x + h * (a[i, :i] @ k[:i]) if i else x
            k[i] = self.f(t + c[i] * h, y, u)
        err = None if self.b_hat is None else h * ((b - self.b_hat) @ k)
        return x + h * (b @ k), err

    def _implicit(self, t, x, u, h):
        """Simplified Newton on all stages at once, Jacobian frozen at (t, x) (HW IV.8)."""
        a, b, c = self.a, self.b, self.c
        s, n = len(b), len(x)
        J = self.jac(t, x, u)
        if not np.all(np.isfinite(J)):
            return np.full(n, np.nan), None
        # Small systems (s * n of a few dozen): one inverse is cheaper than repeated LU solves.
        W = np.linalg.inv(np.eye(s * n) - h * np.kron(a, J))
        k = np.tile(self.f(t, x, u), (s, 1))
        for it in range(NEWTON_MAX):
            y = x + h * (a @ k)
            g = k - np.array([self.f(t + c[i] * h, y[i], u) for i in range(s)])
            dk = -(W @ g.reshape(-1)).reshape(s, n)
            k = k + dk
            self.iterations += 1
            if np.max(np.abs(h * dk)) <= NEWTON_TOL * max(1.0, float(np.max(np.abs(x)))):
                break
        self.solves += 1
        err = None if self.b_hat is None else h * ((b - self.b_hat) @ k)
        return x + h * (b @ k), err

    def _rosenbrock(self, t, x, u, h):
        n = len(x)
        J = self.jac(t, x, u)
        if not np.all(np.isfinite(J)):
            return np.full(n, np.nan)
        W = np.linalg.inv(np.eye(n) - self.gamma * h * J)
        dfdt = self._time_derivative(t, x, u)
        k = []
        for i in range(len(self.b)):
            y = x + h * sum((self.alpha[i, j] * k[j] for j in range(i)), np.zeros(n))
            rhs = self.f(t + h * self.alpha[i].sum(), y, u) + \
                sum((self.coupling[i, j] * k[j] for j in range(i)), np.zeros(n)) + \
                self.time[i] * h * dfdt
            k.append(W @ rhs)
        self.solves += 1
        return x + h * sum(bi * ki for bi, ki in zip(self.b, k))

    def _time_derivative(self, t, x, u):
        if self.model.t not in set().union(*[e.free_symbols for e in self.model.f]):
            return np.zeros(len(x))
        d = 1e-7 * max(1.0, abs(t))
        return (self.f(t + d, x, u) - self.f(t - d, x, u)) / (2 * d)

    def _exact(self, x, u, h):
        from scipy.linalg import expm

        A, B, e = self.linear
        key = h
        if key not in self._cache:
            n, m = A.shape[0], B.shape[1] + 1
            block = np.zeros((n + m, n + m))
            block[:n, :n] = A
            block[:n, n:] = np.hstack([B, e[:, None]])
            self._cache[key] = expm(block * h)
        E = self._cache[key]
        n = A.shape[0]
        return E[:n, :n] @ x + E[:n, n:] @ np.concatenate([np.asarray(u, float), [1.0]])


def linear_parts(model: Model):
    """(A, B, e) as float arrays with f = A x + B u + e, or None when the exact method refuses
    the model (the generator's own rule, implicit.linear_parts: nonlinear, time-dependent, or a
    tunable parameter inside the matrices)."""
    try:
        a, b, e = exact_linear_parts(model)
    except ModelError:
        return None
    to = lambda M: np.array(M.tolist(), dtype=np.float64).reshape(M.shape)
    return to(a), to(b), to(e).reshape(-1)


@dataclass(frozen=True)
class Accuracy:
    """Errors of one method at one tick over the horizon, relative to each state's full scale.

    global_error: max over ticks and states of |x_dt - x_exact| / scale, estimated by step
    doubling of the whole run; local_error: the largest one-step error (embedded pair or step
    doubling per step); completed: False when the run stopped on a non-finite value.
    """

    dt: float
    steps: int
    global_error: float
    local_error: float
    local_by: str
    completed: bool
    newton_iterations: float | None = None


def _simulate(stepper: Stepper, x0, inputs, dt, substeps=1):
    n = len(inputs)
    h = dt / substeps
    xs = np.full((n + 1, len(x0)), np.nan)
    xs[0] = x0
    x = np.array(x0, float)
    local = []
    with np.errstate(all="ignore"):
        for k in range(n):
            for m in range(substeps):
                x, err = stepper.step(k * dt + m * h, x, inputs[k], h)
                if err is not None:
                    local.append(np.abs(err))
            if not np.all(np.isfinite(x)):
                return xs, k, local
            xs[k + 1] = x
    return xs, n, local


# Ticks at which the step-doubling local error is sampled (it costs three extra steps each).
LOCAL_SAMPLES = 40


def accuracy(model: Model, method, dt: float, horizon: float, scales=None) -> Accuracy:
    """Estimate the errors of the method at tick dt over the horizon.

    The run starts at the initial states under verify.excitation (each ranged input sweeps its
    range smoothly, as a controller's tick-to-tick changes would excite a stiff model's fast
    modes, not as a step) and compares n ticks of one step dt
    with n ticks of two steps dt/2 (same inputs): for a method of order p the error of the coarse
    run is (x_dt - x_dt/2) * 2^p / (2^p - 1) (Richardson; HNW II.4, from memory). The local error
    is the embedded difference where the method has a pair, else the same doubling applied to
    single steps at LOCAL_SAMPLES ticks.
    """
    n = max(1, int(round(horizon / dt)))
    u = excitation(model, n)
    x0 = np.array([s.initial for s in model.states], float)
    order = getattr(method, "order", None)
    factor = 1.0 if order is None else 2.0 ** order / (2.0 ** order - 1.0)
    coarse = Stepper(model, method)
    xs, done, local = _simulate(coarse, x0, u, dt)
    if done < n:
        return Accuracy(dt, n, math.inf, math.inf, "none", False)
    fine = Stepper(model, method)
    xf, done_f, _ = _simulate(fine, x0, u, dt, substeps=2)
    if scales is None:
        scales = state_scales(model, xf)
    if done_f < n:
        return Accuracy(dt, n, math.inf, math.inf, "none", False)
    global_error = float(np.max(np.abs(xs - xf) / scales) * factor)
    if local:
        local_error = float(np.max(np.array(local) / scales))
        local_by = "embedded pair"
    else:
        local_error, local_by = 0.0, "step doubling"
        probe = Stepper(model, method)
        for k in np.unique(np.linspace(0, n - 1, min(n, LOCAL_SAMPLES)).astype(int)):
            one, _ = probe.step(k * dt, xs[k], u[k], dt)
            half, _ = probe.step(k * dt, xs[k], u[k], dt / 2)
            two, _ = probe.step(k * dt + dt / 2, half, u[k], dt / 2)
            local_error = max(local_error, float(np.max(np.abs(one - two) / scales) * factor))
    iterations = coarse.iterations / coarse.solves if coarse.solves and coarse.iterations else None
    return Accuracy(dt, n, global_error, local_error, local_by, True, iterations)


# ---------------------------------------------------------------------------------------------
# Cost per simulated second
# ---------------------------------------------------------------------------------------------

# ---------------------------------------------------------------------------------------------
# Float or double
# ---------------------------------------------------------------------------------------------

def roundoff(method, steps: int, precision: str, bound: bool = False) -> float:
    """Accumulated round-off over `steps` steps, relative to full scale.

    Each step adds at most ULPS_PER_STAGE * (stages + 1) rounding units of full scale (the budget
    of the cross-check's rounding bound). bound=True adds them all (worst case, N units); the
    estimate lets independent roundings add like a random walk (sqrt(N); common practice, no
    source). On a decaying model, errors older than the horizon (two slow time constants) have
    faded, so the horizon's steps are the ones that add up.
    """
    stages = max(1, getattr(method, "stages", 1))
    per_step = ULPS_PER_STAGE * (stages + 1) * EPS[precision]
    return per_step * (steps if bound else math.sqrt(steps))


def precision_for(method, steps: int, tolerance: float) -> str:
    """float when its round-off estimate fits the round-off share of the tolerance, else double."""
    return "float" if roundoff(method, steps, "float") <= ROUNDOFF_SHARE * tolerance else "double"


# ---------------------------------------------------------------------------------------------
# The advice
# ---------------------------------------------------------------------------------------------

@dataclass(frozen=True)
class MethodAdvice:
    """One row of the advice table (times in seconds, errors relative to full scale)."""

    id: str
    name: str
    kind: str
    order: int | None
    max_stable_dt: float
    dt: float | None
    accuracy: Accuracy | None
    ops_per_step: int
    cost_note: str
    note: str = ""

    @property
    def cost_per_second(self) -> float | None:
        return None if not self.dt else self.ops_per_step / self.dt

    @property
    def meets(self) -> bool:
        return self.dt is not None and self.accuracy is not None and self.accuracy.completed

    def to_dict(self) -> dict:
        return dict(id=self.id, name=self.name, kind=self.kind, order=self.order,
                    max_stable_dt=_finite(self.max_stable_dt), dt=self.dt,
                    ops_per_step=self.ops_per_step, cost_per_second=self.cost_per_second,
                    cost_note=self.cost_note, note=self.note,
                    global_error=None if self.accuracy is None else _finite(
                        self.accuracy.global_error),
                    local_error=None if self.accuracy is None else _finite(
                        self.accuracy.local_error),
                    local_error_by=None if self.accuracy is None else self.accuracy.local_by)


@dataclass(frozen=True)
class Advice:
    """Everything `tickwright advise` reports."""

    model: str
    tolerance: float
    margin: float
    horizon: float
    points: int
    ranged: tuple[str, ...]
    eigenvalues: np.ndarray
    methods: tuple[MethodAdvice, ...]
    chosen: str | None
    chosen_max_stable_dt: float | None
    requested_dt: float | None
    requested: dict | None
    recommended: dict | None
    precision: dict | None
    warnings: tuple[str, ...] = field(default_factory=tuple)

    def row(self, method_id: str) -> MethodAdvice | None:
        return next((m for m in self.methods if m.id == method_id), None)

    def to_dict(self) -> dict:
        return dict(model=self.model, tolerance=self.tolerance, margin=self.margin,
                    horizon=self.horizon, operating_points=self.points,
                    ranged=list(self.ranged),
                    eigenvalues=[[float(v.real), float(v.imag)] for v in self.eigenvalues],
                    method=self.chosen, max_stable_dt=_finite(self.chosen_max_stable_dt),
                    requested_dt=self.requested_dt, requested=self.requested,
                    recommended=self.recommended, precision=self.precision,
                    methods=[m.to_dict() for m in self.methods], warnings=list(self.warnings))


def _finite(v):
    return None if v is None or (isinstance(v, float) and not math.isfinite(v)) else v


def default_horizon(values: np.ndarray) -> float:
    """HORIZON_TIME_CONSTANTS of the slowest non-zero decay in the envelope (1 s if none)."""
    rates = np.abs(values[values != 0])
    return HORIZON_TIME_CONSTANTS / float(rates.min()) if rates.size else 1.0


def candidates() -> list:
    """Every built-in method, looked up at run time (implicit ones join when they are built in)."""
    from ..methods import builtin, builtin_ids

    return [builtin(i) for i in builtin_ids()]


def _search_dt(model, method, dt_cap: float, horizon: float, tolerance: float, scales):
    """The largest nice tick <= dt_cap whose estimated global error meets the truncation share."""
    target = TRUNCATION_SHARE * tolerance
    order = getattr(method, "order", None) or 1
    dt = nice_floor(min(dt_cap, horizon / MIN_STEPS))
    best, last, tried = None, None, set()
    for _ in range(MAX_ATTEMPTS):
        if dt in tried or horizon / dt > MAX_STEPS:
            break
        tried.add(dt)
        acc = accuracy(model, method, dt, horizon, scales)
        last = acc
        if acc.completed and acc.global_error <= target:
            best = acc
            if acc.global_error == 0:
                break
            grow = min(4.0, 0.8 * (target / acc.global_error) ** (1.0 / order))
            nxt = nice_floor(min(dt_cap, horizon / MIN_STEPS, dt * grow))
            if nxt <= dt:
                break
        else:
            if not acc.completed or not math.isfinite(acc.global_error):
                shrink = 0.25
            else:
                shrink = min(0.8, 0.8 * (target / acc.global_error) ** (1.0 / order))
            nxt = nice_floor(dt * shrink)
            if best is not None and nxt <= best.dt:
                break
        dt = nxt
    return best, last


def advise(model: Model, method=None, dt: float | None = None,
           tolerance: float = DEFAULT_TOLERANCE, margin: float = DEFAULT_MARGIN,
           horizon: float | None = None, methods=None, progress=None) -> Advice:
    """The step-size advice for a model (see the module docstring).

    method: the method the user asked about (any kind), or None; dt: a requested tick to check;
    methods: the candidate methods (default: every built-in method).
    """
    if not 0 < tolerance < 1:
        raise CheckError(f"--tolerance: must be between 0 and 1 (a fraction of full scale), "
                         f"got {tolerance}")
    if not 0 < margin <= 1:
        raise CheckError(f"--margin: must be in (0, 1], got {margin}")
    say = progress or (lambda message: None)
    points, ranged = envelope(model)
    say(f"linearize at {len(points)} operating point(s)")
    values, warnings = eigenvalues(model, points)
    warnings = list(warnings)
    growing = values[values.real > 0]
    if growing.size:
        worst = growing[np.argmax(growing.real)]
        warnings.append(f"the model itself is unstable at some operating points (eigenvalue "
                        f"{_fmt_complex(worst)} 1/s grows); stability limits below only cover "
                        "its decaying modes")
    if np.any(values == 0):
        warnings.append("a state integrates without damping (eigenvalue 0): its truncation and "
                        "round-off errors are not forgotten and grow over long runs")
    damped = decaying(values)
    horizon = horizon or default_horizon(values)
    pool = list(candidates() if methods is None else methods)
    if method is not None and all(m.id != method.id for m in pool):
        pool.append(method)
    scales = None
    rows = []
    for m in pool:
        say(f"method {m.id}")
        rows.append(_advise_method(model, m, damped, horizon, tolerance, margin, scales))
    ok = [r for r in rows if r.meets]
    recommended, precision = None, None
    if ok:
        best = min(ok, key=lambda r: (r.cost_per_second, -r.dt))
        steps = int(round(horizon / best.dt))
        prec = precision_for(_find(pool, best.id), steps, tolerance)
        recommended = dict(method=best.id, dt=best.dt, precision=prec)
        precision = _precision_report(_find(pool, best.id), best, steps, tolerance)
    else:
        warnings.append("no candidate method meets the tolerance within "
                        f"{MAX_STEPS} steps over the horizon; loosen --tolerance or pass --horizon")
    chosen = method.id if method is not None else (recommended or {}).get("method")
    chosen_row = next((r for r in rows if r.id == chosen), None)
    requested = None
    if dt is not None and chosen_row is not None:
        requested = _requested(model, _find(pool, chosen), chosen_row, dt, damped, horizon,
                               tolerance, margin, warnings)
    return Advice(model=model.name, tolerance=tolerance, margin=margin, horizon=horizon,
                  points=len(points), ranged=tuple(ranged), eigenvalues=values,
                  methods=tuple(rows), chosen=chosen,
                  chosen_max_stable_dt=None if chosen_row is None else chosen_row.max_stable_dt,
                  requested_dt=dt, requested=requested, recommended=recommended,
                  precision=precision, warnings=tuple(warnings))


def _find(pool, method_id):
    return next(m for m in pool if m.id == method_id)


def _advise_method(model, m, damped, horizon, tolerance, margin, scales) -> MethodAdvice:
    kind = m.kind
    limit = max_stable_dt(m, damped)
    note = ""
    acc = None
    try:
        if kind == EXACT:
            try:
                exact_linear_parts(model)
            except ModelError as exc:  # the generator would refuse it: say why, in its words
                raise CheckError(str(exc).split(": ", 2)[-1]) from None
        if limit == 0:
            raise CheckError("no step size is stable: an eigenvalue lies outside the region at "
                             "every h (for example a lightly damped mode and an explicit method "
                             "without imaginary-axis stability)")
        best, last = _search_dt(model, m, margin * limit, horizon, tolerance, scales)
        acc = best or last
        if best is None:
            if last is None:
                note = f"needs more than {MAX_STEPS} steps over the {horizon:.3g} s horizon"
            else:
                note = (f"does not meet the tolerance at dt = {last.dt:.3g} s (error "
                        f"{last.global_error:.2g}); a smaller tick needs more than "
                        f"{MAX_STEPS} steps over the horizon")
        dt = best.dt if best else None
    except CheckError as exc:
        note, dt = str(exc), None
    except TickwrightError as exc:
        note, dt = str(exc), None
    iterations = acc.newton_iterations if acc is not None else None
    try:
        ops, cost_note = operations_per_step(model, m, iterations)
    except TickwrightError as exc:  # pragma: no cover - every kind has an estimate
        ops, cost_note = 0, str(exc)
    report = analysis.analyse(m)
    row_acc = acc if (acc is not None and dt is not None) else acc
    return MethodAdvice(id=m.id, name=m.name, kind=kind, order=report.order, max_stable_dt=limit,
                        dt=dt, accuracy=row_acc, ops_per_step=ops, cost_note=cost_note, note=note)


def _requested(model, method, row, dt, damped, horizon, tolerance, margin, warnings) -> dict:
    limit = row.max_stable_dt
    stable = dt <= limit
    out = dict(method=method.id, dt=dt, stable=bool(stable),
               ratio_to_limit=_finite(dt / limit) if limit > 0 else None)
    if not stable:
        worst = _binding(method, damped, dt)
        where = "" if worst is None else (f"; the eigenvalue {_fmt_complex(worst)} 1/s puts "
                                         f"h*lambda at {_fmt_complex(worst * dt)}")
        how_far = f"{dt / limit:.3g} times" if limit > 0 else "at any h, beyond"
        warnings.append(f"--dt {dt:g} s is unstable for {method.id}: {how_far} its stability limit "
                        f"{limit:.4g} s{where}")
    elif dt > margin * limit:
        warnings.append(f"--dt {dt:g} s is within the stability limit of {method.id} "
                        f"({limit:.4g} s) but above the {margin:g} margin")
    if stable and horizon / dt <= MAX_STEPS:
        acc = accuracy(model, method, dt, horizon)
        out.update(global_error=_finite(acc.global_error), local_error=_finite(acc.local_error),
                   local_error_by=acc.local_by, meets_tolerance=bool(
                       acc.completed and acc.global_error <= tolerance))
        steps = int(round(horizon / dt))
        out.update(float_roundoff=roundoff(method, steps, "float"),
                   precision=precision_for(method, steps, tolerance))
        if acc.completed and acc.global_error > tolerance:
            warnings.append(f"--dt {dt:g} s with {method.id}: estimated error "
                            f"{acc.global_error:.2g} of full scale exceeds --tolerance "
                            f"{tolerance:g}")
    ops, _ = operations_per_step(model, method)
    out["cost_per_second"] = ops / dt
    return out


def _binding(method, damped, dt):
    """The eigenvalue whose h*lambda is furthest outside the region (largest |R|)."""
    if damped.size == 0:
        return None
    from ..methods.analysis import Z

    R = sp.lambdify(Z, analysis.analyse(method).stability.function, modules="numpy")
    with np.errstate(all="ignore"):
        mags = np.abs(np.asarray(R(damped * dt), dtype=complex) * np.ones(damped.shape))
    return damped[int(np.nanargmax(mags))]


def _precision_report(method, row: MethodAdvice, steps: int, tolerance: float) -> dict:
    rf, rd = roundoff(method, steps, "float"), roundoff(method, steps, "double")
    bound = roundoff(method, steps, "float", bound=True)
    trunc = row.accuracy.global_error if row.accuracy else None
    choice = precision_for(method, steps, tolerance)
    if choice == "float":
        note = (f"float32 is enough: round-off estimate {rf:.2g} of full scale over {steps} steps "
                f"(worst case {bound:.2g}) is within {ROUNDOFF_SHARE:g} x tolerance")
    else:
        note = (f"float32 is not enough: its round-off estimate {rf:.2g} of full scale over "
                f"{steps} steps exceeds {ROUNDOFF_SHARE:g} x tolerance; use double "
                f"(estimate {rd:.2g})")
    if trunc is not None and rf > trunc:
        note += "; in float, round-off dominates truncation, so a smaller tick would not help"
    return dict(float_roundoff=rf, float_roundoff_bound=bound, double_roundoff=rd,
                truncation=trunc, choice=choice, note=note)


def _fmt_complex(v) -> str:
    v = complex(v)
    if v.imag == 0:
        return f"{v.real:.4g}"
    return f"{v.real:.4g}{'+' if v.imag >= 0 else '-'}{abs(v.imag):.4g}j"


def as_dict(advice: Advice) -> dict:
    """Plain data for --json."""
    return advice.to_dict()
