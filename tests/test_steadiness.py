"""How steady a figure is: its run-to-run spread in `eaves show`, the run's JSON and the report,
when the host has at least three complete runs, and nowhere otherwise."""

from __future__ import annotations

import json
import statistics

import pytest
from history_fixtures import fill_wobbly_history
from layer_fixtures import HOST_KEY, HOSTNAME

from eaves.cli import main
from eaves.noise import NOISE_MULTIPLE, steadiness
from eaves.report import build_report
from eaves.store import Store


@pytest.fixture(scope="module")
def store(tmp_path_factory):
    s = Store(f"sqlite:///{tmp_path_factory.mktemp('steady') / 's.db'}")
    fill_wobbly_history(s, 5, seed=4)
    return s


def _spread_by_hand(store, runs, suite, level=None, kernel=None, threads=None, dtype=None) -> float:
    """Median |m[i+1] / m[i] - 1| of one ceiling's run medians, straight from the stored samples."""
    medians = []
    for i in runs:
        (f,) = [f for f in store.load_run(i).figures if f.suite == suite and f.cache_level == level
                and (kernel is None or f.kernel == kernel) and (threads is None or f.threads == threads)
                and (dtype is None or f.dtype == dtype)]
        medians.append(statistics.median(f.samples))
    return statistics.median(abs(b / a - 1) for a, b in zip(medians, medians[1:]))


def _show(store, capsys, *argv):
    assert main(["show", *argv, "--db", store.url]) == 0
    return capsys.readouterr().out


def test_the_steadiness_query_counts_only_runs_up_to_the_one_shown(store):
    newest = steadiness(store, HOST_KEY)
    assert newest and all(n.source == "history" and n.runs == 5 for n in newest.values())
    third = store.load_run(3).summary.started_at
    assert {n.runs for n in steadiness(store, HOST_KEY, until=third).values()} == {3}
    assert steadiness(store, HOST_KEY, until=store.load_run(2).summary.started_at) == {}
    assert steadiness(store, HOST_KEY, k=2) == {}  # fewer than 3 runs looked at: nothing learned
    assert steadiness(store, HOST_KEY, kind="layers") == {}


def test_show_json_carries_each_headline_ceilings_spread(store, capsys):
    doc = json.loads(_show(store, capsys, "5", "--json", "-"))
    memory, latency, compute = (doc["ceilings"][k] for k in ("memory", "latency", "compute"))
    assert memory and latency and compute
    assert all(r["steadiness"]["runs"] == 5 for r in memory + latency)
    assert all(r["peak_steadiness"]["runs"] == 5 for r in compute)
    row = next(r for r in memory if (r["level"], r["kernel"], r["threads"]) == ("DRAM", "read", 1))
    by_hand = _spread_by_hand(store, range(1, 6), "memory", "DRAM", "read", 1)
    assert row["steadiness"]["spread_pct"] == pytest.approx(100 * by_hand)
    assert row["steadiness"]["floor_pct"] == pytest.approx(100 * NOISE_MULTIPLE * by_hand)
    lat = next(r for r in latency if r["level"] == "L2")
    assert lat["steadiness"]["spread_pct"] == pytest.approx(100 * _spread_by_hand(store, range(1, 6), "latency", "L2"))
    fp32 = next(r for r in compute if (r["dtype"], r["threads"]) == ("fp32", 2))
    assert fp32["peak_steadiness"]["spread_pct"] == pytest.approx(
        100 * _spread_by_hand(store, range(1, 6), "compute", kernel="madd-peak", threads=2, dtype="fp32"))


def test_show_json_has_no_steadiness_without_three_runs(store, capsys):
    doc = json.loads(_show(store, capsys, "2", "--json", "-"))
    rows = [r for k in ("memory", "latency", "compute") for r in doc["ceilings"][k]]
    assert rows and not any("steadiness" in r or "peak_steadiness" in r for r in rows)


def test_show_table_lists_the_spread_only_with_history(store, capsys):
    out = _show(store, capsys, "5")
    assert "Run-to-run spread on this host (last 5 complete runs)" in out
    for name in ("memory/read/DRAM/1t", "latency/chase/L2/1t", "compute/madd-peak/fp32/2t"):
        assert name in out
    assert "gemm/matmul" not in out.split("Run-to-run spread")[1]  # headline ceilings only (GEMM has history too)
    assert any(k.suite == "gemm" for k in steadiness(store, HOST_KEY))
    assert "Run-to-run spread" not in _show(store, capsys, "2")


def test_report_shows_the_spread_only_with_history(store, tmp_path):
    page = build_report(store, HOSTNAME).html
    assert "<th>run-to-run spread</th>" in page and "<th>peak run-to-run spread</th>" in page
    assert "(5 runs)</td>" in page
    young = Store(f"sqlite:///{tmp_path / 'young.db'}")
    fill_wobbly_history(young, 2, seed=4)
    assert "run-to-run spread" not in build_report(young, HOSTNAME).html
