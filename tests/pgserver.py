"""A throwaway PostgreSQL server for the tests: its own data dir, socket dir and port.

`.ci/run` starts one with ``python tests/pgserver.py start DIR PORT`` and exports the URL in
``RUNLOG_TEST_PG_URL``; without that variable, the test session starts its own (if the
server binaries are installed) and stops it at the end.
"""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
from pathlib import Path

PG_BIN = Path(os.environ.get("RUNLOG_PG_BIN", "/usr/lib/postgresql/15/bin"))


def available() -> bool:
    return (PG_BIN / "initdb").exists() and (PG_BIN / "pg_ctl").exists()


def _as_postgres(args: list[str]) -> list[str]:
    # initdb refuses to run as root; the Debian package provides the postgres user.
    if os.geteuid() == 0:
        return ["runuser", "-u", "postgres", "--", *args]
    return args


def start(folder: Path, port: int) -> str:
    """Create and start a server in ``folder``; returns its SQLAlchemy URL."""
    folder = Path(folder).resolve()
    data = folder / "data"
    folder.mkdir(parents=True, exist_ok=True)
    if os.geteuid() == 0:
        shutil.chown(folder, "postgres", "postgres")
    if not data.exists():
        subprocess.run(_as_postgres([str(PG_BIN / "initdb"), "-D", str(data), "-A", "trust", "-U", "postgres", "-E", "UTF8", "--no-sync"]), check=True, capture_output=True)
    options = f"-p {port} -k {folder} -c listen_addresses='' -c fsync=off -c synchronous_commit=off -c full_page_writes=off -c max_connections=200"
    subprocess.run(_as_postgres([str(PG_BIN / "pg_ctl"), "-D", str(data), "-o", options, "-l", str(folder / "server.log"), "-w", "start"]), check=True, capture_output=True)
    return f"postgresql+psycopg://postgres@/postgres?host={folder}&port={port}"


def stop(folder: Path) -> None:
    data = Path(folder).resolve() / "data"
    subprocess.run(_as_postgres([str(PG_BIN / "pg_ctl"), "-D", str(data), "-m", "immediate", "stop"]), capture_output=True)


if __name__ == "__main__":
    command, folder = sys.argv[1], Path(sys.argv[2])
    if command == "start":
        print(start(folder, int(sys.argv[3])))
    elif command == "stop":
        stop(folder)
    else:
        raise SystemExit(f"usage: {sys.argv[0]} start DIR PORT | stop DIR")
