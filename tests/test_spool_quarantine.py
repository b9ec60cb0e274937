"""A spool that never jams: a run PostgreSQL refuses for its content is quarantined in the spool with
the server's reason, and the others are sent (issue 18, item 2). Runs on a real PostgreSQL server:
PostgreSQL refuses a NUL character in text (PostgreSQL docs, Character Types) where SQLite keeps it,
which is how a spool, an SQLite file, comes to hold a run the fleet store will never take."""

from __future__ import annotations

import dataclasses

from alembic import command
from sqlalchemy import create_engine, text
from sqlalchemy.orm import Session

from eaves import schema
from eaves.store import Store
from eaves.transfer import push, save_or_spool
from run_records import placement, record, write_before_0004
from store_backends import pg_schema_url
from test_transfer import _dead_server_url


def poisoned_spool(path):
    """Seven good runs and one whose layer name holds a NUL, fourth of eight (it used to stop the rest)."""
    spool = Store(f"sqlite:///{path}")
    uuids, bad = [], None
    for m in range(8):
        rec = record(host="rack3-node07" if m % 2 else "rack3-node08", minutes=m)
        if m == 3:
            rec.placements = [dataclasses.replace(placement(), layer="encoder.\x00.mlp")]
        uuid = spool.save_run(rec)
        if m == 3:
            bad = uuid
        else:
            uuids.append(uuid)
    spool.close()
    return uuids, bad


def test_push_sends_the_seven_good_runs_and_quarantines_the_poisoned_one(tmp_path, run_cli):
    spool = tmp_path / "spool.db"
    good, bad = poisoned_spool(spool)
    with pg_schema_url() as url:
        code, out, err = run_cli("push", "--db", url, "--spool", str(spool))
        assert code == 1 and err == ""
        assert "7 run(s) sent, 0 already there, 7 removed from the spool, 1 quarantined" in out
        assert f"refused {bad} (host rack3-node07): PostgreSQL text fields cannot contain NUL" in out
        listing = [line for line in out.splitlines() if line.startswith(f"  {bad}")]
        assert len(listing) == 1 and "host rack3-node07" in listing[0] and "refused 20" in listing[0]
        target = Store(url)
        assert sorted(r.uuid for r in target.runs()) == sorted(good)
        kept = Store(f"sqlite:///{spool}")
        assert [r.uuid for r in kept.runs()] == [bad]
        assert kept.load_run(kept.resolve_run(bad)).placements[0].layer == "encoder.\x00.mlp"  # intact

        # Decision: a push that quarantines nothing new exits 0 (everything sendable was sent), and
        # still lists what the quarantine holds.
        code, out, _ = run_cli("push", "--db", url, "--spool", str(spool))
        assert code == 0 and "0 run(s) sent, 0 already there, 0 removed from the spool, 0 quarantined" in out
        assert sum(line.startswith(f"  {bad}") for line in out.splitlines()) == 1
        code, out, _ = run_cli("push", "--db", url, "--spool", str(spool), "--retry-quarantined")
        assert code == 1 and f"refused {bad}" in out and "1 quarantined" in out
        assert len(target.runs()) == 7 and [r.uuid for r in kept.runs()] == [bad]

        # The store fixed (here: the poisoned run repaired in the spool): a retry sends it and empties the quarantine.
        with Session(kept.engine) as session, session.begin():
            session.execute(text("UPDATE placements SET layer = 'encoder.0.mlp' WHERE layer LIKE 'encoder.%'"))
        result = push(url, spool, retry_quarantined=True)
        assert (len(result.copied), result.refused, result.quarantined) == (1, (), ())
        assert len(target.runs()) == 8 and kept.runs() == []
        target.close()
        kept.close()


def test_a_store_that_is_away_still_exits_3_and_leaves_the_spool_alone(tmp_path, run_cli):
    spool = tmp_path / "spool.db"
    good, bad = poisoned_spool(spool)
    code, out, err = run_cli("push", "--db", _dead_server_url(), "--spool", str(spool))
    assert code == 3 and out == "" and len(err.strip().splitlines()) == 1 and "Sp00l-secret" not in err
    kept = Store(f"sqlite:///{spool}")
    assert sorted(r.uuid for r in kept.runs()) == sorted(good + [bad])


def test_a_run_the_server_refuses_is_spooled_straight_into_the_quarantine(tmp_path, run_cli):
    spool = tmp_path / "spool.db"
    rec = record()
    rec.tag = "nightly\x00"
    with pg_schema_url() as url:
        saved = save_or_spool(rec, url, spool=spool)
        assert saved.spooled and "quarantine" in saved.message and "NUL" in saved.message
        code, out, _ = run_cli("push", "--db", url, "--spool", str(spool))
        assert code == 0 and "0 run(s) sent" in out and f"  {saved.uuid}  host rack3-node07" in out
        assert Store(url).runs() == []


def test_merge_reports_each_run_and_a_refusal_does_not_stop_the_others(tmp_path, run_cli):
    source = tmp_path / "lab.db"
    good, bad = poisoned_spool(source)
    with pg_schema_url() as url:
        Store(url).save_run(dataclasses.replace(record(minutes=0), uuid=good[0]))  # one already there
        code, out, _ = run_cli("merge", str(source), "--db", url)
        assert code == 1
        lines = out.splitlines()
        assert f"already present {good[0]}" in lines
        assert sorted(line.split()[1] for line in lines if line.startswith("copied ")) == sorted(good[1:])
        assert any(line.startswith(f"refused {bad} (host rack3-node07): ") for line in lines)
        assert lines[-1].endswith("6 run(s) imported, 1 already there, 1 refused")
        assert len(Store(url).runs()) == 7


def test_a_spool_an_older_eaves_made_is_migrated_and_pushed(tmp_path, run_cli):
    spool = tmp_path / "old-spool.db"
    engine = create_engine(f"sqlite:///{spool}")
    with engine.begin() as conn:
        command.upgrade(schema._alembic_config(conn), "0002")
    rec = record()
    rec.uuid = "11111111-2222-4333-8444-555555555555"
    with Session(engine) as session, session.begin():
        write_before_0004(session, rec)  # its placements' roofs under extra, as 0002 kept them
    engine.dispose()
    target = f"sqlite:///{tmp_path / 'store.db'}"
    code, out, _ = run_cli("push", "--db", target, "--spool", str(spool))
    assert code == 0 and "1 run(s) sent" in out
    assert [r.uuid for r in Store(target).runs()] == [rec.uuid]
    assert Store(target).load_run(1).placements == tuple(rec.placements)
