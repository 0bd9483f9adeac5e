"""The report in a real headless browser (Debian's chromium, started by the test).

The browser is driven over the Chrome DevTools Protocol on a pipe
(``--remote-debugging-pipe``: JSON messages ending in NUL on file descriptors 3 and 4,
as documented for Chromium's DevTools pipe transport), so no websocket client is
needed. Checked:

- the page loads (``document.readyState == "complete"``) with no console error or
  warning, no uncaught exception and no browser log error;
- no request leaves the page: every ``Network.requestWillBeSent`` is for the file
  itself or a ``data:`` URI (name resolution is also disabled for the run, so nothing
  could get out if the check were wrong);
- every plot decodes (``naturalWidth > 0``) and its rendered pixels, captured with
  ``Page.captureScreenshot`` clipped to the image, are not blank;
- the numbers the browser shows (``textContent`` of the keyed cells) are those of the
  history database.

A negative control feeds the same harness a page with an external image and a console
error, and requires both to be caught.

Skips when chromium is missing, unless WANEGUIDE_REQUIRE_BROWSER=1 (set by .ci/run).
"""
from __future__ import annotations

import base64
import io
import json
import os
import select
import shutil
import subprocess
import tempfile
import time

import matplotlib.image as mpimg
import numpy as np
import pytest
from test_report import build_example  # tests/ is on sys.path under pytest's default import mode

from waneguide.core.caution import CAUTION
from waneguide.operations.history import History

pytestmark = pytest.mark.browser

CHROMIUM = next((shutil.which(n) for n in ("chromium", "chromium-browser") if shutil.which(n)), None)


@pytest.fixture(scope="module")
def chromium_path():
    if CHROMIUM is None:
        if os.environ.get("WANEGUIDE_REQUIRE_BROWSER") == "1":
            pytest.fail("WANEGUIDE_REQUIRE_BROWSER=1 but chromium is not installed (apt-get install chromium)")
        pytest.skip("chromium not installed (apt-get install chromium); set WANEGUIDE_REQUIRE_BROWSER=1 to fail instead")
    return CHROMIUM


class Browser:
    """Minimal DevTools-protocol client over --remote-debugging-pipe."""

    def __init__(self, exe: str, timeout_s: float = 60.0):
        self.timeout_s = timeout_s
        self.user_dir = tempfile.mkdtemp(prefix="waneguide-chromium-")
        to_child_r, self._w = os.pipe()
        self._r, from_child_w = os.pipe()

        def wire():  # in the child: its fd 3 reads our commands, fd 4 writes replies
            a, b = os.dup(to_child_r), os.dup(from_child_w)
            os.dup2(a, 3)
            os.dup2(b, 4)
            os.set_inheritable(3, True)
            os.set_inheritable(4, True)

        args = [exe, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
                "--disable-background-networking", "--disable-component-update", "--disable-sync",
                "--disable-extensions", "--disable-default-apps", "--mute-audio",
                "--host-resolver-rules=MAP * ~NOTFOUND",
                f"--user-data-dir={self.user_dir}", "--remote-debugging-pipe", "about:blank"]
        self.proc = subprocess.Popen(args, stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL,
                                     stderr=subprocess.DEVNULL, preexec_fn=wire, close_fds=False)
        os.close(to_child_r)
        os.close(from_child_w)
        self._buf = b""
        self._id = 0
        self.events: list[dict] = []
        targets = self.call("Target.getTargets")["targetInfos"]
        page = next(t for t in targets if t["type"] == "page")
        self.session = self.call("Target.attachToTarget", {"targetId": page["targetId"], "flatten": True})["sessionId"]
        for domain in ("Runtime", "Log", "Network", "Page"):
            self.call(f"{domain}.enable", session=True)
        self.call("Emulation.setDeviceMetricsOverride",
                  {"width": 1200, "height": 900, "deviceScaleFactor": 1, "mobile": False}, session=True)

    def _read(self, deadline: float) -> dict:
        while b"\0" not in self._buf:
            left = deadline - time.time()
            if left <= 0:
                raise TimeoutError("no answer from chromium")
            ready, _, _ = select.select([self._r], [], [], left)
            if ready:
                chunk = os.read(self._r, 1 << 20)
                if not chunk:
                    raise EOFError("chromium closed the DevTools pipe")
                self._buf += chunk
        msg, self._buf = self._buf.split(b"\0", 1)
        return json.loads(msg)

    def call(self, method: str, params: dict | None = None, *, session: bool = False) -> dict:
        self._id += 1
        msg = {"id": self._id, "method": method, "params": params or {}}
        if session:
            msg["sessionId"] = self.session
        os.write(self._w, json.dumps(msg).encode() + b"\0")
        deadline = time.time() + self.timeout_s
        while True:
            m = self._read(deadline)
            if m.get("id") == self._id:
                if "error" in m:
                    raise RuntimeError(f"{method}: {m['error']}")
                return m.get("result", {})
            self.events.append(m)

    def load(self, url: str) -> None:
        self.call("Page.navigate", {"url": url}, session=True)
        deadline = time.time() + self.timeout_s
        while not any(e.get("method") == "Page.loadEventFired" for e in self.events):
            self.events.append(self._read(deadline))
        # let late console messages and log entries arrive
        state = self.evaluate("document.readyState")
        assert state == "complete"
        self.evaluate("new Promise(r => setTimeout(r, 300))", await_promise=True)

    def evaluate(self, expression: str, *, await_promise: bool = False):
        res = self.call("Runtime.evaluate", {"expression": expression, "returnByValue": True,
                                             "awaitPromise": await_promise}, session=True)
        if "exceptionDetails" in res:
            raise RuntimeError(res["exceptionDetails"])
        return res["result"].get("value")

    def screenshot(self, clip: dict) -> np.ndarray:
        data = self.call("Page.captureScreenshot", {"format": "png", "captureBeyondViewport": True,
                                                   "clip": {**clip, "scale": 1}}, session=True)["data"]
        return mpimg.imread(io.BytesIO(base64.b64decode(data)), format="png")

    def problems(self) -> list[str]:
        """Console errors/warnings, exceptions, log errors and requests leaving the page."""
        out = []
        for e in self.events:
            m, p = e.get("method"), e.get("params", {})
            if m == "Runtime.consoleAPICalled" and p.get("type") in ("error", "warning", "assert"):
                out.append(f"console {p['type']}: {[a.get('value') for a in p.get('args', [])]}")
            elif m == "Runtime.exceptionThrown":
                out.append(f"exception: {p.get('exceptionDetails', {}).get('text')}")
            elif m == "Log.entryAdded" and p.get("entry", {}).get("level") == "error":
                out.append(f"log error: {p['entry'].get('text')} {p['entry'].get('url', '')}")
            elif m == "Network.requestWillBeSent":
                url = p.get("request", {}).get("url", "")
                if not (url.startswith("file://") or url.startswith("data:")):
                    out.append(f"external request: {url}")
        return out

    def close(self) -> None:
        try:
            self.call("Browser.close")
        except Exception:  # noqa: BLE001 - it may already be gone
            pass
        try:
            self.proc.wait(timeout=15)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            self.proc.wait(timeout=15)
        for fd in (self._r, self._w):
            try:
                os.close(fd)
            except OSError:
                pass
        shutil.rmtree(self.user_dir, ignore_errors=True)


@pytest.fixture()
def browser(chromium_path):
    b = Browser(chromium_path)
    yield b
    b.close()


def test_harness_catches_console_errors_and_external_requests(browser, tmp_path):
    # negative control: the checks below must be able to fail
    page = tmp_path / "bad.html"
    page.write_text('<html><body><img src="http://example.invalid/x.png">'
                    '<script>console.error("boom")</script></body></html>')
    browser.load(page.as_uri())
    found = " | ".join(browser.problems())
    assert "external request: http://example.invalid/x.png" in found
    assert "console error: ['boom']" in found


def test_report_in_headless_chromium(browser, tmp_path):
    ex = build_example(tmp_path)
    browser.load(ex["report"].resolve().as_uri())
    assert browser.problems() == []

    images = browser.evaluate(
        "Array.from(document.images).map(i => {const r = i.getBoundingClientRect();"
        "return {id: i.id, ok: i.complete && i.naturalWidth > 0, w: i.naturalWidth,"
        " x: r.left + window.scrollX, y: r.top + window.scrollY, width: r.width, height: r.height};})")
    assert len(images) == 7   # three path trends, scatter, calibration, residual drift, feature drift
    for im in images:
        assert im["ok"], f"image {im['id']} did not decode"
        # laid out at a readable size, at least 250 x 150 CSS px (common practice, no source)
        assert im["width"] > 250 and im["height"] > 150
        px = browser.screenshot({k: im[k] for k in ("x", "y", "width", "height")})[..., :3]
        # rendered, not blank: mostly white background with dark lines and coloured bands. A blank area
        # has std 0 and no dark pixel; the PNGs themselves give std 0.13-0.33 and 2-28 % of pixels darker
        # than mid-grey (regression values, tests/test_report.py), so 0.05 and 0.2 % are floors well
        # below them (common practice, no source)
        assert px.std() > 0.05, f"image {im['id']} renders blank"
        assert (px.mean(axis=2) < 0.5).mean() > 0.002, f"image {im['id']} has no dark strokes"

    shown = browser.evaluate(
        "Object.fromEntries(Array.from(document.querySelectorAll('[data-key],[id]'))"
        ".map(e => [e.dataset.key || e.id, e.textContent.trim()]))")
    db = History(ex["db"]).scores(model_version="test-v1")
    assert int(shown["n_captures"]) == len(db)
    assert int(shown["n_out_of_family"]) == int((db["in_family"] == False).sum())  # noqa: E712
    last = db[db["status"] == "scored"].groupby("path_id").tail(1).set_index("path_id")
    for pid, row in last.iterrows():
        # printed with two decimals: within half a unit of the last digit
        assert float(shown[f"latest:{pid}:max_loss_pct"]) == pytest.approx(row["max_loss_pct"], abs=0.005)
    assert shown["verdict"] == ex["audit"].verdict
    assert shown["caution"] == CAUTION
