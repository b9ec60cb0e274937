"""Which figures of a run are ceilings, and the identity that matches one ceiling across runs."""

from __future__ import annotations

import fnmatch
from dataclasses import dataclass
from typing import Iterable, Optional, Sequence, TypeVar

from eaves.ceilings import KERNELS, level_key
from eaves.records import Figure, FigureSummary

F = TypeVar("F", Figure, FigureSummary)  # a stored figure with or without its samples

# Suites whose figures are ceilings (the sweep is every working-set point: a curve, not a ceiling).
CEILING_SUITES = ("memory", "latency", "stride", "gather", "scaling", "clock", "compute", "gemm")
# Suites whose variant is how the figure was reached, not what it is: the best one stands for all.
BEST_OF_VARIANTS = ("memory", "compute", "gemm")
# The dtype a suite always measures in: names leave it out; any other dtype is named.
USUAL_DTYPE = {"memory": "fp64", "latency": "int64", "stride": "fp64", "gather": "fp64", "scaling": "fp64"}


@dataclass(frozen=True)
class MetricKey:
    """What a figure measures, independent of the run: equal keys are comparable figures."""

    suite: str
    kernel: str
    variant: Optional[str]
    dtype: str
    threads: int
    cache_level: Optional[str]
    stride_elems: Optional[int]
    shape: Optional[str]

    def name(self) -> str:
        """A short stable name, also what `--metric` patterns match."""
        parts = [self.suite, self.kernel]
        if self.cache_level:
            parts.append(self.cache_level)
        if self.stride_elems is not None:
            parts.append(f"stride{self.stride_elems}")
        if self.shape:
            parts.append(self.shape)
        if USUAL_DTYPE.get(self.suite) != self.dtype:
            parts.append(self.dtype)
        if self.variant:
            parts.append(self.variant)
        return "/".join(parts) + f"/{self.threads}t"

    def sort_key(self) -> tuple[object, ...]:
        """Table order: suite, level, threads, kernel, then the rest."""
        return (CEILING_SUITES.index(self.suite) if self.suite in CEILING_SUITES else 99,
                level_key(self.cache_level), self.threads,
                KERNELS.index(self.kernel) if self.kernel in KERNELS else 9, self.kernel, self.dtype,
                self.stride_elems or 0, self.shape or "", self.variant or "")


def lower_is_better(unit: str) -> bool:
    """Latency and time: lower is better; every rate: higher is better."""
    return unit in ("ns_per_load", "seconds")


def key_of(f: Figure | FigureSummary) -> MetricKey:
    """The identity of a figure across runs (variants that only say how a ceiling was reached left out)."""
    variant = None if f.suite in BEST_OF_VARIANTS else f.variant
    return MetricKey(f.suite, f.kernel, variant, f.dtype, f.threads, f.cache_level, f.stride_elems, f.shape)


def ceiling_figures(figures: Iterable[F]) -> dict[MetricKey, F]:
    """Every ceiling figure of a run by its key; where several figures share a key (variants of a
    memory kernel, multiply-add kernels), the one with the best median, as the ceiling tables pick.
    Works on anything with a figure's identity fields, `unit` and `median` (Figure, FigureSummary)."""
    best: dict[MetricKey, tuple[float, F]] = {}
    for f in figures:
        if f.suite not in CEILING_SUITES or (f.suite == "memory" and not f.cache_level):
            continue
        k, value = key_of(f), f.median
        old = best.get(k)
        if old is None or (value < old[0] if lower_is_better(f.unit) else value > old[0]):
            best[k] = (value, f)
    return {k: best[k][1] for k in sorted(best, key=MetricKey.sort_key)}


def matches(key: MetricKey, patterns: Optional[Sequence[str]]) -> bool:
    """True if no pattern is given, or the key's name matches one (shell wildcards, or a substring)."""
    if not patterns:
        return True
    name = key.name().lower()
    return any(fnmatch.fnmatch(name, p.lower()) or p.lower() in name for p in patterns)
