"""A run as rows of the store's tables: checked to fit every backend, written in bulk, read back.

Measurements and placements go in as one executemany each (no ORM object per row): 100 000 placed
layers took 1.5 ms each through the ORM's unit of work."""

from __future__ import annotations

import dataclasses
import datetime as dt
from dataclasses import dataclass
from typing import Any, Mapping, Optional

from sqlalchemy import Table, delete, insert, select
from sqlalchemy.orm import Session

from eaves.errors import StoreError
from eaves.models import Host, Measurement, Placement, Quarantined, Run
from eaves.records import FIGURE_UNITS, Figure, PlacedLayer, RunRecord
from eaves.timing import coefficient_of_variation, quartiles

HOSTS, RUNS = Host.__table__, Run.__table__
MEASUREMENTS, PLACEMENTS = Measurement.__table__, Placement.__table__
# The fields of a PlacedLayer stored as they are in a column of the same name (samples: a JSON list).
PLACEMENT_COLUMNS = tuple(f.name for f in dataclasses.fields(PlacedLayer) if f.name not in ("samples", "extra"))


class RunRefused(StoreError):
    """The store refused a run for its content (a value it cannot hold), not for being away.

    `reason` is the store's own words, one line, without the store's name."""

    def __init__(self, message: str, reason: str, exit_code: Optional[int] = None) -> None:
        super().__init__(message, exit_code)
        self.reason = reason


@dataclass
class RunRows:
    """One run's rows, without database ids: the same on every store."""

    host: dict[str, Any]
    run: dict[str, Any]
    measurements: list[dict[str, Any]]
    placements: list[dict[str, Any]]


def record_rows(record: RunRecord) -> RunRows:
    """The rows a RunRecord becomes."""
    host = {"host_key": record.host_key, "hostname": record.hostname, "fingerprint": record.fingerprint,
            "facts": record.host_facts}
    run = {"uuid": record.uuid, "kind": record.kind, "started_at": record.started_at,
           "ended_at": record.ended_at, "status": record.status, "eaves_version": record.eaves_version,
           "params": record.params, "facts": record.host_facts, "tag": record.tag, "note": record.note,
           "git_describe": record.git_describe, "ceilings_run_uuid": record.ceilings_run_uuid}
    return RunRows(host, run, [_measurement_row(f) for f in record.figures],
                   [_placement_row(p) for p in record.placements])


def check_fits(rows: RunRows) -> None:
    """Refuse, naming the field, a string longer than its column's bound (models: a UUID, an indexed
    text), before anything is written: SQLite would keep it, PostgreSQL would not."""
    for table, values in ((HOSTS, [rows.host]), (RUNS, [rows.run]), (MEASUREMENTS, rows.measurements),
                          (PLACEMENTS, rows.placements)):
        for column in table.columns:
            limit = column.info.get("max_chars") or getattr(column.type, "length", None)
            if not limit:
                continue
            for i, row in enumerate(values):
                value = row.get(column.key)
                if isinstance(value, str) and len(value) > limit:
                    where = f"{table.name}.{column.key}" + (f" (row {i + 1})" if len(values) > 1 else "")
                    reason = f"{where} is {len(value)} characters long, at most {limit} fit"
                    raise RunRefused(f"run {rows.run.get('uuid')}: {reason}", reason)


def write_rows(session: Session, rows: RunRows) -> bool:
    """Insert a run, its host if new, and all its rows in the caller's transaction; False (nothing
    written) when its UUID is already stored, so a repeated save or copy never doubles a run."""
    if session.scalar(select(RUNS.c.id).where(RUNS.c.uuid == rows.run["uuid"])) is not None:
        return False
    check_fits(rows)
    host_id = session.scalar(select(HOSTS.c.id).where(HOSTS.c.host_key == rows.host["host_key"]))
    if host_id is None:
        host_id = session.execute(insert(HOSTS).values(**rows.host)).inserted_primary_key[0]
    run_id = session.execute(insert(RUNS).values(**rows.run, host_id=host_id)).inserted_primary_key[0]
    for table, many in ((MEASUREMENTS, rows.measurements), (PLACEMENTS, rows.placements)):
        if many:  # one executemany; ids rise in list order, which is the order runs are read back in
            session.execute(insert(table), [{**row, "run_id": run_id} for row in many])
    return True


def read_rows(session: Session, uuid: str) -> Optional[RunRows]:
    """A stored run's rows (None if it is not there), datetimes in UTC whatever the backend."""
    run = session.execute(select(RUNS).where(RUNS.c.uuid == uuid)).mappings().first()
    if run is None:
        return None
    host = session.execute(select(HOSTS).where(HOSTS.c.id == run["host_id"])).mappings().one()

    def children(table: Table) -> list[dict[str, Any]]:
        q = select(table).where(table.c.run_id == run["id"]).order_by(table.c.id)
        return [_plain(table, r, ("id", "run_id")) for r in session.execute(q).mappings()]

    return RunRows(_plain(HOSTS, host, ("id",)), _plain(RUNS, run, ("id", "host_id")),
                   children(MEASUREMENTS), children(PLACEMENTS))


def delete_run(session: Session, uuid: str) -> None:
    """Remove a run and everything of it (its host stays)."""
    run_id = session.scalar(select(RUNS.c.id).where(RUNS.c.uuid == uuid))
    if run_id is None:
        return
    session.execute(delete(Quarantined.__table__).where(Quarantined.__table__.c.run_uuid == uuid))
    for table in (MEASUREMENTS, PLACEMENTS):
        session.execute(delete(table).where(table.c.run_id == run_id))
    session.execute(delete(RUNS).where(RUNS.c.id == run_id))


def _plain(table: Table, row: Mapping[str, Any], skip: tuple[str, ...]) -> dict[str, Any]:
    out = {k: v for k, v in row.items() if k not in skip}
    for column in table.columns:  # SQLite hands back naive datetimes; everything we store is UTC
        value = out.get(column.key)
        if isinstance(value, dt.datetime) and value.tzinfo is None:
            out[column.key] = value.replace(tzinfo=dt.timezone.utc)
    return out


def _measurement_row(f: Figure) -> dict[str, Any]:
    values: dict[str, Any] = {unit: None for unit in FIGURE_UNITS}
    values[f.unit] = f.median
    q1, q3 = quartiles(f.samples)
    return {"suite": f.suite, "kernel": f.kernel, "variant": f.variant, "dtype": f.dtype, "threads": f.threads,
            "working_set_bytes": f.working_set_bytes, "cache_level": f.cache_level,
            "stride_elems": f.stride_elems, "shape": f.shape, "best": f.best, "q1": q1, "q3": q3,
            "cv": coefficient_of_variation(f.samples), "samples": list(f.samples), "repetitions": f.repetitions,
            "min_seconds": f.min_seconds, "extra": f.extra, **values}


def _placement_row(p: PlacedLayer) -> dict[str, Any]:
    return {**{name: getattr(p, name) for name in PLACEMENT_COLUMNS}, "samples": list(p.samples), "extra": p.extra}


def figure_of(m: Measurement) -> Figure:
    """A stored measurement as the Figure it was saved from."""
    unit = next(u for u in FIGURE_UNITS if getattr(m, u) is not None)
    return Figure(suite=m.suite, kernel=m.kernel, dtype=m.dtype, threads=m.threads, unit=unit,
                  samples=tuple(m.samples), repetitions=m.repetitions, min_seconds=m.min_seconds,
                  working_set_bytes=m.working_set_bytes, cache_level=m.cache_level,
                  stride_elems=m.stride_elems, shape=m.shape, variant=m.variant,
                  extra=dict(m.extra or {}))


def placed_of(p: Placement) -> PlacedLayer:
    """A stored placement as the PlacedLayer it was saved from."""
    return PlacedLayer(**{name: getattr(p, name) for name in PLACEMENT_COLUMNS}, samples=tuple(p.samples),
                       extra=dict(p.extra or {}))
