"""`eaves diff`: ceilings and layers of two runs side by side, exit codes, bad references."""

from __future__ import annotations

import dataclasses
import json

import numpy as np
import pytest
from history_fixtures import fill_history, fill_wobbly_history, history_figures, layers_record, survey_record, wobbly
from layer_fixtures import HOSTNAME
from run_records import timed_layer

from eaves.cli import main
from eaves.compare import HELD
from eaves.diff import diff_noise, diff_runs
from eaves.errors import EXIT_INPUT, EXIT_WORSE
from eaves.metrics import key_of
from eaves.noise import DEFAULT_SPREAD, NOISE_MULTIPLE
from eaves.store import Store


def run(store, *argv, capsys):
    code = main([*argv, "--db", store.url])
    out, err = capsys.readouterr()
    return code, out, err


def test_same_distribution_runs_differ_only_within_noise(store, capsys):
    fill_history(store, 2, seed=3)
    code, out, _ = run(store, "diff", "1", "2", "--json", "-", capsys=capsys)
    doc = json.loads(out)
    assert code == 0 and doc["worse"] == []
    names = {c["name"] for c in doc["ceilings"]}
    # every kind of ceiling side by side: bandwidth per level and threads, latency, compute per dtype
    assert {"memory/read/DRAM/2t", "latency/chase/L2/1t", "compute/madd-peak/fp32/1t"} <= names
    assert not any(n.startswith("sweep/") for n in names)  # sweep points are not ceilings


def test_a_slower_dram_is_named_and_exits_worse(store, capsys):
    # Three quiet runs first (was: two runs): with fewer, a ceiling's run-to-run floor is its suite's
    # provisional default (NOISE_MULTIPLE x 15 % for memory), which a 15 % drop does not pass; see the next test.
    fill_history(store, 4, seed=3, drift_from=3, drift={"memory/read/DRAM": 0.85, "latency/chase/DRAM": 1.2})
    code, out, _ = run(store, "diff", "3", "4", "--json", "-", capsys=capsys)
    doc = json.loads(out)
    assert code == EXIT_WORSE
    assert {"memory/read/DRAM/1t", "memory/read/DRAM/2t", "latency/chase/DRAM/1t"} == set(doc["worse"])
    lat = next(c for c in doc["ceilings"] if c["name"] == "latency/chase/DRAM/1t")
    assert lat["verdict"] == "lost" and lat["change_pct"] == pytest.approx(20, abs=3)  # higher latency: lost
    assert lat["noise"]["source"] == "history" and lat["noise"]["runs"] == 3  # runs 1-3: the "after" run left out
    # the other way round the same change is an improvement: nothing worse
    assert run(store, "diff", "4", "3", capsys=capsys)[0] == 0


def test_with_fewer_than_three_runs_the_default_floor_is_used_and_said(store, capsys):
    fill_history(store, 2, seed=3, drift_from=1, drift={"memory/read/DRAM": 0.7})
    code, out, _ = run(store, "diff", "1", "2", "--json", "-", capsys=capsys)
    doc = json.loads(out)
    for c in doc["ceilings"]:
        assert c["noise"]["source"] == "default" and c["noise"]["runs"] == 1, c["name"]
        assert c["noise"]["floor_pct"] == pytest.approx(100 * NOISE_MULTIPLE * DEFAULT_SPREAD[c["suite"]])
    dram = next(c for c in doc["ceilings"] if c["name"] == "memory/read/DRAM/1t")
    # 30 % down is beyond the samples' noise and the 3 % threshold, but not memory's provisional floor
    assert NOISE_MULTIPLE * DEFAULT_SPREAD["memory"] > 0.3
    assert dram["p_value"] < 0.05 and dram["change_pct"] == pytest.approx(-30, abs=2)
    assert dram["verdict"] == "held" and code == 0
    out = run(store, "diff", "1", "2", capsys=capsys)[1]
    assert f"{NOISE_MULTIPLE * DEFAULT_SPREAD['memory']:.0%} default" in out and "provisional defaults for" in out


WOBBLE_RUNS = 13
WOBBLE_SEEDS = range(4)  # pairs of one history share its spread estimates: pool a few histories


def test_runs_that_wobble_run_to_run_differ_only_within_their_wobble(tmp_path):
    # Issue 11: between runs on a shared VM the medians move far more than the samples inside a run.
    # Here every figure moves by up to +-5 % per run (consecutive runs up to about 10 % apart) while
    # the samples of a run stay within 1 %. Target (issue 11): at most 5 % of the figures flagged.
    flagged = by_samples_alone = total = 0
    for seed in WOBBLE_SEEDS:
        store = Store(f"sqlite:///{tmp_path / f'w{seed}.db'}")
        fill_wobbly_history(store, WOBBLE_RUNS, seed=seed)
        runs = [store.load_run(i) for i in range(1, WOBBLE_RUNS + 1)]
        for a, b in zip(runs[2:], runs[3:]):  # every consecutive pair with at least 3 runs of history
            noise, _ = diff_noise(store, a, b)
            judged = [m.comparison for m in diff_runs(a, b, noise=noise).metrics if m.comparison]
            assert all(c.noise.source == "history" and c.noise.runs >= 3 for c in judged)
            flagged += sum(c.verdict != HELD for c in judged)
            by_samples_alone += sum(m.comparison.verdict != HELD for m in diff_runs(a, b).metrics if m.comparison)
            total += len(judged)
    assert flagged <= 0.05 * total, f"{flagged} of {total} flagged"
    assert by_samples_alone > 0.3 * total  # the old rule (samples and 3 % only) cries wolf on the same pairs


@pytest.mark.parametrize("planted", ["memory/read/DRAM/1t", "memory/copy/L2/2t", "compute/madd-peak/fp32/1t"])
def test_a_planted_twenty_percent_drop_stands_out_of_the_wobble(store, capsys, planted):
    fill_wobbly_history(store, 10)
    previous = {key_of(f).name(): f for f in store.load_run(10).figures}
    figs = wobbly(history_figures(np.random.default_rng(5)), np.random.default_rng(6), 0.05)
    figs = [dataclasses.replace(f, samples=tuple(0.8 * x for x in previous[planted].samples))
            if key_of(f).name() == planted else f for f in figs]
    store.save_run(survey_record(figs, 10))
    code, out, _ = run(store, "diff", "10", "11", "--json", "-", capsys=capsys)
    doc = json.loads(out)
    row = next(c for c in doc["ceilings"] if c["name"] == planted)
    assert code == EXIT_WORSE and planted in doc["worse"] and row["change_pct"] == pytest.approx(-20, abs=0.5)
    assert row["noise"]["source"] == "history" and row["noise"]["runs"] == 10 and row["noise"]["floor_pct"] < 20
    assert len(doc["worse"]) <= 0.05 * len(doc["ceilings"]) + 1  # the planted drop and at most 5 % besides


def test_hosts_stand_for_their_newest_complete_run(store, capsys):
    uuids = fill_history(store, 3, seed=5)
    other = "fennick-bench-02"
    store.save_run(survey_record(history_figures(np.random.default_rng(1)), 4, host_key=f"{other}-0badc0de",
                                 hostname=other))
    code, out, _ = run(store, "diff", HOSTNAME, other, "--json", "-", capsys=capsys)
    doc = json.loads(out)
    assert doc["before"]["uuid"] == uuids[-1] and doc["after"]["hostname"] == other
    assert doc["same_hardware"] is True  # same fingerprint: same hardware, another machine


def test_different_hardware_needs_the_flag(store, capsys):
    fill_history(store, 1)
    store.save_run(survey_record(history_figures(np.random.default_rng(1)), 2, host_key="marsh-07-feedf00d",
                                 hostname="marsh-07", fingerprint="feedf00dfeedf00d"))
    code, _, err = run(store, "diff", HOSTNAME, "marsh-07", capsys=capsys)
    assert code == EXIT_INPUT and len(err.strip().splitlines()) == 1
    assert "different hardware" in err and "--allow-different-hosts" in err
    code, out, _ = run(store, "diff", HOSTNAME, "marsh-07", "--allow-different-hosts", capsys=capsys)
    assert code in (0, EXIT_WORSE) and "different hardware" in out


@pytest.mark.parametrize("ref", ["999", "zzzz", "nohost.example"])
def test_unknown_references_are_one_line_input_errors(store, capsys, ref):
    fill_history(store, 1)
    code, out, err = run(store, "diff", "1", ref, capsys=capsys)
    assert code == EXIT_INPUT and out == "" and len(err.strip().splitlines()) == 1 and ref in err


def test_bad_threshold_is_an_input_error(store, capsys):
    fill_history(store, 2)
    assert run(store, "diff", "1", "2", "--threshold", "lots", capsys=capsys)[0] == EXIT_INPUT


def test_layers_are_compared_when_both_runs_have_them(store, capsys):
    a = [timed_layer("tagger", 1e-3, (1.0e-3, 1.01e-3, 0.99e-3, 1.0e-3, 1.02e-3), 0.5),
         timed_layer("old", 1e-3, (1e-3,), 0.5)]
    slow = timed_layer("tagger", 2e-3, (2.0e-3, 2.02e-3, 1.98e-3, 2.0e-3, 2.04e-3), 0.25)
    b = [slow, timed_layer("fresh", 1e-3, (1e-3,), 0.5)]
    store.save_run(layers_record(a, 0))
    store.save_run(layers_record(b, 1))
    code, out, _ = run(store, "diff", "1", "2", "--json", "-", capsys=capsys)
    doc = json.loads(out)
    assert code == EXIT_WORSE and doc["worse"] == ["tagger"]
    (row,) = doc["layers"]
    assert row["efficiency"]["before"] == pytest.approx(0.5) and row["efficiency"]["after"] == pytest.approx(0.25)
    assert doc["new_layers"] == ["fresh"] and doc["vanished_layers"] == ["old"]
    code, out, _ = run(store, "diff", "1", "2", capsys=capsys)  # the table names the layer too
    assert "tagger" in out and "lost" in out and "new layer: fresh" in out


def test_a_memory_ceiling_compares_the_best_variant(store, capsys):
    rng = np.random.default_rng(9)
    figs = history_figures(rng)
    # the second run reached DRAM read through another variant: still the same ceiling
    figs2 = [dataclasses.replace(f, variant="nt-store") if f.suite == "memory" else f for f in history_figures(rng)]
    store.save_run(survey_record(figs, 0))
    store.save_run(survey_record(figs2, 1))
    doc = json.loads(run(store, "diff", "1", "2", "--json", "-", capsys=capsys)[1])
    assert all(c["present"] == "both" for c in doc["ceilings"])
