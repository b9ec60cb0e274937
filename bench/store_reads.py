"""The store's read queries, each answered with typed records (eaves.records), never bare rows.

`StoreReads` is a part of `eaves.store.Store`: it needs only the store's `read` (a session whose
driver errors become one-line StoreErrors) and its `shown_url`."""

from __future__ import annotations

import datetime as dt
from typing import Callable, Optional, Sequence, TypeVar

from sqlalchemy import func, select
from sqlalchemy.orm import Session, selectinload

from eaves.errors import StoreError
from eaves.models import Host, Measurement, Placement, Run
from eaves.records import (FIGURE_UNITS, Figure, FigureSummary, HostSummary, LayerTime, RunRef, RunSummary,
                           StoredRun)
from eaves.run_rows import figure_of, placed_of

T = TypeVar("T")
CHUNK = 500  # ids per IN (...) list: well below every backend's limit on bound parameters


class StoreReads:
    """Hosts, runs, a run's figures and placements, and the histories diff, trend, gate and noise read."""

    shown_url: str

    def read(self, work: Callable[[Session], T], action: str = "cannot read") -> T:
        raise NotImplementedError  # eaves.store.Store.read

    def run_uuids(self) -> list[str]:
        """UUIDs of every run, oldest first."""
        return self.read(lambda s: list(s.scalars(select(Run.uuid).order_by(Run.id))))

    def hosts(self) -> list[HostSummary]:
        """Every host with its number of runs and the start of its last one, by hostname."""
        q = (select(Host.host_key, Host.hostname, func.count(Run.id), func.max(Run.started_at), Host.fingerprint,
                    Host.first_seen).outerjoin(Run).group_by(Host.id).order_by(Host.hostname, Host.host_key))
        rows = self.read(lambda s: s.execute(q).all())
        return [HostSummary(key, name, runs, _aware(last), print_, _aware(first))
                for key, name, runs, last, print_, first in rows]

    def runs(self, host: Optional[str] = None, limit: Optional[int] = None,
             status: Optional[str] = None, kind: Optional[str] = None) -> list[RunSummary]:
        """Runs, newest first, optionally of one host (host key or hostname)."""
        q = select(Run).join(Host).options(selectinload(Run.host))
        if host:
            q = q.where((Host.host_key == host) | (Host.hostname == host))
        if status:
            q = q.where(Run.status == status)
        if kind:
            q = q.where(Run.kind == kind)
        q = q.order_by(Run.started_at.desc(), Run.id.desc())
        if limit:
            q = q.limit(limit)

        def work(session: Session) -> list[RunSummary]:
            runs = session.scalars(q).all()
            counts = _counts(session, [r.id for r in runs])
            return [_summary(r, *counts.get(r.id, (0, 0))) for r in runs]

        return self.read(work)

    def resolve_run(self, ref: str) -> int:
        """Run id from an id number, a UUID or a unique UUID prefix (at least 4 characters)."""
        def work(session: Session) -> int:
            if ref.isdigit() and session.get(Run, int(ref)) is not None:
                return int(ref)
            if len(ref) >= 4:
                ids = session.scalars(select(Run.id).where(Run.uuid.startswith(ref.lower()))).all()
                if len(ids) == 1:
                    return ids[0]
                if len(ids) > 1:
                    raise StoreError(f"run {ref!r}: ambiguous, {len(ids)} runs start with it", exit_code=2)
            raise StoreError(f"run {ref!r}: no such run in {self.shown_url}", exit_code=2)

        return self.read(work)

    def latest_complete_run(self, host: Optional[str] = None, kind: str = "survey") -> Optional[int]:
        """Id of the newest complete run of a host (host key or hostname)."""
        q = select(Run.id).join(Host).where(Run.status == "complete", Run.kind == kind)
        if host:
            q = q.where((Host.host_key == host) | (Host.hostname == host))
        return self.read(lambda s: s.scalar(q.order_by(Run.started_at.desc(), Run.id.desc()).limit(1)))

    def load_run(self, run_id: int) -> StoredRun:
        """A run with its figures and placements."""
        def work(session: Session) -> StoredRun:
            run = session.scalar(select(Run).where(Run.id == run_id).options(
                selectinload(Run.host), selectinload(Run.measurements), selectinload(Run.placements)))
            if run is None:
                raise StoreError(f"run {run_id}: no such run in {self.shown_url}", exit_code=2)
            figures = tuple(figure_of(m) for m in run.measurements)
            placements = tuple(placed_of(p) for p in run.placements)
            return StoredRun(_summary(run, len(figures), len(placements)), dict(run.params),
                             dict(run.facts), dict(run.host.facts), run.ceilings_run_uuid,
                             figures, placements)

        return self.read(work)

    # -- history (diff, trend, gate, noise, report) ----------------------------------------
    def host_fingerprint(self, host_key: str) -> Optional[str]:
        """The hardware fingerprint of a host key (None if the host is unknown)."""
        return self.read(lambda s: s.scalar(select(Host.fingerprint).where(Host.host_key == host_key)))

    def run_history(self, host: str, kind: str = "survey", since: Optional[dt.datetime] = None,
                    last: Optional[int] = None, until: Optional[dt.datetime] = None) -> list[RunRef]:
        """A host's complete runs of one kind, oldest first, started in [since, until]; `last`: only the
        newest that many. No figures and no counts: cheap on a long history."""
        q = select(Run.id, Run.uuid, Run.started_at, Run.tag).join(Host).where(
            Run.status == "complete", Run.kind == kind, (Host.host_key == host) | (Host.hostname == host))
        if since is not None:
            q = q.where(Run.started_at >= since)
        if until is not None:
            q = q.where(Run.started_at <= until)
        q = q.order_by(Run.started_at.desc(), Run.id.desc())
        if last:
            q = q.limit(last)
        rows = self.read(lambda s: s.execute(q).all())
        return [RunRef(run_id, uuid, _aware(started), tag) for run_id, uuid, started, tag in reversed(rows)]

    def figures_of(self, run_ids: Sequence[int], suites: Optional[tuple[str, ...]] = None) -> dict[int, list[Figure]]:
        """Figures of many runs at once, by run id, optionally of some suites only (without `extra`)."""
        m = Measurement
        cols = (m.run_id, m.suite, m.kernel, m.variant, m.dtype, m.threads, m.working_set_bytes, m.cache_level,
                m.stride_elems, m.shape, m.samples, m.repetitions, m.min_seconds, *_unit_columns())

        def work(session: Session) -> dict[int, list[Figure]]:
            out: dict[int, list[Figure]] = {i: [] for i in run_ids}
            for ids in _chunks(run_ids):
                q = select(*cols).where(m.run_id.in_(ids))
                if suites:
                    q = q.where(m.suite.in_(suites))
                for r in session.execute(q.order_by(m.id)):
                    unit, _ = _filled_unit(r[13:])
                    out[r.run_id].append(Figure(
                        suite=r.suite, kernel=r.kernel, variant=r.variant, dtype=r.dtype, threads=r.threads,
                        working_set_bytes=r.working_set_bytes, cache_level=r.cache_level,
                        stride_elems=r.stride_elems, shape=r.shape, unit=unit, samples=tuple(r.samples),
                        repetitions=r.repetitions, min_seconds=r.min_seconds))
            return out

        return self.read(work)

    def figure_summaries(self, run_ids: Sequence[int], suites: tuple[str, ...]) -> list[FigureSummary]:
        """Many runs' figures of some suites without their samples (nothing to decode): long histories."""
        m = Measurement
        cols = (m.id, m.run_id, m.suite, m.kernel, m.variant, m.dtype, m.threads, m.cache_level, m.stride_elems,
                m.shape, m.q1, m.q3, *_unit_columns())

        def work(session: Session) -> list[FigureSummary]:
            out = []
            for ids in _chunks(run_ids):
                for r in session.execute(select(*cols).where(m.run_id.in_(ids), m.suite.in_(suites))):
                    unit, median = _filled_unit(r[12:])
                    out.append(FigureSummary(r.id, r.run_id, r.suite, r.kernel, r.variant, r.dtype, r.threads,
                                             r.cache_level, r.stride_elems, r.shape, unit, median, r.q1, r.q3))
            return out

        return self.read(work)

    def placement_seconds(self, run_ids: Sequence[int]) -> list[LayerTime]:
        """Every placed layer's median time in some runs: the layer histories the gate learns from."""
        def work(session: Session) -> list[LayerTime]:
            q = select(Placement.run_id, Placement.layer, Placement.seconds)
            return [LayerTime(run_id, layer, seconds) for ids in _chunks(run_ids)
                    for run_id, layer, seconds in session.execute(q.where(Placement.run_id.in_(ids)))]

        return self.read(work)

    def samples_of(self, measurement_ids: Sequence[int]) -> dict[int, tuple[float, ...]]:
        """The samples of some figures, by measurement id."""
        def work(session: Session) -> dict[int, tuple[float, ...]]:
            q = select(Measurement.id, Measurement.samples)
            return {i: tuple(s) for ids in _chunks(measurement_ids)
                    for i, s in session.execute(q.where(Measurement.id.in_(ids)))}

        return self.read(work)


def _chunks(ids: Sequence[int]) -> list[Sequence[int]]:
    return [ids[start:start + CHUNK] for start in range(0, len(ids), CHUNK)]


def _unit_columns() -> tuple:
    return tuple(getattr(Measurement, u) for u in FIGURE_UNITS)


def _filled_unit(values: Sequence[Optional[float]]) -> tuple[str, float]:
    """The unit-named column a measurement filled (FIGURE_UNITS order), and its value: the median."""
    return next((u, v) for u, v in zip(FIGURE_UNITS, values) if v is not None)


def _counts(session: Session, ids: list[int]) -> dict[int, tuple[int, int]]:
    """Figures and placements of some runs, by run id."""
    if not ids:
        return {}
    m = dict(session.execute(select(Measurement.run_id, func.count()).where(
        Measurement.run_id.in_(ids)).group_by(Measurement.run_id)).all())
    p = dict(session.execute(select(Placement.run_id, func.count()).where(
        Placement.run_id.in_(ids)).group_by(Placement.run_id)).all())
    return {i: (m.get(i, 0), p.get(i, 0)) for i in ids}


def _summary(run: Run, n_figures: int, n_placements: int) -> RunSummary:
    return RunSummary(id=run.id, uuid=run.uuid, host_key=run.host.host_key,
                      hostname=run.host.hostname, kind=run.kind, status=run.status,
                      started_at=_aware(run.started_at), ended_at=_aware(run.ended_at),
                      tag=run.tag, note=run.note, git_describe=run.git_describe,
                      eaves_version=run.eaves_version, n_figures=n_figures,
                      n_placements=n_placements)


def _aware(value: Optional[dt.datetime]) -> Optional[dt.datetime]:
    """SQLite hands back naive datetimes; everything we store is UTC."""
    if value is not None and value.tzinfo is None:
        return value.replace(tzinfo=dt.timezone.utc)
    return value
