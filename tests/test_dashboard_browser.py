"""The dashboard in a real headless browser: ``runlog dashboard`` serving a demo catalogue.

Skipped when ``/usr/bin/chromium`` is missing, except under ``CI=true``, where that is a
failure (CI installs Debian's chromium package).

Chromium is driven through its DevTools protocol over a websocket (the ``websockets``
package comes with Streamlit). Its one-shot ``--screenshot``/``--dump-dom`` modes do not
work for this app: with ``--virtual-time-budget`` the virtual clock runs ahead while the
page waits on Streamlit's websocket, and the capture shows an empty page. So each test
loads a page, waits until the page's own content is drawn, then saves a screenshot and the
DOM under ``tests/artifacts/``. Run with ``-s`` to see how long each page took to draw.
"""

from __future__ import annotations

import base64
import contextlib
import json
import os
import signal
import socket
import subprocess
import sys
import time
import urllib.request
from pathlib import Path

import pytest

CHROMIUM = Path("/usr/bin/chromium")
ARTIFACTS = Path(__file__).parent / "artifacts"
FLAGS = [
    "--headless",
    "--no-sandbox",
    "--disable-gpu",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
    "--no-first-run",
    "--window-size=1400,1000",
]
HEADLINE = ("fill fraction", "survival", "t2 star", "contrast")

if not CHROMIUM.exists():
    if os.environ.get("CI") == "true":
        pytest.fail("/usr/bin/chromium is missing; CI must run the browser tests (apt-get install chromium)", pytrace=False)
    pytest.skip("no /usr/bin/chromium", allow_module_level=True)


def _free_port() -> int:
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        return probe.getsockname()[1]


def _runlog(*arguments: str) -> list[str]:
    return [sys.executable, "-c", "from runlog.cli import main; main()", *arguments]


def _first_run(url: str) -> str:
    listed = subprocess.run(_runlog("--db", url, "runs", "--apparatus", "lattice-east", "--json"), capture_output=True, text=True, timeout=60)
    return json.loads(listed.stdout)[0]["run"]


@pytest.fixture(scope="module")
def server(tmp_path_factory):
    """``runlog dashboard`` on a four-day demo catalogue, stopped the way a service manager would."""
    folder = tmp_path_factory.mktemp("browser")
    url = f"sqlite:///{folder / 'demo.sqlite'}"
    built = subprocess.run(_runlog("--db", url, "demo", "--days", "4", "--no-dashboard"), capture_output=True, text=True, timeout=120)
    assert built.returncode == 0, built.stderr
    # Two ordinary notes: one at a whole second, one on a run (its start, with microseconds).
    # Their times once reached the Overview and Drift pages as text of two formats and crashed them.
    for note in (["--apparatus", "lattice-east", "--at", "2026-09-03T08:00", "realigned lattice beam"], ["--apparatus", "lattice-east", "--run", _first_run(url), "camera saturated"]):
        added = subprocess.run(_runlog("--db", url, "note", *note), capture_output=True, text=True, timeout=60)
        assert added.returncode == 0, added.stderr
    port = _free_port()
    process = subprocess.Popen(_runlog("--db", url, "dashboard", "--port", str(port)), stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, start_new_session=True)
    address = f"http://127.0.0.1:{port}"
    deadline = time.monotonic() + 60
    while True:
        try:
            with urllib.request.urlopen(f"{address}/_stcore/health", timeout=2) as answer:
                if answer.read() == b"ok":
                    break
        except OSError:
            pass
        assert process.poll() is None, process.stderr.read()
        assert time.monotonic() < deadline, "the dashboard did not come up within 60 s"
        time.sleep(0.2)
    yield address
    process.send_signal(signal.SIGTERM)
    try:
        out, err = process.communicate(timeout=20)
    finally:
        try:
            os.killpg(process.pid, signal.SIGKILL)  # anything of ours left in its session
        except ProcessLookupError:
            pass
    assert out.startswith(f"runlog dashboard: http://localhost:{port}/"), out
    assert "Traceback" not in err, err


class _Browser:
    """Headless chromium with one page, driven over the DevTools protocol."""

    def __init__(self, profile: Path):
        from websockets.sync.client import connect

        self.process = subprocess.Popen([str(CHROMIUM), *FLAGS, f"--user-data-dir={profile}", "--remote-debugging-port=0", "about:blank"], stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        port_file = profile / "DevToolsActivePort"
        deadline = time.monotonic() + 30
        while not (port_file.exists() and port_file.read_text().strip()):
            assert time.monotonic() < deadline, "chromium did not open its DevTools port"
            time.sleep(0.05)
        port = int(port_file.read_text().split()[0])
        pages = []
        while not pages:
            with urllib.request.urlopen(f"http://127.0.0.1:{port}/json/list", timeout=5) as answer:
                pages = [t for t in json.load(answer) if t["type"] == "page"]
        self._opened = contextlib.ExitStack()
        self.socket = self._opened.enter_context(connect(pages[0]["webSocketDebuggerUrl"], max_size=2**27))
        self.calls = 0

    def call(self, method: str, **params):
        self.calls += 1
        self.socket.send(json.dumps({"id": self.calls, "method": method, "params": params}))
        while True:
            message = json.loads(self.socket.recv(timeout=60))
            if message.get("id") == self.calls:
                assert "error" not in message, message["error"]
                return message.get("result", {})

    def evaluate(self, expression: str):
        return self.call("Runtime.evaluate", expression=expression, returnByValue=True)["result"].get("value")

    def show(self, url: str, ready: str, timeout: float = 45.0) -> float:
        """Load ``url``; wait until the JavaScript ``ready`` holds and Streamlit has finished
        the run. Returns milliseconds from the start of the navigation."""
        self.call("Page.navigate", url=url)
        deadline = time.monotonic() + timeout
        check = f"(() => {{ try {{ return ({ready}) && !document.querySelector('[data-testid=\"stStatusWidget\"]') ? performance.now() : null }} catch (e) {{ return null }} }})()"
        while (drawn := self.evaluate(check)) is None:
            assert time.monotonic() < deadline, f"{url} not drawn within {timeout:g} s: {self.text()[:500]}"
            time.sleep(0.025)
        return drawn

    def text(self) -> str:
        return self.evaluate("document.body ? document.body.innerText : ''") or ""

    def keep(self, name: str) -> str:
        """Save a full-page screenshot and the DOM under tests/artifacts; returns the DOM."""
        ARTIFACTS.mkdir(exist_ok=True)
        height = self.evaluate("Math.max(...[...document.querySelectorAll('[data-testid=\"stMain\"] *')].map(e => e.getBoundingClientRect().bottom + (e.scrollTop || 0)), 1000)")
        self.call("Emulation.setDeviceMetricsOverride", width=1400, height=int(height) + 40, deviceScaleFactor=1, mobile=False)
        time.sleep(0.5)  # charts re-fit to the taller window
        shot = self.call("Page.captureScreenshot", format="png")["data"]
        self.call("Emulation.clearDeviceMetricsOverride")
        (ARTIFACTS / f"{name}.png").write_bytes(base64.b64decode(shot))
        dom = self.evaluate("document.documentElement.outerHTML")
        (ARTIFACTS / f"{name}.html").write_text(dom, encoding="utf-8")
        return dom

    def close(self) -> None:
        self._opened.close()
        self.process.terminate()
        self.process.wait(timeout=20)


@pytest.fixture(scope="module")
def browser(tmp_path_factory):
    opened = _Browser(tmp_path_factory.mktemp("chromium-profile"))
    yield opened
    opened.close()


def _no_error(browser: _Browser, dom: str) -> None:
    text = browser.text()
    assert "Traceback" not in dom and "Error" not in text, text[:2000]
    assert browser.evaluate("document.querySelectorAll('[data-testid=\"stException\"], [data-testid=\"stAlertContentError\"]').length") == 0


def test_overview_in_a_browser(server, browser):
    ready = "document.body.innerText.includes('Open alarms') && document.body.innerText.includes('last file in')"
    cold = browser.show(f"{server}/", ready)
    warm = browser.show(f"{server}/", ready)
    dom = browser.keep("overview")
    text = browser.text()
    print(f"\noverview drawn after {cold:.0f} ms (first load of the server), {warm:.0f} ms (again)")
    _no_error(browser, dom)
    for apparatus in ("lattice-east", "tweezer-west"):
        assert f"{apparatus} · lab day" in text
    assert all(name in text for name in HEADLINE)
    assert "2026-09-04" in text or "04 Sep 2026" in text  # the last of the four demo days


def test_drift_page_in_a_browser(server, browser):
    ready = "document.querySelectorAll('.vega-embed canvas, .vega-embed svg').length >= 3"
    first = browser.show(f"{server}/drift", ready)
    again = browser.show(f"{server}/drift", ready)
    dom = browser.keep("drift")
    text = browser.text()
    print(f"\ndrift page charts drawn after {first:.0f} ms, {again:.0f} ms (again)")
    _no_error(browser, dom)
    for name in ("fill fraction", "survival", "t2 star"):
        assert f"{name}: lattice-east" in dom  # the three headline panels of the first load
    assert "baseline days" in text  # the rolling-baseline control of the drift page
    # Each panel is a drawn chart with a non-empty canvas, not a placeholder.
    sizes = browser.evaluate("[...document.querySelectorAll('.vega-embed canvas, .vega-embed svg')].map(e => e.getBoundingClientRect().height)")
    assert len(sizes) == 3 and min(sizes) > 200, sizes
