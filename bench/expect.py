"""Assert from any test suite that a piece of code stays within a fraction of its roof on this host.

    from eaves.expect import assert_roof
    assert_roof(lambda: np.add(a, b, out=c), flops=a.size, bytes=3 * a.nbytes, dtype="fp64",
                min_efficiency=0.3)

The callable is timed with the eaves timing method (eaves.timing: warm-up, calibrated
repetitions, several samples, the median), placed under the ceilings of this host's newest
complete survey in the store, and its efficiency (achieved over attainable) compared with
`min_efficiency`. Without a stored survey of this host the check cannot be made: it raises
NoCeilings, whose message says how to make one. The pytest plugin (eaves.pytest_plugin) wraps
this as the `near_roof` fixture.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Callable, Mapping, Optional

from eaves.errors import EavesError, InputError, StoreError
from eaves.records import PlacedLayer
from eaves.roofline import HostModel
from eaves.timing import TimingPolicy

SURVEY_HINT = "make one with `eaves survey --quick`"


class NoCeilings(EavesError):
    """This host has no stored survey to place the callable under."""


class RoofMiss(AssertionError):
    """The callable ran further below its roof than allowed."""


@dataclass(frozen=True)
class RoofCheck:
    """One timed callable under its roof, and the verdict."""

    placed: PlacedLayer
    min_efficiency: float
    ceilings_run: str

    @property
    def efficiency(self) -> float:
        return self.placed.efficiency

    @property
    def passed(self) -> bool:
        return self.placed.bound != "impossible" and self.placed.efficiency >= self.min_efficiency

    def message(self) -> str:
        p = self.placed
        if p.bound == "impossible":
            return f"{p.layer}: {p.extra.get('reason', 'above every roof')}"
        verdict = "within" if self.passed else "below"
        return (f"{p.layer}: {p.efficiency:.1%} of its {p.bound} roof ({p.roof}), {verdict} the required "
                f"{self.min_efficiency:.1%} (median {p.seconds * 1e6:.3g} µs over {len(p.samples)} samples, "
                f"ceilings from run {self.ceilings_run[:8]})")


def host_model(db: Optional[str] = None, run: Optional[str] = None) -> HostModel:
    """The roofs of this host's newest complete survey (or of `run`) in the store `db`."""
    from eaves.host import collect_host_facts
    from eaves.roofline import model_from_store
    from eaves.store import Store

    host = collect_host_facts().host_key()
    try:
        store = Store(db, create=False)
        return model_from_store(store, run, host=host)
    except StoreError as err:
        where = db or "the default store"
        raise NoCeilings(f"eaves: no stored survey of host {host} ({where}: {err}); {SURVEY_HINT}") from None


def measure(fn: Callable[[], Any], model: HostModel, *, flops: Optional[float] = None,
            bytes: Optional[float] = None, kind: Optional[str] = None, shape: Optional[Mapping[str, int]] = None,
            dtype: str = "fp64", threads: int = 1, name: Optional[str] = None,
            policy: Optional[TimingPolicy] = None) -> PlacedLayer:
    """Time `fn()` and place it under `model`: give its FLOPs and bytes, or a layer kind and shape."""
    from eaves.layers import DTYPE_BYTES, KINDS, LayerSpec, shape_problems
    from eaves.place import place_layers
    from eaves.threads import use_threads
    from eaves.timing import repeat_callable, sample

    label = name or getattr(fn, "__qualname__", "callable")
    if dtype not in DTYPE_BYTES:
        raise InputError(f"{label}: dtype: unknown dtype {dtype!r} (known: {', '.join(DTYPE_BYTES)})")
    if kind is None:
        if flops is None or bytes is None:
            raise InputError(f"{label}: give flops and bytes, or a layer kind and its shape")
        kind = "elementwise"  # explicit counts: the kind only labels the point
    elif kind not in KINDS:
        raise InputError(f"{label}: kind: unknown kind {kind!r} (known: {', '.join(KINDS)})")
    elif flops is None or bytes is None:
        problems = shape_problems(kind, dict(shape or {}))
        if problems:
            raise InputError(f"{label}: {problems[0][0]}: {problems[0][1]}")
    with use_threads(threads):
        timing = sample(repeat_callable(fn), policy or TimingPolicy.quick())
    spec = LayerSpec(name=label, kind=kind, dtype=dtype, threads=threads, seconds=timing.seconds,
                     shape=dict(shape or {}), flops=flops, bytes=bytes, where=label)
    return place_layers([spec], model)[0]


def check_roof(fn: Callable[[], Any], min_efficiency: float, *, model: Optional[HostModel] = None,
               db: Optional[str] = None, **counts: Any) -> RoofCheck:
    """Time and place `fn`; the record says whether it reached `min_efficiency` of its roof."""
    if not 0 < min_efficiency <= 1.5:
        raise InputError(f"min_efficiency: {min_efficiency} must be a fraction of the roof, e.g. 0.5")
    model = model or host_model(db)
    return RoofCheck(measure(fn, model, **counts), min_efficiency, model.run_uuid)


def assert_roof(fn: Callable[[], Any], min_efficiency: float, **kwargs: Any) -> RoofCheck:
    """`check_roof`, raising RoofMiss (an AssertionError) when the callable falls short: for any runner."""
    check = check_roof(fn, min_efficiency, **kwargs)
    if not check.passed:
        raise RoofMiss(check.message())
    return check
