"""The report and the run sheet in a real browser: headless Chromium opens the HTML files from disk.

Chromium is driven over the DevTools protocol on a pipe (``--remote-debugging-pipe``: JSON messages
separated by NUL bytes on file descriptors 3 and 4, the transport Chromium documents for embedders),
so no port is opened and nothing but the standard library is needed. The tests fail on any console
error, uncaught exception or failed load, and on any ``<img>`` that does not decode
(``naturalWidth == 0``), folded ones included; they check in the DOM that the verdict, the next step, the
budget and the caution end above 768 px at 1366 x 768 (show without scrolling), that there is a
trajectory figure for every trial and the stick-figure filmstrip, and that the folded detail tables are
laid out when printing. The run sheet is printed with Chromium's own print-to-PDF and its pages counted
in the PDF (page objects, ISO 32000-1 section 7.7.3.3), each A4 (ISO 216: 210 x 297 mm, 595.3 x 841.9
pt). Screenshots of the first screen and of a trajectory section go to ``tests/artifacts/``.
"""

from __future__ import annotations

import base64
import fcntl
import json
import os
import re
import shutil
import subprocess
import tempfile
import time
from pathlib import Path
from typing import Any

import pytest

from gapgauge.app.prior import load_prior
from gapgauge.compare.propose import propose
from gapgauge.report.sheet import render_sheet
from gapgauge.safety import CAUTION

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
        # a load event of an earlier page must not pass for this one's
        self.events = [e for e in self.events if e.get("method") != "Page.loadEventFired"]
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
def report(report_lab) -> Path:
    return report_lab.report.path


@pytest.fixture(scope="module")
def trials(report_lab) -> int:
    return len(report_lab.store.trials(report_lab.scenario.content_hash))


IMAGES = "[...document.images].map(i => ({alt: i.alt, complete: i.complete, width: i.naturalWidth}))"
FIRST_SCREEN = """(() => {
  const box = id => { const r = document.getElementById(id).getBoundingClientRect();
                      return {top: r.top, bottom: r.bottom, text: document.getElementById(id).innerText}; };
  return {verdict: box('verdict'), next: box('next-step'), budget: box('budget-card'), caution: box('caution'),
          scroll: [window.scrollX, window.scrollY], inner: [window.innerWidth, window.innerHeight]};
})()"""
A4_POINTS = (595.28, 841.89)  # ISO 216: 210 mm x 297 mm at 72 pt per inch


def pdf_pages(pdf: bytes) -> list[tuple[float, float]]:
    """Width and height (pt) of every page object of a PDF (``/Type /Page``, not ``/Pages``)."""
    sizes = []
    for match in re.finditer(rb"/Type\s*/Page(?![s\w])", pdf):
        start = pdf.rfind(b"obj", 0, match.start())
        end = pdf.find(b"endobj", match.end())
        box = re.search(rb"/MediaBox\s*\[\s*([-\d.]+)\s+([-\d.]+)\s+([-\d.]+)\s+([-\d.]+)\s*\]", pdf[start:end])
        if box is None:  # inherited from the page tree: take the document's first MediaBox
            box = re.search(rb"/MediaBox\s*\[\s*([-\d.]+)\s+([-\d.]+)\s+([-\d.]+)\s+([-\d.]+)\s*\]", pdf)
        x0, y0, x1, y1 = (float(v) for v in box.groups())
        sizes.append((x1 - x0, y1 - y0))
    return sizes


def print_to_pdf(browser: Browser, page: Path) -> bytes:
    browser.open(page)
    reply = browser.call("Page.printToPDF", {"preferCSSPageSize": True, "printBackground": True})
    return base64.b64decode(reply["data"])


def test_report_opens_without_console_errors_and_every_image_decodes(browser, report):
    browser.events.clear()
    browser.open(report)
    images = browser.evaluate(IMAGES)
    assert len(images) >= 8, (
        "the full report draws the motion, sweep, shift, prior, proposals, budget and calibration figures"
    )
    broken = [i["alt"] for i in images if not i["complete"] or i["width"] == 0]
    assert broken == [], f"images that did not decode: {broken}"
    assert browser.errors() == []
    # the hostile robot id in the store shows as text and never ran
    assert browser.evaluate("document.body.innerText.includes('<script>alert(1)</script>')")
    assert browser.evaluate("document.querySelectorAll('script').length") == 0


def test_first_screen_shows_verdict_next_step_budget_and_caution_without_scrolling(browser, report):
    browser.open(report)
    shot = browser.screenshot(ARTIFACTS / "report_first_screen.png")
    assert shot[:8] == b"\x89PNG\r\n\x1a\n"
    boxes = browser.evaluate(FIRST_SCREEN)
    assert boxes["inner"] == list(VIEWPORT)
    assert boxes["scroll"] == [0, 0]
    for key in ("verdict", "next", "budget", "caution"):
        assert 0 <= boxes[key]["top"] < boxes[key]["bottom"] <= VIEWPORT[1], (key, boxes[key])
    assert "CAUTION" in boxes["caution"]["text"]
    assert " ".join(CAUTION.split()[1:4]) in boxes["caution"]["text"]
    assert re.search(r"\d+ trials|> \d+ trials", boxes["budget"]["text"]), boxes["budget"]["text"]


def test_every_trial_has_a_trajectory_figure_and_the_filmstrip_is_there(browser, report, trials):
    browser.open(report)
    images = {i["alt"]: i for i in browser.evaluate(IMAGES)}
    for number in range(1, trials + 1):
        figure = images.get(f"trajectories of trial {number}")
        assert figure is not None and figure["width"] > 900, number
    film = [alt for alt in images if alt.startswith("stick-figure filmstrip of trial")]
    assert len(film) == 1 and images[film[0]]["width"] > 600
    # a screenshot of the section with the most different trial, scrolled into view
    browser.evaluate("document.querySelector('#motion h3').scrollIntoView()")
    browser.screenshot(ARTIFACTS / "report_trajectories.png")


def test_the_folded_detail_tables_are_laid_out_when_printed(browser, report):
    browser.open(report)
    # checkVisibility(): false for content a closed <details> hides (layout queries would lay it out anyway)
    folded = "[...document.querySelectorAll('details.fold table')].map(t => t.checkVisibility())"
    on_screen = browser.evaluate(folded)
    assert len(on_screen) >= 3 and not any(on_screen)  # folded on screen
    browser.call("Emulation.setEmulatedMedia", {"media": "print"})
    try:
        assert all(browser.evaluate(folded))
    finally:
        browser.call("Emulation.setEmulatedMedia", {"media": ""})


@pytest.mark.parametrize(("count", "pages"), [(5, 1), (7, 2)])
def test_the_run_sheet_prints_five_trials_to_one_a4_page(browser, report_lab, tmp_path, count, pages):
    prior = load_prior(report_lab.scenario, report_lab.store)
    proposals = propose(report_lab.scenario, prior, count=count, seed=3)
    last = report_lab.store.trials(report_lab.scenario.content_hash)[-1]
    sheet = tmp_path / "sheet.html"
    sheet.write_text(render_sheet(report_lab.scenario, proposals, last, first_number=6,
                                  store_path="a/rather/long/path/to/the/lab/store.sqlite").html, encoding="utf-8")
    browser.events.clear()
    pdf = print_to_pdf(browser, sheet)
    assert pdf[:5] == b"%PDF-"
    sizes = pdf_pages(pdf)
    assert len(sizes) == pages, sizes
    for width, height in sizes:
        assert width == pytest.approx(A4_POINTS[0], abs=1.5) and height == pytest.approx(A4_POINTS[1], abs=1.5)
    assert browser.errors() == []


def test_the_page_counter_counts_the_pages_of_a_long_page(browser, tmp_path):
    """The PDF check itself can fail: a page three A4 sheets tall prints to three pages."""
    page = tmp_path / "long.html"
    page.write_text("<!doctype html><style>@page { size: A4 } div { height: 250mm }</style>"
                    "<div>1</div><div>2</div><div>3</div>", encoding="utf-8")
    assert len(pdf_pages(print_to_pdf(browser, page))) == 3


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
