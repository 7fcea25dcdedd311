"""The report rendered by a real browser: headless Chromium, Debian's package (.ci/run
installs it; the tests skip with the reason when it is missing).

Chromium is driven through the Chrome DevTools Protocol over ``--remote-debugging-pipe``
(JSON messages ended by a NUL byte on file descriptors 3 and 4; no extra library). The
viewport is set with ``Emulation.setDeviceMetricsOverride``, because a headless window
is never narrower than 500 px. At desktop (1280 px) and phone (390 px) width the page
must not scroll sideways: a measuring expression, evaluated by the protocol (the page
itself has no script), returns the layout's widths and the elements that stick out
outside a scroll box. ``Network.requestWillBeSent`` lists what the page asks for: no
HTTP(S) URL. Screenshots are taken at both widths into the test's temporary directory,
not committed.
"""

from __future__ import annotations

import base64
import contextlib
import json
import os
import select
import shutil
import struct
import subprocess
import time
import zlib
from pathlib import Path

import pytest

from tests.report_stores import build_drift_campaign, report_page

CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")
pytestmark = pytest.mark.skipif(
    CHROMIUM is None, reason="headless Chromium is not installed (apt-get install chromium): "
    "the report's rendering, widths and requests are not checked")
# Flags for a quiet, repeatable headless run; the proxy on the discard port keeps the
# browser's own background requests off the network (the tests need none).
CHROMIUM_FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
                  "--no-first-run", "--disable-background-networking",
                  "--disable-component-update", "--disable-sync", "--hide-scrollbars",
                  "--proxy-server=http://127.0.0.1:9"]
DESKTOP, PHONE = 1280, 390  # CSS px; 390 is a common phone's width (common practice)
HEIGHT = 2400
GUARD_S = 120  # a hung browser fails the test instead of hanging it (not a timing check)
MEASURE = """(function () {
  var vw = document.documentElement.clientWidth, bad = [];
  function inScrollBox(el) {
    for (var p = el.parentElement; p && p !== document.body; p = p.parentElement) {
      var o = getComputedStyle(p).overflowX;
      if (o === "auto" || o === "scroll" || o === "hidden") return true;
    }
    return false;
  }
  document.querySelectorAll("body *").forEach(function (el) {
    if (inScrollBox(el)) return;
    var r = el.getBoundingClientRect();
    if (r.width > 0 && (r.right > vw + 0.5 || r.left < -0.5))
      bad.push(el.tagName.toLowerCase() + " " + Math.round(r.left) + ".." + Math.round(r.right));
  });
  return {scrollWidth: document.documentElement.scrollWidth, clientWidth: vw,
          innerWidth: window.innerWidth, overflowing: bad.slice(0, 20),
          svgs: document.querySelectorAll("svg").length};
})()"""


class Browser:
    """One headless Chromium with one page, spoken to over the DevTools pipe."""

    def __init__(self, profile: Path):
        to_r, self._to_w = os.pipe()
        self._from_r, from_w = os.pipe()

        def fds():  # Chromium reads commands on fd 3 and writes replies on fd 4
            os.dup2(to_r, 3)
            os.dup2(from_w, 4)

        self.proc = subprocess.Popen(
            [CHROMIUM, *CHROMIUM_FLAGS, f"--user-data-dir={profile}",
             "--remote-debugging-pipe", "about:blank"],
            stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
            # Our own descriptors are not inheritable (PEP 446): only the two dup2'd
            # ones reach Chromium, and they need not be open in this process first.
            preexec_fn=fds, close_fds=False)
        os.close(to_r)
        os.close(from_w)
        self._buf = b""
        self._next = 0
        self.events: list[dict] = []
        target = self.send("Target.createTarget", url="about:blank")["targetId"]
        self.session = self.send("Target.attachToTarget", targetId=target,
                                 flatten=True)["sessionId"]

    def _message(self, deadline: float) -> dict:
        while b"\0" not in self._buf:
            left = deadline - time.monotonic()
            ready, _, _ = select.select([self._from_r], [], [], max(0.0, left))
            if not ready:
                raise TimeoutError(f"Chromium sent nothing for {GUARD_S} s")
            chunk = os.read(self._from_r, 1 << 20)
            if not chunk:
                raise EOFError("Chromium closed its DevTools pipe (did it crash?)")
            self._buf += chunk
        raw, self._buf = self._buf.split(b"\0", 1)
        return json.loads(raw)

    def send(self, method: str, session: bool = False, **params):
        self._next += 1
        msg = {"id": self._next, "method": method, "params": params}
        if session:
            msg["sessionId"] = self.session
        os.write(self._to_w, json.dumps(msg).encode() + b"\0")
        deadline = time.monotonic() + GUARD_S
        while True:
            reply = self._message(deadline)
            if reply.get("id") == self._next:
                assert "error" not in reply, (method, reply["error"])
                return reply["result"]
            self.events.append(reply)

    def wait_for(self, method: str) -> dict:
        deadline = time.monotonic() + GUARD_S
        for i, ev in enumerate(self.events):
            if ev.get("method") == method:
                return self.events.pop(i)
        while True:
            ev = self._message(deadline)
            if ev.get("method") == method:
                return ev
            self.events.append(ev)

    def open(self, url: str, width: int, height: int = HEIGHT) -> None:
        self.send("Emulation.setDeviceMetricsOverride", session=True, width=width,
                  height=height, deviceScaleFactor=1, mobile=width < 600)
        self.send("Page.enable", session=True)
        self.send("Network.enable", session=True)
        self.send("Page.navigate", session=True, url=url)
        self.wait_for("Page.loadEventFired")

    def evaluate(self, expression: str):
        return self.send("Runtime.evaluate", session=True, expression=expression,
                         returnByValue=True)["result"]["value"]

    def screenshot(self, path: Path) -> None:
        data = self.send("Page.captureScreenshot", session=True, format="png")["data"]
        path.write_bytes(base64.b64decode(data))

    def requested(self) -> list[str]:
        return [ev["params"]["request"]["url"] for ev in self.events
                if ev.get("method") == "Network.requestWillBeSent"]

    def close(self) -> None:
        with contextlib.suppress(EOFError, OSError):  # it may close before replying
            self.send("Browser.close")
        try:
            self.proc.wait(timeout=30)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            self.proc.wait()
        os.close(self._to_w)
        os.close(self._from_r)


@pytest.fixture
def browser(tmp_path):
    b = Browser(tmp_path / "profile")  # a fresh profile for every test
    yield b
    b.close()


@pytest.fixture(scope="module")
def page(tmp_path_factory):
    """The report with every section filled: a refused session, a calibration whose
    campaign drifts (so its drift charts draw the drift line) and the day's AOD."""
    day = build_drift_campaign(tmp_path_factory.mktemp("browser") / "cal.db")
    text = report_page(day)
    assert text.count('data-series="drift"') == len(day.config.channels)
    return text


def show(page: str, browser: Browser, tmp_path: Path, width: int, name: str) -> dict:
    f = tmp_path / f"{name}.html"
    f.write_text(page, encoding="utf-8")
    browser.open(f.as_uri(), width)
    return browser.evaluate(MEASURE)


@pytest.mark.parametrize("width", [DESKTOP, PHONE])
def test_no_horizontal_overflow_and_a_screenshot(page, browser, tmp_path, width):
    got = show(page, browser, tmp_path, width, "report")
    assert got["innerWidth"] == width  # the viewport really is that wide
    assert got["svgs"] == page.count("<svg")
    assert got["scrollWidth"] <= got["clientWidth"], got
    assert got["overflowing"] == [], got
    shot = tmp_path / f"report-{width}.png"
    browser.screenshot(shot)
    size, values = png_size_and_values(shot)
    assert size == (width, HEIGHT)
    assert values > 64, "the screenshot is (nearly) blank"


def test_the_overflow_check_can_fail(page, browser, tmp_path):
    # A fixed 600-px block on a 390-px phone: the same check must see it.
    wide = page.replace("<h2>Summary</h2>", '<div style="width:600px">wide</div>'
                        "<h2>Summary</h2>")
    got = show(wide, browser, tmp_path, PHONE, "wide")
    assert got["scrollWidth"] > got["clientWidth"]
    assert any(o.startswith("div ") for o in got["overflowing"])


def test_the_page_fetches_nothing(page, browser, tmp_path):
    show(page, browser, tmp_path, DESKTOP, "report")
    urls = browser.requested()
    assert urls and all(u.startswith("file:") for u in urls), urls


def test_the_request_check_can_fail(page, browser, tmp_path):
    # The discard port through the discard-port proxy: nothing is reached.
    probe = page.replace("</body>", '<img src="http://127.0.0.1:9/x.png" alt=""></body>')
    show(probe, browser, tmp_path, DESKTOP, "probe")
    assert "http://127.0.0.1:9/x.png" in browser.requested()


def png_size_and_values(path: Path) -> tuple[tuple[int, int], int]:
    """(width, height) from the PNG header (PNG spec, ISO/IEC 15948 section 11.2.2) and
    the number of distinct byte values of its image data (a blank page has few)."""
    data = path.read_bytes()
    assert data[:8] == b"\x89PNG\r\n\x1a\n"
    size = struct.unpack(">II", data[16:24])
    idat, i = b"", 8
    while i < len(data):
        n, kind = struct.unpack(">I4s", data[i:i + 8])
        if kind == b"IDAT":
            idat += data[i + 8:i + 8 + n]
        i += 12 + n
    return size, len(set(zlib.decompress(idat)))
