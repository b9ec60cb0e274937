"""Issue 18, item 3: a survey proves its store takes a write before measuring; a store that cannot is
spooled for (said up front), or the survey stops before measuring; a run no store takes is kept as JSON."""

from __future__ import annotations

import contextlib
import json
import socket

import pytest
from sqlalchemy import text
from sqlalchemy.engine import make_url

from eaves.cli import main
from eaves.errors import EXIT_INTERRUPTED, EXIT_STORE, StoreError
from eaves.store import Store
from run_records import record
from store_backends import pg_base_url, pg_schema_url
from survey_fakes import ARGS, fake_survey, read_only


def _store_with_a_run(path) -> str:
    url = f"sqlite:///{path}"
    store = Store(url)
    store.save_run(record())
    store.close()
    return url


def _spooled_uuids(place) -> list[str]:
    spool = Store(f"sqlite:///{place / 'spool.db'}", create=False)
    try:
        return spool.run_uuids()
    finally:
        spool.close()


def _free_port() -> int:
    with socket.socket() as s:  # bound then closed: nothing listens there afterwards
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


# -- Store.check_writable itself ------------------------------------------------------------

def test_check_writable_writes_nothing_and_uses_up_no_id(store_url):
    store = Store(store_url)
    store.check_writable()
    store.check_writable()
    assert store.runs() == [] and store.hosts() == []
    # PostgreSQL never rolls back a sequence's nextval (its documentation, "Sequence Manipulation
    # Functions"): the check writes with explicit ids, so the first real run still gets id 1.
    store.save_run(record())
    assert [r.id for r in store.runs()] == [1]


def test_check_writable_refuses_a_read_only_sqlite_file(place):
    url = _store_with_a_run(place / "store.db")
    with read_only(place / "store.db"):
        store = Store(url)  # opening (and reading) still works: only a write can tell
        assert len(store.runs()) == 1
        with pytest.raises(StoreError, match="cannot take a write.*readonly"):
            store.check_writable()
        store.close()


def test_check_writable_refuses_a_read_only_postgresql_session():
    # default_transaction_read_only makes the server refuse every write of the session, as a hot
    # standby does (PostgreSQL documentation, "Client Connection Defaults"); reads still work.
    with pg_schema_url() as url:
        Store(url).close()  # the schema, created while writable
        parsed = make_url(url)
        options = f"{parsed.query['options']} -cdefault_transaction_read_only=on"
        readonly = parsed.update_query_dict({"options": options}).render_as_string(hide_password=False)
        store = Store(readonly)
        assert store.runs() == []
        with pytest.raises(StoreError, match="read-only transaction"):
            store.check_writable()
        store.close()


# -- the survey: spool when the store cannot take a write ------------------------------------------

def _up_front(capsys, calls):
    """What the survey had printed when measuring started (the fake snapshots it)."""
    return lambda: calls.append(("printed", capsys.readouterr()))


def _survey_spools(place, capsys, monkeypatch, url: str, needle: str, secret: str | None = None):
    calls: list = []
    fake_survey(monkeypatch, calls, during=_up_front(capsys, calls))
    assert main([*ARGS, "--db", url]) == 0
    out, err = capsys.readouterr()
    before = calls[1][1].out + calls[1][1].err
    assert f"this run will be spooled to {place / 'spool.db'}" in before, before
    assert needle in before
    assert len(_spooled_uuids(place)) == 1
    if secret:
        assert secret not in before + out + err
    return before


def test_a_read_only_store_file_is_spooled_for_and_left_unchanged(place, capsys, monkeypatch):
    url = _store_with_a_run(place / "store.db")
    with read_only(place / "store.db"):
        before = (place / "store.db").read_bytes()
        _survey_spools(place, capsys, monkeypatch, url, "readonly")
        assert (place / "store.db").read_bytes() == before
    assert len(Store(url).runs()) == 1


def test_a_server_that_is_down_at_the_start_is_spooled_for(place, capsys, monkeypatch):
    url = f"postgresql+psycopg://eaves:pw@127.0.0.1:{_free_port()}/eaves"
    _survey_spools(place, capsys, monkeypatch, url, "127.0.0.1")


def test_a_wrong_password_is_spooled_for_and_never_shown(place, capsys, monkeypatch):
    base = make_url(pg_base_url())
    wrong = "Wr0ngPassw0rd"
    url = base.set(password=wrong).render_as_string(hide_password=False)
    _survey_spools(place, capsys, monkeypatch, url, "password", secret=wrong)


def test_a_store_of_a_newer_schema_is_spooled_for(place, capsys, monkeypatch):
    url = _store_with_a_run(place / "store.db")
    store = Store(url)
    with store.engine.begin() as conn:
        conn.execute(text("UPDATE alembic_version SET version_num = '9999'"))
    store.close()
    _survey_spools(place, capsys, monkeypatch, url, "newer")


def test_neither_store_nor_spool_writable_stops_before_measuring(place, capsys, monkeypatch):
    url = _store_with_a_run(place / "store.db")
    (place / "file").write_text("a file, so no folder can be made under it\n")
    monkeypatch.setenv("EAVES_SPOOL", str(place / "file" / "spool.db"))
    calls: list = []
    fake_survey(monkeypatch, calls)
    with read_only(place / "store.db"):
        before = (place / "store.db").read_bytes()
        assert main([*ARGS, "--db", url]) == EXIT_STORE
        assert (place / "store.db").read_bytes() == before
    err = capsys.readouterr().err.strip()
    assert calls == []  # nothing measured
    assert len(err.splitlines()) == 1 and "Traceback" not in err
    assert "readonly" in err and "spool" in err and "nothing measured" in err


def test_the_spool_itself_as_a_read_only_store_stops_before_measuring(place, capsys, monkeypatch):
    url = _store_with_a_run(place / "spool.db")
    calls: list = []
    fake_survey(monkeypatch, calls)
    with read_only(place / "spool.db"):
        assert main([*ARGS, "--db", url]) == EXIT_STORE
    err = capsys.readouterr().err.strip()
    assert calls == [] and len(err.splitlines()) == 1 and "the spool itself" in err


def test_a_file_that_is_no_store_stops_before_measuring_and_is_not_spooled_for(place, capsys, monkeypatch):
    (place / "notes.db").write_bytes(b"my notes\n" * 100)
    calls: list = []
    fake_survey(monkeypatch, calls)
    assert main([*ARGS, "--db", f"sqlite:///{place / 'notes.db'}"]) == EXIT_STORE
    assert calls == [] and not (place / "spool.db").exists()
    assert "not an SQLite database" in capsys.readouterr().err


# -- the survey: a run no store takes is kept as JSON ---------------------------------------------

@pytest.mark.parametrize("with_json", [True, False], ids=["--json", "fallback"])
def test_a_run_no_store_takes_is_written_as_json_and_exits_3(place, capsys, monkeypatch, with_json):
    url = _store_with_a_run(place / "store.db")
    monkeypatch.setenv("EAVES_SPOOL", str(place / "spooldir" / "spool.db"))
    calls: list = []
    faults = contextlib.ExitStack()

    def break_both():  # while "measuring": the store turns read-only, the spool's folder cannot be made
        faults.enter_context(read_only(place / "store.db"))
        (place / "spooldir").write_text("not a folder\n")

    fake_survey(monkeypatch, calls, during=break_both)
    with faults:
        code = main([*ARGS, "--db", url, *(["--json", "doc.json"] if with_json else [])])
    out, err = capsys.readouterr()
    assert code == EXIT_STORE and len(calls) == 1
    kept = "doc.json" if with_json else next(p.relative_to(place).as_posix()
                                             for p in (place / "results").glob("unstored-run-*.json"))
    doc = json.loads((place / kept).read_text())
    assert doc["run"]["stored_in"] is None and doc["figures"]
    assert f"its JSON document is {kept}" in out
    assert doc["run"]["uuid"] in out and "could not be stored" in out
    assert len(Store(url).runs()) == 1  # the earlier run is still there


def test_an_interrupted_run_without_a_figure_is_not_stored(place, capsys, monkeypatch):
    url = f"sqlite:///{place / 'store.db'}"
    calls: list = []
    fake_survey(monkeypatch, calls, interrupted_by="SIGINT", with_figures=False)
    assert main([*ARGS, "--db", url, "--json", "doc.json"]) == EXIT_INTERRUPTED
    out = capsys.readouterr().out
    assert "before any figure was measured: nothing stored" in out
    assert Store(url).runs() == [] and not (place / "spool.db").exists() and not (place / "doc.json").exists()


def test_an_interrupted_run_with_figures_is_stored_as_interrupted(place, capsys, monkeypatch):
    url = f"sqlite:///{place / 'store.db'}"
    fake_survey(monkeypatch, [], interrupted_by="SIGTERM")
    assert main([*ARGS, "--db", url]) == EXIT_INTERRUPTED
    assert "interrupted by SIGTERM: stored as an interrupted run" in capsys.readouterr().out
    assert [r.status for r in Store(url).runs()] == ["interrupted"]
