"""Schema versions of a store: create a fresh one at the newest revision, refuse or migrate the others."""

from __future__ import annotations

from pathlib import Path
from typing import Optional

from sqlalchemy import inspect, text
from sqlalchemy.engine import Connection

from eaves.errors import StoreError
from eaves.models import SCHEMA_REVISION, Base

MIGRATIONS = Path(__file__).parent / "migrations"
VERSION_TABLE = "alembic_version"
FIRST_REVISION = "0001"
FIRST_TABLES = {"hosts", "runs", "measurements", "placements"}  # what a store of FIRST_REVISION holds
# Arbitrary constant key of the PostgreSQL advisory lock that serialises schema changes.
_PG_SCHEMA_LOCK = 0x6561766573


def _alembic_config(conn: Connection):
    from alembic.config import Config

    cfg = Config()
    cfg.set_main_option("script_location", str(MIGRATIONS))
    cfg.attributes["connection"] = conn
    return cfg


def known_revisions() -> list[str]:
    """Every revision of the migration scripts, oldest first."""
    from alembic.script import ScriptDirectory

    script = ScriptDirectory(str(MIGRATIONS))
    return [s.revision for s in reversed(list(script.walk_revisions()))]


def head_revision() -> str:
    from alembic.script import ScriptDirectory

    return ScriptDirectory(str(MIGRATIONS)).get_current_head()


def lock_schema(conn: Connection) -> None:
    """Serialise schema creation and migration between processes (SQLite: BEGIN IMMEDIATE did)."""
    if conn.dialect.name == "postgresql":
        conn.execute(text("SELECT pg_advisory_xact_lock(:key)"), {"key": _PG_SCHEMA_LOCK})


def current_revision(conn: Connection) -> Optional[str]:
    """The store's revision; FIRST_REVISION for an eaves store made before versions were kept;
    None for an empty database. Raises StoreError for a database that holds other tables."""
    tables = set(inspect(conn).get_table_names())
    if VERSION_TABLE in tables:
        rows = conn.execute(text(f"SELECT version_num FROM {VERSION_TABLE}")).scalars().all()
        if len(rows) == 1:
            return rows[0]
        raise StoreError(f"schema version table holds {len(rows)} rows, expected 1")
    if not tables:
        return None
    if FIRST_TABLES <= tables:
        return FIRST_REVISION
    raise StoreError("not an eaves store: it holds other tables (left untouched)")


def create(conn: Connection) -> Optional[str]:
    """In a write transaction: give an empty database the newest schema, stamped; returns the revision."""
    lock_schema(conn)
    revision = current_revision(conn)
    if revision is None:
        from alembic import command

        Base.metadata.create_all(conn)
        command.stamp(_alembic_config(conn), SCHEMA_REVISION)
        revision = SCHEMA_REVISION
    return revision


def require_current(revision: Optional[str], shown_url: str) -> None:
    """A StoreError that says what to do unless the store is at SCHEMA_REVISION."""
    if revision == SCHEMA_REVISION:
        return
    if revision is None:
        raise StoreError("the store is empty: no eaves schema in it")
    if revision in known_revisions():
        raise StoreError(f"schema version {revision} is older than this eaves uses ({SCHEMA_REVISION}); "
                         f"migrate it with: eaves db upgrade --db {shown_url}")
    raise _newer(revision)


def _newer(revision: str) -> StoreError:
    return StoreError(f"schema version {revision} is newer than this eaves knows ({SCHEMA_REVISION}); "
                      f"install a newer eaves to use this store")


def upgrade(conn: Connection) -> tuple[Optional[str], str]:
    """Migrate the store to SCHEMA_REVISION; returns (revision before, revision after)."""
    from alembic import command

    lock_schema(conn)
    before = current_revision(conn)
    if before is not None and before not in known_revisions():
        raise _newer(before)
    cfg = _alembic_config(conn)
    if before == FIRST_REVISION and VERSION_TABLE not in inspect(conn).get_table_names():
        command.stamp(cfg, FIRST_REVISION)
    command.upgrade(cfg, SCHEMA_REVISION)
    if conn.dialect.name == "sqlite":  # table rebuilds ran with foreign keys off: prove they still hold
        broken = conn.exec_driver_sql("PRAGMA foreign_key_check").fetchall()
        if broken:
            raise StoreError(f"migration left {len(broken)} broken reference(s), e.g. in table {broken[0][0]}; "
                             f"nothing was changed")
    return before, SCHEMA_REVISION
