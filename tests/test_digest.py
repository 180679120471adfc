"""The daily digest on the 14-day scenario of tests/test_drift.py: text, JSON, a
self-contained HTML page rendered in headless Chromium, e-mail to a local SMTP server
(aiosmtpd) and a post to a local HTTP receiver; no credential in any output."""

from __future__ import annotations

import datetime as dt
import json
import shutil
import socket
import subprocess
import threading
from http.server import BaseHTTPRequestHandler, HTTPServer

import pytest
from click.testing import CliRunner
from test_drift import COHERENCE_STEP_DAY, START, scenario  # noqa: F401  (the fixture)

from runlog.cli import cli
from runlog.digest import build_digest, digest_html, digest_text, send_mail, send_webhook

DAY = START + dt.timedelta(days=COHERENCE_STEP_DAY)
SECRET = "hunter2-not-for-printing"


def _free_port() -> int:
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        return probe.getsockname()[1]


def test_the_digest_says_where_each_figure_stands_and_names_the_open_alarm(scenario, tmp_path):  # noqa: F811
    scenario.check_drift()
    scenario.annotate("repump fibre replaced this morning", apparatus="bench-north", at=f"{DAY.isoformat()}T08:00:00+00:00")
    found = build_digest(scenario, day=DAY)
    (bench,) = found["apparatus"]
    states = {f["quantity"]: f["state"] for f in bench["figures"]}
    assert states["t2_star"] == "changed" and states["survival"] == "in limits"
    coherence = next(f for f in bench["figures"] if f["quantity"] == "t2_star")
    assert coherence["size"] < 0 and coherence["z"] < -3 and coherence["series"]["sequence"] == "ramsey"
    assert any(a["quantity"] == "t2_star" and a["notes"][0]["text"] == "repump fibre replaced this morning" for a in bench["alarms"])
    assert bench["notes"][0]["text"] == "repump fibre replaced this morning" and bench["sent_data"]
    text = digest_text(found)
    assert "t2_star" in text and "changed" in text and "repump fibre replaced" in text
    later = build_digest(scenario, day=START + dt.timedelta(days=20))
    assert "WARNING: no data on" in digest_text(later)  # an apparatus that sent nothing


def test_the_digest_page_is_self_contained_and_renders_in_chromium(scenario, tmp_path):  # noqa: F811
    scenario.check_drift()
    page = digest_html(build_digest(scenario, day=DAY))
    assert "<svg" in page and "<script" not in page and "src=" not in page and "http" not in page.replace("http://www.w3.org/2000/svg", "")
    out = tmp_path / "report.html"
    url = scenario.engine.url.render_as_string(hide_password=False)
    result = CliRunner().invoke(cli, ["--db", url, "digest", "--day", DAY.isoformat(), "--out", str(out)])
    assert result.exit_code == 0, result.output
    assert out.read_text(encoding="utf-8") == page
    browser = shutil.which("chromium") or shutil.which("chromium-browser")
    if browser is None:
        pytest.skip("no chromium on this machine")
    shot = tmp_path / "report.png"
    subprocess.run([browser, "--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking", "--window-size=1200,1400", f"--screenshot={shot}", out.as_uri()], check=True, capture_output=True, timeout=120)
    assert shot.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n" and shot.stat().st_size > 20_000


def test_the_digest_arrives_by_mail_with_its_html_part(scenario):  # noqa: F811
    from aiosmtpd.controller import Controller
    from aiosmtpd.handlers import Message

    received = []

    class Keep(Message):
        def handle_message(self, message):
            received.append(message)

    port = _free_port()
    controller = Controller(Keep(), hostname="127.0.0.1", port=port)
    controller.start()
    try:
        environ = {"RUNLOG_SMTP_HOST": "127.0.0.1", "RUNLOG_SMTP_PORT": str(port), "RUNLOG_SMTP_STARTTLS": "0", "RUNLOG_DIGEST_TO": "lab@example.org", "RUNLOG_DIGEST_FROM": "runlog@example.org"}
        assert send_mail(build_digest(scenario, day=DAY), environ=environ) == ["lab@example.org"]
    finally:
        controller.stop()
    (message,) = received
    assert message["Subject"] == f"runlog digest {DAY.isoformat()}" and message["To"] == "lab@example.org"
    parts = {part.get_content_type(): part.get_payload(decode=True).decode() for part in message.walk() if not part.is_multipart()}
    assert set(parts) == {"text/plain", "text/html"}
    assert "<svg" in parts["text/html"] and "t2_star" in parts["text/plain"]


def test_no_credential_in_any_output_when_sending_fails(scenario, monkeypatch, capsys):  # noqa: F811
    from conftest import run_main

    url = scenario.engine.url.render_as_string(hide_password=False)
    monkeypatch.setenv("RUNLOG_SMTP_HOST", "127.0.0.1")
    monkeypatch.setenv("RUNLOG_SMTP_PORT", str(_free_port()))  # nobody listens
    monkeypatch.setenv("RUNLOG_SMTP_USER", "lab")
    monkeypatch.setenv("RUNLOG_SMTP_PASSWORD", SECRET)
    monkeypatch.setenv("RUNLOG_DIGEST_TO", "lab@example.org")
    monkeypatch.setenv("RUNLOG_DIGEST_WEBHOOK", f"http://127.0.0.1:{_free_port()}/hook/{SECRET}")
    for option in ("--mail", "--webhook"):
        code, out, err = run_main(capsys, "--db", url, "digest", "--day", DAY.isoformat(), option)
        assert code != 0
        assert SECRET not in out + err and "Traceback" not in err
        assert "failed" in err and len(err.strip().splitlines()) == 1


def test_the_digest_is_posted_to_a_chat_webhook(scenario):  # noqa: F811
    posted = []

    class Receiver(BaseHTTPRequestHandler):
        def do_POST(self):  # noqa: N802  (http.server's name)
            posted.append((self.path, json.loads(self.rfile.read(int(self.headers["Content-Length"])))))
            self.send_response(204)
            self.end_headers()

        def log_message(self, *args):
            pass

    server = HTTPServer(("127.0.0.1", 0), Receiver)
    thread = threading.Thread(target=server.serve_forever, daemon=True)
    thread.start()
    try:
        status = send_webhook(build_digest(scenario, day=DAY), url=f"http://127.0.0.1:{server.server_port}/hook/abc")
    finally:
        server.shutdown()
    assert status == 204
    ((path, body),) = posted
    assert path == "/hook/abc" and body["text"].startswith(f"runlog digest for lab day {DAY.isoformat()}")


def test_watch_sends_the_digest_once_a_day_after_its_hour():
    from runlog.digest import due_day

    sent: set[str] = set()
    morning = dt.datetime(2026, 4, 20, 6, 30, tzinfo=dt.timezone.utc)
    assert due_day("UTC", 7, sent, now=morning) is None
    day = due_day("UTC", 7, sent, now=morning + dt.timedelta(hours=1))
    assert day == dt.date(2026, 4, 19)
    sent.add(day.isoformat())
    assert due_day("UTC", 7, sent, now=morning + dt.timedelta(hours=5)) is None
