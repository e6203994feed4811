"""report.html in a real browser: headless Chromium (Debian's ``chromium``) loads the demo's page
from a file:// URL, driven over the Chrome DevTools Protocol on ``--remote-debugging-pipe``
(the protocol's messages are JSON, each ended by a NUL byte, as documented at
https://chromedevtools.github.io/devtools-protocol/ ). The page must load with no console error
and no uncaught exception, every chart must be drawn with a non-zero size and content, no network
request other than the page itself may be made (data: URIs are inline), and a full-page
screenshot is written.

Run by hand to screenshot any page: ``python tests/test_report_browser.py PAGE.html OUT.png``.
"""

from __future__ import annotations

import base64
import json
import os
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import pytest

CHROMIUM = shutil.which("chromium") or "/usr/bin/chromium"
REPO = Path(__file__).resolve().parents[1]
FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
         "--disable-background-networking", "--disable-component-update", "--disable-sync",
         "--disable-default-apps", "--remote-debugging-pipe", "--window-size=1100,900"]

#: What the page reports about its charts, run inside it: one record per <figure>.
CHARTS_JS = """[...document.querySelectorAll('figure')].map(f => {
  const c = f.querySelector('svg, img');
  const r = c ? c.getBoundingClientRect() : {width: 0, height: 0};
  return {section: f.closest('section').id, kind: c ? c.tagName.toLowerCase() : null,
          width: r.width, height: r.height,
          marks: c && c.tagName.toLowerCase() === 'svg' ? c.querySelectorAll('path, rect, use, line').length : 0,
          complete: c && c.tagName.toLowerCase() === 'img' ? (c.complete && c.naturalWidth > 0) : true};
})"""


class Browser:
    """A headless Chromium driven over its DevTools pipe (fd 3 in, fd 4 out of the browser)."""

    def __init__(self, timeout: float = 40.0):
        self.profile = tempfile.mkdtemp(prefix="leanset-chromium-")
        to_chrome, self._send = os.pipe()
        self._recv, from_chrome = os.pipe()
        # parked on fds 100 and 101, then put by bash on fds 3 and 4, where --remote-debugging-pipe expects them
        os.dup2(to_chrome, 100)
        os.dup2(from_chrome, 101)
        os.close(to_chrome)
        os.close(from_chrome)
        wire = 'exec "$@" 3<&100 4>&101 100<&- 101>&-'
        self.proc = subprocess.Popen(["bash", "-c", wire, "bash", CHROMIUM, *FLAGS, f"--user-data-dir={self.profile}", "about:blank"],
                                     stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, pass_fds=(100, 101))
        os.close(100)
        os.close(101)
        self.deadline = time.monotonic() + timeout
        self.buffer = b""
        self.events: list[dict] = []
        self.next_id = 0

    def _read(self) -> dict:
        while b"\0" not in self.buffer:
            if time.monotonic() > self.deadline:
                raise TimeoutError("chromium did not answer in time")
            chunk = os.read(self._recv, 1 << 16)
            if not chunk:
                raise RuntimeError("chromium closed its DevTools pipe")
            self.buffer += chunk
        message, self.buffer = self.buffer.split(b"\0", 1)
        return json.loads(message)

    def send(self, method: str, session: str | None = None, **params) -> dict:
        """Send one command and return its result; events that arrive meanwhile are kept."""
        self.next_id += 1
        message = {"id": self.next_id, "method": method, "params": params}
        if session:
            message["sessionId"] = session
        os.write(self._send, json.dumps(message).encode() + b"\0")
        while True:
            reply = self._read()
            if reply.get("id") == self.next_id:
                if "error" in reply:
                    raise RuntimeError(f"{method}: {reply['error']}")
                return reply["result"]
            self.events.append(reply)

    def wait_for(self, method: str) -> dict:
        for i, e in enumerate(self.events):
            if e.get("method") == method:
                return self.events.pop(i)
        while True:
            e = self._read()
            if e.get("method") == method:
                return e
            self.events.append(e)

    def close(self) -> None:
        try:
            self.send("Browser.close")
        except (RuntimeError, TimeoutError, OSError):
            pass
        try:
            self.proc.wait(timeout=10)
        except subprocess.TimeoutExpired:
            self.proc.kill()
        for fd in (self._send, self._recv):
            os.close(fd)
        shutil.rmtree(self.profile, ignore_errors=True)


def render_page(page: Path, screenshot: Path) -> dict:
    """Load ``page`` in headless Chromium; return its console errors, exceptions, network requests
    other than the page itself, its charts, and write a full-page PNG screenshot."""
    browser = Browser()
    try:
        target = browser.send("Target.createTarget", url="about:blank")["targetId"]
        session = browser.send("Target.attachToTarget", targetId=target, flatten=True)["sessionId"]
        for domain in ("Page", "Runtime", "Log", "Network"):
            browser.send(f"{domain}.enable", session)
        url = page.resolve().as_uri()
        browser.send("Page.navigate", session, url=url)
        browser.wait_for("Page.loadEventFired")
        charts = browser.send("Runtime.evaluate", session, expression=CHARTS_JS, returnByValue=True)["result"]["value"]
        size = browser.send("Page.getLayoutMetrics", session)["cssContentSize"]
        shot = browser.send("Page.captureScreenshot", session, format="png", captureBeyondViewport=True,
                            clip={"x": 0, "y": 0, "width": size["width"], "height": size["height"], "scale": 1})
        screenshot.write_bytes(base64.b64decode(shot["data"]))
        browser.send("Runtime.evaluate", session, expression="1")  # drain events sent after the screenshot
        events = browser.events
    finally:
        browser.close()
    requests = [e["params"]["request"]["url"] for e in events if e.get("method") == "Network.requestWillBeSent"]
    return {
        "console_errors": [e["params"] for e in events if e.get("method") == "Runtime.consoleAPICalled"
                           and e["params"].get("type") in ("error", "assert")],
        "log_errors": [e["params"]["entry"] for e in events if e.get("method") == "Log.entryAdded"
                       and e["params"]["entry"].get("level") == "error"],
        "exceptions": [e["params"] for e in events if e.get("method") == "Runtime.exceptionThrown"],
        "requests": [u for u in requests if u != url and not u.startswith("data:")],
        "page_requested": url in requests,
        "charts": charts,
        "size": size,
    }


def _demo_runs() -> list[Path]:
    """Runs of configs/demo.yaml in the repository's store (CI's first Quick-start command makes one)."""
    runs = REPO / "leanset-store" / "runs"
    found = []
    for run_json in sorted(runs.glob("*/run.json")) if runs.is_dir() else []:
        if json.loads(run_json.read_text())["input"]["path"].endswith("pump_faults.parquet"):
            found.append(run_json.parent)
    return found


@pytest.fixture(scope="module")
def demo_page(request, tmp_path_factory):
    """The demo's report: rebuilt from the run of configs/demo.yaml in the repository's store when
    there is one (as in CI), else from a run of the demo config on a slice of its table (the whole
    demo takes minutes; the page has the same sections, charts and row lists)."""
    import pyarrow.parquet as pq
    import yaml

    from leanset.store.page import build_report
    from store_helpers import published, run_ok

    tmp = tmp_path_factory.mktemp("browser")
    demo = _demo_runs()
    if demo:
        return build_report(demo[-1], out=tmp / "report.html")
    request.getfixturevalue("prefect_api")  # the session's Prefect test server, only when a run is made
    table = pq.read_table(REPO / "data_samples" / "pump_faults.parquet")
    pq.write_table(table.slice(0, 6000), tmp / "pump_faults.parquet")
    cfg = yaml.safe_load((REPO / "configs" / "demo.yaml").read_text())
    cfg["input"]["path"] = str(tmp / "pump_faults.parquet")
    cfg["proxy"].update(folds=3, rounds=30)
    cfg["selection"]["class_floor"] = 100
    cfg["target"]["params"]["num_boost_round"] = 60
    cfg["verify"] = {**cfg["verify"], "bootstrap": 200, "random_repeats": 1}
    cfg["store"] = str(tmp / "store")
    path = tmp / "demo.yaml"
    path.write_text(yaml.safe_dump(cfg))
    run_ok(path)
    return published(tmp / "store")[-1] / "report.html"


@pytest.mark.skipif(not Path(CHROMIUM).exists() and not os.environ.get("LEANSET_REQUIRE_BROWSER"),
                    reason="chromium is not installed (.ci/run installs it and sets LEANSET_REQUIRE_BROWSER)")
def test_demo_report_in_headless_chromium(demo_page, tmp_path):
    from leanset.report.html import SECTIONS

    shot = tmp_path / "report.png"
    t0 = time.perf_counter()
    seen = render_page(demo_page, shot)
    took = time.perf_counter() - t0
    assert seen["page_requested"]  # the DevTools Network domain did see requests: the page's own
    assert seen["requests"] == []  # nothing else: no CDN, font, image or link that loads
    assert seen["console_errors"] == [] and seen["log_errors"] == [] and seen["exceptions"] == []
    charts = seen["charts"]
    # one chart in each charted section of the demo (it has no segments, frontier or lineage history)
    assert {c["section"] for c in charts} >= {"verdict", "metrics", "composition", "scores", "reasons"}
    for c in charts:
        assert c["width"] > 100 and c["height"] > 50, c
        assert c["complete"] and (c["kind"] == "img" or c["marks"] > 10), c
    assert seen["size"]["height"] > 2000  # every section laid out
    # the screenshot is a PNG (PNG specification, section 5.2: the 8-byte signature)
    assert shot.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n" and shot.stat().st_size > 50_000
    assert demo_page.stat().st_size < 1_000_000  # the target: the page stays under 1 MB
    assert list(SECTIONS)[0] == "verdict"
    print(f"browser check {took:.1f} s, {len(charts)} charts, screenshot {shot}")


if __name__ == "__main__":
    result = render_page(Path(sys.argv[1]), Path(sys.argv[2]))
    print(json.dumps({k: v for k, v in result.items() if k != "charts"}, indent=1))
    for c in result["charts"]:
        print(c)
