"""Options every command spells and reads the same way: --db, --json PATH|-, run references,
percentages, dates, --host."""

from __future__ import annotations

import argparse
import datetime as dt
import json
import sys
from typing import TYPE_CHECKING, Any, Optional

from eaves.errors import InputError

if TYPE_CHECKING:
    from eaves.store import Store

DB_HELP = "store URL (default: $EAVES_DB or sqlite:///results/eaves.db)"
JSON_TO_STDOUT = "-"
# Run ids are the models' `Integer` keys: PostgreSQL's integer holds -2147483648 to +2147483647 (its
# documentation, "Numeric Types") and answers a larger value with "integer out of range"; SQLite's
# INTEGER goes to 2**63 - 1 but an eaves store numbers its runs from 1 and never gets near either.
MAX_RUN_ID = 2**31 - 1


def add_db_option(parser: argparse.ArgumentParser) -> None:
    """`--db URL`, the store a command reads or writes (None: $EAVES_DB or the default file)."""
    parser.add_argument("--db", metavar="URL", default=None, help=DB_HELP)


def add_json_option(parser: argparse.ArgumentParser, what: str) -> None:
    """`--json PATH|-`: write `what` as one JSON document to PATH, or to standard output for '-'."""
    parser.add_argument("--json", metavar="PATH|-", default=None,
                        help=f"write {what} as a JSON document to PATH ('-': standard output, and no table)")


def json_to_stdout(path: Optional[str]) -> bool:
    """True when --json sends the document to standard output (the table is then left out)."""
    return path == JSON_TO_STDOUT


def check_json_path(path: Optional[str]) -> None:
    """Refuse an unwritable --json path before any work (eaves.outfile.check_output_path)."""
    from eaves.outfile import check_output_path

    check_output_path(path, "--json")


def json_text(doc: Any) -> str:
    """The document as indented JSON; dates in ISO 8601. NaN and infinity are refused (ValueError):
    JSON has neither, and a document carrying them is a bug of the command that built it."""
    return json.dumps(doc, indent=2, allow_nan=False, default=_iso) + "\n"


def write_json(doc: Any, path: str) -> None:
    """Write --json: to standard output for '-', else through eaves.outfile (atomic for a regular
    file, through symlinks, into devices); a path that fails is a one-line InputError."""
    text = json_text(doc)
    if json_to_stdout(path):
        sys.stdout.write(text)
        sys.stdout.flush()
        return
    from eaves.outfile import write_text

    write_text(path, text, "--json")


def _iso(value: Any) -> Any:
    """Dates as ISO 8601; numpy scalars as the Python number they hold (numpy's `item`)."""
    if isinstance(value, (dt.datetime, dt.date)):
        return value.isoformat()
    if type(value).__module__ == "numpy" and hasattr(value, "item"):
        return value.item()
    raise TypeError(f"{type(value).__name__} is not JSON")


def run_ref(text: str) -> str:
    """argparse type for a run reference (id, UUID or prefix, 'latest', a host name ...): all digits is
    a run id, so it must be ASCII digits no larger than MAX_RUN_ID (a 20-digit id reached SQLite as an
    OverflowError, PostgreSQL as "integer out of range"); anything else is passed on to the store."""
    if text.isdigit() and not (text.isascii() and len(text) <= 10 and int(text) <= MAX_RUN_ID):
        shown = text if len(text) <= 24 else text[:24] + "..."
        raise argparse.ArgumentTypeError(f"{shown!r} is not a run id: ids are whole numbers from 0 to {MAX_RUN_ID}")
    return text


def parse_percent(text: str, what: str) -> float:
    """'3', '3%' or '0.5' -> fraction; negative or non-numbers are an InputError."""
    try:
        value = float(str(text).strip().rstrip("%"))
    except ValueError:
        raise InputError(f"{what}: {text!r} is not a percentage (example: 3 or 3%)") from None
    if not 0 <= value < 1000:
        raise InputError(f"{what}: {text!r} must be between 0 and 1000 percent")
    return value / 100.0


def parse_date(text: str, what: str) -> dt.datetime:
    """An ISO date or date-time; naive ones are UTC."""
    try:
        value = dt.datetime.fromisoformat(text.strip())
    except ValueError:
        raise InputError(f"{what}: {text!r} is not a date (example: 2026-03-01 or 2026-03-01T02:00)") from None
    return value if value.tzinfo else value.replace(tzinfo=dt.timezone.utc)


def host_or_this(store: Store, host: Optional[str]) -> str:
    """`--host`: the host asked for (host key or hostname), else this host; an unknown host is an
    InputError listing the known ones."""
    hosts = store.hosts()
    if host is None:
        from eaves.host import collect_host_facts

        host = collect_host_facts().host_key()
    if not any(host in (h.host_key, h.hostname) for h in hosts):
        known = ", ".join(h.host_key for h in hosts[:8]) or "none"
        raise InputError(f"--host {host}: no such host in {store.shown_url} (known: {known})")
    return host
