"""Bulk storing (issue 18, item 8): a run written with one executemany per table holds exactly the rows
SQLAlchemy's ORM unit of work wrote before, in the same order, on SQLite and PostgreSQL."""

from __future__ import annotations

import dataclasses
import datetime as dt
from typing import Any

import pytest

from sqlalchemy import select
from sqlalchemy.orm import Session

from eaves.models import Host, Measurement, Placement, Run
from eaves.records import RunRecord
from eaves.run_rows import RunRefused
from eaves.store import Store
from run_records import placement, record
from store_backends import backend_url

# Python-side results of the ORM's own defaults and keys; everything else must match.
IGNORED = {"id", "run_id", "host_id", "first_seen"}


def orm_save(store: Store, rec: RunRecord) -> None:
    """The way runs were stored before (ORM objects and the unit of work), as the reference."""
    from eaves.run_rows import record_rows  # the same values, so only the way of writing differs

    rows = record_rows(rec)
    with Session(store.engine) as session, session.begin():
        host = Host(**rows.host)
        run = Run(**rows.run, host=host)
        run.measurements = [Measurement(**m) for m in rows.measurements]
        run.placements = [Placement(**p) for p in rows.placements]
        session.add(run)


def table_rows(store: Store) -> dict[str, list[dict[str, Any]]]:
    out = {}
    with Session(store.engine) as session:
        for model in (Host, Run, Measurement, Placement):
            table = model.__table__
            out[table.name] = [{k: _utc(v) for k, v in r.items() if k not in IGNORED}
                               for r in session.execute(select(table).order_by(table.c.id)).mappings()]
    return out


def _utc(value: Any) -> Any:  # SQLite hands back naive datetimes (UTC), PostgreSQL aware ones
    if isinstance(value, dt.datetime) and value.tzinfo is None:
        return value.replace(tzinfo=dt.timezone.utc)
    return value


def big_record() -> RunRecord:
    rec = record()
    rec.placements = [dataclasses.replace(placement(), layer=f"block{i // 10}.layer{i}", seconds=1e-3 + i * 1e-7,
                                          samples=(1e-3, 1e-3 + i * 1e-7), extra={"i": i, "shape": [i, 2]})
                      for i in range(2_000)]
    rec.figures = rec.figures * 40
    return rec


def test_bulk_rows_equal_the_orm_unit_of_work_rows(store_url, tmp_path):
    rec = big_record()
    rec.uuid = "0b0b0b0b-0000-4000-8000-000000000001"
    bulk = Store(store_url)
    bulk.save_run(rec)
    with backend_url("sqlite", tmp_path, "reference.db") as reference_url:
        reference = Store(reference_url)
        orm_save(reference, rec)
        expected = table_rows(reference)
    got = table_rows(bulk)
    assert [len(got[t]) for t in got] == [1, 1, len(rec.figures), 2_000]
    assert got == expected
    loaded = bulk.load_run(bulk.resolve_run(rec.uuid))
    assert list(loaded.placements) == rec.placements and list(loaded.figures) == rec.figures  # order kept


def test_a_bulk_write_that_fails_midway_leaves_nothing(store_url):
    store = Store(store_url)
    rec = big_record()
    rec.placements[-1] = dataclasses.replace(rec.placements[-1], extra={"not json": object()})
    with pytest.raises(RunRefused, match="not JSON serializable"):  # the json module's own refusal
        store.save_run(rec)
    assert store.runs() == [] and store.hosts() == []
