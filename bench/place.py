"""Place timed layers under a host's roofs: where each sits, what bounds it, how much is left.

The memory roof a layer is held against is the fastest level whose capacity holds its compulsory
working set (the layer's bytes), since a layer timed in a loop finds that data still there;
layers larger than every cache are held against DRAM. The compute roof is the dtype's
multiply-add peak (the GEMM figure when no peak was measured).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Iterable, Optional, Sequence

from eaves.errors import InputError
from eaves.layers import BATCHABLE, DTYPE_BYTES, LayerCounts, LayerSpec, count, with_batch
from eaves.records import PlacedLayer
from eaves.roofline import LEVELS, HostModel, Roof, ThreadMatch, attainable

# Roofs are medians of noisy samples: a layer up to this factor above its highest roof is
# placed (efficiency above 1); beyond it the counts, dtype or threads must be wrong.
IMPOSSIBLE_SLACK = 1.10
DEFAULT_BATCHES = (1, 2, 4, 8, 16, 32, 64, 128, 256)


@dataclass(frozen=True)
class RoofSet:
    """The roofs that apply to one (dtype, threads) pair."""

    memory: tuple[Roof, ...]  # fastest level first
    compute: Roof  # peak, else achievable
    achievable: Optional[Roof]
    memory_match: ThreadMatch
    compute_match: ThreadMatch


@dataclass(frozen=True)
class Ceiling:
    """The roof over one layer's counts: which memory level, which compute roof, what is attainable."""

    memory: Roof
    compute: Roof
    attainable_flops_per_s: float
    bound: str  # memory | compute
    ridge_flops_per_byte: float


@dataclass(frozen=True)
class Projection:
    """A layer's counts and roof at another dtype (no time: only where it would move)."""

    layer: str
    dtype: str
    as_dtype: str
    flops: float
    bytes: float
    as_bytes: float
    flops_per_byte: float
    as_flops_per_byte: float
    attainable_flops_per_s: float
    as_attainable_flops_per_s: float
    as_bound: str
    as_roof: str
    as_seconds_at_roof: float


@dataclass(frozen=True)
class BatchPoint:
    """One batch size of a dense or attention layer at its roof: latency and throughput."""

    batch: int
    flops: float
    bytes: float
    flops_per_byte: float
    attainable_flops_per_s: float
    bound: str
    latency_seconds: float  # at the roof
    items_per_s: float  # batch / latency


class Placer:
    """Places layers under one model, resolving each (dtype, threads) pair's roofs once."""

    def __init__(self, model: HostModel) -> None:
        self.model = model
        self._cache: dict[tuple[str, int], Optional[RoofSet]] = {}

    def roofs(self, dtype: str, threads: int) -> Optional[RoofSet]:
        """The roofs of a (dtype, threads) pair; None when the model has no compute roof for the dtype."""
        key = (dtype, threads)
        if key not in self._cache:
            self._cache[key] = self._resolve(dtype, threads)
        return self._cache[key]

    def _resolve(self, dtype: str, threads: int) -> Optional[RoofSet]:
        m = self.model
        peak = m.compute_roof(dtype, threads, "peak")
        best = m.compute_roof(dtype, threads, "achievable")
        memory = m.memory_roofs(threads)
        if (peak or best) is None or not memory:
            return None
        return RoofSet(tuple(memory), peak or best, best, m.match_threads(threads),
                       m.match_threads(threads, "compute", dtype))

    def missing(self, specs: Iterable[LayerSpec], dtype: Optional[str] = None) -> list[str]:
        """One line per layer whose dtype (or `dtype`) has no compute roof in the model."""
        have = ", ".join(self.model.dtypes()) or "none"
        lines = []
        for s in specs:
            d = dtype or s.dtype
            if self.roofs(d, s.threads) is None:
                field = "--as-dtype" if dtype else "dtype"
                lines.append(f"{s.where or s.name}: {field}: no compute ceilings for {d} in run "
                             f"{self.model.run_uuid[:8]} (measured: {have})")
        return lines

    def ceiling(self, counts: LayerCounts, roofs: RoofSet) -> Ceiling:
        """The memory level holding the working set, and attainable = min(compute, I x bandwidth)."""
        fit = next((r for r in roofs.memory if r.capacity_bytes and counts.bytes <= r.capacity_bytes),
                   roofs.memory[-1])
        intensity = counts.flops / counts.bytes
        ridge = roofs.compute.value / fit.value
        return Ceiling(fit, roofs.compute, attainable(intensity, roofs.compute.value, fit.value),
                       "memory" if intensity < ridge else "compute", ridge)

    def place(self, spec: LayerSpec) -> PlacedLayer:
        """One layer's placement; raises InputError if its dtype has no compute roof."""
        roofs = self.roofs(spec.dtype, spec.threads)
        if roofs is None:
            raise InputError(self.missing([spec])[0])
        counts = count(spec)
        c = self.ceiling(counts, roofs)
        seconds = spec.median_seconds
        flops_per_s, bytes_per_s = counts.flops / seconds, counts.bytes / seconds
        memory_eff = bytes_per_s / c.memory.value
        compute_eff = flops_per_s / c.compute.value
        efficiency = flops_per_s / c.attainable_flops_per_s if counts.flops else memory_eff
        intensity = counts.flops / counts.bytes
        fastest = roofs.memory[0]
        top = max(roofs.compute.value, roofs.achievable.value if roofs.achievable else 0.0)
        bound, roof, reason = c.bound, (c.memory if c.bound == "memory" else c.compute).name, None
        if counts.flops:
            ceiling_max = attainable(intensity, top, fastest.value)
            over = flops_per_s > IMPOSSIBLE_SLACK * ceiling_max
        else:
            ceiling_max = fastest.value
            over = bytes_per_s > IMPOSSIBLE_SLACK * ceiling_max
        if over:
            bound, roof = "impossible", "none"
            reason = (f"achieved {flops_per_s if counts.flops else bytes_per_s:.4g} "
                      f"{'FLOP/s' if counts.flops else 'B/s'} is above every roof of {spec.dtype} at "
                      f"{roofs.compute_match.measured} threads ({ceiling_max:.4g}): check the counts, dtype or threads")
        extra: dict[str, Any] = {}
        if spec.batch:
            extra["items_per_s"] = spec.batch / seconds  # throughput = batch / latency (common practice)
        if reason:
            extra["reason"] = reason
        return PlacedLayer(layer=spec.name, kind=spec.kind, dtype=spec.dtype, threads=spec.threads,
                           batch=spec.batch, seconds=seconds, samples=tuple(spec.seconds),
                           flops=counts.flops, bytes=counts.bytes, flops_per_byte=intensity,
                           flops_per_s=flops_per_s, bytes_per_s=bytes_per_s,
                           attainable_flops_per_s=c.attainable_flops_per_s, efficiency=efficiency,
                           bound=bound, roof=roof, macs=counts.macs, where=spec.where,
                           memory_roof=c.memory.name, memory_roof_bytes_per_s=c.memory.value,
                           memory_roof_kernel=c.memory.kernel, compute_roof=c.compute.name,
                           compute_roof_ops_per_s=c.compute.value, ridge_flops_per_byte=c.ridge_flops_per_byte,
                           memory_efficiency=memory_eff, compute_efficiency=compute_eff,
                           achievable_efficiency=flops_per_s / roofs.achievable.value if roofs.achievable else None,
                           consistent_level=_consistent_level(c.memory, roofs, bytes_per_s),
                           threads_measured=roofs.compute_match.measured, threads_match=roofs.compute_match.how,
                           memory_threads_measured=roofs.memory_match.measured, extra=extra)

    def project(self, spec: LayerSpec, dtype: str) -> Projection:
        """Where the layer would move at another dtype: bytes, intensity and compute roof recomputed."""
        here, there = self.roofs(spec.dtype, spec.threads), self.roofs(dtype, spec.threads)
        if here is None or there is None:
            raise InputError(self.missing([spec], None if here is None else dtype)[0])
        now, then = count(spec), count(spec, dtype)
        c_now, c_then = self.ceiling(now, here), self.ceiling(then, there)
        return Projection(spec.name, spec.dtype, dtype, now.flops, now.bytes, then.bytes,
                          now.flops / now.bytes, then.flops / then.bytes, c_now.attainable_flops_per_s,
                          c_then.attainable_flops_per_s, c_then.bound,
                          (c_then.memory if c_then.bound == "memory" else c_then.compute).name,
                          then.flops / c_then.attainable_flops_per_s if then.flops else
                          then.bytes / c_then.memory.value)

    def batch_curve(self, spec: LayerSpec, batches: Sequence[int] = DEFAULT_BATCHES) -> tuple[BatchPoint, ...]:
        """Intensity, attainable rate, latency and throughput at the roof for each batch size."""
        if spec.kind not in BATCHABLE:
            raise InputError(f"{spec.where or spec.name}: kind: {spec.kind} has no batch axis (only {', '.join(BATCHABLE)})")
        roofs = self.roofs(spec.dtype, spec.threads)
        if roofs is None:
            raise InputError(self.missing([spec])[0])
        points = []
        for b in batches:
            counts = count(with_batch(spec, b))
            c = self.ceiling(counts, roofs)
            latency = counts.flops / c.attainable_flops_per_s
            points.append(BatchPoint(b, counts.flops, counts.bytes, counts.flops / counts.bytes,
                                     c.attainable_flops_per_s, c.bound, latency, b / latency))
        return tuple(points)


def _consistent_level(fit: Roof, roofs: RoofSet, bytes_per_s: float) -> Optional[str]:
    """The level the working set fits in, if its roof covers the achieved bandwidth; else the
    slowest faster level whose roof does (traffic below the compulsory count); None if none does."""
    if bytes_per_s <= fit.value:
        return fit.level
    faster = [r for r in roofs.memory if LEVELS.index(r.level) < LEVELS.index(fit.level)]
    covering = [r for r in faster if r.value >= bytes_per_s]
    return covering[-1].level if covering else None


def place_layers(specs: Sequence[LayerSpec], model: HostModel) -> list[PlacedLayer]:
    """Place every layer; if any dtype lacks a compute roof, one InputError lists them all."""
    placer = Placer(model)
    missing = placer.missing(specs)
    if missing:
        raise InputError("\n".join(missing))
    return [placer.place(s) for s in specs]


def as_dtype(specs: Sequence[LayerSpec], model: HostModel, dtype: str) -> list[Projection]:
    """Every layer projected to `dtype` (int8 moves 4x fewer bytes than fp32 for the same FLOPs)."""
    if dtype not in DTYPE_BYTES:
        raise InputError(f"--as-dtype: unknown dtype {dtype!r} (known: {', '.join(DTYPE_BYTES)})")
    placer = Placer(model)
    missing = placer.missing(specs, dtype)
    if missing:
        raise InputError("\n".join(missing))
    return [placer.project(s, dtype) for s in specs]
