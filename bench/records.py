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
    """One layer placed under a roof (filled by the analyzer): its counts, its rates, the roofs it was
    held against and how close it came. `extra` holds what only some placements have (items_per_s
    for a batched layer, the reason of an impossible one)."""

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
    macs: Optional[float]  # None when the layer's FLOPs were given without a shape
    where: str  # "file:line" of the layer file it came from ("" if none)
    memory_roof: str  # the level whose roof the layer is held against
    memory_roof_bytes_per_s: float
    memory_roof_kernel: str
    compute_roof: str
    compute_roof_ops_per_s: float
    ridge_flops_per_byte: float
    memory_efficiency: float  # achieved bandwidth over the memory roof
    compute_efficiency: float  # achieved FLOP/s over the compute roof
    achievable_efficiency: Optional[float]  # over the best GEMM; None where no GEMM was measured
    consistent_level: Optional[str]  # the level whose roof covers the achieved bandwidth; None if none does
    threads_measured: int  # the measured thread count of the compute roof
    threads_match: str  # exact | nearest
    memory_threads_measured: int  # the measured thread count of the memory roofs
    extra: dict[str, Any] = field(default_factory=dict)

    @property
    def working_set_bytes(self) -> float:
        """The compulsory working set: the layer's bytes."""
        return self.bytes

    @property
    def headroom(self) -> float:
        """How many times faster the layer could run at its roof."""
        return 1.0 / self.efficiency

    def to_dict(self) -> dict[str, Any]:
        """The placement as the JSON documents carry it: the counts and rates at the top, the roofs
        and efficiencies under "extra" (with what only some placements have), as since schema_version 1."""
        out = {name: getattr(self, name) for name in PLACED_TOP}
        out["extra"] = {**{name: getattr(self, name) for name in PLACED_DETAIL}, **self.extra}
        return out


# The top-level keys of a placement in the JSON documents, and the keys every placement has under its
# "extra" there, in the order they have always been written in.
PLACED_TOP = ("layer", "kind", "dtype", "threads", "batch", "seconds", "samples", "flops", "bytes",
              "flops_per_byte", "flops_per_s", "bytes_per_s", "attainable_flops_per_s", "efficiency",
              "bound", "roof")
PLACED_DETAIL = ("macs", "where", "working_set_bytes", "memory_roof", "memory_roof_bytes_per_s",
                 "memory_roof_kernel", "compute_roof", "compute_roof_ops_per_s", "ridge_flops_per_byte",
                 "memory_efficiency", "compute_efficiency", "achievable_efficiency", "headroom",
                 "consistent_level", "threads_measured", "threads_match", "memory_threads_measured")


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


@dataclass(frozen=True)
class HostSummary:
    """A host of a store as listed: its key and name, how many runs it has, and when the last started."""

    host_key: str
    hostname: str
    runs: int
    last_run: Optional[dt.datetime]
    fingerprint: str = ""  # the hardware fingerprint (eaves.host.HostFacts.fingerprint)
    first_seen: Optional[dt.datetime] = None  # when the store first saw this host


@dataclass(frozen=True)
class RunRef:
    """A run in a history: enough to label a point."""

    id: int
    uuid: str
    started_at: dt.datetime
    tag: Optional[str]


@dataclass(frozen=True)
class FigureSummary:
    """A stored figure without its samples: enough to follow a long history quickly."""

    id: int
    run_id: int
    suite: str
    kernel: str
    variant: Optional[str]
    dtype: str
    threads: int
    cache_level: Optional[str]
    stride_elems: Optional[int]
    shape: Optional[str]
    unit: str
    median: float
    q1: float
    q3: float


@dataclass(frozen=True)
class LayerTime:
    """One placed layer's median time in a stored run: what a layer's run-to-run noise is learned from."""

    run_id: int
    layer: str
    seconds: float
