"""Move runs between stores without losing or doubling any: spool when the store is away, push, merge."""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path
from typing import Any, NamedTuple, Optional

from sqlalchemy import select
from sqlalchemy.orm import Session, selectinload

from eaves.errors import StoreError
from eaves.models import Host, Measurement, Placement, Run
from eaves.records import RunRecord
from eaves.store import CONNECT_TIMEOUT_SECONDS, Store, default_url, is_server_url, mask_url

DEFAULT_SPOOL_PATH = Path("results") / "spool.db"


def default_spool() -> Path:
    """`EAVES_SPOOL` if set, else results/spool.db under the current directory."""
    return Path(os.environ.get("EAVES_SPOOL") or DEFAULT_SPOOL_PATH)


class Saved(NamedTuple):
    """Where a run went: the store (masked URL) or the spool file, and a line for the user."""

    where: str
    uuid: str
    spooled: bool
    message: str


@dataclass(frozen=True)
class Transfer:
    """Outcome of a push or merge: runs written, runs the target already had, runs left behind."""

    copied: int
    already_there: int
    removed_from_source: int


def save_or_spool(record: RunRecord, url: Optional[str] = None, spool: Optional[Path] = None,
                  connect_timeout: float = CONNECT_TIMEOUT_SECONDS) -> Saved:
    """Save the run to the store at `url`; if that is a server that cannot be reached or refuses
    the run, save it to the local SQLite spool instead, to be sent later with `eaves push`.

    A local SQLite store that fails is the user's input error and raises StoreError as it is."""
    url = url or default_url()
    try:
        store = Store(url, connect_timeout=connect_timeout)
        uuid = store.save_run(record)
        store.close()
        return Saved(store.shown_url, uuid, False, f"run {uuid} saved to {store.shown_url}")
    except StoreError as err:
        if not is_server_url(url):
            raise
        reason = str(err)
    spool = spool or default_spool()
    try:
        uuid = Store(f"sqlite:///{spool}").save_run(record)
    except StoreError as err:
        raise StoreError(f"{reason}; and the spool failed too: {err}") from None
    return Saved(str(spool), uuid, True,
                 f"{reason}; run {uuid} kept in the spool {spool}: send it later with "
                 f"`eaves push --db {mask_url(url)}`")


def copy_runs(source: Store, target: Store, remove: bool = False) -> Transfer:
    """Copy every run of `source` (with its host, figures and placements) that `target` lacks,
    one transaction per run; matched by run UUID, hosts by host key. With `remove`, a run leaves
    the source only after the target committed it, so an interrupted copy repeated is harmless."""
    copied = already = removed = 0
    for uuid in source.run_uuids():
        rows = _export(source, uuid)
        if rows is None:  # removed meanwhile by a concurrent push
            continue
        if target.write(lambda session: _import(session, rows), "could not copy run"):
            copied += 1
        else:
            already += 1
        if remove:
            source.write(lambda session: _delete(session, uuid), "could not remove pushed run")
            removed += 1
    return Transfer(copied, already, removed)


def push(url: Optional[str] = None, spool: Optional[Path] = None) -> Transfer:
    """Send the spooled runs to the store and remove each from the spool once it is stored."""
    spool = spool or default_spool()
    if not spool.exists():
        return Transfer(0, 0, 0)
    source = Store(f"sqlite:///{spool}", create=False)
    try:
        return copy_runs(source, Store(url or default_url()), remove=True)
    finally:
        source.close()


def merge(path: Path, url: Optional[str] = None) -> Transfer:
    """Import the hosts and runs of another store file; the file is opened read-only."""
    source = Store(f"sqlite:///{path}", create=False, readonly=True)
    try:
        return copy_runs(source, Store(url or default_url()))
    finally:
        source.close()


def _columns(row: Any, skip: tuple[str, ...]) -> dict[str, Any]:
    return {a.key: getattr(row, a.key) for a in row.__mapper__.column_attrs if a.key not in skip}


def _export(store: Store, uuid: str) -> Optional[dict[str, Any]]:
    with Session(store.engine) as session:
        run = session.scalar(select(Run).where(Run.uuid == uuid).options(
            selectinload(Run.host), selectinload(Run.measurements), selectinload(Run.placements)))
        if run is None:
            return None
        return {"host": _columns(run.host, ("id",)),
                "run": _columns(run, ("id", "host_id")),
                "measurements": [_columns(m, ("id", "run_id")) for m in run.measurements],
                "placements": [_columns(p, ("id", "run_id")) for p in run.placements]}


def _import(session: Session, rows: dict[str, Any]) -> bool:
    if session.scalar(select(Run.id).where(Run.uuid == rows["run"]["uuid"])) is not None:
        return False
    host = session.scalar(select(Host).where(Host.host_key == rows["host"]["host_key"]))
    if host is None:
        host = Host(**rows["host"])
        session.add(host)
        session.flush()
    run = Run(host_id=host.id, **rows["run"])
    run.measurements = [Measurement(**m) for m in rows["measurements"]]
    run.placements = [Placement(**p) for p in rows["placements"]]
    session.add(run)
    return True


def _delete(session: Session, uuid: str) -> None:
    run = session.scalar(select(Run).where(Run.uuid == uuid))
    if run is not None:
        session.delete(run)
