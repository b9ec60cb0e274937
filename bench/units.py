"""Parse sizes typed by people and format figures for display; SI prefixes appear only here."""

from __future__ import annotations

import math
import re

from eaves.errors import InputError

_BINARY = {"": 1, "b": 1, "k": 1024, "kib": 1024, "m": 1024**2, "mib": 1024**2,
           "g": 1024**3, "gib": 1024**3, "t": 1024**4, "tib": 1024**4}
_DECIMAL = {"kb": 1000, "mb": 1000**2, "gb": 1000**3, "tb": 1000**4}
_SIZE = re.compile(r"^\s*([-+]?[0-9]*\.?[0-9]+)\s*([a-zA-Z]*)\s*$")


def parse_size(text: str, what: str = "size") -> int:
    """Bytes from '64KiB', '1.5GiB', '512M', '4096', '2GB'; an unknown unit is an InputError."""
    m = _SIZE.match(str(text))
    if not m:
        raise InputError(f"{what}: cannot read {text!r} as a size (examples: 4096, 64KiB, 2GiB)")
    number, unit = float(m.group(1)), m.group(2).lower()
    factor = _BINARY.get(unit) or _DECIMAL.get(unit)
    if factor is None:
        raise InputError(f"{what}: unknown unit {m.group(2)!r} in {text!r} (use B, KiB, MiB, GiB, TiB, KB, MB, GB)")
    if number < 0:
        raise InputError(f"{what}: {text!r} is negative: a size must be above zero")
    if not math.isfinite(number * factor) or number * factor >= 2**63:
        raise InputError(f"{what}: {text!r} is too large to be a size")
    value = int(round(number * factor))
    if value <= 0:
        raise InputError(f"{what}: {text!r} must be above zero")
    return value


def parse_int_list(text: str, what: str) -> list[int]:
    """'1,2,4' -> [1, 2, 4]; anything else is an InputError naming `what`."""
    try:
        values = [int(part) for part in str(text).split(",") if part.strip()]
    except ValueError:
        raise InputError(f"{what}: {text!r} is not a comma-separated list of whole numbers") from None
    if not values:
        raise InputError(f"{what}: empty list")
    return values


def parse_name_list(text: str, what: str) -> list[str]:
    """'fp64, fp32' -> ['fp64', 'fp32']; a list with no name in it (',' or '') is an InputError naming `what`."""
    names = [part.strip() for part in str(text).split(",") if part.strip()]
    if not names:
        raise InputError(f"{what}: {text!r} is an empty list (give at least one name)")
    return names


def format_bytes(n: float | None) -> str:
    """1536 -> '1.5 KiB' (binary prefixes, as sizes of memory are quoted)."""
    if n is None:
        return "-"
    for unit in ("B", "KiB", "MiB", "GiB", "TiB"):
        if abs(n) < 1024 or unit == "TiB":
            return f"{n:.0f} {unit}" if unit == "B" else f"{n:.3g} {unit}"
        n /= 1024
    return f"{n} B"


def format_rate(value: float | None, unit: str) -> str:
    """3.2e10, 'B/s' -> '32 GB/s' (decimal prefixes, as rates are quoted); None, NaN, inf -> '-'."""
    if value is None or not math.isfinite(value):
        return "-"
    for prefix, scale in (("T", 1e12), ("G", 1e9), ("M", 1e6), ("k", 1e3)):
        if abs(value) >= scale:
            return f"{value / scale:.3g} {prefix}{unit}"
    return f"{value:.3g} {unit}"


def format_duration(seconds: float | None) -> str:
    """0.0123 -> '12.3 ms': the largest of s, ms, µs, ns that keeps the number at 1 or more; None, NaN -> '-'."""
    if seconds is None or not math.isfinite(seconds):
        return "-"
    for unit, scale in (("s", 1.0), ("ms", 1e-3), ("µs", 1e-6)):
        if abs(seconds) >= scale:
            return f"{seconds / scale:.3g} {unit}"
    return f"{seconds / 1e-9:.3g} ns"


# How each stored unit of a figure (eaves.records.Figure.unit) is shown, and the rate's unit symbol.
RATE_SYMBOLS = {"bytes_per_s": "B/s", "ops_per_s": "OP/s", "hz": "Hz"}


def format_figure(value: float | None, unit: str) -> str:
    """A figure in its stored unit: durations and latencies through format_duration, efficiency in
    percent, every rate through format_rate."""
    if value is None or not math.isfinite(value):
        return "-"
    if unit == "ns_per_load":
        return format_duration(value * 1e-9)
    if unit == "seconds":
        return format_duration(value)
    if unit == "efficiency":
        return f"{value:.1%}"
    return format_rate(value, RATE_SYMBOLS.get(unit, unit))
