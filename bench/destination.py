"""Where a survey's run will be written, decided before anything is measured: never measure for nothing."""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path
from typing import Optional

from sqlalchemy.engine import make_url

from eaves.errors import StoreError
from eaves.store import CONNECT_TIMEOUT_SECONDS, Store, default_url, mask_url
from eaves.transfer import default_spool, open_spool


@dataclass(frozen=True)
class Destination:
    """The store asked for and, when it cannot take a write now, the spool the run will go to and why."""

    url: str
    spool: Path
    store_reason: Optional[str] = None  # why the store cannot take a write; None: it can

    @property
    def spooled(self) -> bool:
        return self.store_reason is not None

    @property
    def shown_url(self) -> str:
        return mask_url(self.url)


def choose_destination(url: Optional[str] = None, spool: Optional[Path] = None,
                       connect_timeout: float = CONNECT_TIMEOUT_SECONDS) -> Destination:
    """The store if a trial write to it succeeds (`Store.check_writable`); else the spool if one does
    there; else StoreError with both reasons, and the survey does not start.

    A store that is not a store at all (a URL that cannot be used, a path that is not an SQLite file)
    raises at once: a run spooled for it could never be sent. A store that is one but cannot take a
    write (server down, wrong password, newer or older schema, read-only file or server) is spooled for."""
    url = url or default_url()
    spool = Path(spool or default_spool())
    Store(url, check_schema=False).close()  # only the URL and, for SQLite, the file's kind: no connection
    try:
        _try_write(url, connect_timeout)
        return Destination(url, spool)
    except StoreError as err:
        reason = str(err)
    if _same_file(url, spool):
        raise StoreError(f"{reason}; it is the spool itself, so the run could not be kept anywhere: "
                         "nothing measured")
    try:
        kept = open_spool(spool)  # as the save will open it: an older spool is migrated first
        try:
            kept.check_writable()
        finally:
            kept.close()
    except StoreError as err:
        raise StoreError(f"{reason}; and the spool cannot take it either ({err}): nothing measured") from None
    return Destination(url, spool, reason)


def _try_write(url: str, connect_timeout: float) -> None:
    store = Store(url, connect_timeout=connect_timeout)  # connects, creates or checks the schema
    try:
        store.check_writable()
    finally:
        store.close()


def _same_file(url: str, spool: Path) -> bool:
    """Whether an SQLite store URL names the spool's file (the spool is then no way out)."""
    parsed = make_url(url)  # the URL was usable a moment ago
    database = parsed.database if parsed.get_backend_name() == "sqlite" else None
    if not database or database == ":memory:":
        return False
    return os.path.realpath(database) == os.path.realpath(spool)
