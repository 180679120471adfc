"""Dashboard speed: the drift page on a 10 M-shot catalogue, against a bare Streamlit page
drawing the same Altair charts.

Uses (or builds, with the builder of ``benchmarks/drift.py``, through ``ready_catalogue`` of
``benchmarks/export.py``) the synthetic catalogue of a busy apparatus: 365 lab days,
~27 200 shots a day in runs of 200. The drift page opens on the apparatus's headline
figures over every lab day; that is what is measured, as a lab member first sees it.

The peer, measured in the same run the same ways: a minimal Streamlit page (written to a
temporary file) that draws the same Altair charts (``charts.drift_chart``, same layers, same
daily points, same width) from pandas frames held in memory. It has no catalogue behind it,
so it is the floor of Streamlit + Altair on this machine; runlog / peer is what the
catalogue and the page logic add.

Measured, median of several repeats:

1. The page's script run under ``streamlit.testing`` AppTest: cold (cached query results
   cleared, as when the 60 s cache has expired; modules imported, catalogue open) and warm
   (a rerun of the same session, results cached). The first run in the process (imports,
   opening the catalogue, queries) is printed once.
2. Headless Chromium against ``streamlit run`` servers on free localhost ports, driven over
   the DevTools protocol as ``tests/test_dashboard_browser.py`` does. A script added to
   every new document records, in ms from the start of the navigation: the browser's
   first contentful paint, the page's title drawn, and the charts drawn (every chart's
   canvas laid out and the script run finished). Cold: the first page load of a freshly
   started server (one server per repeat); warm: a new page load on a server whose
   results are cached.

Run (about 1.5 minutes on 2 cores)::

    python benchmarks/dashboard.py [--db URL] [--shots 10000000] [--cold 3] [--warm 5]
    python benchmarks/dashboard.py --db 'postgresql+psycopg://postgres@/postgres?host=/tmp/pgdev&port=55432'

A catalogue at an older schema revision is refused, never upgraded: this script only reads.

Servers, Chromium and temporary files are cleaned up on success, failure and Ctrl-C.
"""

from __future__ import annotations

import argparse
import contextlib
import importlib.util
import json
import logging
import os
import platform
import shutil
import signal
import socket
import statistics
import subprocess
import sys
import tempfile
import time
import urllib.request
from pathlib import Path

import pandas as pd

CHROMIUM = Path("/usr/bin/chromium")
CHROMIUM_FLAGS = [
    "--headless",
    "--no-sandbox",
    "--disable-gpu",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
    "--no-first-run",
    "--window-size=1400,1000",
]
TARGET_SECONDS = 2.0
PAGE = "views/drift.py"
TITLE = "Drift"

# The peer page. Its frames are the drift page's own (pickled once by this script) and are
# kept in memory by the server, so a run draws charts and does nothing else.
PEER_PAGE = '''"""Peer of the drift page: the same Altair charts from frames held in memory."""

import pandas as pd
import streamlit as st

from runlog.dashboard_app.charts import drift_chart


@st.cache_resource(show_spinner=False)
def panels():
    return pd.read_pickle({frames!r})


st.set_page_config(page_title="peer", layout="wide")
st.title({title!r})
held = panels()
left, right = st.columns([4, 3], gap="large")
with left:
    for index, view in enumerate(held["views"]):
        st.altair_chart(drift_chart(view, held["domain"], held["zone"]), width="stretch", key=f"chart-{{index}}")
'''

# Runs in every new document before the page's own scripts. Marks are taken in the next
# animation frame, i.e. when what was found is on screen, not merely in the DOM.
MARKS_SCRIPT = """
(() => {
  const marks = window.__benchMarks = {paint: null, title: null, charts: null};
  new PerformanceObserver((list) => {
    for (const entry of list.getEntries()) if (entry.name === 'first-contentful-paint') marks.paint = entry.startTime;
  }).observe({type: 'paint', buffered: true});
  const check = () => {
    if (marks.title === null && [...document.querySelectorAll('h1')].some((h) => h.textContent.includes(%(title)s))) {
      requestAnimationFrame(() => { if (marks.title === null) marks.title = performance.now(); });
    }
    const drawn = [...document.querySelectorAll('.vega-embed canvas, .vega-embed svg')];
    if (marks.charts === null && drawn.length >= %(charts)d && drawn.every((e) => e.getBoundingClientRect().height > 0)
        && !document.querySelector('[data-testid="stStatusWidget"]')) {
      requestAnimationFrame(() => { if (marks.charts === null) marks.charts = performance.now(); });
    }
  };
  new MutationObserver(check).observe(document, {childList: true, subtree: true, attributes: true});
})();
"""
MEASURES = (("paint", "first contentful paint"), ("title", "page title drawn"), ("charts", "charts drawn"))


def _sibling(name: str):
    path = Path(__file__).with_name(name)
    spec = importlib.util.spec_from_file_location(f"runlog_bench_{path.stem}", path)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


# --- the page under AppTest ------------------------------------------------------------------


@contextlib.contextmanager
def _quiet():
    # Outside a script run Streamlit warns that it has no runtime; that is expected here.
    logging.disable(logging.WARNING)
    try:
        yield
    finally:
        logging.disable(logging.NOTSET)


def _forget_results() -> None:
    """Clear cached query results, as their 60 s expiry does; the open catalogue stays."""
    import streamlit as st

    with _quiet():
        st.cache_data.clear()


def _script_run(script: Path, page: str | None, at=None) -> tuple[float, object]:
    """One AppTest run (a new session unless ``at`` is given); seconds and the AppTest."""
    from streamlit.testing.v1 import AppTest

    with _quiet():
        if at is None:
            at = AppTest.from_file(str(script), default_timeout=180)
            if page:
                at.switch_page(page)
        tick = time.perf_counter()
        at.run()
        seconds = time.perf_counter() - tick
    if at.exception:
        raise SystemExit(f"{script} ({page or 'main'}): {at.exception[0].message}")
    if at.error:
        raise SystemExit(f"{script} ({page or 'main'}): the page shows an error: {at.error[0].value}")
    return seconds, at


def _drawn_charts(at) -> int:
    return len(at.get("vega_lite_chart"))


def script_times(script: Path, page: str | None, cold: int, warm: int) -> tuple[list[float], list[float]]:
    cold_times, last = [], None
    for _ in range(cold):
        _forget_results()
        seconds, last = _script_run(script, page)
        cold_times.append(seconds)
    warm_times = [_script_run(script, page, last)[0] for _ in range(warm)]
    return cold_times, warm_times


def page_as_opened(at, url: str) -> tuple[str, list[dict], tuple[str, str], str]:
    """The drift page's first view, asked of the same cached functions the page calls:
    apparatus, the panels' tables, the time axis and the lab time zone."""
    from runlog.dashboard_app import common

    with _quiet():
        apparatus = at.selectbox(key="drift-apparatus").value
        quantities = at.multiselect(key=f"drift-quantities-{apparatus}").value
        since, until = at.date_input(key=f"drift-days-{apparatus}").value
        baseline_days = int(at.number_input(key="drift-baseline").value)
        zone = common.lab_timezone(url)
        mixed = common.mixed_units(url, apparatus)
        views = [common.drift_view(url, quantity, apparatus, None, since, until, (), baseline_days) for quantity in quantities if quantity not in mixed]
    return apparatus, [view for view in views if not view["points"].empty], (since.isoformat(), until.isoformat()), zone


# --- servers and the browser ------------------------------------------------------------------


def _free_port() -> int:
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        return probe.getsockname()[1]


class Server:
    """``streamlit run`` on a script with the dashboard's own settings, on a free port."""

    def __init__(self, script: Path, url: str, log: Path):
        from runlog.dashboard import APP, command, environment

        self.port = _free_port()
        line = [str(script) if part == str(APP) else part for part in command(port=self.port)]
        self.address = f"http://127.0.0.1:{self.port}"
        self.log = log
        self.stopped = False
        with open(log, "ab") as output:
            self.process = subprocess.Popen(line, env=environment(url), stdout=output, stderr=subprocess.STDOUT, start_new_session=True)
        try:
            self.start_seconds = self._wait_until_up(script)
        except BaseException:  # Ctrl-C or a failed start: leave no server behind
            self.stop()
            raise

    def _wait_until_up(self, script: Path) -> float:
        tick = time.perf_counter()
        deadline = time.monotonic() + 90
        while True:
            try:
                with urllib.request.urlopen(f"{self.address}/_stcore/health", timeout=2) as answer:
                    if answer.read() == b"ok":
                        return time.perf_counter() - tick
            except OSError:
                pass
            if self.process.poll() is not None or time.monotonic() > deadline:
                raise SystemExit(f"streamlit did not come up for {script}:\n{self.log.read_text(errors='replace')[-2000:]}")
            time.sleep(0.1)

    def stop(self) -> None:
        if not self.stopped:  # the group id must not be signalled once the system may reuse it
            self.stopped = True
            _stop_group(self.process)


def _stop_group(process: subprocess.Popen) -> None:
    """Stop a process started in its own session, and anything it started."""
    if process.poll() is None:
        with contextlib.suppress(ProcessLookupError):
            os.killpg(process.pid, signal.SIGTERM)
        try:
            process.wait(timeout=15)
        except subprocess.TimeoutExpired:
            pass
    with contextlib.suppress(ProcessLookupError):
        os.killpg(process.pid, signal.SIGKILL)
    with contextlib.suppress(subprocess.TimeoutExpired):
        process.wait(timeout=5)


class Browser:
    """Headless Chromium with one tab, driven over the DevTools protocol."""

    def __init__(self, profile: Path, charts: int):
        from websockets.sync.client import connect

        self.process = subprocess.Popen(
            [str(CHROMIUM), *CHROMIUM_FLAGS, f"--user-data-dir={profile}", "--remote-debugging-port=0", "about:blank"],
            stdout=subprocess.DEVNULL,
            stderr=subprocess.DEVNULL,
            start_new_session=True,
        )
        self._opened = contextlib.ExitStack()
        self._opened.callback(_stop_group, self.process)
        self.calls = 0
        try:
            port_file = profile / "DevToolsActivePort"
            deadline = time.monotonic() + 30
            while not (port_file.exists() and port_file.read_text().strip()):
                if time.monotonic() > deadline:
                    raise SystemExit("chromium did not open its DevTools port within 30 s")
                time.sleep(0.05)
            port = int(port_file.read_text().split()[0])
            tabs: list[dict] = []
            while not tabs:
                with urllib.request.urlopen(f"http://127.0.0.1:{port}/json/list", timeout=5) as answer:
                    tabs = [t for t in json.load(answer) if t["type"] == "page"]
            self.socket = self._opened.enter_context(connect(tabs[0]["webSocketDebuggerUrl"], max_size=2**27))
            self.version = self.call("Browser.getVersion").get("product", "chromium")
            self.call("Page.enable")
            self.call("Page.addScriptToEvaluateOnNewDocument", source=MARKS_SCRIPT % {"title": json.dumps(TITLE), "charts": charts})
        except BaseException:  # leave no browser behind
            self.close()
            raise

    def call(self, method: str, **params) -> dict:
        self.calls += 1
        self.socket.send(json.dumps({"id": self.calls, "method": method, "params": params}))
        while True:
            message = json.loads(self.socket.recv(timeout=60))
            if message.get("id") == self.calls:  # events in between are not needed
                if "error" in message:
                    raise RuntimeError(f"{method}: {message['error']}")
                return message.get("result", {})

    def evaluate(self, expression: str):
        try:
            return self.call("Runtime.evaluate", expression=expression, returnByValue=True)["result"].get("value")
        except RuntimeError:  # the old document went away mid-navigation: ask again
            return None

    def load(self, address: str, timeout: float = 120.0) -> dict[str, float]:
        """Navigate to ``address``; the marks, in ms from the start of the navigation."""
        # The old document's marks must not be read as the new one's.
        self.evaluate("delete window.__benchMarks")
        self.call("Page.navigate", url=address)
        deadline = time.monotonic() + timeout
        while True:
            marks = self.evaluate("window.__benchMarks ? JSON.stringify(window.__benchMarks) : null")
            if marks and json.loads(marks)["charts"] is not None:
                return json.loads(marks)
            if self.evaluate("document.querySelectorAll('[data-testid=\"stException\"], [data-testid=\"stAlertContentError\"]').length"):
                raise SystemExit(f"{address}: the page shows an error: {self.text()[:800]}")
            if time.monotonic() > deadline:
                raise SystemExit(f"{address}: charts not drawn within {timeout:g} s: {self.text()[:800]}")
            time.sleep(0.1)

    def text(self) -> str:
        return self.evaluate("document.body ? document.body.innerText : ''") or ""

    def close(self) -> None:
        self._opened.close()


def browser_times(scripts: dict[str, Path], url: str, folder: Path, charts: int, cold: int, warm: int) -> tuple[dict, dict, dict, str]:
    """Cold and warm page loads of each script's server, alternating between the scripts so
    that both see the same load of the machine. Returns marks per script, server start
    times and the browser's version."""
    cold_marks: dict[str, list[dict]] = {name: [] for name in scripts}
    warm_marks: dict[str, list[dict]] = {name: [] for name in scripts}
    starts: dict[str, list[float]] = {name: [] for name in scripts}
    with contextlib.ExitStack() as cleanup:
        browser = Browser(folder / "chromium-profile", charts)
        cleanup.callback(browser.close)
        kept: dict[str, Server] = {}
        for repeat in range(cold):
            for name, script in scripts.items():
                server = Server(script, url, folder / f"{name}-server.log")
                cleanup.callback(server.stop)
                starts[name].append(server.start_seconds)
                cold_marks[name].append(browser.load(server.address + "/drift" if name == "runlog" else server.address))
                if repeat < cold - 1:
                    server.stop()
                else:
                    kept[name] = server
        for _ in range(warm):
            for name, server in kept.items():
                warm_marks[name].append(browser.load(server.address + "/drift" if name == "runlog" else server.address))
        return cold_marks, warm_marks, starts, browser.version


# --- the report -------------------------------------------------------------------------------


def _line(what: str, ours: list[float], peer: list[float], unit: str, target: float | None = None) -> str:
    scale, digits = (1000.0, 0) if unit == "ms" else (1.0, 2)
    mine, floor = statistics.median(ours), statistics.median(peer)

    def shown(values: list[float]) -> str:
        return ", ".join(f"{v * scale:.{digits}f}" for v in values)

    verdict = ""
    if target is not None:
        verdict = f"  (target < {target:g} s: {'met' if mine < target else 'MISSED'})"
    return f"  {what:<34} runlog {mine * scale:7.{digits}f} {unit} [{shown(ours)}]   peer {floor * scale:7.{digits}f} {unit} [{shown(peer)}]   ratio {mine / floor:6.2f}{verdict}"


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--db", default=f"sqlite:///{Path(tempfile.gettempdir()) / 'runlog-bench-drift.sqlite'}")
    parser.add_argument("--shots", type=int, default=10_000_000, help="catalogue size to use, or to build when the catalogue is empty")
    parser.add_argument("--cold", type=int, default=3, help="cold repeats (each browser one starts a fresh server)")
    parser.add_argument("--warm", type=int, default=5, help="warm repeats")
    parser.add_argument("--no-browser", action="store_true", help="only the AppTest measures")
    args = parser.parse_args()

    # A service manager or a timeout stops us with SIGTERM: clean up as on Ctrl-C.
    def stop(signum: int, frame: object) -> None:
        raise KeyboardInterrupt

    signal.signal(signal.SIGTERM, stop)

    import altair
    import streamlit

    from runlog.dashboard import APP, URL_VARIABLE
    from runlog.errors import RunlogError
    from runlog.store.engine import resolve_url

    url = resolve_url(args.db)
    try:
        catalogue = _sibling("export.py").ready_catalogue(url, args.shots)
    except RunlogError as error:  # e.g. a catalogue at an older schema: this script never upgrades it
        raise SystemExit(f"cannot use the catalogue: {error}") from None
    counts = catalogue.counts()
    shown_url = catalogue.url
    catalogue.close()
    os.environ[URL_VARIABLE] = url  # how the app is handed its catalogue, in process too

    browser = not args.no_browser
    if browser and not CHROMIUM.exists():
        print(f"no {CHROMIUM}: browser measures skipped (apt-get install -y chromium)", file=sys.stderr)
        browser = False

    folder = Path(tempfile.mkdtemp(prefix="runlog-bench-dashboard-"))
    try:
        print("AppTest: the drift page's first run in this process ...", file=sys.stderr)
        first_seconds, at = _script_run(APP, PAGE)
        charts = _drawn_charts(at)
        apparatus, views, domain, zone = page_as_opened(at, url)
        if charts == 0 or len(views) != charts:
            raise SystemExit(f"the drift page drew {charts} charts, the peer would draw {len(views)}: nothing comparable to measure")
        frames = folder / "panels.pickle"
        pd.to_pickle({"views": views, "domain": domain, "zone": zone}, frames)
        peer = folder / "peer_page.py"
        peer.write_text(PEER_PAGE.format(frames=str(frames), title=TITLE), encoding="utf-8")
        _script_run(peer, None)  # imports the peer's modules once, as the page's first run did
        print("AppTest: cold and warm script runs ...", file=sys.stderr)
        ours_cold, ours_warm = script_times(APP, PAGE, args.cold, args.warm)
        peer_cold, peer_warm = script_times(peer, None, args.cold, args.warm)
        if browser:
            print("Chromium: cold (fresh server) and warm page loads ...", file=sys.stderr)
            cold_marks, warm_marks, starts, chromium = browser_times({"runlog": APP, "peer": peer}, url, folder, charts, args.cold, args.warm)
    finally:
        shutil.rmtree(folder, ignore_errors=True)

    points = sum(len(view["points"]) for view in views)
    print(f"machine: {os.cpu_count()} cores, {platform.system()} {platform.release()} {platform.machine()}, Python {platform.python_version()}, Streamlit {streamlit.__version__}, Altair {altair.__version__}" + (f", {chromium}" if browser else ""))
    print(f"catalogue: {shown_url}: {counts['apparatus']} apparatus, {counts['runs']} runs, {counts['shots']} shots")
    print(f"drift page as opened: apparatus {apparatus}, {charts} panels ({', '.join(v['quantity'] for v in views)}), {domain[0]} to {domain[1]}, {points} daily points in all")
    print(f"peer: a bare Streamlit page drawing the same {charts} Altair charts (charts.drift_chart) from the same frames held in memory")
    print(f"AppTest script run (first in this process, with imports and opening the catalogue: {first_seconds:.2f} s)")
    print(_line(f"cold results, median of {args.cold}", ours_cold, peer_cold, "s", TARGET_SECONDS))
    print(_line(f"warm rerun, median of {args.warm}", ours_warm, peer_warm, "s", TARGET_SECONDS))
    if browser:
        for name in ("runlog", "peer"):
            print(f"  ({name} server up in {statistics.median(starts[name]):.2f} s, median of {len(starts[name])})")
        print(f"headless Chromium, cold: first load of a fresh server, median of {args.cold}")
        for key, what in MEASURES:
            print(_line(what, [m[key] / 1000 for m in cold_marks["runlog"]], [m[key] / 1000 for m in cold_marks["peer"]], "ms", TARGET_SECONDS if key != "title" else None))
        print(f"headless Chromium, warm: a new page load, results cached, median of {args.warm}")
        for key, what in MEASURES:
            print(_line(what, [m[key] / 1000 for m in warm_marks["runlog"]], [m[key] / 1000 for m in warm_marks["peer"]], "ms", TARGET_SECONDS if key != "title" else None))


if __name__ == "__main__":
    try:
        main()
    except KeyboardInterrupt:
        raise SystemExit("stopped; servers, browser and temporary files cleaned up") from None
