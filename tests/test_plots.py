"""Pictures (codegen.plots): the files exist, and what they show is where the math says it is."""

from __future__ import annotations

import json

import numpy as np
import pytest
from click.testing import CliRunner

# matplotlib is a test dependency (pyproject's "test" extra): a missing one fails, it never skips.
import matplotlib.figure  # noqa: E402
import matplotlib.image  # noqa: E402

from codegen.report import plots  # noqa: E402
from codegen.cli import main  # noqa: E402
from codegen.methods import builtin  # noqa: E402
from codegen.resources import examples_dir  # noqa: E402
from codegen.verify import OrderStudy  # noqa: E402

SHADE = np.array([0xcf, 0xe3, 0xf5]) / 255.0  # the stable region's fill colour in plots.py


def pixel(image, ax_box, xlim, ylim, z):
    """The RGB colour at data point z of an axes with the given pixel box and limits."""
    (x0, y0), (x1, y1) = ax_box
    h = image.shape[0]
    px = x0 + (z.real - xlim[0]) / (xlim[1] - xlim[0]) * (x1 - x0)
    py = y0 + (z.imag - ylim[0]) / (ylim[1] - ylim[0]) * (y1 - y0)
    return image[int(round(h - py)), int(round(px)), :3]


def test_euler_region_is_the_disk_around_minus_one(tmp_path, monkeypatch):
    # Forward Euler's region is |1 + z| <= 1 (Hairer, Norsett & Wanner, Solving ODEs I, 2nd ed.,
    # section IV.2, from memory):
    # z = -0.8 + 0.45i is shaded, -2.6 + 0.45i and 0.35 + 0.45i are not.
    seen = {}
    import matplotlib.figure

    save = matplotlib.figure.Figure.savefig

    def spy(fig, path, **kw):
        ax = fig.axes[0]
        seen.update(box=ax.get_window_extent().get_points() * kw["dpi"] / fig.dpi,
                    xlim=ax.get_xlim(), ylim=ax.get_ylim())
        return save(fig, path, **kw)

    monkeypatch.setattr(matplotlib.figure.Figure, "savefig", spy)
    path = plots.stability_region(builtin("euler"), np.array([-0.5, -3.0]), tmp_path / "e.png")
    image = matplotlib.image.imread(path)
    colour = lambda z: pixel(image, seen["box"], seen["xlim"], seen["ylim"], z)
    assert np.allclose(colour(-0.8 + 0.45j), SHADE, atol=0.02)
    assert not np.allclose(colour(-2.6 + 0.45j), SHADE, atol=0.02)
    assert not np.allclose(colour(0.35 + 0.45j), SHADE, atol=0.02)


def test_svg_is_reproducible_and_png_is_a_picture(tmp_path):
    method = builtin("rk4")
    points = np.array([-1.0, -3.2, -0.1 + 2j])
    a = plots.stability_region(method, points, tmp_path / "a.svg").read_bytes()
    b = plots.stability_region(method, points, tmp_path / "b.svg").read_bytes()
    assert a == b and b"<svg" in a[:400]
    assert plots.stability_region(method, points, tmp_path / "c.png").read_bytes()[:8] == \
        b"\x89PNG\r\n\x1a\n"


def test_unknown_picture_format_is_one_clear_error(tmp_path):
    from codegen.errors import CheckError

    with pytest.raises(CheckError, match="picture format"):
        plots.stability_region(builtin("euler"), np.array([-1.0]), tmp_path / "x.bmp")


def test_convergence_plot_from_an_order_study(tmp_path, monkeypatch):
    # Errors of an order-4 method, e = C h^4 exactly with h = 1 s / n. The study reports a fitted
    # order of 3.9: the picture must draw the errors at their steps, a fit of slope 3.9 and the
    # expected order's line of slope 4 (log-log).
    steps = (8, 16, 32)
    errors = tuple(1e-2 * (1 / n) ** 4 for n in steps)
    study = OrderStudy(4, 1.0, steps, errors, errors, 3.9, True)
    seen = {}
    save = matplotlib.figure.Figure.savefig

    def spy(fig, path, **kw):
        seen.update({line.get_label(): line.get_xydata() for line in fig.axes[0].get_lines()})
        return save(fig, path, **kw)

    monkeypatch.setattr(matplotlib.figure.Figure, "savefig", spy)
    path = plots.convergence(study, tmp_path / "conv.png")
    assert matplotlib.image.imread(path).shape[0] > 100
    np.testing.assert_allclose(seen["C build (double) vs solve_ivp"],
                               np.column_stack([1.0 / np.array(steps), errors]), rtol=1e-12)

    def slopes(xy):
        return np.diff(np.log(xy[:, 1])) / np.diff(np.log(xy[:, 0]))

    np.testing.assert_allclose(slopes(seen["fitted slope 3.90"]), 3.9, rtol=1e-9)
    np.testing.assert_allclose(slopes(seen["order 4"]), 4.0, rtol=1e-9)


def test_check_and_advise_write_their_pictures(tmp_path):
    runner = CliRunner()
    model = str(examples_dir() / "heater.toml")
    result = runner.invoke(main, ["check", model, "--method", "rk4", "--dt", "1", "--ticks", "50",
                                  "--plot", str(tmp_path), "--json"])
    assert result.exit_code == 0, result.output
    report = json.loads(result.stdout)
    names = sorted(p.rsplit("/", 1)[-1] for p in report["pictures"])
    assert names == ["heater-rk4-convergence.png", "heater-rk4-trajectories.png"]
    result = runner.invoke(main, ["advise", model, "--method", "rk4", "--dt", "1",
                                  "--plot", str(tmp_path), "--plot-format", "svg"])
    assert result.exit_code == 0, result.output
    assert (tmp_path / "heater-rk4-stability.svg").exists()


def test_check_plots_an_exact_method_without_a_measured_order(tmp_path):
    # zoh-exact has no order to measure: the convergence picture is titled with the study's note.
    model = str(examples_dir() / "battery.toml")
    result = CliRunner().invoke(main, ["check", model, "--method", "zoh-exact", "--dt", "1",
                                       "--plot", str(tmp_path)])
    assert result.exit_code == 0, result.output
    assert "Traceback" not in result.output
    assert sorted(p.name for p in tmp_path.iterdir()) == [
        "battery-zoh-exact-convergence.png", "battery-zoh-exact-trajectories.png"]
    study = OrderStudy(None, 2.0, (2, 4, 8), (1e-16,) * 3, (), None, True, "exact")
    assert plots.convergence_title("battery", "zoh-exact", study) == "battery: zoh-exact, exact"


def test_check_pictures_build_the_c_that_was_checked(tmp_path, monkeypatch):
    # The pictures regenerate the C: with an implicit method they must pass the same Newton
    # limit, tolerance and linear solve as the check, or they could show another build.
    import codegen.pipeline

    calls = []
    generate = codegen.pipeline.generate

    def spy(*args, **kwargs):
        calls.append(kwargs)
        return generate(*args, **kwargs)

    monkeypatch.setattr(codegen.pipeline, "generate", spy)
    model = str(examples_dir() / "heater.toml")
    result = CliRunner().invoke(main, [
        "check", model, "--method", "sdirk2", "--dt", "1", "--ticks", "20", "--no-order",
        "--newton-iterations", "3", "--newton-tol", "1e-5", "--linear-solve", "dense-lu",
        "--plot", str(tmp_path)])
    assert result.exit_code == 0, result.output
    assert len(calls) >= 2  # at least one C build per precision for the trajectories
    for kwargs in calls:
        assert (kwargs["newton_iterations"], kwargs["newton_tol"], kwargs["solver"]) == \
            (3, 1e-5, "dense-lu"), kwargs
