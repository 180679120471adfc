"""Start-up time of the ``runlog`` command against a bare click program.

Times, in one run and alternating so machine load hits all alike, the median wall time of

    python -c "import click"                   the peer: a bare click program's floor
    runlog --version
    runlog --help
    runlog --db <demo> runs --json             on the demo catalogue (462 runs)

each as a fresh process, and prints the medians with the ratio to the peer, and the median
CPU time (user + system), which a machine shared with other jobs disturbs less. The processes
cache their bytecode in the temporary folder (``PYTHONPYCACHEPREFIX``), as a user's
machine does after the first run, even where ``PYTHONDONTWRITEBYTECODE`` is set: else
runlog's own modules would be compiled anew by every process, and the peer's not. Targets
(issue #12): ``--version`` and ``--help`` at most 4x the peer, ``runs --json`` at most
0.6 s. The demo catalogue is built into a temporary folder unless ``--db`` names one.

    python benchmarks/startup.py [--repeat 15] [--db URL]
"""

from __future__ import annotations

import argparse
import os
import resource
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


def wall(argv: list[str], env: dict[str, str]) -> tuple[float, float]:
    """Wall time and CPU time (user + system) of one fresh process."""
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    tick = time.perf_counter()
    done = subprocess.run(argv, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, env=env)
    took = time.perf_counter() - tick
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    if done.returncode != 0:
        sys.exit(f"{' '.join(argv)} failed: {done.stderr.decode().strip()}")
    return took, (after.ru_utime + after.ru_stime) - (before.ru_utime + before.ru_stime)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeat", type=int, default=15)
    parser.add_argument("--db", default=None, help="The demo catalogue (default: build one now).")
    options = parser.parse_args()
    script = runlog_script()
    env = {k: v for k, v in os.environ.items() if k not in ("RUNLOG_DB", "PYTHONDONTWRITEBYTECODE")}
    with tempfile.TemporaryDirectory(prefix="runlog-startup-") as folder:
        env["PYTHONPYCACHEPREFIX"] = str(Path(folder) / "bytecode")
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
        cpu: dict[str, list[float]] = {name: [] for name in cases}
        for _ in range(options.repeat):
            for name, argv in cases.items():
                took, used = wall(argv, env)
                times[name].append(took)
                cpu[name].append(used)
    medians = {name: statistics.median(values) for name, values in times.items()}
    cpu_medians = {name: statistics.median(values) for name, values in cpu.items()}
    peer = medians["python -c 'import click' (peer)"]
    targets = {"runlog --version": ("ratio", 4.0), "runlog --help": ("ratio", 4.0), "runlog runs --json (demo)": ("seconds", 0.6)}
    print(f"median of {options.repeat} fresh processes each, {sys.executable}")
    print(f"{'command':<34} {'median':>8} {'min':>7} {'max':>7} {'x peer':>7} {'cpu':>7}  target (on the wall median)")
    for name, median in medians.items():
        kind, limit = targets.get(name, (None, None))
        if kind == "ratio":
            verdict = f"<= {limit:g}x: {'met' if median / peer <= limit else 'MISSED'}"
        elif kind == "seconds":
            verdict = f"<= {limit:g} s: {'met' if median <= limit else 'MISSED'}"
        else:
            verdict = ""
        print(f"{name:<34} {median:>7.3f}s {min(times[name]):>6.3f}s {max(times[name]):>6.3f}s {median / peer:>7.2f} {cpu_medians[name]:>6.3f}s  {verdict}")


if __name__ == "__main__":
    main()
