"""The README's ``Using it`` examples run as written on the demo catalogue, on both backends.

The demo is built as a new user builds it (``runlog demo``, four invented days); each
example line is then run with ``RUNLOG_DB`` pointing at it, as the demo's last lines tell
the user to do. Lines that need something the demo does not make (a folder of exports, a
watched folder, a server: ingest, watch, dashboard and the ``--db postgresql://...`` lines)
are left out, and named in ``NOT_RUN`` so that a new kind of line is not skipped silently.
"""

from __future__ import annotations

import shlex
from pathlib import Path

import pytest
from conftest import BACKENDS, _fresh_postgres_database

from runlog.cli import main

README = Path(__file__).resolve().parent.parent / "README.md"
NOT_RUN = ("ingest", "watch", "dashboard", "--db")


def readme_examples() -> list[list[str]]:
    text = README.read_text(encoding="utf-8")
    section = text[text.index("## Using it") :]
    section = section[: section.index("\n## ", 3)] if "\n## " in section[3:] else section
    lines = [line.strip() for line in section.splitlines() if line.startswith("    runlog ")]
    return [shlex.split(line, comments=True) for line in lines]


@pytest.fixture(scope="module", params=BACKENDS)
def demo_url(request, tmp_path_factory):
    if request.param == "sqlite":
        url, drop = f"sqlite:///{tmp_path_factory.mktemp('readme') / 'demo.sqlite'}", None
    else:
        url, drop = _fresh_postgres_database(request.getfixturevalue("postgres_url"))
    try:
        main(["--db", url, "demo", "--days", "4", "--no-dashboard"])
    except SystemExit as exit:
        assert exit.code == 0, f"runlog demo exited {exit.code}"
    yield url
    if drop:
        drop()


def _run(capsys, args: list[str]) -> tuple[int, str, str]:
    try:
        main(args)
        code = 0
    except SystemExit as exit:
        code = exit.code or 0
    out, err = capsys.readouterr()
    return code, out, err


def test_the_readme_shows_the_examples_this_test_runs():
    examples = readme_examples()
    run = [e for e in examples if not any(word in e[1:2] or word in e for word in NOT_RUN)]
    assert len(examples) >= 15 and len(run) >= 10
    assert {e[1] for e in run} >= {"runs", "show", "note", "derive", "drift", "alarms", "shots", "export", "plot"}


def test_readme_examples_work_on_the_demo_as_written(demo_url, capsys, monkeypatch, tmp_path):
    monkeypatch.setenv("RUNLOG_DB", demo_url)
    monkeypatch.chdir(tmp_path)  # export and plot write where the user stands
    capsys.readouterr()
    for example in readme_examples():
        if example[1] in NOT_RUN or "--db" in example:
            continue
        code, out, err = _run(capsys, example[1:])
        assert (code, err) == (0, ""), f"{shlex.join(example)}: exit {code}: {err}"
        assert out.strip(), shlex.join(example)
    assert (tmp_path / "thesis-ch4" / "datapackage.json").is_file()
    assert (tmp_path / "fill.pdf").stat().st_size > 1000 and (tmp_path / "ramsey.pdf").stat().st_size > 1000
