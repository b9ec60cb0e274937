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
from sqlalchemy import create_engine, inspect, text

from eaves import schema
from eaves.errors import EXIT_STORE, StoreError
from eaves.models import SCHEMA_REVISION, Base, Run
from eaves.records import PlacedLayer
from eaves.store import Store
from run_records import figures, placement, record, row_before_0004, write_before_0004

FIXTURE_V1 = Path(__file__).parent / "fixtures" / "store_v1.db"  # made by make_store_v1.py
FIXTURE_V2 = Path(__file__).parent / "fixtures" / "zen3-kvm-2cpu" / "ten-quick-surveys.db"  # real runs, 0002
TABLES = ("hosts", "runs", "measurements", "placements")




def test_models_name_the_newest_migration():
    assert schema.known_revisions() == ["0001", "0002", "0003", "0004"]
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
    assert store.load_run(runs[1].id).placements == (placement(),)  # its roofs moved from extra to columns
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


def _placed() -> list[PlacedLayer]:
    """Layers placed by eaves.place under the invented host's roofs: a batched one (items_per_s in its
    extra), one without a shape (no MACs), one too fast for any roof (a reason), one at another count
    of threads than measured (nearest)."""
    from eaves.layers import LayerSpec
    from eaves.place import place_layers
    from eaves.roofline import model_from_figures
    from layer_fixtures import CACHES, HOST_KEY, synthetic_figures

    model = model_from_figures(synthetic_figures(), "0badc0de-run", HOST_KEY, {"caches": CACHES})
    specs = [LayerSpec("enc.0", "dense", "fp32", 1, (1e-3, 1.1e-3, 0.9e-3), dict(m=64, n=512, k=512), batch=64,
                       where="layers.csv:2"),
             LayerSpec("given", "elementwise", "fp32", 2, (2e-3,), {}, flops=1e6, bytes=4e6, where="layers.csv:3"),
             LayerSpec("too fast", "dense", "fp32", 1, (1e-9,), dict(m=64, n=512, k=512), where="layers.csv:4"),
             LayerSpec("odd threads", "elementwise", "fp64", 3, (1e-4,), dict(elements=4096, inputs=2))]
    placed = place_layers(specs, model)
    assert placed[0].extra["items_per_s"] and placed[1].macs is None and placed[2].bound == "impossible"
    assert placed[3].threads_match == "nearest"
    return placed


@pytest.mark.parametrize("old", ["0002", "0003"])
def test_an_older_store_on_each_backend_is_upgraded_with_its_runs_and_placements_intact(store_url, run_cli, old):
    from eaves.run_rows import HOSTS, MEASUREMENTS, PLACEMENTS, RUNS
    from sqlalchemy import select
    from sqlalchemy.orm import Session

    def untouched(session) -> dict[str, list]:  # the tables 0004 leaves as they were
        return {t.name: session.execute(select(t).order_by(t.c.id)).all() for t in (HOSTS, RUNS, MEASUREMENTS)}

    engine = create_engine(store_url)
    with engine.begin() as conn:
        command.upgrade(schema._alembic_config(conn), old)
    recs = [record(minutes=m) for m in range(3)]
    recs[1].placements = _placed()
    with Session(engine) as session, session.begin():
        for i, rec in enumerate(recs):
            rec.uuid = f"00000000-0000-4000-8000-00000000000{i}"
            write_before_0004(session, rec)
    with Session(engine) as session:
        before = untouched(session)
        old_extra = session.execute(select(PLACEMENTS.c.extra).order_by(PLACEMENTS.c.id)).scalars().all()
    engine.dispose()
    placed = [p for r in recs for p in r.placements]
    assert len(placed) == 6
    # what the old store held under extra is what a JSON document shows of each placement
    assert old_extra == [p.to_dict()["extra"] for p in placed]
    assert run_cli("db", "upgrade", "--db", store_url)[0] == 0
    store = Store(store_url)
    with Session(store.engine) as session:
        assert untouched(session) == before
        moved = session.execute(select(PLACEMENTS.c.memory_roof, PLACEMENTS.c.extra).order_by(PLACEMENTS.c.id)).all()
        if store.is_sqlite:  # SQLite's own checks of the rebuilt placements table and its references
            assert session.execute(text("PRAGMA integrity_check")).scalar() == "ok"
            assert session.execute(text("PRAGMA foreign_key_check")).all() == []
    assert [list(store.load_run(store.resolve_run(r.uuid)).figures) for r in recs] == [figures()] * 3
    stored = [p for r in recs for p in store.load_run(store.resolve_run(r.uuid)).placements]
    assert stored == placed  # every field, the roofs and efficiencies included
    assert [p.to_dict() for p in stored] == [p.to_dict() for p in placed]
    # the roofs are columns now; only what some placements have stays in extra
    assert [m for m, _ in moved] == [p.memory_roof for p in placed]
    assert [e for _, e in moved] == [p.extra for p in placed]
    store.save_run(record(minutes=9))  # and the upgraded store takes new runs
    assert len(store.runs()) == 4


def test_a_placement_without_the_roofs_every_placement_has_stops_the_upgrade_and_changes_nothing(store_url, run_cli):
    from eaves.run_rows import PLACEMENTS
    from sqlalchemy import insert, select
    from sqlalchemy.orm import Session

    engine = create_engine(store_url)
    with engine.begin() as conn:
        command.upgrade(schema._alembic_config(conn), "0003")
    rec = record(uuid="00000000-0000-4000-8000-000000000009")
    legacy = dataclasses.replace(rec.placements[0], extra={"note": "stored by hand, no roofs"})
    with Session(engine) as session, session.begin():
        write_before_0004(session, rec)
        row = {**row_before_0004(legacy), "run_id": session.scalar(select(Run.id))}
        row["extra"] = legacy.extra
        session.execute(insert(PLACEMENTS), [row])
    engine.dispose()
    code, _, err = run_cli("db", "upgrade", "--db", store_url)
    assert code == EXIT_STORE and "placements row" in err and "memory_roof" in err and "changed nothing" in err
    assert len(err.strip().splitlines()) == 1 and "Traceback" not in err
    probe = Store(store_url, check_schema=False)
    assert probe.schema_revision() == "0003"
    with Session(probe.engine) as session:
        extras = session.execute(select(PLACEMENTS.c.extra).order_by(PLACEMENTS.c.id)).scalars().all()
    assert extras == [rec.placements[0].to_dict()["extra"], legacy.extra]
