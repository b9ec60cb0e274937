"""Drift of a host's ceilings over time: each run against the rolling baseline of the runs before it.

The baseline of a run is the median of the medians of the `window` complete survey runs before it
that measured the same ceiling. A run drifted on a ceiling when its median moved from the
baseline by at least the threshold and the rank test of its samples against the pooled samples
of the baseline runs says the move is beyond noise (eaves.compare).
"""

from __future__ import annotations

import datetime as dt
import statistics
from dataclasses import dataclass
from typing import Optional, Sequence

from eaves.compare import DEFAULT_ALPHA, DEFAULT_THRESHOLD, NOISE, SLOWER, Comparison, compare
from eaves.errors import InputError
from eaves.metrics import CEILING_SUITES, MetricKey, ceiling_figures, lower_is_better, matches
from eaves.records import Figure

DEFAULT_WINDOW = 5
DEFAULT_LAST = 200  # runs shown when no --since is given: a long history stays quick to answer


@dataclass(frozen=True)
class RunRef:
    """A run in a history: enough to label a point."""

    id: int
    uuid: str
    started_at: dt.datetime
    tag: Optional[str]


@dataclass(frozen=True)
class TrendPoint:
    """One run's value of one ceiling, and how it stands against its rolling baseline."""

    run: RunRef
    median: float
    q1: float
    q3: float
    baseline: Optional[float]  # None for the first run(s): nothing before it
    comparison: Optional[Comparison]  # None without a baseline

    @property
    def drifted(self) -> bool:
        return self.comparison is not None and self.comparison.verdict != NOISE


@dataclass(frozen=True)
class MetricTrend:
    """The history of one ceiling."""

    key: MetricKey
    unit: str
    points: tuple[TrendPoint, ...]

    @property
    def latest(self) -> TrendPoint:
        return self.points[-1]


@dataclass(frozen=True)
class Trend:
    """Every ceiling's history on one host."""

    host: str
    runs: tuple[RunRef, ...]
    metrics: tuple[MetricTrend, ...]
    window: int
    threshold: float


@dataclass(frozen=True)
class BaselineCheck:
    """A new run against its host's baseline (`eaves survey --check`)."""

    run: RunRef
    baseline_runs: tuple[RunRef, ...]
    changes: tuple[tuple[MetricKey, str, Comparison], ...]  # key, unit, comparison

    @property
    def regressions(self) -> tuple[tuple[MetricKey, str, Comparison], ...]:
        return tuple(c for c in self.changes if c[2].verdict == SLOWER)

    @property
    def moved(self) -> tuple[tuple[MetricKey, str, Comparison], ...]:
        return tuple(c for c in self.changes if c[2].verdict != NOISE)


def _quartiles(samples: Sequence[float]) -> tuple[float, float]:
    s = sorted(samples)
    if len(s) < 2:
        return s[0], s[0]
    q = statistics.quantiles(s, n=4, method="inclusive")
    return q[0], q[2]


def against_baseline(history: Sequence[Figure], current: Figure, threshold: float,
                     alpha: float = DEFAULT_ALPHA) -> Optional[Comparison]:
    """`current` against the baseline made of the figures in `history` (None if empty)."""
    if not history:
        return None
    baseline = statistics.median(f.median for f in history)
    pooled = [x for f in history for x in f.samples]
    lower = lower_is_better(current.unit)
    if abs(current.median - baseline) < threshold * abs(baseline):  # cheap: the test cannot overturn this
        return Comparison(baseline, current.median, (current.median - baseline) / baseline if baseline else 0.0,
                          None, "threshold", NOISE, lower, len(pooled), len(current.samples))
    return compare(pooled, current.samples, lower, threshold, alpha, reference=baseline)


def trend(store, host: str, patterns: Optional[Sequence[str]] = None, since: Optional[dt.datetime] = None,
          window: int = DEFAULT_WINDOW, threshold: float = DEFAULT_THRESHOLD, last: Optional[int] = DEFAULT_LAST,
          alpha: float = DEFAULT_ALPHA) -> Trend:
    """The history of each ceiling of `host` (host key or hostname), each run against its baseline."""
    if window < 1:
        raise InputError(f"--window: {window} must be at least 1")
    every = store.run_history(host, "survey", last=None if since or not last else last + window)
    if since is not None:
        cut = next((i for i, r in enumerate(every) if r[2] >= since), len(every))
    else:
        cut = max(0, len(every) - last) if last else 0
    earlier, shown = every[max(0, cut - window):cut], every[cut:]
    runs = [RunRef(*r) for r in earlier + shown]
    figures = store.figures_of([r.id for r in runs], CEILING_SUITES)
    per_run = {r.id: ceiling_figures(figures.get(r.id, ())) for r in runs}
    keys: dict[MetricKey, str] = {}
    for r in runs:
        for k, f in per_run[r.id].items():
            if k not in keys and matches(k, patterns):
                keys[k] = f.unit
    n_earlier = len(earlier)
    metrics = []
    for k in sorted(keys, key=MetricKey.sort_key):
        seen: list[Figure] = []
        points = []
        for i, r in enumerate(runs):
            f = per_run[r.id].get(k)
            if f is None or f.unit != keys[k]:
                continue
            cmp = against_baseline(seen[-window:], f, threshold, alpha)
            if i >= n_earlier:
                q1, q3 = _quartiles(f.samples)
                points.append(TrendPoint(r, f.median, q1, q3, cmp.before if cmp else None, cmp))
            seen.append(f)
        if points:
            metrics.append(MetricTrend(k, keys[k], tuple(points)))
    return Trend(host, tuple(RunRef(*r) for r in shown), tuple(metrics), window, threshold)


def check_run(store, run_uuid: str, window: int = DEFAULT_WINDOW, threshold: float = DEFAULT_THRESHOLD,
              alpha: float = DEFAULT_ALPHA) -> BaselineCheck:
    """A stored survey run against the baseline of the `window` complete runs of its host before it."""
    run = store.load_run(store.resolve_run(run_uuid))
    s = run.summary
    history = [r for r in store.run_history(s.host_key, "survey") if r[0] != s.id and r[2] <= s.started_at]
    earlier = [RunRef(*r) for r in history[-window:]]
    figures = store.figures_of([r.id for r in earlier], CEILING_SUITES)
    past = [ceiling_figures(figures.get(r.id, ())) for r in earlier]
    changes = []
    for k, f in ceiling_figures(run.figures).items():
        seen = [p[k] for p in past if k in p and p[k].unit == f.unit]
        cmp = against_baseline(seen, f, threshold, alpha)
        if cmp is not None:
            changes.append((k, f.unit, cmp))
    return BaselineCheck(RunRef(s.id, s.uuid, s.started_at, s.tag), tuple(earlier), tuple(changes))
