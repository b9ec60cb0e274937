"""Run-to-run noise: how far a figure's median moves from one complete run of a host to the next.

The samples of one run only show the noise inside that run. Between runs (another boot, another
page placement, a neighbour on a shared VM) a figure moves much further, so a change between runs
counts only beyond a floor learned from the host's own history (`source="history"`, once the figure
is in at least MIN_HISTORY_RUNS of the host's last k complete runs of that kind), else beyond a
per-suite default (`source="default"`). eaves.compare applies it: a change counts when the rank
test rejects and |change| >= max(practical threshold, floor).

The spread is the median absolute relative change between the medians of consecutive runs (oldest
first), the same quantity a diff reports as "change" and the one the reproducibility figures of
issue 11 are quoted in. It is used rather than the median absolute deviation of the medians
because it is not inflated by a slow drift or one step inside the window (one large change is one
of k - 1), and because with few runs it is far steadier: at k = 3 the deviation from the median
has one zero term by construction (seeded trials in tests/test_noise.py). floor = NOISE_MULTIPLE x spread.
"""

from __future__ import annotations

import datetime as dt
import statistics
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any, Iterable, Mapping, Optional, Sequence

from eaves.metrics import CEILING_SUITES, MetricKey, ceiling_figures
from eaves.records import Figure, FigureSummary

if TYPE_CHECKING:
    from eaves.store import Store

# The multiple of the spread beyond which a change between two runs counts. For normal run-to-run
# noise of relative spread s the change between two runs is N(0, 2 s^2); its median absolute value
# is 0.6745 x sqrt(2) x s = 0.954 s (0.6745: the normal distribution's upper quartile, a published
# table value). With the spread known, 3x would flag 4.3 % of unchanged figures; learned from only a
# few runs the estimate wobbles and fattens that tail. Seeded normal-noise trials (tests/test_noise.py)
# flag 9-11 % at 3x; at 4.5x, 4.7 % with the shortest history (3 runs) and 2.7 % with 10: the
# smallest half-step multiple that keeps a diff of two unchanged runs under issue 11's target of
# 5 % of figures flagged for every history allowed.
NOISE_MULTIPLE = 4.5
MIN_HISTORY_RUNS = 3  # fewer runs cannot tell a figure's run-to-run spread (issue 11: k at least 3)
DEFAULT_NOISE_RUNS = 10  # k: the newest complete runs the spread is learned from

# Default spreads per suite (median absolute change between consecutive runs, a fraction), used until
# a figure has MIN_HISTORY_RUNS runs. Memory suites: measured by tests/benchmarks/reproducibility.py,
# 10 back-to-back `survey --quick --only memory` on a 2-vCPU AMD EPYC (Zen 3) KVM guest, 2026-12-02:
# the median over each suite's figures of their run-to-run median |change| (memory 8.5 %, latency
# 15.3 %, stride 12.9 %, gather 13.3 %, scaling 11.4 %; the C loops' own 10.4 % on the figures both
# measure). sweep points are taken like the memory ceilings. Not yet measured by the script (provisional):
# clock and compute run from registers, 5 % (the low end of the C loops' spread in the issue's report);
# gemm 15 %, in line with the 11-18 % back-to-back GEMM moves noted in eaves.trend.
DEFAULT_SPREAD = {"sweep": 0.085, "memory": 0.085, "latency": 0.153, "stride": 0.129, "gather": 0.133,
                  "scaling": 0.114, "clock": 0.05, "compute": 0.05, "gemm": 0.15, "layers": 0.01}
# Layer timings (the gate): measured by tests/benchmarks/layer_noise.py, 10 back-to-back `place --builtin
# --quick` on the 2-vCPU Zen 3 KVM guest, 2026-12-03: the median over the 20 reference layers of their
# run-to-run median |change| of rate, 1.0 % (max 8.9 %, the batch-1 dense layer); `eaves gate` over the 9
# pairs failed 0 of 180 layers. Its floor (4.5 %) sits just under the gate's default --max-loss of 5 %.
LAYERS = "layers"

# The figures a run's tables lead with: bandwidth per level, latency per level, multiply-add peaks.
HEADLINE_SUITES = ("memory", "latency", "compute")


@dataclass(frozen=True)
class RunNoise:
    """A figure's run-to-run noise and where it came from."""

    spread: float  # median |relative change| between consecutive run medians (a fraction)
    source: str  # "history" (learned) | "default" (the suite's provisional figure) | "none" (no floor)
    runs: int  # runs of the history that had the figure (fewer than MIN_HISTORY_RUNS unless "history")

    @property
    def floor(self) -> float:
        """The smallest change between runs that counts (a fraction)."""
        return NOISE_MULTIPLE * self.spread


def spread_of(medians: Sequence[float]) -> Optional[float]:
    """Median |m[i+1] / m[i] - 1| over consecutive medians (oldest first); None below MIN_HISTORY_RUNS."""
    if len(medians) < MIN_HISTORY_RUNS:
        return None
    changes = [abs(b - a) / abs(a) for a, b in zip(medians, medians[1:]) if a]
    return statistics.median(changes) if changes else None


def default_noise(suite: str, runs: int = 0) -> RunNoise:
    """The suite's provisional default (or no floor where there is none), noting the runs there were."""
    if suite in DEFAULT_SPREAD:
        return RunNoise(DEFAULT_SPREAD[suite], "default", runs)
    return RunNoise(0.0, "none", runs)


def noise_of(medians: Sequence[float], suite: str) -> RunNoise:
    """Learned from the medians when there are enough of them, else the suite's default."""
    spread = spread_of(medians)
    return default_noise(suite, len(medians)) if spread is None else RunNoise(spread, "history", len(medians))


def larger(a: Optional[RunNoise], b: Optional[RunNoise]) -> Optional[RunNoise]:
    """The noisier of two (either may be missing): two hosts compared are held to the larger spread."""
    if a is None or b is None:
        return a or b
    return a if a.spread >= b.spread else b


def learn(per_run: Iterable[Mapping[MetricKey, float]]) -> dict[MetricKey, RunNoise]:
    """Per key the noise of its medians over runs (oldest first); a key in too few runs gets its default."""
    series: dict[MetricKey, list[float]] = {}
    for medians in per_run:
        for k, m in medians.items():
            series.setdefault(k, []).append(m)
    return {k: noise_of(ms, k.suite) for k, ms in series.items()}


def _runs(store: Store, host: str, kind: str, k: int, until: Optional[dt.datetime],
          exclude: Iterable[int]) -> list[int]:
    skip = set(exclude)
    runs = store.run_history(host, kind, last=k + len(skip), until=until)
    return [r.id for r in runs if r.id not in skip][-k:]


def host_medians(store: Store, host: str, kind: str = "survey", k: int = DEFAULT_NOISE_RUNS,
                 until: Optional[dt.datetime] = None, exclude: Iterable[int] = ()) -> list[dict[MetricKey, float]]:
    """The ceiling medians of `host`'s newest k complete runs of `kind` started by `until`, oldest first,
    leaving out the runs `exclude` (a run is never part of the noise it is judged against)."""
    ids = _runs(store, host, kind, k, until, exclude)
    by_run: dict[int, list[FigureSummary]] = {i: [] for i in ids}
    for f in store.figure_summaries(ids, CEILING_SUITES) if ids else ():
        by_run[f.run_id].append(f)
    return [{key: f.median for key, f in ceiling_figures(by_run[i]).items()} for i in ids]


def host_noise(store: Store, host: str, kind: str = "survey", k: int = DEFAULT_NOISE_RUNS,
               until: Optional[dt.datetime] = None, exclude: Iterable[int] = ()) -> dict[MetricKey, RunNoise]:
    """The noise of every ceiling of `host` (see host_medians for the runs); keys absent from every run
    are absent here: use `noise.get(key) or default_noise(key.suite)`."""
    return learn(host_medians(store, host, kind, k, until, exclude))


def steadiness(store: Store, host_key: str, kind: str = "survey", k: int = DEFAULT_NOISE_RUNS,
               until: Optional[dt.datetime] = None) -> dict[MetricKey, RunNoise]:
    """How steady each ceiling of a host is: its run-to-run spread over the host's newest k complete
    runs of `kind` (started by `until`, the run shown included), for the ceilings in at least
    MIN_HISTORY_RUNS of them only; empty when the history is shorter."""
    return {key: n for key, n in host_noise(store, host_key, kind, k, until).items() if n.source == "history"}


def layer_noise(store: Store, host: str, k: int = DEFAULT_NOISE_RUNS, until: Optional[dt.datetime] = None,
                exclude: Iterable[int] = ()) -> dict[str, RunNoise]:
    """Per layer name the run-to-run spread of its rate (1 / seconds: what efficiency follows under a fixed
    roof) over the host's newest k complete layers runs; too few runs: the layers default."""
    ids = _runs(store, host, "layers", k, until, exclude)
    order = {i: n for n, i in enumerate(ids)}
    series: dict[str, list[tuple[int, float]]] = {}
    for t in store.placement_seconds(ids) if ids else ():
        if t.seconds and t.seconds > 0:
            series.setdefault(t.layer, []).append((order[t.run_id], 1.0 / t.seconds))
    return {name: noise_of([v for _, v in sorted(points)], LAYERS) for name, points in series.items()}


def headline(noise: Mapping[MetricKey, RunNoise], figures: Sequence[Figure]) -> list[tuple[MetricKey, RunNoise]]:
    """The run's headline ceilings (HEADLINE_SUITES) that have a learned spread, in table order."""
    return [(k, noise[k]) for k in ceiling_figures(figures) if k.suite in HEADLINE_SUITES and k in noise]


def lookup(noise: Mapping[MetricKey, RunNoise], suite: str, **fields: Any) -> Optional[RunNoise]:
    """The noise of the key of `suite` whose named fields match, e.g. lookup(s, "memory",
    cache_level="L1", kernel="read", threads=1); None if no key matches."""
    for key, n in noise.items():
        if key.suite == suite and all(getattr(key, f) == v for f, v in fields.items()):
            return n
    return None
