"""Typed records that cross module boundaries: what a run measured, ready to store or show."""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass, field
from typing import Any, Optional

# Unit-named figure columns; a measurement fills exactly one of them.
FIGURE_UNITS = ("bytes_per_s", "ops_per_s", "ns_per_load", "hz")


@dataclass(frozen=True)
class Figure:
    """One measured figure: which kernel, under what conditions, and its samples."""

    suite: str
    kernel: str
    dtype: str
    threads: int
    unit: str  # one of FIGURE_UNITS
    samples: tuple[float, ...]  # in `unit`, one per sample
    repetitions: int
    min_seconds: float
    working_set_bytes: Optional[int] = None
    cache_level: Optional[str] = None
    stride_elems: Optional[int] = None
    shape: Optional[str] = None
    variant: Optional[str] = None
    extra: dict[str, Any] = field(default_factory=dict)

    @property
    def median(self) -> float:
        s = sorted(self.samples)
        mid = len(s) // 2
        return s[mid] if len(s) % 2 else 0.5 * (s[mid - 1] + s[mid])

    @property
    def best(self) -> float:
        """Best sample: highest rate, or lowest latency."""
        return min(self.samples) if self.unit == "ns_per_load" else max(self.samples)


@dataclass(frozen=True)
class PlacedLayer:
    """One layer placed under a roof (filled by the analyzer)."""

    layer: str
    kind: str
    dtype: str
    threads: int
    batch: Optional[int]
    seconds: float
    samples: tuple[float, ...]
    flops: float
    bytes: float
    flops_per_byte: float
    flops_per_s: float
    bytes_per_s: float
    attainable_flops_per_s: float
    efficiency: float
    bound: str
    roof: str
    extra: dict[str, Any] = field(default_factory=dict)


@dataclass(frozen=True)
class StepFailure:
    """A measurement that gave no figure: which step (its progress label and identity) and why."""

    label: str  # e.g. "sweep read 64 KiB x1"
    reason: str  # e.g. "no result within 40 s", "killed by SIGILL (an instruction this CPU lacks)"
    what: dict[str, Any] = field(default_factory=dict)  # suite, kernel, threads, working_set_bytes ...

    def to_dict(self) -> dict[str, Any]:
        return {"label": self.label, "reason": self.reason, **{k: v for k, v in self.what.items()
                                                               if k not in ("label", "reason")}}


@dataclass
class RunRecord:
    """A run as the harness builds it; stored in one transaction when it ends."""

    host_key: str
    hostname: str
    fingerprint: str
    host_facts: dict[str, Any]
    started_at: dt.datetime
    eaves_version: str
    params: dict[str, Any]
    kind: str = "survey"
    status: str = "running"
    ended_at: Optional[dt.datetime] = None
    tag: Optional[str] = None
    note: Optional[str] = None
    git_describe: Optional[str] = None
    ceilings_run_uuid: Optional[str] = None
    uuid: Optional[str] = None
    figures: list[Figure] = field(default_factory=list)
    placements: list[PlacedLayer] = field(default_factory=list)


@dataclass(frozen=True)
class RunSummary:
    """A stored run as listed: no figures."""

    id: int
    uuid: str
    host_key: str
    hostname: str
    kind: str
    status: str
    started_at: dt.datetime
    ended_at: Optional[dt.datetime]
    tag: Optional[str]
    note: Optional[str]
    git_describe: Optional[str]
    eaves_version: str
    n_figures: int
    n_placements: int


@dataclass(frozen=True)
class StoredRun:
    """A stored run with everything it measured."""

    summary: RunSummary
    params: dict[str, Any]
    facts: dict[str, Any]
    host_facts: dict[str, Any]
    ceilings_run_uuid: Optional[str]
    figures: tuple[Figure, ...]
    placements: tuple[PlacedLayer, ...]
