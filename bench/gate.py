"""The change gate: did any layer move away from its roof, beyond noise, between two placements?

Each layer's efficiency (achieved over attainable) is compared sample by sample: with its counts
and roof fixed, a sample of t seconds has efficiency `efficiency * median_seconds / t`. A layer
fails when its efficiency fell by more than the allowed loss and by more than the layer's run-to-run
floor on its host (eaves.noise), and the rank test says the fall is beyond noise (eaves.compare).
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Callable, Mapping, Optional, Sequence

from eaves.compare import DEFAULT_ALPHA, LOST, Comparison, compare
from eaves.errors import InputError, StoreError
from eaves.noise import DEFAULT_NOISE_RUNS, LAYERS, RunNoise, default_noise, layer_noise
from eaves.records import PlacedLayer, RunSummary

if TYPE_CHECKING:
    from eaves.roofline import HostModel
    from eaves.store import Store

DEFAULT_MAX_LOSS = 0.05  # 5 % of efficiency
LAYER_FILE_SUFFIXES = (".csv", ".json")


@dataclass(frozen=True)
class LayerSet:
    """The placed layers of one side of a comparison, and where they came from."""

    source: str  # "run 1a2b3c4d" or a file path
    layers: tuple[PlacedLayer, ...]
    ceilings_run: Optional[str]
    host_key: Optional[str] = None  # the stored run's host, or that of the roofs a file was placed under
    run: Optional[RunSummary] = None  # the stored run (None for a file)


@dataclass(frozen=True)
class LayerChange:
    """One layer present on both sides: efficiency against its roof before and after."""

    layer: str
    kind: str
    dtype: str
    threads: int
    before_seconds: float
    after_seconds: float
    comparison: Comparison  # of efficiency samples (higher is better)
    counts_changed: bool  # FLOPs or bytes differ: the layer itself changed

    @property
    def before_efficiency(self) -> float:
        """Efficiency against the roof before (the median of its samples' efficiencies)."""
        return self.comparison.before

    @property
    def after_efficiency(self) -> float:
        """Efficiency against the roof after."""
        return self.comparison.after


@dataclass(frozen=True)
class LayerComparison:
    """Every layer of two sets, matched by name."""

    changes: tuple[LayerChange, ...]
    new: tuple[str, ...]  # only in the candidate
    vanished: tuple[str, ...]  # only in the baseline
    threshold: float

    @property
    def worse(self) -> tuple[LayerChange, ...]:
        """The layers whose efficiency fell beyond noise."""
        return tuple(c for c in self.changes if c.comparison.verdict == LOST)


def efficiency_samples(p: PlacedLayer) -> tuple[float, ...]:
    """Efficiency of every sample (same counts and roof: efficiency scales as 1 / seconds)."""
    samples = p.samples or (p.seconds,)
    return tuple(p.efficiency * p.seconds / s for s in samples if s > 0)


def compare_layers(before: Sequence[PlacedLayer], after: Sequence[PlacedLayer],
                   threshold: float = DEFAULT_MAX_LOSS, alpha: float = DEFAULT_ALPHA,
                   noise: Optional[Mapping[str, RunNoise]] = None) -> LayerComparison:
    """Match layers by name and judge each one's efficiency change; `noise`: run-to-run noise per
    layer name (a name missing from it: none), None judges by the samples and the threshold alone."""
    b = {p.layer: p for p in before}
    a = {p.layer: p for p in after}
    changes = []
    for name in (n for n in b if n in a):
        x, y = b[name], a[name]
        run_noise = None if noise is None else (noise.get(name) or default_noise(LAYERS))
        cmp = compare(efficiency_samples(x), efficiency_samples(y), lower_is_better=False,
                      threshold=threshold, alpha=alpha, noise=run_noise)
        counts_changed = abs(x.flops - y.flops) > 1e-9 * max(x.flops, 1.0) or \
            abs(x.bytes - y.bytes) > 1e-9 * max(x.bytes, 1.0)
        changes.append(LayerChange(name, y.kind, y.dtype, y.threads, x.seconds, y.seconds, cmp, counts_changed))
    return LayerComparison(tuple(changes), tuple(n for n in a if n not in b),
                           tuple(n for n in b if n not in a), threshold)


def is_layer_file(ref: str) -> bool:
    """A reference names a file if it exists, or looks like a path or a layer file name."""
    return Path(ref).is_file() or "/" in ref or ref.lower().endswith(LAYER_FILE_SUFFIXES)


def load_layer_set(store: Store, ref: str, model: Callable[[], HostModel], role: str) -> LayerSet:
    """The layers of `ref`: a stored run's placements, or a layer file placed under `model()`."""
    if is_layer_file(ref):
        from eaves.layerfile import read_layers
        from eaves.place import place_layers

        specs = read_layers(ref)
        m = model()
        return LayerSet(ref, tuple(place_layers(specs, m)), m.run_uuid, m.host_key)
    try:
        run_id = store.resolve_run(ref)
    except StoreError as err:
        if err.exit_code == 2:
            raise InputError(f"--{role} {ref}: no such run or layer file in {store.shown_url}") from None
        raise
    run = store.load_run(run_id)
    if not run.placements:
        raise InputError(f"--{role} {ref}: run {run.summary.uuid[:8]} ({run.summary.kind}) has no placed layers "
                         "(store some with `eaves place --builtin`, or give a layer file)")
    return LayerSet(f"run {run.summary.uuid[:8]}", run.placements, run.ceilings_run_uuid, run.summary.host_key,
                    run.summary)


def gate_noise(store: Store, baseline: LayerSet, candidate: LayerSet, k: int = DEFAULT_NOISE_RUNS) -> dict[str, RunNoise]:
    """Per layer the run-to-run noise on the candidate's host (else the baseline's): its newest k complete
    layers runs started by the later stored side, the candidate's own run left out."""
    host = candidate.host_key or baseline.host_key
    if host is None:
        return {}
    starts = [s.run.started_at for s in (baseline, candidate) if s.run]
    skip = (candidate.run.id,) if candidate.run else ()
    return layer_noise(store, host, k, max(starts) if starts else None, skip)
