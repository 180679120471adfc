"""The dashboard on a shared server: the author of every note and acknowledgement comes
from an authenticated identity when the server names one (a trusted proxy's header, or
Streamlit's login), and writing can be switched off. On both backends."""

from __future__ import annotations

import pytest
from streamlit.testing.v1 import AppTest

from conftest import shot_table, write_table
from runlog.dashboard import APP, AUTHOR_HEADER_VARIABLE, LOGIN_VARIABLE, URL_VARIABLE, WRITES_VARIABLE, environment
from runlog.dashboard_app import common


@pytest.fixture
def served(catalogue, db_url, tmp_path, monkeypatch):
    catalogue.ingest(write_table(tmp_path / "a.parquet", shot_table({"r1": 6})))
    monkeypatch.setenv(URL_VARIABLE, db_url)
    for name in (AUTHOR_HEADER_VARIABLE, LOGIN_VARIABLE, WRITES_VARIABLE):
        monkeypatch.delenv(name, raising=False)
    yield catalogue
    common.catalogue(db_url).close()
    import streamlit as st

    st.cache_resource.clear()
    st.cache_data.clear()


def _page(user: dict | None = None) -> AppTest:
    at = AppTest.from_file(str(APP), default_timeout=60)
    if user is not None:
        at.user = user
    at.run()
    at.switch_page("views/notes.py").run()
    assert not at.exception, [e.message for e in at.exception]
    return at


def _add_run_note(at: AppTest, text: str, author: str | None = None) -> None:
    at.text_area(key="note-run-text").input(text)
    if author is not None:
        at.text_input(key="note-run-author").input(author)
    at.button(key="note-run-submit").click().run()
    assert not at.exception, [e.message for e in at.exception]


def _has(at: AppTest, key: str) -> bool:
    return any(getattr(element, "key", None) == key for kind in ("text_area", "text_input") for element in getattr(at, kind))


def test_the_proxy_header_names_the_author(served, monkeypatch):
    monkeypatch.setenv(AUTHOR_HEADER_VARIABLE, "X-Forwarded-User")
    monkeypatch.setattr(common, "request_headers", lambda: {"X-Forwarded-User": "k.varga"})
    at = _page()
    assert not _has(at, "note-run-author")  # no name to type: it is the login's
    _add_run_note(at, "repump fibre swapped")
    note = served.annotations(apparatus="bench-a").iloc[-1]
    assert (note["text"], note["author"]) == ("repump fibre swapped", "k.varga")


def test_without_the_header_nothing_can_be_written(served, monkeypatch):
    monkeypatch.setenv(AUTHOR_HEADER_VARIABLE, "X-Forwarded-User")
    monkeypatch.setattr(common, "request_headers", lambda: {"X-Forwarded-User": "  "})
    at = _page()
    assert not _has(at, "note-run-text") and not _has(at, "acknowledge-note")
    assert at.info[0].value == "no authenticated user in the X-Forwarded-User header: notes need the lab's login in front of the dashboard"
    assert served.annotations().empty


def test_streamlit_login_names_the_author(served, monkeypatch):
    monkeypatch.setenv(LOGIN_VARIABLE, "1")
    at = _page({"is_logged_in": True, "email": "ada@lab.example", "name": "Ada"})
    _add_run_note(at, "camera saturated")
    assert served.annotations().iloc[-1]["author"] == "ada@lab.example"
    logged_out = _page({"is_logged_in": False})
    assert not _has(logged_out, "note-run-text") and logged_out.info[0].value == "log in to add notes"
    assert logged_out.button(key="note-login").label == "Log in"


def test_writing_can_be_switched_off(served, monkeypatch):
    served.annotate("an earlier note", run="r1")
    monkeypatch.setenv(WRITES_VARIABLE, "off")
    at = _page()
    assert not _has(at, "note-day-text") and not _has(at, "note-run-text") and not _has(at, "acknowledge-note")
    assert "writing from the dashboard is switched off" in at.info[0].value
    assert "an earlier note" in set(at.dataframe[0].value["note"])  # reading goes on


def test_by_default_the_author_is_typed(served):
    at = _page()
    assert _has(at, "note-run-author") and _has(at, "note-run-text")
    _add_run_note(at, "fibre cleaned", author="j.doe")
    assert served.annotations().iloc[-1]["author"] == "j.doe"


def test_the_server_settings_reach_the_app(monkeypatch, capsys):
    settings = environment("sqlite:////tmp/x.sqlite", author_header="X-Remote-User", writes=False)
    monkeypatch.delenv(LOGIN_VARIABLE, raising=False)
    settings = environment("sqlite:////tmp/x.sqlite", author_header="X-Remote-User", writes=False)
    assert settings[AUTHOR_HEADER_VARIABLE] == "X-Remote-User" and settings[WRITES_VARIABLE] == "off" and LOGIN_VARIABLE not in settings
    assert environment("sqlite:////tmp/x.sqlite", login=True)[LOGIN_VARIABLE] == "1"
    from conftest import run_main

    code, out, err = run_main(capsys, "dashboard", "--author-header", "X-Remote-User", "--login")
    assert code == 2 and "choose one of --author-header and --login" in err
