"""The versioned JSON document of a run: host facts and every ceiling, units in the keys."""

from __future__ import annotations

import dataclasses
import datetime as dt
import math
from typing import Any, Mapping, Optional, Sequence

from eaves.ceilings import latency_ceilings, memory_ceilings, stride_rows
from eaves.records import Figure, PlacedLayer

DOCUMENT_SCHEMA = "eaves.run"
DOCUMENT_VERSION = 1


def _clean(value: Any) -> Any:
    """JSON has no NaN or infinity: they become null."""
    if isinstance(value, float) and not math.isfinite(value):
        return None
    if isinstance(value, dict):
        return {k: _clean(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_clean(v) for v in value]
    if isinstance(value, (dt.datetime, dt.date)):
        return value.isoformat()
    return value


def figure_dict(f: Figure) -> dict[str, Any]:
    d = {"suite": f.suite, "kernel": f.kernel, "variant": f.variant, "dtype": f.dtype, "threads": f.threads,
         "working_set_bytes": f.working_set_bytes, "cache_level": f.cache_level,
         "stride_elems": f.stride_elems, "shape": f.shape, f"median_{f.unit}": f.median,
         f"best_{f.unit}": f.best, f"samples_{f.unit}": list(f.samples), "repetitions": f.repetitions,
         "min_seconds_per_sample": f.min_seconds, "extra": f.extra}
    return d


def steadiness_dict(noise) -> dict[str, Any]:
    """A ceiling's run-to-run spread on its host (eaves.noise.RunNoise learned from history)."""
    return {"spread_pct": 100.0 * noise.spread, "floor_pct": 100.0 * noise.floor, "runs": noise.runs}


def run_document(run: dict[str, Any], host: dict[str, Any], figures: Sequence[Figure],
                 placements: Sequence[PlacedLayer] = (), steadiness: Optional[Mapping] = None) -> dict[str, Any]:
    """Everything a reader needs about one run; `run` holds uuid, host_key, times, status, tag ...
    `steadiness` (eaves.noise.steadiness): each memory and latency ceiling and compute peak that has a
    learned run-to-run spread carries it (`steadiness`, `peak_steadiness` for compute rows)."""
    from eaves.noise import lookup

    steady = steadiness or {}

    def spread(suite: str, key: str = "steadiness", **fields) -> dict[str, Any]:
        n = lookup(steady, suite, **fields) if steady else None
        return {key: steadiness_dict(n)} if n else {}

    doc: dict[str, Any] = {
        "schema": DOCUMENT_SCHEMA,
        "schema_version": DOCUMENT_VERSION,
        "run": run,
        "host": host,
        "ceilings": {
            "memory": [{"level": c.level, "kernel": c.kernel, "threads": c.threads, "bytes_per_s": c.bytes_per_s,
                        "variant": c.variant, "working_set_bytes": c.working_set_bytes, "cv": c.cv,
                        **({"caution": c.caution} if c.caution else {}),
                        **spread("memory", cache_level=c.level, kernel=c.kernel, threads=c.threads)}
                       for c in memory_ceilings(figures)],
            "latency": [{"level": c.level, "ns_per_load": c.ns_per_load, "working_set_bytes": c.working_set_bytes,
                         **spread("latency", cache_level=c.level)}
                        for c in latency_ceilings(figures)],
            "stride": [{"stride_bytes": r.stride_bytes, "threads": r.threads,
                        "useful_bytes_per_s": r.useful_bytes_per_s, "line_bytes_per_s": r.line_bytes_per_s,
                        "vs_sequential": r.vs_sequential} for r in stride_rows(figures)],
            "compute": [{**r, **spread("compute", "peak_steadiness", dtype=r["dtype"], threads=r["threads"])}
                        for r in _compute_rows(figures)],
        },
        "figures": [figure_dict(f) for f in figures],
        # steps that gave no figure (a hang, a crash, a wrong checksum, a rate above the bound) and why
        "failures": list((run.get("params") or {}).get("failures") or []),
    }
    if placements:
        doc["layers"] = [p.to_dict() for p in placements]
    return _clean(doc)


def _compute_rows(figures: Sequence[Figure]) -> list[dict[str, Any]]:
    if not any(f.suite in ("compute", "gemm") for f in figures):
        return []
    from eaves.compute import compute_ceilings

    rows = []
    for c in compute_ceilings(figures):
        unit = "ops_per_s" if c.dtype.startswith("int") else "flops_per_s"
        rows.append({"dtype": c.dtype, "threads": c.threads, f"peak_{unit}": c.peak_ops_per_s,
                     "peak_path": c.peak_variant, "native": c.native, f"gemm_{unit}": c.gemm_ops_per_s,
                     "gemm_shape": c.gemm_shape, f"theoretical_{unit}": c.theoretical_ops_per_s,
                     "percent_of_theoretical": c.pct_of_theoretical,
                     "peak_macs_per_s": c.peak_macs_per_s})
    return rows


PLACEMENTS_SCHEMA = "eaves.placements"
PLACEMENTS_VERSION = 1


def placements_document(ceilings_run: str, host_key: str, placed: Sequence[PlacedLayer],
                        projections: Sequence[Any] = (), curves: Optional[Mapping[str, Sequence[Any]]] = None,
                        stored_run: Optional[str] = None, **more: Any) -> dict[str, Any]:
    """Layers placed under a survey's roofs (eaves place, eaves profile-torch): every placement, the
    --as-dtype projections, the --batching curves, the run they were stored as; `more`: keys of the
    command (a PyTorch model's name, shape, whole-pass times ...)."""
    return _clean({"schema": PLACEMENTS_SCHEMA, "schema_version": PLACEMENTS_VERSION,
                   "ceilings_run": ceilings_run, "host_key": host_key, "stored_run": stored_run,
                   "layers": [p.to_dict() for p in placed],
                   "as_dtype": [dataclasses.asdict(p) for p in projections],
                   "batching": {name: [dataclasses.asdict(b) for b in pts] for name, pts in (curves or {}).items()},
                   **more})

