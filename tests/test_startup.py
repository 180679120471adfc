"""Start-up: the command line imports the heavy libraries only in the commands that use them.

``runlog --version`` and ``--help`` should cost little more than a bare click program
(issue #12; the speed itself is measured by ``benchmarks/startup.py``). This test keeps
future commands honest: a heavy import at the top of ``runlog/cli.py``, or in
``runlog/__init__.py``, shows up here.
"""

from __future__ import annotations

import json
import subprocess
import sys

HEAVY = ("pandas", "sqlalchemy", "pyarrow", "scipy", "pint", "numpy", "alembic", "streamlit", "runlog.catalogue")

PROBE = """
import json, sys
from runlog.cli import cli, main

def every_help():
    yield ["--version"]
    yield ["--help"]
    for name, command in cli.commands.items():
        yield [name, "--help"]
        for sub in getattr(command, "commands", {}):
            yield [name, sub, "--help"]

seen = {}
for argv in every_help():
    try:
        main(argv)
    except SystemExit as done:
        assert not done.code, (argv, done.code)
    seen[" ".join(argv)] = sorted(m for m in HEAVY if m in sys.modules)
print(json.dumps(seen), file=sys.stderr)
"""


def test_version_and_every_help_import_nothing_heavy():
    code = f"HEAVY = {HEAVY!r}\n" + PROBE
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stderr
    seen = json.loads(done.stderr.strip().splitlines()[-1])
    assert "--version" in seen and "--help" in seen and "ingest --help" in seen and "db copy --help" in seen
    heavy = {argv: modules for argv, modules in seen.items() if modules}
    assert heavy == {}


def test_import_runlog_is_light_and_the_api_loads_on_use():
    code = "import sys, runlog; before = [m for m in %r if m in sys.modules]; runlog.open; runlog.Figure; print(before, 'runlog.catalogue' in sys.modules)" % (HEAVY,)
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=60)
    assert done.returncode == 0, done.stderr
    assert done.stdout.strip() == "[] True"


# What `runlog runs --json` needs is SQLAlchemy and the database driver; everything below
# is what once crept into its path (numpy through runlog.times and runlog.catalogue, the
# PostgreSQL dialect through a partial index's postgresql_where on SQLite).
NOT_FOR_RUNS = ("pandas", "pyarrow", "scipy", "pint", "numpy", "alembic", "streamlit", "runlog.ingest", "runlog.derive")

RUNS_PROBE = """
import json, sys
from runlog.cli import main
try:
    main(["--db", URL, "runs", "--json"])
except SystemExit as done:
    assert not done.code, done.code
loaded = sorted(m for m in NOT_FOR_RUNS if m in sys.modules)
if URL.startswith("sqlite"):
    loaded += sorted(m for m in sys.modules if m.startswith("sqlalchemy.dialects.postgresql"))[:1]
print(json.dumps(loaded), file=sys.stderr)
"""


def test_runs_json_imports_no_frames_no_physics_no_migrations(catalogue, db_url, make_file):
    catalogue.ingest(make_file(runs={"r1": 3, "r2": 2}))
    code = f"URL = {db_url!r}\nNOT_FOR_RUNS = {NOT_FOR_RUNS!r}\n" + RUNS_PROBE
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stderr
    assert sorted(r["run"] for r in json.loads(done.stdout)) == ["r1", "r2"]
    assert json.loads(done.stderr.strip().splitlines()[-1]) == []
