"""The memory budget: every allocation of a survey is checked against it before it is made."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Optional

import psutil

from eaves.errors import InputError
from eaves.units import format_bytes, parse_size

DEFAULT_FRACTION = 0.25  # of available memory, unless --max-memory says otherwise


@dataclass(frozen=True)
class MemoryBudget:
    """At most `cap_bytes` allocated by the survey at once."""

    cap_bytes: int
    available_bytes: int

    def refuse_above(self, request_bytes: int, what: str) -> None:
        """Raise before allocating when a request does not fit."""
        if request_bytes > self.cap_bytes:
            raise InputError(f"{what} needs {format_bytes(request_bytes)}, above the memory cap of "
                             f"{format_bytes(self.cap_bytes)} (raise it with --max-memory)")


def make_budget(max_memory: Optional[str] = None, available_bytes: Optional[int] = None) -> MemoryBudget:
    """Budget from `--max-memory` (a size) or a quarter of available memory."""
    available = available_bytes if available_bytes is not None else psutil.virtual_memory().available
    if max_memory is None:
        return MemoryBudget(int(available * DEFAULT_FRACTION), available)
    cap = parse_size(max_memory, "--max-memory")
    if cap > available:
        raise InputError(f"--max-memory {max_memory} is above the memory available now "
                         f"({format_bytes(available)})")
    return MemoryBudget(cap, available)
