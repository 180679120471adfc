"""Starting the dashboard: a Streamlit server on the app shipped in :mod:`runlog.dashboard_app`.

``runlog dashboard`` (and the last step of ``runlog demo``) call :func:`serve`. The catalogue
URL reaches the app through the environment of the server process, in ``RUNLOG_DB`` (the
variable every runlog command already reads), so it never appears on a command line where
other users of the machine could read it with ``ps``. The server binds to 127.0.0.1 unless
told otherwise: without an identity (``--author-header``, ``--login``) anyone who reaches
it can read the catalogue and add notes; ``--read-only`` takes the forms away
(docs/scaling.md, "The dashboard for a group").
"""

from __future__ import annotations

import os
import signal
import socket
import subprocess
import sys
from collections.abc import Callable
from pathlib import Path

__all__ = ["APP", "URL_VARIABLE", "AUTHOR_HEADER_VARIABLE", "LOGIN_VARIABLE", "WRITES_VARIABLE", "command", "environment", "free_port", "serve"]

#: How many ports after the asked one are tried when it is taken.
PORT_TRIES = 20

#: The Streamlit entry script inside the installed package.
APP = Path(__file__).resolve().parent / "dashboard_app" / "app.py"

#: The environment variable that carries the catalogue URL to the app.
URL_VARIABLE = "RUNLOG_DB"
#: The request header a trusted reverse proxy puts the authenticated user in (e.g.
#: ``X-Forwarded-User``); when set, notes and acknowledgements carry that name only.
AUTHOR_HEADER_VARIABLE = "RUNLOG_DASHBOARD_AUTHOR_HEADER"
#: ``"1"``: authors come from Streamlit's own login (OIDC, ``st.login``; the provider is
#: configured in ``.streamlit/secrets.toml``).
LOGIN_VARIABLE = "RUNLOG_DASHBOARD_LOGIN"
#: ``"off"``: the dashboard only reads; its note and acknowledgement forms are gone.
WRITES_VARIABLE = "RUNLOG_DASHBOARD_WRITES"

# Our own colours (Okabe-Ito blue as the accent); Streamlit's usage statistics stay off so
# that a lab machine does not call out to the internet.
_SETTINGS = {
    "server.headless": "true",
    "server.runOnSave": "false",
    "server.fileWatcherType": "none",
    "browser.gatherUsageStats": "false",
    "logger.level": "warning",
    "client.toolbarMode": "minimal",
    "theme.base": "light",
    "theme.primaryColor": "#0072B2",
}


def command(host: str = "127.0.0.1", port: int = 8501) -> list[str]:
    """The ``streamlit run`` command line for the dashboard (without the catalogue URL)."""
    options = [f"--{key}={value}" for key, value in {**_SETTINGS, "server.address": host, "server.port": str(port)}.items()]
    return [sys.executable, "-m", "streamlit", "run", str(APP), *options]


def environment(url: str | None, *, author_header: str | None = None, login: bool = False, writes: bool = True) -> dict[str, str]:
    """The server's environment: ours, with the resolved catalogue URL in ``RUNLOG_DB`` and
    who may write how (the ``*_VARIABLE`` constants)."""
    from runlog.store.engine import resolve_url

    settings = {URL_VARIABLE: resolve_url(url)}
    if author_header:
        settings[AUTHOR_HEADER_VARIABLE] = author_header
    if login:
        settings[LOGIN_VARIABLE] = "1"
    if not writes:
        settings[WRITES_VARIABLE] = "off"
    return {**os.environ, **settings}


def free_port(host: str, port: int, tries: int = PORT_TRIES) -> int:
    """``port``, or the first of the next ``tries - 1`` ports nothing listens on at ``host``.

    Another dashboard (a demo still serving, a colleague's) may hold the usual port; the URL
    we print must be the one our server answers on.
    """
    from runlog.errors import RunlogError

    for candidate in range(port, port + tries):
        with socket.socket(socket.AF_INET6 if ":" in host else socket.AF_INET) as probe:
            # As the server will bind: a port in TIME_WAIT is free, one with a listener is not.
            probe.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
            try:
                probe.bind((host, candidate))
            except OSError:
                continue
            return candidate
    raise RunlogError(f"ports {port}-{port + tries - 1} on {host} are all in use: give a free one with --port")


def serve(url: str | None, *, host: str = "127.0.0.1", port: int = 8501, say: Callable[[str], None] = print, author_header: str | None = None, login: bool = False, writes: bool = True) -> int:
    """Run the dashboard on ``url``'s catalogue until Ctrl-C; returns the server's exit status."""
    from runlog.store.engine import redact, resolve_url

    asked, port = port, free_port(host, port)
    if port != asked:
        say(f"port {asked} is in use (another dashboard?); using {port}")
    shown = "localhost" if host in ("127.0.0.1", "::1") else host
    say(f"runlog dashboard: http://{shown}:{port}/  (catalogue {redact(resolve_url(url))}; Ctrl-C to stop)")
    if host not in ("127.0.0.1", "localhost", "::1") and writes and not (author_header or login):
        say("note: no authenticated identity (--author-header or --login): anyone who can reach this address can add notes under any name; --read-only turns writing off")
    server = subprocess.Popen(command(host, port), env=environment(url, author_header=author_header, login=login, writes=writes), stdout=subprocess.DEVNULL)

    def stop(signum: int, frame: object) -> None:
        raise KeyboardInterrupt

    # A service manager stops us with SIGTERM: take the server down with us, as Ctrl-C does.
    previous = signal.signal(signal.SIGTERM, stop)
    try:
        return server.wait()
    except KeyboardInterrupt:
        server.terminate()
        try:
            server.wait(timeout=10)
        except subprocess.TimeoutExpired:
            server.kill()
            server.wait()
        return 0
    finally:
        signal.signal(signal.SIGTERM, previous)
