"""The roofline model of a host, built from the figures of one stored survey run.

Memory roofs: per cache level and thread count, the highest median bandwidth among the read,
write, copy and axpy kernels. Compute roofs: per dtype and thread count, the multiply-add peak
("peak") and the best GEMM ("achievable"). Ridge points are compute roof / memory roof, in
operations per byte. Attainable performance follows Williams, Waterman and Patterson,
"Roofline: an insightful visual performance model for multicore architectures", CACM 2009:
attainable = min(compute roof, operational intensity x memory roof).

Thread counts: a layer's thread count is matched to the measured count equal to it, else to
the nearest measured count (on a tie, the larger one, whose roof is higher, so that a layer is
never flagged impossible only because the survey skipped its thread count). The match is
reported beside every placement.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING, Any, Iterable, Optional

from eaves.errors import InputError, StoreError
from eaves.records import Figure

if TYPE_CHECKING:
    from eaves.store import Store

LEVELS = ("L1", "L2", "L3", "DRAM")  # fastest first
MEMORY_KERNELS = ("read", "write", "copy", "axpy")


@dataclass(frozen=True)
class Roof:
    """One ceiling: a bandwidth (memory) or an operation rate (compute) at one thread count."""

    name: str  # "L2", "fp32 peak", "fp32 achievable"
    side: str  # "memory" | "compute"
    threads: int
    value: float  # bytes_per_s for memory, ops_per_s for compute
    kernel: str  # the kernel whose median set the roof
    level: Optional[str] = None  # memory roofs
    dtype: Optional[str] = None  # compute roofs
    source: Optional[str] = None  # compute roofs: "peak" | "achievable"
    capacity_bytes: Optional[int] = None  # memory roofs: the largest working set that level holds
    detail: Optional[str] = None  # variant or GEMM shape


@dataclass(frozen=True)
class Ridge:
    """Machine balance of one memory/compute pair: below it a layer is memory-bound."""

    memory: str
    compute: str
    threads: int
    flops_per_byte: float


@dataclass(frozen=True)
class ThreadMatch:
    """Which measured thread count stands in for a layer's."""

    requested: int
    measured: int

    @property
    def how(self) -> str:
        """"exact" or "nearest"."""
        return "exact" if self.requested == self.measured else "nearest"


@dataclass(frozen=True)
class HostModel:
    """Every roof and ridge of one host as measured by one run."""

    run_uuid: str
    host_key: str
    memory: tuple[Roof, ...]
    compute: tuple[Roof, ...]
    ridges: tuple[Ridge, ...]

    def thread_counts(self, side: str = "memory", dtype: Optional[str] = None) -> list[int]:
        """The thread counts measured on one side (compute: of one dtype), ascending."""
        roofs = self.memory if side == "memory" else [r for r in self.compute if r.dtype == dtype]
        return sorted({r.threads for r in roofs})

    def dtypes(self) -> list[str]:
        """Every dtype with a compute roof."""
        return sorted({r.dtype for r in self.compute if r.dtype})

    def match_threads(self, threads: int, side: str = "memory", dtype: Optional[str] = None) -> Optional[ThreadMatch]:
        """The measured thread count used for `threads`: exact, else nearest (tie: the larger)."""
        counts = self.thread_counts(side, dtype)
        if not counts:
            return None
        best = min(counts, key=lambda n: (abs(n - threads), -n))
        return ThreadMatch(threads, best)

    def memory_roofs(self, threads: int) -> list[Roof]:
        """Memory roofs at the measured thread count matched to `threads`, fastest level first."""
        match = self.match_threads(threads)
        if match is None:
            return []
        roofs = [r for r in self.memory if r.threads == match.measured]
        return sorted(roofs, key=lambda r: LEVELS.index(r.level))

    def compute_roof(self, dtype: str, threads: int, source: str = "peak") -> Optional[Roof]:
        """The compute roof of a dtype at the matched thread count; None if not measured."""
        match = self.match_threads(threads, "compute", dtype)
        if match is None:
            return None
        return next((r for r in self.compute if r.dtype == dtype and r.threads == match.measured
                     and r.source == source), None)


def attainable(intensity: float, compute_roof: float, memory_roof: float) -> float:
    """Attainable ops/s = min(compute roof, intensity x memory roof) (Williams et al., CACM 2009)."""
    return min(compute_roof, intensity * memory_roof)


def _best(figures: Iterable[tuple[Figure, tuple[Any, ...]]]) -> dict[tuple[Any, ...], Figure]:
    best: dict[tuple[Any, ...], Figure] = {}
    for f, key in figures:
        if key not in best or f.median > best[key].median:
            best[key] = f
    return best


def model_from_figures(figures: Iterable[Figure], run_uuid: str, host_key: str,
                       host_facts: Optional[dict[str, Any]] = None) -> HostModel:
    """Build the model from a run's figures; cache capacities come from `host_facts` when given."""
    figures = list(figures)
    mem = _best((f, (f.cache_level, f.threads)) for f in figures
                if f.suite == "memory" and f.kernel in MEMORY_KERNELS and f.cache_level in LEVELS
                and f.unit == "bytes_per_s" and f.samples)
    measured_ws: dict[str, int] = {}  # fallback capacity: the largest working set measured at a level
    for f in figures:
        if f.suite == "memory" and f.cache_level in LEVELS and f.working_set_bytes:
            measured_ws[f.cache_level] = max(measured_ws.get(f.cache_level, 0), f.working_set_bytes)

    def capacity(level: str, threads: int) -> Optional[int]:
        if level == "DRAM":
            return None
        return capacities_from_facts(host_facts or {}, threads).get(level) or measured_ws.get(level)

    memory = tuple(Roof(level, "memory", t, f.median, f.kernel, level=level,
                        capacity_bytes=capacity(level, t), detail=f.variant)
                   for (level, t), f in sorted(mem.items(), key=lambda kv: (kv[0][1], LEVELS.index(kv[0][0]))))
    peak = _best((f, (f.dtype, f.threads)) for f in figures
                 if f.suite == "compute" and f.kernel == "madd-peak" and f.unit == "ops_per_s" and f.samples)
    gemm = _best((f, (f.dtype, f.threads)) for f in figures
                 if f.suite == "gemm" and f.unit == "ops_per_s" and f.samples)
    compute = tuple(
        [Roof(f"{d} peak", "compute", t, f.median, f.kernel, dtype=d, source="peak",
              detail="native" if f.extra.get("native", True) else "emulated") for (d, t), f in sorted(peak.items())]
        + [Roof(f"{d} achievable", "compute", t, f.median, f.kernel, dtype=d, source="achievable", detail=f.shape)
           for (d, t), f in sorted(gemm.items())])
    ridges = tuple(Ridge(m.name, c.name, c.threads, c.value / m.value)
                   for c in compute for m in memory if m.threads == c.threads and m.value > 0)
    return HostModel(run_uuid, host_key, memory, compute, ridges)


def capacities_from_facts(host_facts: dict[str, Any], threads: int = 1) -> dict[str, int]:
    """Bytes each cache level holds for `threads` threads, from the stored host facts' caches."""
    out: dict[str, int] = {}
    for c in host_facts.get("caches") or []:
        if c.get("kind") == "instruction" or not c.get("size_bytes") or c.get("level") not in (1, 2, 3):
            continue
        shared = c.get("shared_cpus") or 1
        instances = c.get("instances") or 1
        used = min(instances, max(1, -(-threads // shared)))
        out[f"L{c['level']}"] = int(c["size_bytes"]) * used
    return out


def model_from_store(store: Store, run_ref: Optional[str] = None, host: Optional[str] = None) -> HostModel:
    """The model of a stored run: `run_ref` (id, UUID or prefix), else the newest complete survey of `host`."""
    if run_ref:
        run_id = store.resolve_run(run_ref)
    else:
        if host is None:
            from eaves.host import collect_host_facts

            host = collect_host_facts().host_key()
        run_id = store.latest_complete_run(host=host, kind="survey")
        if run_id is None:
            raise StoreError(f"no complete survey run of host {host} in {store.shown_url}: "
                             "run `eaves survey` first or pass --run", exit_code=2)
    run = store.load_run(run_id)
    model = model_from_figures(run.figures, run.summary.uuid, run.summary.host_key, run.host_facts or run.facts)
    if not model.memory:
        raise InputError(f"run {run.summary.uuid[:8]}: no memory ceilings (suite 'memory') to place layers under")
    if not model.compute:
        raise InputError(f"run {run.summary.uuid[:8]}: no compute ceilings (suites 'compute', 'gemm')")
    return model
