"""The report opened in a real browser: headless Chromium driven over its
DevTools protocol (``--remote-debugging-pipe``: JSON messages ending in NUL
on file descriptors 3 and 4; standard library only).

Checks what only a browser can: the page loads from a file path with no
console error, every figure is laid out with a non-zero size, a full-page
screenshot is a real image, and HTML in user text stays inert.
"""

import base64
import fcntl
import json
import os
import select
import shutil
import subprocess
import tempfile
import time
from pathlib import Path

import pytest

from conftest import tiny_study
from test_report_page import FRAGILE, SCRIPT, build_store, render_report, rich_study

BROWSERS = ("chromium", "chromium-browser", "google-chrome")


def find_chromium() -> str:
    for name in BROWSERS:
        path = shutil.which(name)
        if path:
            return path
    message = f"no Chromium on PATH (looked for {', '.join(BROWSERS)}); Debian: apt-get install chromium"
    if os.environ.get("CI"):
        pytest.fail(message + " — CI must run the browser checks")
    pytest.skip(message)


class Chromium:
    """A headless Chromium and one page, driven over the DevTools pipe."""

    def __init__(self, executable: str, width: int = 1280, height: int = 900):
        self.profile = tempfile.mkdtemp(prefix="estbench-chromium-")
        commands_read, self._commands = os.pipe()
        self._answers, answers_write = os.pipe()

        def wire_pipes():            # in the child: the protocol wants fds 3 (in) and 4 (out)
            high = [fcntl.fcntl(fd, fcntl.F_DUPFD, 10) for fd in (commands_read, answers_write)]
            os.dup2(high[0], 3)      # (via fds >= 10, so neither end is overwritten on the way)
            os.dup2(high[1], 4)

        self.process = subprocess.Popen(
            [executable, "--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
             "--disable-component-update", "--disable-sync", "--no-first-run", "--hide-scrollbars",
             f"--user-data-dir={self.profile}", f"--window-size={width},{height}",
             "--remote-debugging-pipe", "about:blank"],
            stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
            pass_fds=(3, 4), preexec_fn=wire_pipes)
        os.close(commands_read)
        os.close(answers_write)
        self._buffer = b""
        self._next_id = 0
        self.events: list[dict] = []
        self.session = None

    def send(self, method: str, params: dict | None = None, *, to_page: bool = True, timeout: float = 60):
        self._next_id += 1
        message = {"id": self._next_id, "method": method, "params": params or {}}
        if to_page and self.session:
            message["sessionId"] = self.session
        os.write(self._commands, json.dumps(message).encode() + b"\0")
        while True:
            answer = self._read(timeout)
            if answer.get("id") == self._next_id:
                if "error" in answer:
                    raise RuntimeError(f"{method} failed: {answer['error']}")
                return answer["result"]
            self.events.append(answer)

    def _read(self, timeout: float) -> dict:
        deadline = time.monotonic() + timeout
        while b"\0" not in self._buffer:
            left = deadline - time.monotonic()
            if left <= 0:
                raise TimeoutError("Chromium did not answer")
            if select.select([self._answers], [], [], left)[0]:
                chunk = os.read(self._answers, 1 << 20)
                if not chunk:
                    raise RuntimeError("Chromium closed the DevTools pipe")
                self._buffer += chunk
        raw, self._buffer = self._buffer.split(b"\0", 1)
        return json.loads(raw)

    def wait_for(self, method: str, timeout: float = 60) -> dict:
        for i, event in enumerate(self.events):
            if event.get("method") == method:
                return self.events.pop(i)
        deadline = time.monotonic() + timeout
        while True:
            event = self._read(max(0.01, deadline - time.monotonic()))
            if event.get("method") == method:
                return event
            if event.get("method") == "Page.javascriptDialogOpening":   # it would block the page
                raise AssertionError(f"the page opened a dialog: {event['params']}")
            self.events.append(event)

    def open(self, path: Path) -> None:
        target = self.send("Target.createTarget", {"url": "about:blank"}, to_page=False)["targetId"]
        self.session = self.send("Target.attachToTarget", {"targetId": target, "flatten": True},
                                 to_page=False)["sessionId"]
        for domain in ("Page", "Runtime", "Log"):
            self.send(f"{domain}.enable")
        self.send("Page.navigate", {"url": path.resolve().as_uri()})
        self.wait_for("Page.loadEventFired")

    def evaluate(self, expression: str):
        result = self.send("Runtime.evaluate", {"expression": expression, "returnByValue": True})
        if "exceptionDetails" in result:
            raise RuntimeError(f"script failed: {result['exceptionDetails']}")
        return result["result"].get("value")

    def screenshot(self, out: Path) -> tuple[int, int]:
        size = self.send("Page.getLayoutMetrics")["cssContentSize"]
        clip = {"x": 0, "y": 0, "width": size["width"], "height": size["height"], "scale": 1}
        data = self.send("Page.captureScreenshot", {"format": "png", "captureBeyondViewport": True,
                                                    "clip": clip})["data"]
        out.write_bytes(base64.b64decode(data))
        return int(size["width"]), int(size["height"])

    def problems(self) -> list[dict]:
        """Console errors, uncaught exceptions, failed loads and dialogs seen so far."""
        self.send("Runtime.evaluate", {"expression": "1"})     # flush pending events
        bad = []
        for e in self.events:
            method, params = e.get("method"), e.get("params", {})
            if method == "Runtime.exceptionThrown" or method == "Page.javascriptDialogOpening":
                bad.append(e)
            elif method == "Runtime.consoleAPICalled" and params.get("type") in ("error", "assert", "warning"):
                bad.append(e)
            elif method == "Log.entryAdded" and params.get("entry", {}).get("level") in ("error", "warning"):
                bad.append(e)
        return bad

    def close(self) -> None:
        try:
            self.send("Browser.close", to_page=False, timeout=10)
            self.process.wait(timeout=20)
        except Exception:
            self.process.kill()
            self.process.wait(timeout=20)
        finally:
            os.close(self._commands)
            os.close(self._answers)
            shutil.rmtree(self.profile, ignore_errors=True)


@pytest.fixture
def chromium():
    browser = Chromium(find_chromium())
    try:
        yield browser
    finally:
        browser.close()


FIGURE_SIZES = """JSON.stringify([...document.querySelectorAll('svg')].map(s => {
    const r = s.getBoundingClientRect();
    return {w: r.width, h: r.height, label: s.getAttribute('aria-label'), top: r.top + window.scrollY};
}))"""


def opens_cleanly_with_figures(chromium, page: Path, count: int) -> list[dict]:
    """Open *page*: no console or load problem, and exactly *count* figures, each laid out
    at a readable size. Returns the figures' sizes and labels."""
    chromium.open(page)
    assert chromium.problems() == []
    figures = json.loads(chromium.evaluate(FIGURE_SIZES))
    assert len(figures) == count
    for f in figures:
        assert f["w"] > 300 and f["h"] > 150, f
    return figures


def test_report_loads_cleanly_and_every_figure_is_laid_out(tmp_path, chromium):
    (tmp_path / "fragile.py").write_text(FRAGILE)
    raw = rich_study()
    raw["estimators"]["fragile"] = {"function": "fragile:fragile_mean", "target": "mean"}
    render_report(build_store(tmp_path, raw), tmp_path / "out")
    figures = opens_cleanly_with_figures(chromium, tmp_path / "out" / "report.html", 7)
    for f in figures:
        assert f["label"]
    assert chromium.evaluate("document.querySelectorAll('figure figcaption').length") == 7
    assert chromium.evaluate("document.scripts.length") == 0
    # Tables fit: the page never scrolls sideways at 1280 px.
    assert chromium.evaluate("document.documentElement.scrollWidth <= window.innerWidth")
    shot = tmp_path / "report.png"
    width, height = chromium.screenshot(shot)
    data = shot.read_bytes()
    assert data[:8] == b"\x89PNG\r\n\x1a\n" and len(data) > 100_000
    assert width >= 1000 and height > 5000
    from PIL import Image
    with Image.open(shot) as image:
        assert image.size == (width, height)
        colours = image.convert("RGB").resize((200, 800)).getcolors(maxcolors=1 << 16)
        assert colours is not None and len(colours) > 200     # text, tables and figures, not a blank page


def test_html_in_user_text_stays_text_in_the_browser(tmp_path, chromium):
    (tmp_path / "fragile.py").write_text(FRAGILE)
    raw = tiny_study(description=f"Study {SCRIPT}", replicates=40, blocks_per_job=4)
    raw["dgms"]["normal"]["description"] = f"DGM {SCRIPT}"
    raw["estimators"]["median"]["description"] = f"Estimator {SCRIPT}"
    raw["estimators"]["fragile"] = {"function": "fragile:fragile_mean", "target": "mean"}
    render_report(build_store(tmp_path, raw), tmp_path / "out")
    chromium.open(tmp_path / "out" / "report.html")
    assert chromium.problems() == []            # no alert dialog, no error
    assert chromium.evaluate("document.scripts.length") == 0
    text = chromium.evaluate("document.body.innerText")
    for shown in (f"Study {SCRIPT}", f"DGM {SCRIPT}", f"Estimator {SCRIPT}", f"ValueError: {SCRIPT}"):
        assert shown in text, shown
