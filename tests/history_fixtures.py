"""Invented histories of an invented lab host for diff, trend, gate and report tests (test data only)."""

from __future__ import annotations

import dataclasses
import datetime as dt
from typing import Optional

import numpy as np
from layer_fixtures import CACHES, HOST_KEY, HOSTNAME, synthetic_figures

from eaves.records import Figure, PlacedLayer, RunRecord
from eaves.store import Store

T0 = dt.datetime(2026, 2, 1, 2, 0, tzinfo=dt.timezone.utc)
FINGERPRINT = "0badc0de0badc0de"


def noisy(figures: list[Figure], rng: np.random.Generator, n: int = 5, cv: float = 0.01,
          scale: Optional[dict[str, float]] = None) -> list[Figure]:
    """The figures with `n` fresh samples each around their median (relative spread `cv`);
    `scale` multiplies the figures whose suite/kernel/level name starts with a key."""
    out = []
    for f in figures:
        factor = 1.0
        for prefix, s in (scale or {}).items():
            if f"{f.suite}/{f.kernel}/{f.cache_level}".startswith(prefix):
                factor *= s
        samples = tuple(float(x) for x in f.median * factor * (1 + cv * rng.standard_normal(n)))
        out.append(dataclasses.replace(f, samples=samples))
    return out


def history_figures(rng: np.random.Generator, n: int = 5, cv: float = 0.01,
                    scale: Optional[dict[str, float]] = None) -> list[Figure]:
    """Ceilings, a latency per level and a short sweep, as a survey of the invented host stores them."""
    base = [f for f in synthetic_figures() if f.cache_level != "L9"]
    base += [Figure("latency", "chase", "int64", 1, "ns_per_load", (v, v, v), 10, 0.01,
                    working_set_bytes=ws, cache_level=lvl)
             for lvl, v, ws in (("L1", 1.2, 16384), ("L2", 4.0, 2**19), ("L3", 14.0, 2**23), ("DRAM", 85.0, 2**28))]
    base += [Figure("sweep", k, "fp64", 1, "bytes_per_s", (v, v, v), 10, 0.01, working_set_bytes=2 ** e)
             for k in ("read", "copy") for e, v in ((12, 190e9), (16, 180e9), (20, 95e9), (24, 45e9), (28, 19e9))]
    return noisy(base, rng, n, cv, scale)


def survey_record(figures: list[Figure], day: int, tag: Optional[str] = "nightly", host_key: str = HOST_KEY,
                  hostname: str = HOSTNAME, fingerprint: str = FINGERPRINT, note: Optional[str] = None) -> RunRecord:
    started = T0 + dt.timedelta(days=day)
    levels = {"1": [{"name": "L1", "first_bytes": 4096, "last_bytes": 32768},
                    {"name": "DRAM", "first_bytes": 2**24, "last_bytes": 2**28}]}
    return RunRecord(host_key=host_key, hostname=hostname, fingerprint=fingerprint,
                     host_facts={"caches": CACHES, "hostname": hostname, "model": "Invented CPU 3000",
                                 "logical_cpus": 2},
                     started_at=started, eaves_version="test", params={"levels": levels}, kind="survey",
                     status="complete", ended_at=started + dt.timedelta(minutes=2), tag=tag, note=note,
                     figures=figures)


def layers_record(placed: list[PlacedLayer], day: int, ceilings_uuid: Optional[str] = None,
                  host_key: str = HOST_KEY, hostname: str = HOSTNAME) -> RunRecord:
    started = T0 + dt.timedelta(days=day, hours=1)
    return RunRecord(host_key=host_key, hostname=hostname, fingerprint=FINGERPRINT,
                     host_facts={"caches": CACHES}, started_at=started, eaves_version="test", params={},
                     kind="layers", status="complete", ended_at=started, ceilings_run_uuid=ceilings_uuid,
                     placements=placed)


def fill_history(store: Store, days: int, seed: int = 7, cv: float = 0.01, n: int = 5,
                 drift_from: Optional[int] = None, drift: Optional[dict[str, float]] = None) -> list[str]:
    """`days` nightly surveys of the invented host; from day `drift_from` on, `drift` scales figures."""
    rng = np.random.default_rng(seed)
    uuids = []
    for d in range(days):
        scale = drift if drift_from is not None and d >= drift_from else None
        uuids.append(store.save_run(survey_record(history_figures(rng, n, cv, scale), d)))
    return uuids


def wobbly(figures: list[Figure], rng: np.random.Generator, wobble: float) -> list[Figure]:
    """Each figure scaled by its own factor drawn uniformly from [1 - wobble, 1 + wobble]: a run whose
    medians moved from the last one the way they do between runs on a shared VM (invented test data)."""
    return [dataclasses.replace(f, samples=tuple(x * u for x in f.samples))
            for f, u in zip(figures, rng.uniform(1 - wobble, 1 + wobble, len(figures)))]


def fill_wobbly_history(store: Store, days: int, seed: int = 17, wobble: float = 0.05, cv: float = 0.01) -> list[str]:
    """`days` surveys whose medians wobble run to run (each figure by up to +-`wobble`, so consecutive
    runs differ by up to about twice that) while the samples inside a run stay within `cv`."""
    rng = np.random.default_rng(seed)
    return [store.save_run(survey_record(wobbly(history_figures(rng, cv=cv), rng, wobble), d)) for d in range(days)]
