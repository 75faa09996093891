"""The report in a real browser: headless Chromium opens the HTML file from disk.

Chromium is driven over the DevTools protocol on a pipe (``--remote-debugging-pipe``: JSON messages
separated by NUL bytes on file descriptors 3 and 4, the transport Chromium documents for embedders),
so no port is opened and nothing but the standard library is needed. The test fails on any console
error, uncaught exception or failed load, and on any ``<img>`` that does not decode
(``naturalWidth == 0``); it saves a 1366 x 768 screenshot of the first screen to
``tests/artifacts/report_first_screen.png`` and checks in the DOM that the verdict, the next step and
the caution end above 768 px, that is, show without scrolling.
"""

from __future__ import annotations

import base64
import fcntl
import json
import os
import shutil
import subprocess
import tempfile
import time
from pathlib import Path
from typing import Any

import pytest

from gapgauge.app.report import write_report
from gapgauge.safety import CAUTION
from test_report_support import build_store, project

CHROMIUM = "/usr/bin/chromium"
ARTIFACTS = Path(__file__).parent / "artifacts"
VIEWPORT = (1366, 768)
PROTOCOL_WAIT_S = 60.0  # a guard against a hung browser, not a timing check

pytestmark = [
    pytest.mark.browser,
    pytest.mark.skipif(
        not Path(CHROMIUM).exists(),
        reason=f"headless Chromium not found at {CHROMIUM}; .ci/run installs Debian's chromium",
    ),
]


class Browser:
    """A headless Chromium and one page, spoken to over the DevTools protocol on a pipe."""

    def __init__(self) -> None:
        self.profile = tempfile.mkdtemp(prefix="gapgauge-chromium-")
        to_child_r, self._to_child = os.pipe()
        self._from_child, from_child_w = os.pipe()

        def wire() -> None:  # in the child: the protocol's fds 3 (commands in) and 4 (replies out)
            # Move both ends above 4 first: a pipe end may already be fd 3 or 4, and dup2 onto itself
            # would neither free the slot for the other end nor clear close-on-exec.
            read_end = fcntl.fcntl(to_child_r, fcntl.F_DUPFD, 10)
            write_end = fcntl.fcntl(from_child_w, fcntl.F_DUPFD, 10)
            os.dup2(read_end, 3)
            os.dup2(write_end, 4)

        self.process = subprocess.Popen(
            [
                CHROMIUM,
                "--headless",
                "--no-sandbox",
                "--disable-gpu",
                "--disable-quic",
                "--no-first-run",
                "--disable-background-networking",
                "--disable-component-update",
                "--disable-sync",
                "--disable-dev-shm-usage",
                "--hide-scrollbars",
                f"--user-data-dir={self.profile}",
                "--remote-debugging-pipe",
                "about:blank",
            ],
            stdin=subprocess.DEVNULL,
            stdout=subprocess.DEVNULL,
            stderr=subprocess.DEVNULL,
            close_fds=False,
            preexec_fn=wire,
        )
        os.close(to_child_r)
        os.close(from_child_w)
        self._buffer = b""
        self._next_id = 0
        self.events: list[dict[str, Any]] = []
        self.session = None
        target = self.call("Target.createTarget", {"url": "about:blank"})["targetId"]
        self.session = self.call("Target.attachToTarget", {"targetId": target, "flatten": True})["sessionId"]

    def _read_message(self, deadline: float) -> dict[str, Any]:
        while b"\0" not in self._buffer:
            if time.monotonic() > deadline:
                raise TimeoutError("Chromium did not answer on the DevTools pipe")
            chunk = os.read(self._from_child, 1 << 16)
            if not chunk:
                raise RuntimeError("Chromium closed the DevTools pipe")
            self._buffer += chunk
        message, self._buffer = self._buffer.split(b"\0", 1)
        return json.loads(message)

    def call(self, method: str, params: dict[str, Any] | None = None, session: bool = True) -> dict[str, Any]:
        self._next_id += 1
        message: dict[str, Any] = {"id": self._next_id, "method": method, "params": params or {}}
        if session and self.session is not None:
            message["sessionId"] = self.session
        os.write(self._to_child, json.dumps(message).encode() + b"\0")
        deadline = time.monotonic() + PROTOCOL_WAIT_S
        while True:
            reply = self._read_message(deadline)
            if reply.get("id") == self._next_id:
                if "error" in reply:
                    raise RuntimeError(f"{method}: {reply['error']}")
                return reply.get("result", {})
            self.events.append(reply)

    def wait_for(self, method: str) -> dict[str, Any]:
        for event in self.events:
            if event.get("method") == method:
                return event
        deadline = time.monotonic() + PROTOCOL_WAIT_S
        while True:
            event = self._read_message(deadline)
            self.events.append(event)
            if event.get("method") == method:
                return event

    def evaluate(self, expression: str) -> Any:
        result = self.call(
            "Runtime.evaluate", {"expression": expression, "returnByValue": True, "awaitPromise": True}
        )
        if "exceptionDetails" in result:
            raise RuntimeError(f"page script failed: {result['exceptionDetails']}")
        return result["result"].get("value")

    def open(self, path: Path, viewport: tuple[int, int] = VIEWPORT) -> None:
        for domain in ("Page", "Runtime", "Log"):
            self.call(f"{domain}.enable")
        self.call(
            "Emulation.setDeviceMetricsOverride",
            {"width": viewport[0], "height": viewport[1], "deviceScaleFactor": 1, "mobile": False},
        )
        self.call("Page.navigate", {"url": path.resolve().as_uri()})
        self.wait_for("Page.loadEventFired")
        # every image decoded (or failed) before the checks read naturalWidth
        self.evaluate("Promise.all([...document.images].map(i => i.decode().catch(() => null)))")

    def errors(self) -> list[str]:
        """Console errors, uncaught exceptions and failed loads seen so far."""
        out = []
        for event in self.events:
            method, params = event.get("method"), event.get("params", {})
            if method == "Runtime.consoleAPICalled" and params.get("type") in ("error", "assert"):
                out.append(
                    "console: " + " ".join(str(a.get("value", a.get("description"))) for a in params["args"])
                )
            elif method == "Runtime.exceptionThrown":
                out.append("exception: " + str(params["exceptionDetails"].get("text")))
            elif method == "Log.entryAdded" and params["entry"].get("level") == "error":
                out.append(f"log ({params['entry'].get('source')}): {params['entry'].get('text')}")
        return out

    def screenshot(self, path: Path) -> bytes:
        png = base64.b64decode(self.call("Page.captureScreenshot", {"format": "png"})["data"])
        path.parent.mkdir(parents=True, exist_ok=True)
        ignore = path.parent / ".gitignore"  # artifacts stay out of git without touching the root .gitignore
        if not ignore.exists():
            ignore.write_text("*\n", encoding="utf-8")
        path.write_bytes(png)
        return png

    def close(self) -> None:
        try:
            self.call("Browser.close", session=False)
        except (RuntimeError, TimeoutError, OSError):
            pass
        try:
            self.process.wait(timeout=20)
        except subprocess.TimeoutExpired:
            self.process.kill()
            self.process.wait()
        for fd in (self._to_child, self._from_child):
            os.close(fd)
        shutil.rmtree(self.profile, ignore_errors=True)


@pytest.fixture(scope="module")
def browser():
    b = Browser()
    yield b
    b.close()


@pytest.fixture(scope="module")
def report(tmp_path_factory) -> Path:
    folder = tmp_path_factory.mktemp("browser")
    scenario = project(folder)
    with build_store(scenario, folder / "store.sqlite", hostile=True) as store:
        return write_report(scenario, store, folder / "report.html").path


IMAGES = "[...document.images].map(i => ({alt: i.alt, complete: i.complete, width: i.naturalWidth}))"
FIRST_SCREEN = """(() => {
  const box = id => { const r = document.getElementById(id).getBoundingClientRect();
                      return {top: r.top, bottom: r.bottom, text: document.getElementById(id).innerText}; };
  return {verdict: box('verdict'), next: box('next-step'), caution: box('caution'),
          scroll: [window.scrollX, window.scrollY], inner: [window.innerWidth, window.innerHeight]};
})()"""


def test_report_opens_without_console_errors_and_every_image_decodes(browser, report):
    browser.events.clear()
    browser.open(report)
    images = browser.evaluate(IMAGES)
    assert len(images) >= 8, (
        "the full report draws the sweep, shift, prior, proposals, budget and calibration figures"
    )
    broken = [i["alt"] for i in images if not i["complete"] or i["width"] == 0]
    assert broken == [], f"images that did not decode: {broken}"
    assert browser.errors() == []
    # the hostile robot id in the store shows as text and never ran
    assert browser.evaluate("document.body.innerText.includes('<script>alert(1)</script>')")
    assert browser.evaluate("document.querySelectorAll('script').length") == 0


def test_first_screen_shows_verdict_next_step_and_caution_without_scrolling(browser, report):
    browser.open(report)
    shot = browser.screenshot(ARTIFACTS / "report_first_screen.png")
    assert shot[:8] == b"\x89PNG\r\n\x1a\n"
    boxes = browser.evaluate(FIRST_SCREEN)
    assert boxes["inner"] == list(VIEWPORT)
    assert boxes["scroll"] == [0, 0]
    for key in ("verdict", "next", "caution"):
        assert 0 <= boxes[key]["top"] < boxes[key]["bottom"] <= VIEWPORT[1], (key, boxes[key])
    assert "CAUTION" in boxes["caution"]["text"]
    assert " ".join(CAUTION.split()[1:4]) in boxes["caution"]["text"]


def test_the_browser_check_catches_a_broken_image_and_a_console_error(browser, tmp_path):
    """The harness itself can fail: a page with a bad data URI and a console error is caught."""
    page = tmp_path / "broken.html"
    page.write_text(
        '<!doctype html><img alt="bad" src="data:image/png;base64,iVBORw0KGgoAAAA=">'
        "<script>console.error('boom')</script>",
        encoding="utf-8",
    )
    browser.events.clear()
    browser.open(page)
    images = browser.evaluate(IMAGES)
    assert images == [{"alt": "bad", "complete": True, "width": 0}]
    assert any("boom" in e for e in browser.errors())
