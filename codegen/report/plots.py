"""Pictures of the advice and the checks (matplotlib, Agg backend; PNG or SVG by file suffix).

Three pictures: the stability region of a method with the model's h*lambda points over it; the
convergence plot of an order study (error against dt, log-log) with the fitted order; and the
trajectories of the C build against the reference. Every function writes one file and returns
its path; the files carry no timestamps (SVG and PNG metadata dates are switched off).
"""

from __future__ import annotations

import io
from pathlib import Path

import numpy as np

from ..errors import CheckError
from ..output import write_files

FORMATS = ("png", "svg")
# Pixels per inch of PNG output: a readable figure of about 1000 x 700 pixels.
DPI = 110
# Grid points per axis for the |R(z)| <= 1 contour.
REGION_GRID = 401


def _pyplot():
    try:
        import matplotlib
    except ImportError:
        raise CheckError("--plot: needs matplotlib; install it with pip install "
                         "'tickwright[plots]'") from None
    matplotlib.use("Agg")
    matplotlib.rcParams["svg.hashsalt"] = "tickwright"  # stable ids: reproducible SVG
    import matplotlib.pyplot as plt

    return plt


def _save(fig, path: Path) -> Path:
    path = Path(path)
    suffix = path.suffix.lstrip(".").lower()
    if suffix not in FORMATS:
        raise CheckError(f"{path}: picture format must be one of {', '.join(FORMATS)}")
    metadata = {"Date": None} if suffix == "svg" else {"Software": None}
    buffer = io.BytesIO()
    fig.savefig(buffer, format=suffix, dpi=DPI, metadata=metadata)
    import matplotlib.pyplot as plt

    plt.close(fig)
    write_files([(path, buffer.getvalue())], CheckError, "choose a writable folder for --plot")
    return path


def region_extent(points: np.ndarray, real_limit: float | None, imag_limit: float | None):
    """(x_min, x_max, y_max) of the window: the h*lambda points and the bounded region's ends."""
    xs = [-3.5, 0.5]
    ys = [3.0]
    if real_limit is not None:
        xs.append(1.15 * real_limit)
    if imag_limit is not None:
        ys.append(1.15 * imag_limit)
    if points.size:
        xs += [1.1 * float(points.real.min()), 1.1 * float(points.real.max())]
        ys.append(1.1 * float(np.abs(points.imag).max()))
    x_min, x_max = min(xs), max(xs)
    span = x_max - x_min
    return x_min - 0.05 * span, max(x_max, 0.1 * span), max(ys + [0.35 * span])


def stability_region(method, hlambda, path, title: str = "") -> Path:
    """Shade |R(z)| <= 1 of the method and mark the model's h*lambda points.

    hlambda: complex points z = h * lambda; the ones outside the region are drawn as crosses.
    """
    from ..methods import analysis

    plt = _pyplot()
    points = np.atleast_1d(np.asarray(hlambda, dtype=complex))
    report = analysis.analyse(method)
    R = report.stability.function
    x_min, x_max, y_max = region_extent(points, report.real_axis_limit, report.imag_axis_limit)
    xr = np.linspace(x_min, x_max, REGION_GRID)
    yr = np.linspace(-y_max, y_max, REGION_GRID)
    X, Y = np.meshgrid(xr, yr)
    stable = analysis.in_stability_region(R, X + 1j * Y)
    fig, ax = plt.subplots(figsize=(8, 6))
    ax.contourf(X, Y, stable.astype(float), levels=[0.5, 1.5], colors=["#cfe3f5"])
    ax.contour(X, Y, stable.astype(float), levels=[0.5], colors=["#1f5f9f"], linewidths=1.2)
    ax.axhline(0, color="0.5", linewidth=0.6)
    ax.axvline(0, color="0.5", linewidth=0.6)
    if points.size:
        inside = analysis.in_stability_region(R, points)
        ax.plot(points.real[inside], points.imag[inside], "o", color="#2a8c2a", markersize=5,
                label="h·λ inside the region")
        if np.any(~inside):
            ax.plot(points.real[~inside], points.imag[~inside], "x", color="#c0392b",
                    markersize=8, mew=2, label="h·λ outside (unstable)")
        ax.legend(loc="upper left")
    ax.set_xlim(x_min, x_max)
    ax.set_ylim(-y_max, y_max)
    ax.set_xlabel("Re z")
    ax.set_ylabel("Im z")
    ax.set_title(title or f"stability region |R(z)| ≤ 1 of {method.id} (shaded)")
    ax.grid(True, alpha=0.3)
    return _save(fig, path)


def convergence(study, path, title: str = "") -> Path:
    """Error at the end of the order study against dt, log-log, with the fitted order's line."""
    plt = _pyplot()
    if not study.errors_c:
        raise CheckError(f"{path}: the order study has no measured errors to plot "
                         f"({study.note or 'no levels'})")
    dts = study.horizon / np.asarray(study.steps, float)
    errors = np.asarray(study.errors_c, float)
    fig, ax = plt.subplots(figsize=(7, 5))
    ax.loglog(dts, errors, "o-", label="C build (double) vs solve_ivp")
    if study.errors_reference:
        ax.loglog(dts, np.asarray(study.errors_reference, float), "s", mfc="none",
                  label="Python reference")
    if study.measured is not None:
        fit = errors[-1] * (dts / dts[-1]) ** study.measured
        ax.loglog(dts, fit, "--", color="0.4", label=f"fitted slope {study.measured:.2f}")
    if study.expected:
        ideal = errors[0] * (dts / dts[0]) ** study.expected
        ax.loglog(dts, ideal, ":", color="0.6", label=f"order {study.expected}")
    ax.set_xlabel("step h [s]")
    ax.set_ylabel("max |error| at the end of the horizon")
    ax.set_title(title or "convergence")
    ax.grid(True, which="both", alpha=0.3)
    ax.legend()
    return _save(fig, path)


def trajectories(ts, runs: dict, names, path, title: str = "") -> Path:
    """One panel per state: each run's trajectory (runs: label -> (n, nx) array) against ts."""
    plt = _pyplot()
    names = list(names)
    fig, axes = plt.subplots(len(names), 1, figsize=(8, 2.4 * len(names) + 0.8), sharex=True,
                             squeeze=False)
    styles = ["-", "--", ":", "-."]
    for i, name in enumerate(names):
        ax = axes[i][0]
        for k, (label, xs) in enumerate(runs.items()):
            ax.plot(ts[: len(xs)], np.asarray(xs)[:, i], styles[k % len(styles)], label=label)
        ax.set_ylabel(name)
        ax.grid(True, alpha=0.3)
    axes[0][0].legend(loc="best", fontsize="small")
    axes[-1][0].set_xlabel("t [s]")
    fig.suptitle(title or "trajectories")
    fig.tight_layout()
    return _save(fig, path)


def convergence_title(model_name: str, method_id: str, study) -> str:
    """The convergence picture's title: the measured order, or the study's note when it has none
    (an exact discretization has no order to measure)."""
    if study.measured is None:
        return f"{model_name}: {method_id}, {study.note or 'no measured order'}"
    return (f"{model_name}: {method_id}, measured order {study.measured:.2f} (expected "
            f"{study.expected})")


def check_pictures(model, method, dt: float, substeps: int, precisions, ticks: int, report,
                   out_dir, fmt: str = "png", options: dict | None = None, inputs=None,
                   parameters=None) -> list[Path]:
    """The pictures of `tickwright check`: trajectories of the C builds and the convergence plot.

    options: the generation options of implicit methods the check used, so the pictures show the
    same C as the check; inputs, parameters: the check's inputs and tunable parameter values per
    tick (None: the input sweep and the model's values).
    """
    from .. import reference
    from ..build import build
    from ..pipeline import generate
    from ..run import as_precision, run_c
    from ..verify import excitation
    from ..verify.scenario import tunable_as_inputs

    out = Path(out_dir)
    written = []
    u = excitation(model, ticks) if inputs is None else np.asarray(inputs)
    runs = {}
    ts = None
    for precision in precisions:
        csource = generate(model, method, dt, substeps, precision, **(options or {}))
        c_run = run_c(build(csource, model), model, as_precision(u, precision),
                      parameters=parameters)
        runs[f"C ({precision})"] = c_run.xs[: c_run.completed + 1]
        ts = c_run.ts
    if parameters is not None:  # the reference reads per-tick parameters as inputs
        model, u = tunable_as_inputs(model), np.hstack([u, parameters])
    ref = reference.run(model, method, dt, substeps, u)
    runs["Python reference"] = ref.xs[: ref.completed + 1]
    exact = reference.high_accuracy(model, dt, u)
    runs["solve_ivp (DOP853, rtol 1e-12)"] = exact.xs[: exact.completed + 1]
    ts = np.arange(ticks + 1) * dt if ts is None else ts
    written.append(trajectories(
        ts, runs, [s.name for s in model.states],
        out / f"{model.name}-{method.id}-trajectories.{fmt}",
        title=f"{model.name}: {method.id}, dt = {dt:g} s, C builds against the references"))
    if report.order is not None and report.order.errors_c:
        written.append(convergence(
            report.order, out / f"{model.name}-{method.id}-convergence.{fmt}",
            title=convergence_title(model.name, method.id, report.order)))
    return written


def advice_pictures(model, advice, methods: dict, out_dir, fmt: str = "png") -> list[Path]:
    """The pictures of `tickwright advise`: the stability region of the chosen method (and of the
    recommended one when different) with h*lambda at its tick."""
    out = Path(out_dir)
    written = []
    ids = [advice.chosen] if advice.chosen else []
    if advice.recommended and advice.recommended["method"] not in ids:
        ids.append(advice.recommended["method"])
    for method_id in ids:
        row = advice.row(method_id)
        if method_id == advice.chosen and advice.requested_dt:
            dt = advice.requested_dt
        elif row is not None and row.dt:
            dt = row.dt
        else:
            dt = row.max_stable_dt if row and np.isfinite(row.max_stable_dt) else None
        if dt is None:
            continue
        written.append(stability_region(
            methods[method_id], np.asarray(advice.eigenvalues) * dt,
            out / f"{model.name}-{method_id}-stability.{fmt}",
            title=f"{model.name}: {method_id} at dt = {dt:g} s, h·λ over the envelope"))
    return written
