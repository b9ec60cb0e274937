"""The noise model on measured history: ten back-to-back quick surveys of one quiet host (a copied store)."""

import json
import shutil
import sqlite3
from pathlib import Path

from eaves.cli import main
from eaves.noise import steadiness
from eaves.store import Store

FIXTURE = Path(__file__).parent / "fixtures" / "zen3-kvm-2cpu" / "ten-quick-surveys.db"


def _flags(url, a, b, capsys) -> dict[str, str]:
    main(["diff", str(a), str(b), "--json", "-", "--db", url])
    doc = json.loads(capsys.readouterr().out)
    return {c["name"]: c["verdict"] for c in doc["ceilings"] if c.get("verdict")}


def _plant_drop(db: Path, run_id: int, key, factor: float) -> None:
    """Every variant of one memory ceiling of one run, `factor` times what was measured."""
    with sqlite3.connect(db) as conn:
        rows = conn.execute("SELECT id, samples FROM measurements WHERE run_id = ? AND suite = ? AND kernel = ? "
                            "AND cache_level = ? AND threads = ?",
                            (run_id, key.suite, key.kernel, key.cache_level, key.threads)).fetchall()
        assert rows
        for mid, samples in rows:
            scaled = [v * factor for v in json.loads(samples)]
            conn.execute("UPDATE measurements SET samples = ?, bytes_per_s = bytes_per_s * ?, best = best * ?, "
                         "q1 = q1 * ?, q3 = q3 * ? WHERE id = ?",
                         (json.dumps(scaled), factor, factor, factor, factor, mid))


def test_back_to_back_surveys_flag_few_figures_and_a_planted_20_percent_drop_is_caught(tmp_path, capsys):
    db = tmp_path / "copy.db"
    shutil.copy(FIXTURE, db)
    url = f"sqlite:///{db}"
    Store(url, check_schema=False).upgrade_schema()  # the fixture keeps the schema it was measured with
    ids = [r.id for r in sorted(Store(url).runs(), key=lambda r: r.started_at)]
    assert len(ids) == 10
    flagged = total = 0
    for a, b in zip(ids, ids[1:]):
        verdicts = _flags(url, a, b, capsys)
        flagged += sum(v != "held" for v in verdicts.values())
        total += len(verdicts)
    assert total > 300 and flagged <= 0.05 * total, f"{flagged} of {total} flagged"
    # the drop goes into the steadiest memory ceiling: on this host DRAM read moves ~11 % run to run, and
    # no pairwise test flags a 20 % move there without also flagging noise (4.5x its spread is the floor)
    store = Store(url)
    steady = steadiness(store, store.runs()[0].host_key)
    store.close()
    key, noise = min(((k, n) for k, n in steady.items() if k.suite == "memory"), key=lambda kn: kn[1].spread)
    assert noise.floor < 0.2, f"the steadiest memory ceiling {key.name()} moves {noise.spread:.1%} run to run"
    assert _flags(url, ids[-2], ids[-1], capsys)[key.name()] == "held"
    _plant_drop(db, ids[-1], key, 0.8)
    assert _flags(url, ids[-2], ids[-1], capsys)[key.name()] == "lost"
