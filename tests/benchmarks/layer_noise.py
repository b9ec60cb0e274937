"""How still do layer timings hold: N `place --builtin --quick` back to back, their spread, and the gate's false alarms.

Run on a quiet host that already has a survey in the store:
    python tests/benchmarks/layer_noise.py [--runs 10] [--db URL]
For every built-in reference layer it takes the run-to-run spread of its rate (1 / seconds, what the gate
judges efficiency by under a fixed roof): the median absolute change between consecutive runs. The median
over layers is the figure eaves.noise.DEFAULT_SPREAD["layers"] is set from. It also counts how many layers
`eaves gate` fails over the consecutive pairs (the runs are the same code, so every failure is a false alarm).
"""

from __future__ import annotations

import argparse
import json
import statistics
import subprocess
import sys
import tempfile
from collections import defaultdict

from eaves.store import Store


def place(db: str) -> str:
    """One `place --builtin --quick` as a user runs it (its own process); returns the stored run's UUID."""
    out = subprocess.run([sys.executable, "-m", "eaves", "place", "--builtin", "--quick", "--db", db,
                          "--json", "-"], capture_output=True, text=True, check=False)
    if out.returncode != 0:
        raise SystemExit(f"place failed ({out.returncode}): {out.stderr[-2000:]}")
    return json.loads(out.stdout)["stored_run"]


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--runs", type=int, default=10)
    parser.add_argument("--db", default=f"sqlite:///{tempfile.gettempdir()}/eaves-repro.db")
    args = parser.parse_args()
    uuids = []
    for i in range(args.runs):
        uuids.append(place(args.db))
        print(f"run {i + 1}/{args.runs}: {uuids[-1][:8]}", flush=True)
    store = Store(args.db)
    ids = [store.resolve_run(u) for u in uuids]
    order = {run_id: n for n, run_id in enumerate(ids)}
    rates: dict = defaultdict(list)
    for run_id, layer, seconds in ((t.run_id, t.layer, t.seconds)
                                   for t in sorted(store.placement_seconds(ids), key=lambda t: order[t.run_id])):
        rates[layer].append(1.0 / seconds)
    changes = {layer: statistics.median(abs(b / a - 1) for a, b in zip(v, v[1:]))
               for layer, v in rates.items() if len(v) == len(ids)}
    for layer, c in sorted(changes.items(), key=lambda kv: kv[1]):
        print(f"{layer[:60]:60} {100 * c:6.1f}%")
    print(f"\n{len(changes)} layers: median of the run-to-run median |change| "
          f"{100 * statistics.median(changes.values()):.1f}% (max {100 * max(changes.values()):.1f}%)")
    failed = total = 0
    for a, b in zip(uuids, uuids[1:]):
        out = subprocess.run([sys.executable, "-m", "eaves", "gate", "--baseline", a, "--candidate", b, "--json",
                              "-", "--db", args.db], capture_output=True, text=True)
        doc = json.loads(out.stdout)
        failed += len(doc["failed"])
        total += len(doc["layers"])
    print(f"eaves gate over {len(uuids) - 1} consecutive pairs: {failed} of {total} layers failed "
          f"({100 * failed / max(total, 1):.1f}%; the code did not change, so each is a false alarm)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
