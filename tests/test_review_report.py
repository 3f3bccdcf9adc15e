"""tickwright report: one self-contained HTML page, checked as text and in a real headless browser
(Chromium over the DevTools protocol, tests/browser.py): every picture loads, nothing is fetched,
no console error, the screenshot is not blank and the page prints to PDF."""

from __future__ import annotations

import base64
import hashlib
import json
import re
import shlex
import xml.dom.minidom

import numpy as np
import pytest
import sympy as sp
from click.testing import CliRunner

from codegen.cli import main
from codegen.report.html import CAUTIONS, equation

from browser import load
from conftest import EXAMPLES

HEATER = EXAMPLES / "heater.toml"
ARGS = ["--method", "rk4", "--dt", "0.5", "--target", "cortex-m4f"]
# The pictures of a report: the stability region, the trajectories and the convergence plot.
PICTURES = 3


def run(*args):
    return CliRunner().invoke(main, [str(a) for a in args])


@pytest.fixture(scope="module")
def report(tmp_path_factory):
    """The heater's review page with a cortex-m4f run: (path, its text, the CLI result)."""
    out = tmp_path_factory.mktemp("review") / "heater-review.html"
    result = run("report", HEATER, *ARGS, "--out", out)
    assert result.exit_code == 0, result.output
    return out, out.read_text(encoding="utf-8"), result


def test_the_page_needs_nothing_else(report):
    _, page, result = report
    assert result.output.strip().endswith("verdict PASS")
    assert page.startswith("<!DOCTYPE html>") and "<style>" in page
    # No script, no linked file, no web font, no address outside the page.
    for banned in ("<script", "<link", "@import", "@font-face", "url(", "http:", "https:"):
        assert banned not in page, banned
    sources = re.findall(r'src="([^"]*)"', page)
    assert len(sources) == PICTURES
    for src in sources:
        assert src.startswith("data:image/svg+xml;base64,")
        svg = xml.dom.minidom.parseString(base64.b64decode(src.split(",", 1)[1]))
        assert svg.documentElement.tagName == "svg"


def test_the_page_holds_what_a_review_signs_off(report):
    out, page, _ = report
    for section in ("Cautions", "Model heater", "Method and tick", "Advice", "Checks", "Targets",
                    "Command line and fingerprints", "Sign-off"):
        assert f">{section}</h2>" in page, section
    for caution in CAUTIONS:
        assert caution.split(";")[0] in page.replace("&#39;", "'")
    # The model: every quantity with its unit, and the equations as MathML.
    for cell in ("<code>T</code></td><td>degC</td>", "<code>duty</code></td><td>1</td>",
                 "<code>C_th</code></td><td>J/K</td>", "<code>T_surface</code></td>"):
        assert cell in page, cell
    assert page.count("<math ") == 2  # dT/dt and T_surface
    assert "classical RK4 (<code>rk4</code>)" in page
    assert "within rk4&#39;s stability limit" in page
    assert "Recommended: <strong>" in page
    # The check lines and the target figures.
    for label in ("cross-check float", "accuracy float", "order"):
        assert f"<td>{label}</td><td class=\"ok\">ok</td>" in page, label
    assert re.search(r"<td><code>cortex-m4f</code></td><td>float</td><td class=\"ok\">ok</td>"
                     r"<td>yes \(exact bits\)</td>(<td class=\"num\">\d+</td>){3}<td>yes</td>"
                     r"<td class=\"num\">0</td><td>2.3, 2.5, 8.14</td>", page)
    # The exact command line, quoted for a shell.
    assert shlex.join(["tickwright", "report", str(HEATER), *ARGS, "--out", str(out)]) in page


def test_fingerprints_are_the_sha256_of_the_model_and_of_the_emitted_files(report, tmp_path):
    _, page, _ = report
    assert hashlib.sha256(HEATER.read_bytes()).hexdigest() in page
    # The report checks the target's default precision (float): the files emit writes for it.
    result = run("emit", HEATER, "--method", "rk4", "--dt", "0.5", "--precision", "float",
                 "--out", tmp_path)
    assert result.exit_code == 0, result.output
    for name in ("heater.h", "heater.c"):
        digest = hashlib.sha256((tmp_path / name).read_bytes()).hexdigest()
        assert f"<code>{name} (float)</code></td><td class=\"mono hash\">{digest}</td>" in page


def test_chromium_renders_every_picture_without_errors_and_prints(report, tmp_path):
    out, _, _ = report
    page = load(out, tmp_path / "browser")
    assert page.title.startswith("heater: classical RK4 at dt = 0.5 s")
    assert len(page.images) == PICTURES
    assert all(i["complete"] and i["width"] > 0 for i in page.images), page.images
    assert page.errors == []
    # The page itself, then its inline pictures: nothing from anywhere else.
    assert page.requests[0] == out.resolve().as_uri()
    assert all(url.startswith("data:") for url in page.requests[1:]), page.requests
    assert page.math_width > 20  # the browser laid the MathML out
    pixels = _pixels(page.screenshot)
    assert pixels.shape[0] > 2000 and pixels.shape[1] >= 1000  # the whole page, not the window
    ink = np.mean(pixels.min(axis=2) < 200)
    assert 0.02 < ink < 0.6, ink  # text and pictures on a white page: neither blank nor black
    colours = pixels.reshape(-1, 3).astype(np.int64) @ np.array([1 << 16, 1 << 8, 1])
    assert len(np.unique(colours)) > 100  # the pictures' colours, not only black text
    pdf = page.pdf.read_bytes()
    assert pdf.startswith(b"%PDF-") and len(re.findall(rb"/Type\s*/Page\b", pdf)) >= 3


def _pixels(path) -> np.ndarray:
    from PIL import Image

    return np.asarray(Image.open(path).convert("RGB"))


def test_the_browser_check_sees_broken_images_errors_and_outside_requests(tmp_path):
    # The same checks on a page that breaks each rule, so they cannot pass by accident.
    bad = tmp_path / "bad.html"
    bad.write_text('<!DOCTYPE html><html><head><title>bad</title></head><body><p>text</p>'
                   '<img src="data:image/png;base64,AAAA" alt="broken">'
                   '<img src="http://127.0.0.1:9/none.png" alt="outside">'
                   '<script>console.error("deliberate");</script></body></html>')
    page = load(bad, tmp_path / "browser")
    assert [i["width"] for i in page.images] == [0, 0]
    assert any("deliberate" in e for e in page.errors)
    assert "http://127.0.0.1:9/none.png" in page.requests


def test_a_failed_check_writes_the_page_with_its_verdict_and_exits_1(tmp_path):
    out = tmp_path / "r.html"
    # An accuracy target of 1e-12 of full scale is beyond any float build.
    result = run("report", HEATER, "--method", "euler", "--dt", "0.5", "--precision", "float",
                 "--no-advice", "--no-order", "--tolerance", "1e-12", "--out", out, "--json")
    assert result.exit_code == 1
    data = json.loads(result.stdout)
    assert data["passed"] is False and data["report"] == str(out)
    assert data["fingerprints"][0]["sha256"] == hashlib.sha256(HEATER.read_bytes()).hexdigest()
    page = out.read_text()
    assert 'class="verdict fail">FAIL' in page and "The check FAILED" in page
    assert "Not run (<code>--no-advice</code>)." in page
    assert "No target was run" in page


def test_an_unstable_tick_writes_nothing(tmp_path):
    out = tmp_path / "r.html"
    # The axis' electrical pole near -2970/s: Euler at 1 ms has h*lambda = -2.97, beyond -2, the
    # end of forward Euler's region |1 + z| <= 1 on the real axis (common practice, no source).
    result = run("report", EXAMPLES / "axis.toml", "--method", "euler", "--dt", "1e-3",
                 "--out", out)
    assert result.exit_code == 1 and "--force-run" in result.output and not out.exists()


def test_piecewise_and_atan2_are_rendered_as_the_model_means_them():
    x, y = sp.symbols("x y", real=True)
    text = str(equation("d/dt x", sp.Piecewise((x, x < 0), (2 * x, True))))
    assert "<mtable>" in text and "<mtext>otherwise</mtext>" in text
    assert "<mo>&lt;</mo>" in text and "<mo><</mo>" not in text
    assert "<mfrac><mrow><mi>d</mi><mi>x</mi></mrow>" in text
    assert "<mi>atan2</mi>" in str(equation("y", sp.atan2(y, x)))
