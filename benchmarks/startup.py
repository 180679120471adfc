"""Start-up time of the ``runlog`` command against a bare click program.

Times, in one run and alternating so machine load hits all alike, the median wall time of

    python -c "import click"                   the peer: a bare click program's floor
    runlog --version
    runlog --help
    runlog --db <demo> runs --json             on the demo catalogue (462 runs)

each as a fresh process, and prints the medians with the ratio to the peer. Targets
(issue #12): ``--version`` and ``--help`` at most 4x the peer, ``runs --json`` at most
0.6 s. The demo catalogue is built into a temporary folder unless ``--db`` names one.

    python benchmarks/startup.py [--repeat 15] [--db URL]
"""

from __future__ import annotations

import argparse
import os
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path


def runlog_script() -> str:
    beside = Path(sys.executable).parent / "runlog"
    found = str(beside) if beside.exists() else shutil.which("runlog")
    if not found:
        sys.exit("the runlog console script is not installed (pip install -e .)")
    return found


def wall(argv: list[str], env: dict[str, str]) -> float:
    tick = time.perf_counter()
    done = subprocess.run(argv, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, env=env)
    took = time.perf_counter() - tick
    if done.returncode != 0:
        sys.exit(f"{' '.join(argv)} failed: {done.stderr.decode().strip()}")
    return took


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeat", type=int, default=15)
    parser.add_argument("--db", default=None, help="The demo catalogue (default: build one now).")
    options = parser.parse_args()
    script = runlog_script()
    env = {k: v for k, v in os.environ.items() if k != "RUNLOG_DB"}
    with tempfile.TemporaryDirectory(prefix="runlog-startup-") as folder:
        url = options.db
        if url is None:
            url = f"sqlite:///{Path(folder) / 'demo.sqlite'}"
            print("building the demo catalogue ...", flush=True)
            subprocess.run([script, "--db", url, "demo", "--no-dashboard"], check=True, stdout=subprocess.DEVNULL, env=env)
        cases = {
            "python -c 'import click' (peer)": [sys.executable, "-c", "import click"],
            "runlog --version": [script, "--version"],
            "runlog --help": [script, "--help"],
            "runlog runs --json (demo)": [script, "--db", url, "runs", "--json"],
        }
        for argv in cases.values():  # warm the file cache and the bytecode
            wall(argv, env)
        times: dict[str, list[float]] = {name: [] for name in cases}
        for _ in range(options.repeat):
            for name, argv in cases.items():
                times[name].append(wall(argv, env))
    medians = {name: statistics.median(values) for name, values in times.items()}
    peer = medians["python -c 'import click' (peer)"]
    targets = {"runlog --version": ("ratio", 4.0), "runlog --help": ("ratio", 4.0), "runlog runs --json (demo)": ("seconds", 0.6)}
    print(f"median of {options.repeat} fresh processes each, {sys.executable}")
    print(f"{'command':<34} {'median':>8} {'min':>7} {'max':>7} {'x peer':>7}  target")
    for name, median in medians.items():
        kind, limit = targets.get(name, (None, None))
        if kind == "ratio":
            verdict = f"<= {limit:g}x: {'met' if median / peer <= limit else 'MISSED'}"
        elif kind == "seconds":
            verdict = f"<= {limit:g} s: {'met' if median <= limit else 'MISSED'}"
        else:
            verdict = ""
        print(f"{name:<34} {median:>7.3f}s {min(times[name]):>6.3f}s {max(times[name]):>6.3f}s {median / peer:>7.2f}  {verdict}")


if __name__ == "__main__":
    main()
