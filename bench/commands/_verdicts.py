"""Printing shared by the commands that judge changes (diff, trend, gate, survey --check)."""

from __future__ import annotations

import dataclasses
import datetime as dt
import math
from typing import Any, Optional

from eaves.compare import FASTER, SLOWER, Comparison
from eaves.errors import InputError
from eaves.noise import RunNoise
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


def floor_cell(c: Comparison) -> str:
    """The run-to-run floor a change had to pass, and where it came from."""
    n = c.noise
    if n is None or n.source == "none":
        return "-"
    return f"{n.floor:.0%} " + (f"({n.runs} runs)" if n.source == "history" else "default")


def noise_dict(n: Optional[RunNoise]) -> Optional[dict[str, Any]]:
    """Which run-to-run noise a verdict used: source (history, default, none), spread, floor, runs."""
    if n is None:
        return None
    return {"source": n.source, "spread_pct": 100.0 * n.spread, "floor_pct": 100.0 * n.floor, "runs": n.runs}


def noise_summary(comparisons, what: str = "figures") -> str:
    """One line: how many verdicts used a learned spread, a default, or no run-to-run floor."""
    counts = {"history": 0, "default": 0, "none": 0}
    for c in comparisons:
        if c is not None and c.noise is not None:
            counts[c.noise.source] += 1
    parts = [f"learned from this host's runs for {counts['history']} {what}" if counts["history"] else "",
             f"provisional defaults for {counts['default']} (fewer than 3 runs)" if counts["default"] else "",
             f"no floor for {counts['none']} (fewer than 3 runs, no default)" if counts["none"] else ""]
    return "run-to-run noise: " + "; ".join(p for p in parts if p) if any(parts) else ""


def comparison_dict(c: Comparison) -> dict[str, Any]:
    d = dataclasses.asdict(c)
    d["change_pct"] = c.change_pct if math.isfinite(c.change_pct) else None
    d["noise"] = noise_dict(c.noise)
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
