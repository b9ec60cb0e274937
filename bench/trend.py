"""Drift of a host's ceilings over time: each run against the rolling baseline of the runs before it.

The baseline of a run is the median of the medians of the `window` complete survey runs before it
that measured the same ceiling. A run drifted on a ceiling when its median moved from the
baseline by at least the threshold and the ceiling's run-to-run floor (eaves.noise: learned from
the runs before it), and the rank test of its samples against the pooled samples of the baseline
runs says the move is beyond noise (eaves.compare).
"""

from __future__ import annotations

import datetime as dt
import statistics
from dataclasses import dataclass
from typing import TYPE_CHECKING, Optional, Sequence

from eaves.compare import DEFAULT_ALPHA, DEFAULT_THRESHOLD, HELD, LOST, Comparison, compare
from eaves.errors import InputError
from eaves.metrics import CEILING_SUITES, MetricKey, ceiling_figures, lower_is_better, matches
from eaves.noise import DEFAULT_NOISE_RUNS, RunNoise, default_noise, host_noise, noise_of
from eaves.records import Figure, FigureSummary, RunRef

if TYPE_CHECKING:
    from eaves.store import Store

DEFAULT_WINDOW = 5
# Fewer earlier runs than this cannot tell run-to-run variation from drift: moves are reported,
# but `survey --check` and `trend` do not fail on them (back-to-back GEMM runs on a busy 2-core
# host differed by 11-18 %, measured while writing this).
MIN_BASELINE_RUNS = 3
DEFAULT_LAST = 100  # runs shown when no --since is given: a long history stays quick to answer


@dataclass(frozen=True)
class TrendPoint:
    """One run's value of one ceiling, and how it stands against its rolling baseline."""

    run: RunRef
    median: float
    q1: float
    q3: float
    baseline: Optional[float]  # None for the first run(s): nothing before it
    comparison: Optional[Comparison]  # None without a baseline
    baseline_runs: int = 0  # how many earlier runs made the baseline

    @property
    def drifted(self) -> bool:
        """Whether the run moved from its baseline beyond noise (either way)."""
        return self.comparison is not None and self.comparison.verdict != HELD


@dataclass(frozen=True)
class MetricTrend:
    """The history of one ceiling."""

    key: MetricKey
    unit: str
    points: tuple[TrendPoint, ...]

    @property
    def latest(self) -> TrendPoint:
        """The newest run's point."""
        return self.points[-1]


@dataclass(frozen=True)
class Trend:
    """Every ceiling's history on one host."""

    host: str
    runs: tuple[RunRef, ...]
    metrics: tuple[MetricTrend, ...]
    window: int
    threshold: float
    noise_runs: int = DEFAULT_NOISE_RUNS  # the runs before each point its run-to-run noise is learned from


@dataclass(frozen=True)
class BaselineCheck:
    """A new run against its host's baseline (`eaves survey --check`)."""

    run: RunRef
    baseline_runs: tuple[RunRef, ...]
    changes: tuple[tuple[MetricKey, str, Comparison], ...]  # key, unit, comparison

    @property
    def regressions(self) -> tuple[tuple[MetricKey, str, Comparison], ...]:
        """The ceilings that got worse beyond noise."""
        return tuple(c for c in self.changes if c[2].verdict == LOST)

    @property
    def moved(self) -> tuple[tuple[MetricKey, str, Comparison], ...]:
        """The ceilings that moved beyond noise, either way."""
        return tuple(c for c in self.changes if c[2].verdict != HELD)


def _judge(baseline_medians: Sequence[float], median: float, unit: str, threshold: float,
           noise: Optional[RunNoise] = None) -> Optional[Comparison]:
    """The verdict when the threshold or the run-to-run floor alone settles it (the rank test cannot
    overturn "held"), else None: the samples must be tested."""
    baseline = statistics.median(baseline_medians)
    if abs(median - baseline) < max(threshold, noise.floor if noise else 0.0) * abs(baseline):
        return Comparison(baseline, median, (median - baseline) / baseline if baseline else 0.0, None, "threshold",
                          HELD, lower_is_better(unit), len(baseline_medians), 0, noise)
    return None


def against_baseline(history: Sequence[Figure], current: Figure, threshold: float,
                     alpha: float = DEFAULT_ALPHA, noise: Optional[RunNoise] = None) -> Optional[Comparison]:
    """`current` against the baseline made of the figures in `history` (None if empty), held to the
    run-to-run `noise` as well when given."""
    if not history:
        return None
    medians = [f.median for f in history]
    quick = _judge(medians, current.median, current.unit, threshold, noise)
    if quick is not None:
        return quick
    pooled = [x for f in history for x in f.samples]
    return compare(pooled, current.samples, lower_is_better(current.unit), threshold, alpha,
                   reference=statistics.median(medians), noise=noise)


def trend(store: Store, host: str, patterns: Optional[Sequence[str]] = None, since: Optional[dt.datetime] = None,
          window: int = DEFAULT_WINDOW, threshold: float = DEFAULT_THRESHOLD, last: Optional[int] = DEFAULT_LAST,
          alpha: float = DEFAULT_ALPHA, noise_runs: int = DEFAULT_NOISE_RUNS) -> Trend:
    """The history of each ceiling of `host` (host key or hostname), each run against its baseline,
    and against its run-to-run noise over the `noise_runs` runs before it (eaves.noise).

    Medians and quartiles come from the stored columns; samples are read only for the points whose
    move from the baseline passes the threshold and the floor, where the rank test has to decide."""
    if window < 1:
        raise InputError(f"--window: {window} must be at least 1")
    if noise_runs < 1:
        raise InputError(f"trend: noise_runs {noise_runs} must be at least 1")
    before = max(window, noise_runs)  # earlier runs needed by the first run shown
    every = store.run_history(host, "survey", last=None if since or not last else last + before)
    if since is not None:
        cut = next((i for i, r in enumerate(every) if r.started_at >= since), len(every))
    else:
        cut = max(0, len(every) - last) if last else 0
    earlier, shown = every[max(0, cut - before):cut], every[cut:]
    runs = earlier + shown
    by_run: dict[int, list[FigureSummary]] = {r.id: [] for r in runs}
    for summary in store.figure_summaries([r.id for r in runs], CEILING_SUITES):
        by_run[summary.run_id].append(summary)
    per_run = {r.id: ceiling_figures(by_run[r.id]) for r in runs}
    keys: dict[MetricKey, str] = {}
    for r in runs:
        for k, f in per_run[r.id].items():
            if k not in keys and matches(k, patterns):
                keys[k] = f.unit
    n_earlier = len(earlier)
    series = []  # per key: [(run index, figure, baseline figures, verdict or None)]
    to_test: set[int] = set()
    for k in sorted(keys, key=MetricKey.sort_key):
        seen: list[FigureSummary] = []
        rows = []
        for i, r in enumerate(runs):
            f = per_run[r.id].get(k)
            if f is None or f.unit != keys[k]:
                continue
            if i >= n_earlier:
                history = seen[-window:]
                noise = noise_of([h.median for h in seen[-noise_runs:]], k.suite)
                quick = _judge([h.median for h in history], f.median, f.unit, threshold, noise) if history else None
                if history and quick is None:
                    to_test.update([f.id, *(h.id for h in history)])
                rows.append((r, f, history, quick, noise))
            seen.append(f)
        if rows:
            series.append((k, rows))
    samples = store.samples_of(sorted(to_test)) if to_test else {}
    metrics = []
    for k, rows in series:
        points = []
        for r, f, history, cmp, noise in rows:
            if history and cmp is None:
                pooled = [x for h in history for x in samples[h.id]]
                cmp = compare(pooled, samples[f.id], lower_is_better(f.unit), threshold, alpha,
                              reference=statistics.median(h.median for h in history), noise=noise)
            points.append(TrendPoint(r, f.median, f.q1, f.q3, cmp.before if cmp else None, cmp, len(history)))
        metrics.append(MetricTrend(k, keys[k], tuple(points)))
    return Trend(host, tuple(shown), tuple(metrics), window, threshold, noise_runs)


def check_run(store: Store, run_uuid: str, window: int = DEFAULT_WINDOW, threshold: float = DEFAULT_THRESHOLD,
              alpha: float = DEFAULT_ALPHA, noise_runs: int = DEFAULT_NOISE_RUNS) -> BaselineCheck:
    """A stored survey run against the baseline of the `window` complete runs of its host before it,
    and against each ceiling's run-to-run noise over the `noise_runs` runs before it."""
    run = store.load_run(store.resolve_run(run_uuid))
    s = run.summary
    history = [r for r in store.run_history(s.host_key, "survey") if r.id != s.id and r.started_at <= s.started_at]
    earlier = history[-window:]
    figures = store.figures_of([r.id for r in earlier], CEILING_SUITES)
    past = [ceiling_figures(figures.get(r.id, ())) for r in earlier]
    noise = host_noise(store, s.host_key, "survey", noise_runs, s.started_at, exclude=(s.id,))
    changes = []
    for k, f in ceiling_figures(run.figures).items():
        seen = [p[k] for p in past if k in p and p[k].unit == f.unit]
        cmp = against_baseline(seen, f, threshold, alpha, noise.get(k) or default_noise(k.suite))
        if cmp is not None:
            changes.append((k, f.unit, cmp))
    return BaselineCheck(RunRef(s.id, s.uuid, s.started_at, s.tag), tuple(earlier), tuple(changes))
