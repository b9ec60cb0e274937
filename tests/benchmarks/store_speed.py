"""Time storing one layers run of N distinct placed layers (issue 18: 1.5 ms per layer before bulk inserts).

Run: python tests/benchmarks/store_speed.py [--layers 100000] [--db URL]
Prints ms per layer for the save and for reading the run back, and the growth of the process's peak
memory (ru_maxrss) over the save; the layers are synthetic test data placed under invented ceilings.
Without --db the store is a fresh SQLite file in a temporary folder; with --db it must be empty
or an eaves store (the run is added to it).
"""

from __future__ import annotations

import argparse
import dataclasses
import datetime as dt
import resource
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
sys.path.insert(0, str(Path(__file__).resolve().parent))

from layer_fixtures import CACHES, HOST_KEY, HOSTNAME, synthetic_figures  # noqa: E402
from place_speed import layers  # noqa: E402

from eaves.place import place_layers  # noqa: E402
from eaves.records import RunRecord  # noqa: E402
from eaves.roofline import model_from_figures  # noqa: E402
from eaves.store import Store  # noqa: E402


def layers_record(n: int) -> RunRecord:
    model = model_from_figures(synthetic_figures(), "bench", HOST_KEY, {"caches": CACHES})
    placed = [dataclasses.replace(p, layer=f"model.block{i // 50}.layer{i}") for i, p in
              enumerate(place_layers(layers(n), model))]
    now = dt.datetime.now(dt.timezone.utc)
    return RunRecord(host_key=HOST_KEY, hostname=HOSTNAME, fingerprint="0badc0de", host_facts={"caches": CACHES},
                     started_at=now, eaves_version="bench", params={"layers": n}, kind="layers",
                     status="complete", ended_at=now, note="store_speed benchmark", placements=placed)


def peak_rss_mib() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024  # Linux reports KiB


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--layers", type=int, default=100_000)
    parser.add_argument("--db", default=None)
    args = parser.parse_args()
    record = layers_record(args.layers)
    with tempfile.TemporaryDirectory() as tmp:
        store = Store(args.db or f"sqlite:///{Path(tmp) / 'speed.db'}")
        rss0 = peak_rss_mib()
        start = time.perf_counter()
        uuid = store.save_run(record)
        save_s = time.perf_counter() - start
        rss1 = peak_rss_mib()
        start = time.perf_counter()
        loaded = store.load_run(store.resolve_run(uuid))
        load_s = time.perf_counter() - start
        assert list(loaded.placements) == record.placements
        store.close()
    n = args.layers
    print(f"store {store.engine.dialect.name}: save {n} layers {save_s:.2f} s = {1e3 * save_s / n:.3f} ms/layer; "
          f"peak memory +{rss1 - rss0:.0f} MiB ({1024 * (rss1 - rss0) / n:.1f} KiB/layer); "
          f"load back {load_s:.2f} s = {1e3 * load_s / n:.3f} ms/layer")


if __name__ == "__main__":
    main()
