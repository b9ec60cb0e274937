"""Strings a user or a store supplied, shown as data: never as rich markup, never as terminal controls.

`visible` spells out control characters (C0, DEL, C1 -- ESC, BEL, CSI ... -- and the bidirectional
overrides) as Python-style escapes, so a tag cannot retitle the terminal or hide text. `plain` also
escapes rich markup, for text that goes into a rich console or table. The stored string and the
JSON keep the exact value; only what is shown changes.
"""

from __future__ import annotations

import re
from typing import Any

from rich.markup import escape

# C0, DEL and C1 (Unicode category Cc), plus the bidirectional embeddings, overrides and isolates
# that reorder what a terminal shows (Unicode UAX #9; common practice to flag them in source review).
_CONTROL = re.compile("[\x00-\x1f\x7f-\x9f\u202a-\u202e\u2066-\u2069\u2028\u2029]")
_NAMED = {"\n": "\\n", "\r": "\\r", "\t": "\\t"}


def _spelled(match: re.Match) -> str:
    c = match.group()
    return _NAMED.get(c) or (f"\\x{ord(c):02x}" if ord(c) < 0x100 else f"\\u{ord(c):04x}")


def visible(value: Any, keep_newlines: bool = False) -> str:
    """`value` as text with every control character written as an escape (\\x1b, \\n, \\u202e);
    `keep_newlines` leaves line breaks alone (multi-line error messages)."""
    text = "" if value is None else str(value)
    if keep_newlines:
        return "\n".join(_CONTROL.sub(_spelled, line) for line in text.split("\n"))
    return _CONTROL.sub(_spelled, text)


def plain(value: Any) -> str:
    """`value` for a rich console or table cell: controls spelled out, markup escaped, so it prints
    exactly as written (consoles are made with emoji=False, so :codes: stay text too). Do not put a
    markup tag right after it: a trailing backslash of the value would escape that tag."""
    # rich's escape doubles a trailing backslash for a tag that may follow; the guard character keeps
    # the value's own backslash single, so the text alone renders exactly
    return escape(visible(value) + "_")[:-1]


def unstorable(text: str) -> str | None:
    """Why `text` cannot be stored as it is, or None: NUL (no SQL text column takes it; PostgreSQL
    refuses it) or a lone surrogate (not Unicode text: no store, file or terminal takes it)."""
    if "\x00" in text:
        return "contains a NUL character"
    if any("\ud800" <= c <= "\udfff" for c in text):
        return "contains a lone surrogate (not Unicode text)"
    return None
