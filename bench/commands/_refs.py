"""Run references typed on the command line, refused at parse time when no run can have them."""

from __future__ import annotations

import argparse

# Run ids are the models' `Integer` keys: PostgreSQL's integer holds -2147483648 to +2147483647 (its
# documentation, "Numeric Types") and answers a larger value with "integer out of range"; SQLite's
# INTEGER goes to 2**63 - 1 but an eaves store numbers its runs from 1 and never gets near either.
MAX_RUN_ID = 2**31 - 1


def run_ref(text: str) -> str:
    """argparse type for a run reference (id, UUID or prefix, 'latest', a host name ...): all digits is
    a run id, so it must be ASCII digits no larger than MAX_RUN_ID (a 20-digit id reached SQLite as an
    OverflowError, PostgreSQL as "integer out of range"); anything else is passed on to the store."""
    if text.isdigit() and not (text.isascii() and len(text) <= 10 and int(text) <= MAX_RUN_ID):
        shown = text if len(text) <= 24 else text[:24] + "..."
        raise argparse.ArgumentTypeError(f"{shown!r} is not a run id: ids are whole numbers from 0 to {MAX_RUN_ID}")
    return text
