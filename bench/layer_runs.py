"""Placements stored as a "layers" run, linked to the survey whose roofs they were placed under."""

from __future__ import annotations

import datetime as dt
from typing import TYPE_CHECKING, Any, Sequence

from eaves.records import PlacedLayer, RunRecord

if TYPE_CHECKING:
    from eaves.host import HostFacts
    from eaves.roofline import HostModel
    from eaves.store import Store


def store_layers_run(store: Store, facts: HostFacts, model: HostModel, placed: Sequence[PlacedLayer],
                     params: dict[str, Any], note: str) -> str:
    """Placements timed on this host (built-in layers, PyTorch) as a complete layers run of this host;
    returns its UUID."""
    from eaves import __version__

    now = dt.datetime.now(dt.timezone.utc)
    record = RunRecord(host_key=facts.host_key(), hostname=facts.hostname, fingerprint=facts.fingerprint(),
                       host_facts=facts.to_dict(), started_at=now, eaves_version=__version__,
                       params=params, kind="layers", status="complete", ended_at=now, note=note,
                       ceilings_run_uuid=model.run_uuid, placements=list(placed))
    return store.save_run(record)


def store_file_layers(store: Store, model: HostModel, placed: Sequence[PlacedLayer], path: str) -> str:
    """A layer file's placements, stored under the host whose ceilings they were placed under (the
    timings may come from anywhere: the file says nothing of the machine); returns the run's UUID."""
    from eaves import __version__

    survey = store.load_run(store.resolve_run(model.run_uuid))
    ceilings, host_facts = survey.summary, survey.host_facts
    now = dt.datetime.now(dt.timezone.utc)
    record = RunRecord(host_key=ceilings.host_key, hostname=ceilings.hostname,
                       fingerprint=store.host_fingerprint(ceilings.host_key) or "", host_facts=host_facts,
                       started_at=now, eaves_version=__version__, params={"file": str(path)}, kind="layers",
                       status="complete", ended_at=now, note=f"layer timings from {path}",
                       ceilings_run_uuid=model.run_uuid, placements=list(placed))
    return store.save_run(record)
