"""Four writers and a reader at once, on SQLite and PostgreSQL: no lock failure, no lost or
duplicated shot."""

from __future__ import annotations

import os
import subprocess
import sys
import textwrap

from conftest import shot_table, write_table

import runlog

READER = textwrap.dedent(
    """
    import sys, time, runlog
    catalogue = runlog.open(sys.argv[1])
    deadline = time.monotonic() + float(sys.argv[2])
    reads = 0
    while time.monotonic() < deadline:
        catalogue.runs()
        catalogue.counts()
        reads += 1
    print(reads)
    """
)


def test_four_writers_and_a_reader(db_url, tmp_path):
    runlog.open(db_url).close()  # create the schema once, as `runlog init` would
    writers = []
    for number in range(4):
        folder = tmp_path / f"apparatus-{number}"
        folder.mkdir()
        for day in range(3):
            table = shot_table({f"d{day}-a": 300, f"d{day}-b": 250}, apparatus=f"bench-{number}", seed=10 * number + day, sites=25)
            write_table(folder / f"day{day}.parquet", table)
        writers.append(folder)
    environment = {**os.environ}
    reader = subprocess.Popen([sys.executable, "-c", READER, db_url, "8"], stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=environment)
    processes = [
        subprocess.Popen([sys.executable, "-m", "runlog", "--db", db_url, "ingest", "--json", str(folder)], stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=environment)
        for folder in writers
    ]
    for process in processes:
        out, err = process.communicate(timeout=240)
        assert process.returncode == 0, err
        assert "locked" not in err
    reads, err = reader.communicate(timeout=240)
    assert reader.returncode == 0, err
    assert int(reads) > 0

    with runlog.open(db_url) as catalogue:
        runs = catalogue.runs()
        assert len(runs) == 4 * 3 * 2
        assert sorted(runs["shots"].tolist()) == sorted([300, 250] * 12)
        assert catalogue.counts()["shots"] == 4 * 3 * 550
        for apparatus in range(4):
            shots = catalogue.shots("d1-a", apparatus=f"bench-{apparatus}")
            assert list(shots["shot"]) == list(range(300))
        # every rollup agrees with its runs: nothing lost between writers
        fill = catalogue.drift("fill_fraction", apparatus="bench-2", record_alarms=False)
        assert sum(point.runs for point in fill.points) == 6
