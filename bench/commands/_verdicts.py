"""Printing shared by the commands that judge changes (diff, trend, gate, survey --check)."""

from __future__ import annotations

import dataclasses
import datetime as dt
import math
from typing import Any, Optional

from eaves.compare import FASTER, SLOWER, Comparison
from eaves.errors import InputError
from eaves.units import format_rate

VERDICT_STYLE = {FASTER: "green", SLOWER: "bold red"}


def format_value(value: Optional[float], unit: str) -> str:
    """A figure in its unit with an SI prefix where rates are concerned."""
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "-"
    if unit == "ns_per_load":
        return f"{value:.3g} ns"
    if unit == "seconds":
        return f"{value * 1e3:.3g} ms"
    if unit == "efficiency":
        return f"{value:.1%}"
    return format_rate(value, {"bytes_per_s": "B/s", "ops_per_s": "OP/s", "hz": "Hz"}.get(unit, unit))


def verdict_cell(c: Comparison) -> str:
    style = VERDICT_STYLE.get(c.verdict)
    return f"[{style}]{c.verdict}[/]" if style else c.verdict


def change_cell(c: Comparison) -> str:
    return f"{c.change_pct:+.1f}%" if math.isfinite(c.change_pct) else "-"


def p_cell(c: Comparison) -> str:
    return "-" if c.p_value is None else f"{c.p_value:.3f}"


def comparison_dict(c: Comparison) -> dict[str, Any]:
    d = dataclasses.asdict(c)
    d["change_pct"] = c.change_pct if math.isfinite(c.change_pct) else None
    return d


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
