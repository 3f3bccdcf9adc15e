"""A headless Chromium driven over the DevTools protocol, to test pages as a browser shows them.

Chromium speaks the protocol on two pipes (--remote-debugging-pipe: it reads commands on file
descriptor 3 and writes answers and events to 4, each message JSON ended by a NUL byte), so no
network port and no extra library are needed. ``load`` opens a page and returns what a test
asserts: every image (loaded or not), console errors and uncaught exceptions, every request the
page made, a full-page PNG screenshot and a PDF print.
"""

from __future__ import annotations

import base64
import json
import os
import select
import shutil
import subprocess
import time
from dataclasses import dataclass
from pathlib import Path

# Flags for a closed machine: no sandbox (root in a container), no GPU, and none of the
# background connections (updates, sync, QUIC) that a network without internet would refuse.
FLAGS = ("--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
         "--disable-background-networking", "--disable-component-update", "--disable-sync")
# Width of the window in CSS pixels: a desktop browser's.
WIDTH = 1200
# Seconds to wait for one answer of the browser before the test fails.
TIMEOUT_S = 60
# What the page reports about itself once loaded: every image and whether it rendered, and the
# size of the first MathML formula (0 when MathML is not laid out).
PAGE_FACTS = """JSON.stringify({
  images: Array.from(document.images).map(i => ({complete: i.complete, width: i.naturalWidth,
                                                  alt: i.alt})),
  math: (() => { const m = document.querySelector('math');
                 return m ? m.getBoundingClientRect().width : 0; })(),
  title: document.title})"""


@dataclass(frozen=True)
class Page:
    """What the browser found on a page: images (complete, natural width, alt text), console
    errors and exceptions (text), the URLs of every request, the first formula's width in CSS
    pixels, the title, and the files of the screenshot (PNG) and the print (PDF)."""

    images: list[dict]
    errors: list[str]
    requests: list[str]
    math_width: float
    title: str
    screenshot: Path
    pdf: Path


def chromium() -> str:
    """The browser's command (Debian's chromium; scripts/install-toolchains.sh installs it)."""
    found = shutil.which("chromium") or shutil.which("chromium-browser")
    assert found, "chromium is missing: run scripts/install-toolchains.sh as root"
    return found


class _Browser:
    """One headless Chromium with its two protocol pipes."""

    def __init__(self, profile: Path):
        commands_in, self._commands = os.pipe()
        self._answers, answers_out = os.pipe()

        def onto_3_and_4():  # in the child, before exec: the descriptors Chromium expects
            os.dup2(commands_in, 3)
            os.dup2(answers_out, 4)

        self.proc = subprocess.Popen(
            [chromium(), *FLAGS, f"--user-data-dir={profile}", "--remote-debugging-pipe",
             "about:blank"], pass_fds=(3, 4), preexec_fn=onto_3_and_4,
            stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        os.close(commands_in)
        os.close(answers_out)
        self._buffer = b""
        self._id = 0
        self.events: list[dict] = []

    def _message(self) -> dict:
        deadline = time.monotonic() + TIMEOUT_S
        while b"\0" not in self._buffer:
            left = deadline - time.monotonic()
            assert left > 0, "chromium did not answer in time"
            ready, _, _ = select.select([self._answers], [], [], left)
            if ready:
                chunk = os.read(self._answers, 1 << 20)
                assert chunk, "chromium closed its pipe"
                self._buffer += chunk
        text, _, self._buffer = self._buffer.partition(b"\0")
        return json.loads(text)

    def send(self, method: str, params: dict | None = None, session: str | None = None) -> dict:
        self._id += 1
        message = {"id": self._id, "method": method, "params": params or {}}
        if session:
            message["sessionId"] = session
        os.write(self._commands, json.dumps(message).encode() + b"\0")
        while True:
            answer = self._message()
            if answer.get("id") == self._id:
                assert "error" not in answer, f"{method}: {answer['error']}"
                return answer["result"]
            self.events.append(answer)

    def wait_for(self, method: str) -> dict:
        while True:
            for i, event in enumerate(self.events):
                if event.get("method") == method:
                    return self.events.pop(i)
            self.events.append(self._message())

    def close(self) -> None:
        try:
            self.send("Browser.close")
        finally:
            self.proc.wait(timeout=TIMEOUT_S)
            os.close(self._commands)
            os.close(self._answers)


def load(page: Path, out: Path) -> Page:
    """Open page (a file) in headless Chromium; keep the screenshot and the PDF in out."""
    out.mkdir(parents=True, exist_ok=True)
    browser = _Browser(out / "profile")
    try:
        target = browser.send("Target.createTarget", {"url": "about:blank"})["targetId"]
        session = browser.send("Target.attachToTarget",
                               {"targetId": target, "flatten": True})["sessionId"]
        for domain in ("Runtime", "Log", "Page", "Network"):
            browser.send(f"{domain}.enable", session=session)
        browser.send("Emulation.setDeviceMetricsOverride", {"width": WIDTH, "height": 900,
                                                            "deviceScaleFactor": 1,
                                                            "mobile": False}, session=session)
        browser.send("Page.navigate", {"url": page.resolve().as_uri()}, session=session)
        browser.wait_for("Page.loadEventFired")
        facts = json.loads(browser.send("Runtime.evaluate", {"expression": PAGE_FACTS,
                                                             "returnByValue": True},
                                        session=session)["result"]["value"])
        size = browser.send("Page.getLayoutMetrics", session=session)["cssContentSize"]
        shot = browser.send("Page.captureScreenshot", {
            "format": "png", "captureBeyondViewport": True,
            "clip": {"x": 0, "y": 0, "width": size["width"], "height": size["height"],
                     "scale": 1}}, session=session)
        printed = browser.send("Page.printToPDF", {"printBackground": True}, session=session)
    finally:
        browser.close()
    screenshot, pdf = out / "page.png", out / "page.pdf"
    screenshot.write_bytes(base64.b64decode(shot["data"]))
    pdf.write_bytes(base64.b64decode(printed["data"]))
    errors, requests = [], []
    for event in browser.events:
        method, params = event.get("method"), event.get("params", {})
        if method == "Runtime.consoleAPICalled" and params["type"] in ("error", "assert"):
            errors.append(" ".join(str(a.get("value", a.get("description", "")))
                                   for a in params["args"]))
        elif method == "Runtime.exceptionThrown":
            errors.append(params["exceptionDetails"].get("text", "exception"))
        elif method == "Log.entryAdded" and params["entry"]["level"] == "error":
            errors.append(params["entry"]["text"])
        elif method == "Network.requestWillBeSent":
            requests.append(params["request"]["url"])
    return Page(images=facts["images"], errors=errors, requests=requests,
                math_width=float(facts["math"]), title=facts["title"], screenshot=screenshot,
                pdf=pdf)
