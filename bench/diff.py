"""Two runs side by side: every ceiling and every placed layer, each judged against noise: the
samples' (the rank test) and the figure's run-to-run noise on its host (eaves.noise)."""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING, Mapping, Optional, Sequence

from eaves.compare import DEFAULT_ALPHA, DEFAULT_THRESHOLD, LOST, Comparison, compare
from eaves.errors import InputError, StoreError
from eaves.gate import LayerComparison, compare_layers
from eaves.metrics import MetricKey, ceiling_figures, lower_is_better
from eaves.noise import DEFAULT_NOISE_RUNS, RunNoise, default_noise, host_noise, larger, layer_noise
from eaves.records import HostSummary, RunSummary, StoredRun

if TYPE_CHECKING:
    from eaves.store import Store


@dataclass(frozen=True)
class MetricChange:
    """One ceiling in both runs (or in one only: `comparison` is None)."""

    key: MetricKey
    unit: str
    comparison: Optional[Comparison]
    present: str  # both | before only | after only


@dataclass(frozen=True)
class RunDiff:
    """The whole comparison of run A (before) with run B (after)."""

    before: RunSummary
    after: RunSummary
    metrics: tuple[MetricChange, ...]
    layers: Optional[LayerComparison]  # None unless both runs placed layers
    threshold: float
    same_hardware: bool

    @property
    def worse(self) -> tuple[str, ...]:
        """Names of everything that got worse beyond noise."""
        names = [m.key.name() for m in self.metrics if m.comparison and m.comparison.verdict == LOST]
        if self.layers:
            names += [c.layer for c in self.layers.worse]
        return tuple(names)


def resolve_ref(store: Store, ref: str, hosts: Optional[Sequence[HostSummary]] = None) -> int:
    """Run id of a reference: a host key or hostname (its newest complete survey), else a run id,
    UUID or UUID prefix. Unknown references are an InputError."""
    hosts = store.hosts() if hosts is None else hosts
    if any(ref in (h.host_key, h.hostname) for h in hosts):
        run_id = store.latest_complete_run(ref, kind="survey") or store.latest_complete_run(ref, kind="layers")
        if run_id is None:
            raise InputError(f"{ref}: host has no complete run in {store.shown_url}")
        return run_id
    try:
        return store.resolve_run(ref)
    except StoreError as err:
        if err.exit_code == 2:
            raise InputError(f"{ref}: no such run or host in {store.shown_url}") from None
        raise


def diff_noise(store: Store, before: StoredRun, after: StoredRun, k: int = DEFAULT_NOISE_RUNS,
               ) -> tuple[dict[MetricKey, RunNoise], dict[str, RunNoise]]:
    """The run-to-run noise of ceilings and layers for a diff: learned on each run's host from its
    newest k complete runs of that kind started by the later of the two, the "after" run left out
    (a change never sets its own noise); two hosts: per figure the larger spread."""
    until = max(before.summary.started_at, after.summary.started_at)
    skip = (after.summary.id,)
    metrics: dict[MetricKey, RunNoise] = {}
    layers: dict[str, RunNoise] = {}
    for s in {before.summary.host_key: before.summary, after.summary.host_key: after.summary}.values():
        for key, n in host_noise(store, s.host_key, s.kind, k, until, skip).items():
            metrics[key] = larger(metrics.get(key), n)
        if before.placements and after.placements:
            for name, n in layer_noise(store, s.host_key, k, until, skip).items():
                layers[name] = larger(layers.get(name), n)
    return metrics, layers


def diff_runs(before: StoredRun, after: StoredRun, same_hardware: bool = True,
              threshold: float = DEFAULT_THRESHOLD, alpha: float = DEFAULT_ALPHA,
              noise: Optional[Mapping[MetricKey, RunNoise]] = None,
              layers_noise: Optional[Mapping[str, RunNoise]] = None) -> RunDiff:
    """Every ceiling of two runs side by side, and their placed layers when both have some.
    `noise`: run-to-run noise per ceiling (a ceiling missing from it gets its suite's default);
    None judges by the samples and the threshold alone."""
    a, b = ceiling_figures(before.figures), ceiling_figures(after.figures)
    keys = list(a) + [k for k in b if k not in a]
    changes = []
    for k in sorted(keys, key=MetricKey.sort_key):
        fa, fb = a.get(k), b.get(k)
        if fa and fb and fa.unit == fb.unit:
            run_noise = None if noise is None else (noise.get(k) or default_noise(k.suite))
            cmp = compare(fa.samples, fb.samples, lower_is_better(fa.unit), threshold, alpha, noise=run_noise)
            changes.append(MetricChange(k, fa.unit, cmp, "both"))
        else:
            f = fa or fb
            changes.append(MetricChange(k, f.unit, None, "before only" if fa else "after only"))
    layers = None
    if before.placements and after.placements:
        layers = compare_layers(before.placements, after.placements, threshold, alpha, layers_noise)
    return RunDiff(before.summary, after.summary, tuple(changes), layers, threshold, same_hardware)
