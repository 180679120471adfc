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
