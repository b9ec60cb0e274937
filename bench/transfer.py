"""Move runs between stores without losing or doubling any: spool when the store is away, push, merge."""

from __future__ import annotations

import contextlib
import dataclasses
import datetime as dt
import os
import tempfile
from dataclasses import dataclass
from pathlib import Path
from typing import NamedTuple, Optional

from sqlalchemy import delete, select
from sqlalchemy.orm import Session

from eaves.errors import InputError, StoreError
from eaves.models import SCHEMA_REVISION, Host, Quarantined, Run
from eaves.records import RunRecord
from eaves.run_rows import RunRefused, delete_run, read_rows, write_rows
from eaves.schema import known_revisions, require_current
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
class Refusal:
    """A run a store refused for its content, and why (the store's words, one line)."""

    uuid: str
    hostname: str
    started_at: dt.datetime
    reason: str
    refused_at: Optional[dt.datetime] = None  # set once it is kept in a spool's quarantine


@dataclass(frozen=True)
class Transfer:
    """Outcome of a push or merge, run by run: written, already in the target, refused; with push,
    how many left the spool and every run its quarantine holds afterwards (earlier pushes' too)."""

    copied: tuple[str, ...]
    already_there: tuple[str, ...]
    refused: tuple[Refusal, ...]
    removed_from_source: int = 0
    quarantined: tuple[Refusal, ...] = ()


def save_or_spool(record: RunRecord, url: Optional[str] = None, spool: Optional[Path] = None,
                  connect_timeout: float = CONNECT_TIMEOUT_SECONDS, local: bool = False) -> Saved:
    """Save the run to the store at `url`; if that is a server that cannot be reached or refuses
    the run, save it to the local SQLite spool instead, to be sent later with `eaves push`.

    A local SQLite store that fails is the user's input error and raises StoreError as it is, unless
    `local` (the survey checked that store before measuring: a failure now is not the user's)."""
    url = url or default_url()
    try:
        store = Store(url, connect_timeout=connect_timeout)
        uuid = store.save_run(record)
        store.close()
        return Saved(store.shown_url, uuid, False, f"run {uuid} saved to {store.shown_url}")
    except StoreError as err:
        if not (local or is_server_url(url)):
            raise
        reason, refused = str(err), err if isinstance(err, RunRefused) else None
    spool = spool or default_spool()
    try:
        kept = open_spool(spool)
        uuid = kept.save_run(record)
        if refused is not None:  # sending it again would fail the same way: held until a retry
            kept.write(lambda session: _quarantine(session, uuid, refused.reason, mask_url(url)),
                       "could not quarantine the refused run")
    except StoreError as err:
        raise StoreError(f"{reason}; and the spool failed too: {err}") from None
    if refused is not None:
        return Saved(str(spool), uuid, True,
                     f"{reason}; run {uuid} kept in the quarantine of the spool {spool}: "
                     f"`eaves push --retry-quarantined --db {mask_url(url)}` sends it once the store takes it")
    return Saved(str(spool), uuid, True,
                 f"{reason}; run {uuid} kept in the spool {spool}: send it later with "
                 f"`eaves push --db {mask_url(url)}`")


def copy_runs(source: Store, target: Store, remove: bool = False, *,
              uuids: Optional[list[str]] = None, quarantine: bool = False) -> Transfer:
    """Copy every run of `source` (or those of `uuids`) that `target` lacks, with its host, figures
    and placements, one transaction per run; matched by run UUID, hosts by host key. A run the
    target refuses for its content is skipped and reported (and with `quarantine` kept in the
    source's quarantine); a target that is away raises StoreError. With `remove`, a run leaves the
    source only after the target committed it, so an interrupted copy repeated is harmless."""
    copied, already, refused, removed = [], [], [], 0
    for uuid in source.run_uuids() if uuids is None else uuids:
        rows = source.read(lambda session: read_rows(session, uuid))
        if rows is None:  # removed meanwhile by a concurrent push
            continue
        try:
            written = target.write(lambda session: write_rows(session, rows), "could not copy run")
        except RunRefused as err:
            refusal = Refusal(uuid, rows.host["hostname"], rows.run["started_at"], err.reason)
            if quarantine:
                source.write(lambda session: _quarantine(session, uuid, refusal.reason, target.shown_url),
                             "could not quarantine the refused run")
            refused.append(refusal)
            continue
        (copied if written else already).append(uuid)
        if remove:
            source.write(lambda session: delete_run(session, uuid), "could not remove pushed run")
            removed += 1
    return Transfer(tuple(copied), tuple(already), tuple(refused), removed)


def push(url: Optional[str] = None, spool: Optional[Path] = None, retry_quarantined: bool = False) -> Transfer:
    """Send the spooled runs to the store and remove each from the spool once it is stored. A run
    the store refuses for its content goes to the spool's quarantine and is not sent again (unless
    `retry_quarantined`); it never stops the others. A store that is away raises StoreError."""
    spool = spool or default_spool()
    if not spool.exists():
        return Transfer((), (), ())
    source = open_spool(spool, create=False)
    try:
        held = {q.uuid for q in quarantined(source)}
        sendable = [u for u in source.run_uuids() if retry_quarantined or u not in held]
        result = copy_runs(source, Store(url or default_url()), remove=True, uuids=sendable, quarantine=True)
        return dataclasses.replace(result, quarantined=tuple(quarantined(source)))
    finally:
        source.close()


def merge(path: Path, url: Optional[str] = None) -> Transfer:
    """Import the hosts and runs of another store file of any known schema; it is opened read-only."""
    if not path.exists():
        raise InputError(f"{path}: no such file")
    if not path.is_file():
        raise InputError(f"{path}: not a file")
    source = Store(f"sqlite:///{path}", create=False, readonly=True, check_schema=False)
    try:
        revision = source.schema_revision()
        if revision not in known_revisions():
            require_current(revision, source.shown_url)  # empty or newer: says so
        if revision == SCHEMA_REVISION:
            return copy_runs(source, Store(url or default_url()))
    finally:
        source.close()
    with tempfile.TemporaryDirectory(prefix="eaves-merge-") as folder:  # an older schema: merge a migrated copy
        copy = _migrated_copy(path, Path(folder) / path.name)
        try:
            return copy_runs(copy, Store(url or default_url()))
        finally:
            copy.close()


def _migrated_copy(path: Path, to: Path) -> Store:
    """A copy of an older store file, migrated to this eaves's schema; the file itself is only read.
    Copied through SQLite's backup API, which sees what a write-ahead log still holds."""
    import sqlite3

    try:
        with contextlib.closing(sqlite3.connect(f"{path.resolve().as_uri()}?mode=ro", uri=True)) as src, \
                contextlib.closing(sqlite3.connect(to)) as dst:
            src.backup(dst)
    except sqlite3.Error as err:
        raise StoreError(f"store {path}: cannot copy it to migrate: {err}") from None
    copy = Store(f"sqlite:///{to}", create=False, check_schema=False)
    copy.upgrade_schema()
    return copy


def open_spool(path: Path, create: bool = True) -> Store:
    """The spool's store, migrated first when an older eaves made it (it is eaves's own file)."""
    url = f"sqlite:///{path}"
    if path.exists():
        probe = Store(url, create=False, check_schema=False)
        try:
            if probe.schema_revision() in known_revisions()[:-1]:
                probe.upgrade_schema()
        finally:
            probe.close()
    return Store(url, create=create)


def quarantined(spool: Store) -> list[Refusal]:
    """Every run held in a spool's quarantine, oldest refusal first."""
    q = select(Run.uuid, Host.hostname, Run.started_at, Quarantined.reason, Quarantined.refused_at) \
        .select_from(Quarantined).join(Run, Run.uuid == Quarantined.run_uuid).join(Host, Host.id == Run.host_id) \
        .order_by(Quarantined.refused_at, Quarantined.id)
    return spool.read(lambda session: [Refusal(u, h, _utc(s), r, _utc(t)) for u, h, s, r, t in session.execute(q)])


def _quarantine(session: Session, uuid: str, reason: str, refused_by: str) -> None:
    session.execute(delete(Quarantined).where(Quarantined.run_uuid == uuid))
    session.add(Quarantined(run_uuid=uuid, reason=reason, refused_by=refused_by))


def _utc(value: dt.datetime) -> dt.datetime:
    return value if value.tzinfo else value.replace(tzinfo=dt.timezone.utc)
