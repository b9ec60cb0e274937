"""Schema versions: fresh stores are stamped, old ones refused until `eaves db upgrade` migrates them."""

from __future__ import annotations

import dataclasses
import shutil
import sqlite3
from pathlib import Path

import pytest
from alembic import command
from alembic.autogenerate import compare_metadata
from alembic.migration import MigrationContext
from sqlalchemy import create_engine, inspect

from eaves import schema
from eaves.errors import EXIT_STORE, StoreError
from eaves.models import SCHEMA_REVISION, Base
from eaves.store import Store
from run_records import figures, record
from store_backends import run_cli, store_url  # noqa: F401  (fixtures)

FIXTURE_V1 = Path(__file__).parent / "fixtures" / "store_v1.db"  # made by make_store_v1.py
FIXTURE_V2 = Path(__file__).parent / "fixtures" / "zen3-kvm-2cpu" / "ten-quick-surveys.db"  # real runs, 0002
TABLES = ("hosts", "runs", "measurements", "placements")




def test_models_name_the_newest_migration():
    assert schema.known_revisions() == ["0001", "0002", "0003"]
    assert schema.head_revision() == SCHEMA_REVISION


def test_migrations_from_nothing_build_exactly_the_models(store_url):
    store = Store(store_url, check_schema=False)
    assert store.upgrade_schema() == (None, SCHEMA_REVISION)
    with store.engine.connect() as conn:
        differences = compare_metadata(MigrationContext.configure(conn), Base.metadata)
    assert differences == []
    Store(store_url).save_run(record())  # and the store is usable at once


def test_fresh_store_is_stamped_and_matches_the_migrations(store_url):
    store = Store(store_url)
    assert store.schema_revision() == SCHEMA_REVISION
    with store.engine.connect() as conn:
        assert compare_metadata(MigrationContext.configure(conn), Base.metadata) == []


def test_the_first_schema_fixture_is_upgraded_and_read(tmp_path, run_cli):
    path = tmp_path / "old.db"
    shutil.copy(FIXTURE_V1, path)
    url = f"sqlite:///{path}"
    with pytest.raises(StoreError) as err:
        Store(url)
    assert f"older than this eaves uses ({SCHEMA_REVISION}); migrate it with: eaves db upgrade --db {url}" \
        in str(err.value)
    assert run_cli("db", "version", "--db", url)[1].startswith(f"{url}: schema 0001 (needs attention")
    code, out, _ = run_cli("db", "upgrade", "--db", url)
    assert code == 0 and out.strip() == f"{url}: schema 0001 -> {SCHEMA_REVISION}"
    assert run_cli("db", "upgrade", "--db", url)[1].strip().endswith("already current")
    store = Store(url)
    runs = store.runs()
    assert [(r.status, r.uuid[-1]) for r in runs] == [("interrupted", "2"), ("complete", "1")]
    assert list(store.load_run(runs[1].id).figures) == figures()
    assert store.load_run(store.latest_complete_run("oldlab-node01")).summary.uuid.endswith("1")
    indexes = {i["name"] for i in inspect(store.engine).get_indexes("measurements")}
    assert "ix_measurements_run_suite_kernel" in indexes and "ix_measurements_run_suite" not in indexes
    store.save_run(record("oldlab-node01", minutes=60))
    assert len(store.runs()) == 3


def test_a_store_from_before_versions_counts_as_the_first_schema(tmp_path):
    path = tmp_path / "unversioned.db"
    shutil.copy(FIXTURE_V1, path)
    with sqlite3.connect(path) as conn:
        conn.execute("DROP TABLE alembic_version")
    with pytest.raises(StoreError, match="schema version 0001 is older"):
        Store(f"sqlite:///{path}")
    assert Store(f"sqlite:///{path}", check_schema=False).upgrade_schema() == ("0001", SCHEMA_REVISION)
    assert len(Store(f"sqlite:///{path}").runs()) == 2


def test_an_old_store_on_each_backend_is_refused_then_upgraded(store_url, run_cli):
    engine = create_engine(store_url)
    with engine.begin() as conn:
        command.upgrade(schema._alembic_config(conn), "0001")
    engine.dispose()
    with pytest.raises(StoreError, match="eaves db upgrade"):
        Store(store_url)
    assert run_cli("db", "upgrade", "--db", store_url)[0] == 0
    store = Store(store_url)
    store.save_run(record())
    assert store.schema_revision() == SCHEMA_REVISION and len(store.runs()) == 1


def test_db_on_a_missing_file_is_an_error_not_a_new_store(tmp_path, run_cli):
    code, _, err = run_cli("db", "version", "--db", f"sqlite:///{tmp_path / 'absent.db'}")
    assert code == EXIT_STORE and "no such file" in err
    assert not (tmp_path / "absent.db").exists()


def _dump(path: Path) -> dict[str, list[tuple]]:
    """Every row of every eaves table, read by SQLite itself (not through our models)."""
    with sqlite3.connect(path) as conn:
        return {t: conn.execute(f"SELECT * FROM {t} ORDER BY id").fetchall() for t in TABLES}


def test_a_real_second_schema_store_keeps_every_row_through_the_upgrade(tmp_path, run_cli):
    path = tmp_path / "v2.db"
    shutil.copy(FIXTURE_V2, path)
    before = _dump(path)
    assert len(before["measurements"]) > 1000 and len(before["runs"]) == 10
    url = f"sqlite:///{path}"
    code, out, _ = run_cli("db", "upgrade", "--db", url)
    assert code == 0 and out.strip() == f"{url}: schema 0002 -> {SCHEMA_REVISION}"
    # Dropping `runs` while rebuilding it would cascade into its measurements if foreign keys were on.
    assert _dump(path) == before
    with sqlite3.connect(path) as conn:
        assert conn.execute("PRAGMA integrity_check").fetchone() == ("ok",)  # SQLite's own checks
        assert conn.execute("PRAGMA foreign_key_check").fetchall() == []
        types = {r[1]: r[2] for r in conn.execute("PRAGMA table_info(measurements)")}
    assert types["variant"] == types["kernel"] == "TEXT"
    store = Store(url)
    with store.engine.connect() as conn:  # foreign keys are on again for the store's own connections
        assert conn.exec_driver_sql("PRAGMA foreign_keys").scalar() == 1
        assert compare_metadata(MigrationContext.configure(conn), Base.metadata) == []
    rec = record("rack3-node07", minutes=60)
    rec.figures[0] = dataclasses.replace(rec.figures[0], variant="v" * 200)
    store.save_run(rec)
    assert len(store.runs()) == 11


def test_a_second_schema_store_on_each_backend_is_upgraded_with_its_runs_intact(store_url, run_cli):
    from eaves.run_rows import read_rows, record_rows, write_rows
    from sqlalchemy.orm import Session

    engine = create_engine(store_url)
    with engine.begin() as conn:
        command.upgrade(schema._alembic_config(conn), "0002")
    recs = [record(minutes=m) for m in range(3)]
    with Session(engine) as session, session.begin():  # the columns of 0002 and 0003 are the same
        for i, rec in enumerate(recs):
            rec.uuid = f"00000000-0000-4000-8000-00000000000{i}"
            write_rows(session, record_rows(rec))
    with Session(engine) as session:
        before = [read_rows(session, r.uuid) for r in recs]
    engine.dispose()
    assert run_cli("db", "upgrade", "--db", store_url)[0] == 0
    store = Store(store_url)
    with Session(store.engine) as session:
        assert [read_rows(session, r.uuid) for r in recs] == before
    assert [list(store.load_run(store.resolve_run(r.uuid)).figures) for r in recs] == [figures()] * 3
