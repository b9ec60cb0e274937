"""Open the SQL store, write a whole run in one transaction, and answer the queries the CLI needs."""

from __future__ import annotations

import contextlib
import datetime as dt
import os
import random
import re
import time
from pathlib import Path
from typing import Callable, Iterator, Optional, TypeVar
from urllib.parse import quote, quote_plus

from sqlalchemy import create_engine, event, func, select
from sqlalchemy.engine import URL, Connection, Engine, make_url
from sqlalchemy.exc import (ArgumentError, DatabaseError, DataError, DBAPIError, IntegrityError,
                            OperationalError, StatementError)
from sqlalchemy.orm import Session, selectinload

from eaves import schema
from eaves.errors import StoreError
from eaves.models import SCHEMA_REVISION, Host, Measurement, Placement, Run, new_uuid
from eaves.records import FIGURE_UNITS, Figure, RunRecord, RunSummary, StoredRun
from eaves.run_rows import RunRefused, figure_of, placed_of, record_rows, write_rows

DEFAULT_DB_PATH = Path("results") / "eaves.db"
CONNECT_TIMEOUT_SECONDS = 10  # a server that does not answer within this is unreachable
BUSY_TIMEOUT_SECONDS = 30  # SQLite: how long a writer waits for another one's lock
WRITE_ATTEMPTS = 6  # bounded retries of a write transaction that lost a race (locked, deadlock, ...)
_RETRY_SQLSTATES = {"40001", "40P01", "55P03"}  # PostgreSQL: serialization, deadlock, lock busy

T = TypeVar("T")


def default_url() -> str:
    """`EAVES_DB` if set, else the SQLite file results/eaves.db under the current directory."""
    return os.environ.get("EAVES_DB") or f"sqlite:///{DEFAULT_DB_PATH}"


URL_NOT_SHOWN = "<URL not shown: it cannot be parsed>"
_SCHEME = re.compile(r"[A-Za-z][A-Za-z0-9+.-]*")  # a URL scheme (RFC 3986, section 3.1)


def parse_url(url: str) -> URL:
    """SQLAlchemy's reading of a store URL; ValueError also when that reading is ambiguous: a
    password followed by another "@" (an unescaped @ in the password, whose rest would be read as
    the host or database: percent-encode it as %40), or a port that is not a number."""
    parsed = make_url(url)  # ArgumentError (not a URL), ValueError (the port is not a number)
    if parsed.password is not None and url.split("://", 1)[-1].count("@") > 1:
        raise ValueError("more than one @ after the scheme of a URL with a password")
    return parsed


def mask_url(url: str) -> str:
    """The URL with its password (and any password=... query value) replaced, for anything shown to a
    person or written to a file; an unparsable URL shows only its scheme and a placeholder."""
    try:
        parsed = parse_url(url)
    except (ArgumentError, ValueError, TypeError):
        scheme = str(url).split("://", 1)[0] if "://" in str(url) else ""
        return (f"{scheme}://" if _SCHEME.fullmatch(scheme) else "") + URL_NOT_SHOWN
    query = {k: "hidden" if "password" in k.lower() else v for k, v in parsed.query.items()}
    return parsed.set(query=query).render_as_string(hide_password=True)


def is_server_url(url: str) -> bool:
    """True for a database server (reached over a network), False for SQLite or an unusable URL."""
    try:
        return make_url(url).get_backend_name() != "sqlite"
    except (ArgumentError, ValueError):  # ValueError: a port that is not a number
        return False


def _sqlite_connect(dbapi_connection, _record) -> None:
    # Let SQLAlchemy's "begin" event emit BEGIN itself (pysqlite's own is late and deferred).
    dbapi_connection.isolation_level = None
    cursor = dbapi_connection.cursor()
    cursor.execute(f"PRAGMA busy_timeout = {BUSY_TIMEOUT_SECONDS * 1000}")
    cursor.execute("PRAGMA foreign_keys = ON")
    cursor.close()


def _sqlite_begin(conn: Connection) -> None:
    # Writers take the lock up front so that the busy timeout applies, instead of failing when a
    # read transaction tries to become a write transaction after another process wrote.
    conn.exec_driver_sql("BEGIN IMMEDIATE" if conn.get_execution_options().get("eaves_write") else "BEGIN")


def _is_sqlite_file(path: Path) -> bool:
    """Whether SQLite can read the file, asked through SQLite itself (read-only). Not through open() and
    close(): closing any descriptor of a file drops every POSIX lock this process holds on it, so the
    store's own idle connections would lose their locks and read stale pages while another process
    writes (seen: a run saved by a subprocess invisible to an open Store)."""
    import sqlite3

    try:
        probe = sqlite3.connect(f"{path.resolve().as_uri()}?mode=ro", uri=True)
    except sqlite3.Error:
        return False
    try:
        probe.execute("PRAGMA schema_version").fetchone()
        return True
    except sqlite3.DatabaseError:
        return False
    finally:
        probe.close()


class Store:
    """A connection to one store (SQLite file or server), with the schema in place.

    `create`: make the file and the schema when missing. `check_schema`: refuse a store of another
    schema revision (False only for `eaves db`). `readonly`: SQLite only, never write the file.
    """

    def __init__(self, url: Optional[str] = None, create: bool = True, *, check_schema: bool = True,
                 readonly: bool = False, connect_timeout: float = CONNECT_TIMEOUT_SECONDS):
        self.url = url or default_url()
        self.shown_url = mask_url(self.url)
        try:
            parsed = parse_url(self.url)
        except (ArgumentError, ValueError):
            raise StoreError(f"store {self.shown_url}: not a database URL (example: sqlite:///results/eaves.db)") from None
        self._secrets = _secrets_of(parsed.password)
        self.is_sqlite = parsed.get_backend_name() == "sqlite"
        try:
            if self.is_sqlite:
                self._prepare_sqlite_file(parsed.database, create)
                engine_url = parsed
                if readonly and parsed.database:
                    engine_url = parsed.set(database=f"file:{parsed.database}?mode=ro",
                                            query={**parsed.query, "uri": "true"})
                self.engine: Engine = create_engine(engine_url, connect_args={"timeout": BUSY_TIMEOUT_SECONDS})
                event.listen(self.engine, "connect", _sqlite_connect)
                event.listen(self.engine, "begin", _sqlite_begin)
            else:
                args = {"connect_timeout": max(1, int(round(connect_timeout)))} \
                    if parsed.get_backend_name() == "postgresql" else {}
                self.engine = create_engine(self.url, pool_pre_ping=True, connect_args=args)
        except (ArgumentError, ImportError, ValueError) as err:
            raise StoreError(f"store {self.shown_url}: cannot use this URL: {self._scrub(str(err))}") from None
        self._write_engine = self.engine.execution_options(eaves_write=True)
        self._readonly = readonly
        self.revision: Optional[str] = None
        if check_schema:
            self._ensure_schema(create)

    def _prepare_sqlite_file(self, database: Optional[str], create: bool) -> None:
        if not database or database == ":memory:":
            return
        path = Path(database)
        if path.exists():
            if not path.is_file():
                raise StoreError(f"store {path}: not a file")
            if not os.access(path, os.R_OK):
                raise StoreError(f"store {path}: not readable")
            if not _is_sqlite_file(path):
                raise StoreError(f"store {path}: not an SQLite database (left untouched)")
            return
        if not create:
            raise StoreError(f"store {path}: no such file")
        try:
            path.parent.mkdir(parents=True, exist_ok=True)
        except OSError as err:
            raise StoreError(f"store {path}: cannot create folder {path.parent}: {err.strerror}") from err
        if not os.access(path.parent, os.W_OK):
            raise StoreError(f"store {path}: folder {path.parent} is not writable")

    def _ensure_schema(self, create: bool) -> None:
        with self._errors("cannot open", name_store=True):
            with self.engine.connect() as conn:
                revision = schema.current_revision(conn)
            if revision in (None, SCHEMA_REVISION):
                self._use_wal()  # only once the file is known to be ours
            if revision is None and create:
                with self._write_engine.begin() as conn:
                    revision = schema.create(conn)
            schema.require_current(revision, self.shown_url)
        self.revision = revision

    def _use_wal(self) -> None:
        """SQLite: write-ahead log, so readers never block the one writer (a persistent setting)."""
        if not self.is_sqlite or self._readonly:
            return
        raw = self.engine.raw_connection()
        try:
            cursor = raw.cursor()
            if cursor.execute("PRAGMA journal_mode").fetchone()[0].lower() != "wal":
                cursor.execute("PRAGMA journal_mode = WAL")
            cursor.close()
        finally:
            raw.close()

    def schema_revision(self) -> Optional[str]:
        """The store's schema revision (None for an empty database)."""
        with self._errors("cannot read the schema version", name_store=True), self.engine.connect() as conn:
            return schema.current_revision(conn)

    def upgrade_schema(self) -> tuple[Optional[str], str]:
        """Migrate the store to the schema this eaves uses; returns (revision before, after).

        SQLite: with foreign keys off (set outside the transaction, where SQLite takes it), since a
        migration rebuilds tables and dropping `runs` would otherwise cascade into its figures."""
        with self._errors("cannot migrate", name_store=True):
            with self._write_engine.connect() as conn:
                raw = conn.connection.driver_connection if self.is_sqlite else None
                if raw is not None:
                    raw.execute("PRAGMA foreign_keys = OFF")
                try:
                    with conn.begin():
                        before, after = schema.upgrade(conn)
                finally:
                    if raw is not None:
                        raw.execute("PRAGMA foreign_keys = ON")
            self._use_wal()
        self.revision = after
        return before, after

    def close(self) -> None:
        """Close pooled connections (a store is usable again afterwards; it reconnects)."""
        self.engine.dispose()

    # -- errors and retries ----------------------------------------------------------------
    def _scrub(self, message: str) -> str:
        """The message without the URL's password, in any spelling a driver may echo."""
        for secret in self._secrets:
            message = message.replace(secret, "***")
        return message

    @contextlib.contextmanager
    def _errors(self, action: str, name_store: bool = False) -> Iterator[None]:
        """Turn driver errors into a one-line StoreError that names the store, never its password;
        `name_store`: also put the store's name before our own StoreErrors (schema checks)."""
        try:
            yield
        except RunRefused:
            raise
        except StoreError as err:
            message = self._scrub(str(err))
            if name_store:
                message = f"store {self.shown_url}: {message}"
            raise StoreError(message, err.exit_code) from None
        except DatabaseError as err:
            raise StoreError(f"store {self.shown_url}: {action}: {self._scrub(_short(err))}") from None
        except (OSError, UnicodeError) as err:  # e.g. a driver failing to resolve a host name
            raise StoreError(f"store {self.shown_url}: {action}: {self._scrub(str(err))}") from None

    def write(self, work: Callable[[Session], T], action: str = "could not write") -> T:
        """Run `work` in one write transaction, retried a bounded number of times when it lost a
        race with another writer (SQLite lock, PostgreSQL deadlock or unique-key race).

        A value the store cannot hold (too long, out of range, a NUL in PostgreSQL text, a broken
        reference) raises RunRefused: the same write would fail again, unlike a store that is away."""
        with self._errors(action):
            for attempt in range(1, WRITE_ATTEMPTS + 1):
                try:
                    with Session(self._write_engine) as session, session.begin():
                        return work(session)
                except (OperationalError, IntegrityError) as err:
                    if attempt < WRITE_ATTEMPTS and _retryable(err):
                        time.sleep(random.uniform(0.5, 1.0) * min(2.0, 0.05 * 2 ** attempt))
                        continue
                    if isinstance(err, IntegrityError) and not _retryable(err):
                        raise self._refused(action, err) from None
                    raise
                except DataError as err:
                    raise self._refused(action, err) from None
                except StatementError as err:  # a value the driver could not even send (not JSON, ...)
                    if isinstance(err, DBAPIError):
                        raise
                    raise self._refused(action, err) from None
                except (OverflowError, ValueError, TypeError) as err:
                    # raised by the driver itself: sqlite3 and an int beyond 64 bits, psycopg and a
                    # value json cannot encode
                    raise self._refused(action, err) from None
        raise AssertionError("unreachable")

    def read(self, work: Callable[[Session], T], action: str = "cannot read") -> T:
        """Run `work` in a session that only reads; driver errors become one-line StoreErrors."""
        with self._errors(action), Session(self.engine) as session:
            return work(session)

    def _refused(self, action: str, err: Exception) -> RunRefused:
        reason = self._scrub(_short(err))
        return RunRefused(f"store {self.shown_url}: {action}: {reason}", reason)

    def check_writable(self) -> None:
        """Prove the store takes a write now, before a survey measures for it: a host and a run row
        (ids -1: no sequence value used up) inserted in a transaction that is then rolled back. On SQLite
        that transaction is BEGIN IMMEDIATE, so the file's write lock is taken too. StoreError says why not
        (read-only file or server, no INSERT right, locked past the busy timeout ...)."""
        from sqlalchemy import insert

        if self._readonly:
            raise StoreError(f"store {self.shown_url}: opened read-only")
        probe, now = f"eaves-write-check-{new_uuid()}", dt.datetime.now(dt.timezone.utc)
        with self._errors("cannot take a write"), self._write_engine.connect() as conn:
            trans = conn.begin()
            try:
                conn.execute(insert(Host).values(id=-1, host_key=probe, hostname=probe, fingerprint="",
                                                 facts={}, first_seen=now))
                conn.execute(insert(Run).values(id=-1, uuid=new_uuid(), host_id=-1, kind="survey",
                                                started_at=now, status="interrupted", eaves_version="",
                                                params={}, facts={}))
            finally:
                trans.rollback()

    # -- writing ---------------------------------------------------------------------------
    def save_run(self, record: RunRecord) -> str:
        """Write the host (if new), the run and all its figures in one transaction; returns the UUID.

        Saving a record whose UUID is already stored writes nothing: a retried save never doubles."""
        return self.add_run(record)[0]

    def add_run(self, record: RunRecord) -> tuple[str, bool]:
        """Like save_run; also says whether the run was written (False: its UUID was there)."""
        if not record.uuid:
            record.uuid = new_uuid()
        rows = record_rows(record)
        return record.uuid, self.write(lambda session: write_rows(session, rows), "could not save run")

    def has_run(self, uuid: str) -> bool:
        with self._errors("cannot read"), Session(self.engine) as session:
            return session.scalar(select(Run.id).where(Run.uuid == uuid)) is not None

    def run_uuids(self) -> list[str]:
        """UUIDs of every run, oldest first."""
        with self._errors("cannot read"), Session(self.engine) as session:
            return list(session.scalars(select(Run.uuid).order_by(Run.id)))

    # -- reading ---------------------------------------------------------------------------
    def hosts(self) -> list[tuple[str, str, int, Optional[dt.datetime]]]:
        """(host_key, hostname, number of runs, last run start) for every host."""
        with self._errors("cannot read"), Session(self.engine) as session:
            rows = session.execute(
                select(Host.host_key, Host.hostname, func.count(Run.id), func.max(Run.started_at))
                .outerjoin(Run).group_by(Host.id).order_by(Host.hostname, Host.host_key)).all()
        return [tuple(r) for r in rows]

    def runs(self, host: Optional[str] = None, limit: Optional[int] = None,
             status: Optional[str] = None, kind: Optional[str] = None) -> list[RunSummary]:
        """Runs, newest first, optionally of one host (host key or hostname)."""
        with self._errors("cannot read"), Session(self.engine) as session:
            q = select(Run).join(Host).options(selectinload(Run.host))
            if host:
                q = q.where((Host.host_key == host) | (Host.hostname == host))
            if status:
                q = q.where(Run.status == status)
            if kind:
                q = q.where(Run.kind == kind)
            q = q.order_by(Run.started_at.desc(), Run.id.desc())
            if limit:
                q = q.limit(limit)
            runs = session.scalars(q).all()
            counts = self._counts(session, [r.id for r in runs])
            return [_summary(r, *counts.get(r.id, (0, 0))) for r in runs]

    def _counts(self, session: Session, ids: list[int]) -> dict[int, tuple[int, int]]:
        if not ids:
            return {}
        m = dict(session.execute(select(Measurement.run_id, func.count()).where(
            Measurement.run_id.in_(ids)).group_by(Measurement.run_id)).all())
        p = dict(session.execute(select(Placement.run_id, func.count()).where(
            Placement.run_id.in_(ids)).group_by(Placement.run_id)).all())
        return {i: (m.get(i, 0), p.get(i, 0)) for i in ids}

    def resolve_run(self, ref: str) -> int:
        """Run id from an id number, a UUID or a unique UUID prefix (at least 4 characters)."""
        with self._errors("cannot read"), Session(self.engine) as session:
            if ref.isdigit() and session.get(Run, int(ref)) is not None:
                return int(ref)
            if len(ref) >= 4:
                ids = session.scalars(select(Run.id).where(Run.uuid.startswith(ref.lower()))).all()
                if len(ids) == 1:
                    return ids[0]
                if len(ids) > 1:
                    raise StoreError(f"run {ref!r}: ambiguous, {len(ids)} runs start with it", exit_code=2)
        raise StoreError(f"run {ref!r}: no such run in {self.shown_url}", exit_code=2)

    def latest_complete_run(self, host: Optional[str] = None, kind: str = "survey") -> Optional[int]:
        """Id of the newest complete run of a host (host key or hostname)."""
        with self._errors("cannot read"), Session(self.engine) as session:
            q = select(Run.id).join(Host).where(Run.status == "complete", Run.kind == kind)
            if host:
                q = q.where((Host.host_key == host) | (Host.hostname == host))
            return session.scalar(q.order_by(Run.started_at.desc(), Run.id.desc()).limit(1))

    def load_run(self, run_id: int) -> StoredRun:
        """A run with its figures and placements."""
        with self._errors("cannot read"), Session(self.engine) as session:
            run = session.scalar(select(Run).where(Run.id == run_id).options(
                selectinload(Run.host), selectinload(Run.measurements), selectinload(Run.placements)))
            if run is None:
                raise StoreError(f"run {run_id}: no such run in {self.shown_url}", exit_code=2)
            figures = tuple(figure_of(m) for m in run.measurements)
            placements = tuple(placed_of(p) for p in run.placements)
            return StoredRun(_summary(run, len(figures), len(placements)), dict(run.params),
                             dict(run.facts), dict(run.host.facts), run.ceilings_run_uuid,
                             figures, placements)

    # -- history (diff, trend, report) -----------------------------------------------------
    def host_fingerprint(self, host_key: str) -> Optional[str]:
        """The hardware fingerprint of a host key (None if the host is unknown)."""
        with self._errors("cannot read"), Session(self.engine) as session:
            return session.scalar(select(Host.fingerprint).where(Host.host_key == host_key))

    def run_history(self, host: str, kind: str = "survey", since: Optional[dt.datetime] = None,
                    last: Optional[int] = None, until: Optional[dt.datetime] = None,
                    ) -> list[tuple[int, str, dt.datetime, Optional[str]]]:
        """(id, uuid, started_at, tag) of a host's complete runs of one kind, oldest first, started in
        [since, until]; `last`: only the newest that many. No figures and no counts: cheap on a long history."""
        with self._errors("cannot read"), Session(self.engine) as session:
            q = select(Run.id, Run.uuid, Run.started_at, Run.tag).join(Host).where(
                Run.status == "complete", Run.kind == kind, (Host.host_key == host) | (Host.hostname == host))
            if since is not None:
                q = q.where(Run.started_at >= since)
            if until is not None:
                q = q.where(Run.started_at <= until)
            q = q.order_by(Run.started_at.desc(), Run.id.desc())
            if last:
                q = q.limit(last)
            rows = session.execute(q).all()
        return [(r[0], r[1], _aware(r[2]), r[3]) for r in reversed(rows)]

    def figures_of(self, run_ids: list[int], suites: Optional[tuple[str, ...]] = None) -> dict[int, list[Figure]]:
        """Figures of many runs at once, by run id, optionally of some suites only (without `extra`)."""
        cols = (Measurement.run_id, Measurement.suite, Measurement.kernel, Measurement.variant,
                Measurement.dtype, Measurement.threads, Measurement.working_set_bytes, Measurement.cache_level,
                Measurement.stride_elems, Measurement.shape, Measurement.samples, Measurement.repetitions,
                Measurement.min_seconds, *(getattr(Measurement, u) for u in FIGURE_UNITS))
        out: dict[int, list[Figure]] = {i: [] for i in run_ids}
        with self._errors("cannot read"), Session(self.engine) as session:
            for start in range(0, len(run_ids), 500):
                q = select(*cols).where(Measurement.run_id.in_(run_ids[start:start + 500]))
                if suites:
                    q = q.where(Measurement.suite.in_(suites))
                for r in session.execute(q.order_by(Measurement.id)):
                    unit = next(u for u, v in zip(FIGURE_UNITS, r[13:]) if v is not None)
                    out[r[0]].append(Figure(suite=r[1], kernel=r[2], variant=r[3], dtype=r[4], threads=r[5],
                                            working_set_bytes=r[6], cache_level=r[7], stride_elems=r[8],
                                            shape=r[9], unit=unit, samples=tuple(r[10]), repetitions=r[11],
                                            min_seconds=r[12]))
        return out

    def figure_summaries(self, run_ids: list[int], suites: tuple[str, ...]) -> list[tuple]:
        """(id, run_id, suite, kernel, variant, dtype, threads, cache_level, stride_elems, shape, unit,
        median, q1, q3) of many runs' figures: no samples to decode, for long histories."""
        m = Measurement
        cols = (m.id, m.run_id, m.suite, m.kernel, m.variant, m.dtype, m.threads, m.cache_level, m.stride_elems,
                m.shape, *(getattr(m, u) for u in FIGURE_UNITS), m.q1, m.q3)
        out = []
        with self._errors("cannot read"), self.engine.connect() as conn:
            for start in range(0, len(run_ids), 500):
                q = select(*cols).where(m.run_id.in_(run_ids[start:start + 500]), m.suite.in_(suites))
                for r in conn.execute(q):
                    unit, value = next((u, v) for u, v in zip(FIGURE_UNITS, r[10:14]) if v is not None)
                    out.append((*r[:10], unit, value, r[14], r[15]))
        return out

    def placement_seconds(self, run_ids: list[int]) -> list[tuple[int, str, float]]:
        """(run_id, layer, seconds) of every placed layer of some runs: the layer histories the gate learns from."""
        out = []
        with self._errors("cannot read"), self.engine.connect() as conn:
            for start in range(0, len(run_ids), 500):
                q = select(Placement.run_id, Placement.layer, Placement.seconds).where(
                    Placement.run_id.in_(run_ids[start:start + 500]))
                out += [tuple(r) for r in conn.execute(q)]
        return out

    def samples_of(self, measurement_ids: list[int]) -> dict[int, tuple[float, ...]]:
        """The samples of some figures, by measurement id."""
        out: dict[int, tuple[float, ...]] = {}
        with self._errors("cannot read"), self.engine.connect() as conn:
            for start in range(0, len(measurement_ids), 500):
                q = select(Measurement.id, Measurement.samples).where(
                    Measurement.id.in_(measurement_ids[start:start + 500]))
                out.update((i, tuple(s)) for i, s in conn.execute(q))
        return out


def _retryable(err: Exception) -> bool:
    """A write that lost a race and may succeed when repeated."""
    orig = getattr(err, "orig", None)
    if isinstance(err, IntegrityError):  # two writers added the same host (or run) at once
        return getattr(orig, "sqlstate", None) == "23505" or "UNIQUE constraint failed" in str(orig)
    if getattr(orig, "sqlstate", None) in _RETRY_SQLSTATES:
        return True
    message = str(orig).lower()
    return "database is locked" in message or "database is busy" in message


def _secrets_of(password: Optional[str]) -> tuple[str, ...]:
    if not password:
        return ()
    return tuple(sorted({password, quote(password, safe=""), quote_plus(password)}, key=len, reverse=True))


def _short(err: Exception) -> str:
    """First line of a driver error, without SQL or parameters, and with no password in it."""
    orig = getattr(err, "orig", None) or err
    return str(orig).strip().splitlines()[0] if str(orig).strip() else type(orig).__name__


def _summary(run: Run, n_figures: int, n_placements: int) -> RunSummary:
    return RunSummary(id=run.id, uuid=run.uuid, host_key=run.host.host_key,
                      hostname=run.host.hostname, kind=run.kind, status=run.status,
                      started_at=_aware(run.started_at), ended_at=_aware(run.ended_at),
                      tag=run.tag, note=run.note, git_describe=run.git_describe,
                      eaves_version=run.eaves_version, n_figures=n_figures,
                      n_placements=n_placements)


def _aware(value: Optional[dt.datetime]) -> Optional[dt.datetime]:
    """SQLite hands back naive datetimes; everything we store is UTC."""
    if value is not None and value.tzinfo is None:
        return value.replace(tzinfo=dt.timezone.utc)
    return value
