"""Small invented runs for store tests (a made-up lab host, figures of every unit, one placed layer)."""

from __future__ import annotations

import datetime as dt
from typing import Any, Optional

from sqlalchemy.orm import Session

from eaves.records import Figure, PlacedLayer, RunRecord

T0 = dt.datetime(2026, 3, 1, 2, 0, tzinfo=dt.timezone.utc)


def figures() -> list[Figure]:
    return [
        Figure(suite="memory", kernel="read", dtype="float64", threads=2, unit="bytes_per_s",
               samples=(9.1e9, 9.4e9, 9.3e9), repetitions=40, min_seconds=0.02,
               working_set_bytes=32 * 1024, cache_level="L1", extra={"vector_bits": 256}),
        Figure(suite="latency", kernel="chase", dtype="int64", threads=1, unit="ns_per_load",
               samples=(81.0, 79.5, 80.2, 80.0), repetitions=3, min_seconds=0.02,
               working_set_bytes=256 * 2**20, cache_level="DRAM"),
        Figure(suite="stride", kernel="strided_read", dtype="float64", threads=1, unit="bytes_per_s",
               samples=(2.0e9, 2.1e9), repetitions=5, min_seconds=0.02, stride_elems=8),
        Figure(suite="gemm", kernel="matmul", dtype="float32", threads=2, unit="ops_per_s",
               samples=(5.5e10, 5.6e10), repetitions=2, min_seconds=0.05, shape="256x256x256"),
        Figure(suite="clock", kernel="add_chain", dtype="int64", threads=1, unit="hz",
               samples=(2.9e9,), repetitions=1, min_seconds=0.05),
    ]


# The roofs an invented layer is held against: every field a placement has besides its counts and times.
ROOF_FIELDS = dict(macs=1.0e8, where="layers.csv:2", memory_roof="L2", memory_roof_bytes_per_s=9.0e10,
                   memory_roof_kernel="read", compute_roof="fp32 peak", compute_roof_ops_per_s=1.8e11,
                   ridge_flops_per_byte=2.0, memory_efficiency=0.03, compute_efficiency=0.74,
                   achievable_efficiency=None, consistent_level="L2", threads_measured=2, threads_match="exact",
                   memory_threads_measured=2)


def placed_layer(**fields: Any) -> PlacedLayer:
    """An invented placed layer; `fields` replace any of its values."""
    values: dict[str, Any] = dict(layer="encoder.0.mlp", kind="linear", dtype="float32", threads=2, batch=8,
                                  seconds=1.5e-3, samples=(1.6e-3, 1.5e-3, 1.5e-3), flops=2.0e8, bytes=4.0e6,
                                  flops_per_byte=50.0, flops_per_s=1.33e11, bytes_per_s=2.67e9,
                                  attainable_flops_per_s=1.8e11, efficiency=0.74, bound="compute",
                                  roof="fma_float32", **ROOF_FIELDS)
    return PlacedLayer(**{**values, **fields})


def timed_layer(name: str, seconds: float, samples: tuple[float, ...], efficiency: float) -> PlacedLayer:
    """An invented dense fp32 layer of 1 MFLOP over 100 kB, timed at `seconds` (median of `samples`) and
    placed at `efficiency` of its roof: for the tests that compare layers (diff, gate)."""
    return placed_layer(layer=name, kind="dense", dtype="fp32", threads=1, batch=None, seconds=seconds,
                        samples=samples, flops=1e6, bytes=1e5, flops_per_byte=10.0, flops_per_s=1e6 / seconds,
                        bytes_per_s=1e5 / seconds, attainable_flops_per_s=1e6 / seconds / efficiency,
                        efficiency=efficiency, bound="compute", roof="fp32 peak")


def placement() -> PlacedLayer:
    return placed_layer(extra={"note": "invented"})


def row_before_0004(p: PlacedLayer) -> dict[str, Any]:
    """A placements row as schemas 0001 to 0003 kept it: the counts and times in columns, everything
    else under `extra`, in the order eaves.place wrote it (the JSON documents still carry that shape)."""
    top = p.to_dict()
    return {**{k: v for k, v in top.items() if k != "samples"}, "samples": list(p.samples)}


def record(host: str = "rack3-node07", status: str = "complete", minutes: int = 0,
           with_figures: bool = True, uuid: Optional[str] = None, kind: str = "survey",
           fingerprint: str = "f00dfeed") -> RunRecord:
    started = T0 + dt.timedelta(minutes=minutes)
    return RunRecord(host_key=f"{host}:{fingerprint}", hostname=host, fingerprint=fingerprint,
                     host_facts={"cores": 2, "model": "Invented CPU 3000"}, started_at=started,
                     eaves_version="0.1.0", params={"quick": True, "threads": [1, 2]}, kind=kind,
                     status=status, ended_at=started + dt.timedelta(seconds=30), tag="nightly",
                     note="lab demo", git_describe="v0.1-3-gabc1234", uuid=uuid,
                     figures=figures() if with_figures else [],
                     placements=[placement()] if with_figures else [])


def write_before_0004(session: Session, rec: RunRecord) -> None:
    """A run written as schemas 0002 and 0003 kept it (their columns are the same), in the caller's
    transaction: an older store, or a spool an older eaves made."""
    from sqlalchemy import insert, select

    from eaves.run_rows import PLACEMENTS, RUNS, record_rows, write_rows

    rows = record_rows(rec)
    rows.placements = []
    write_rows(session, rows)
    if rec.placements:
        run_id = session.scalar(select(RUNS.c.id).where(RUNS.c.uuid == rec.uuid))
        session.execute(insert(PLACEMENTS), [{**row_before_0004(p), "run_id": run_id} for p in rec.placements])
