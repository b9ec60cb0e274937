"""Store URLs for tests: SQLite in a temp folder, and a real PostgreSQL server from EAVES_TEST_PG_URL.

Each PostgreSQL test gets its own fresh schema (via search_path), dropped afterwards. Without
EAVES_TEST_PG_URL the PostgreSQL cases skip, except under CI (CI set), where they fail:
.ci/run starts a server and sets the variable, so a skip there would hide a broken setup.
The fixtures built on these (store_url, once per backend) are in conftest.py."""

from __future__ import annotations

import contextlib
import os
import uuid as uuidlib
from pathlib import Path
from typing import Iterator

import pytest
from sqlalchemy import create_engine, text
from sqlalchemy.engine import make_url

PG_ENV = "EAVES_TEST_PG_URL"
BACKENDS = ("sqlite", "postgresql")


def pg_base_url() -> str:
    """The server URL, or skip (fail under CI) when there is none."""
    url = os.environ.get(PG_ENV)
    if not url:
        message = (f"{PG_ENV} is not set: no PostgreSQL server to test against "
                   f"(.ci/run starts one; see docs/fleet.md)")
        if os.environ.get("CI"):
            pytest.fail(f"{message}; CI must not skip the PostgreSQL tests")
        pytest.skip(message)
    return url


@contextlib.contextmanager
def pg_schema_url() -> Iterator[str]:
    """A URL whose tables live in a new, empty schema of the test server."""
    base = pg_base_url()
    name = f"eaves_test_{uuidlib.uuid4().hex[:12]}"
    admin = create_engine(base, isolation_level="AUTOCOMMIT")
    with admin.connect() as conn:
        conn.execute(text(f'CREATE SCHEMA "{name}"'))
    try:
        yield make_url(base).update_query_dict({"options": f"-csearch_path={name}"}) \
            .render_as_string(hide_password=False)
    finally:
        with admin.connect() as conn:
            conn.execute(text(f'DROP SCHEMA "{name}" CASCADE'))
        admin.dispose()


@contextlib.contextmanager
def backend_url(backend: str, folder: Path, name: str = "store.db") -> Iterator[str]:
    """An empty store URL of the given backend."""
    if backend == "sqlite":
        yield f"sqlite:///{folder / name}"
    else:
        with pg_schema_url() as url:
            yield url
