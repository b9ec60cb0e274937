"""Open the SQL store, keep its schema current, and write a whole run in one transaction; its read
queries are in eaves.store_reads."""

from __future__ import annotations

import contextlib
import datetime as dt
import os
import random
import re
import time
from pathlib import Path
from typing import Any, Callable, Iterator, Optional, TypeVar
from urllib.parse import quote, quote_plus

from sqlalchemy import create_engine, event, insert
from sqlalchemy.engine import URL, Connection, Engine, make_url
from sqlalchemy.exc import (ArgumentError, DatabaseError, DataError, DBAPIError, IntegrityError,
                            OperationalError, StatementError)
from sqlalchemy.orm import Session

from eaves import schema
from eaves.errors import StoreError
from eaves.models import SCHEMA_REVISION, Host, Run, new_uuid
from eaves.records import RunRecord
from eaves.run_rows import RunRefused, record_rows, write_rows
from eaves.store_reads import StoreReads

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


def _sqlite_connect(dbapi_connection: Any, _record: Any) -> None:
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


class Store(StoreReads):
    """A connection to one store (SQLite file or server), with the schema in place; reads: StoreReads.

    `create`: make the file and the schema when missing. `check_schema`: refuse a store of another
    schema revision (False only for `eaves db`). `readonly`: SQLite only, never write the file.
    """

    def __init__(self, url: Optional[str] = None, create: bool = True, *, check_schema: bool = True,
                 readonly: bool = False, connect_timeout: float = CONNECT_TIMEOUT_SECONDS) -> None:
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
