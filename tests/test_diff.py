"""`eaves diff`: ceilings and layers of two runs side by side, exit codes, bad references."""

from __future__ import annotations

import dataclasses
import json

import numpy as np
import pytest
from history_fixtures import fill_history, history_figures, layers_record, survey_record
from layer_fixtures import HOSTNAME

from eaves.cli import main
from eaves.errors import EXIT_INPUT, EXIT_WORSE
from eaves.records import PlacedLayer
from eaves.store import Store


@pytest.fixture
def store(tmp_path):
    return Store(f"sqlite:///{tmp_path / 'd.db'}")


def run(store, *argv, capsys):
    code = main([*argv, "--db", store.url])
    out, err = capsys.readouterr()
    return code, out, err


def test_same_distribution_runs_differ_only_within_noise(store, capsys):
    fill_history(store, 2, seed=3)
    code, out, _ = run(store, "diff", "1", "2", "--json", capsys=capsys)
    doc = json.loads(out)
    assert code == 0 and doc["worse"] == []
    names = {c["name"] for c in doc["ceilings"]}
    # every kind of ceiling side by side: bandwidth per level and threads, latency, compute per dtype
    assert {"memory/read/DRAM/2t", "latency/chase/L2/1t", "compute/madd-peak/fp32/1t"} <= names
    assert not any(n.startswith("sweep/") for n in names)  # sweep points are not ceilings


def test_a_slower_dram_is_named_and_exits_worse(store, capsys):
    fill_history(store, 2, seed=3, drift_from=1, drift={"memory/read/DRAM": 0.85, "latency/chase/DRAM": 1.2})
    code, out, _ = run(store, "diff", "1", "2", "--json", capsys=capsys)
    doc = json.loads(out)
    assert code == EXIT_WORSE
    assert {"memory/read/DRAM/1t", "memory/read/DRAM/2t", "latency/chase/DRAM/1t"} == set(doc["worse"])
    lat = next(c for c in doc["ceilings"] if c["name"] == "latency/chase/DRAM/1t")
    assert lat["verdict"] == "slower" and lat["change_pct"] == pytest.approx(20, abs=3)  # higher latency: slower
    # the other way round the same change is an improvement: nothing worse
    assert run(store, "diff", "2", "1", capsys=capsys)[0] == 0


def test_hosts_stand_for_their_newest_complete_run(store, capsys):
    uuids = fill_history(store, 3, seed=5)
    other = "fennick-bench-02"
    store.save_run(survey_record(history_figures(np.random.default_rng(1)), 4, host_key=f"{other}-0badc0de",
                                 hostname=other))
    code, out, _ = run(store, "diff", HOSTNAME, other, "--json", capsys=capsys)
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


def _layer(name, seconds, samples, efficiency):
    return PlacedLayer(layer=name, kind="dense", dtype="fp32", threads=1, batch=None, seconds=seconds,
                       samples=samples, flops=1e6, bytes=1e5, flops_per_byte=10.0, flops_per_s=1e6 / seconds,
                       bytes_per_s=1e5 / seconds, attainable_flops_per_s=1e6 / seconds / efficiency,
                       efficiency=efficiency, bound="compute", roof="fp32 peak")


def test_layers_are_compared_when_both_runs_have_them(store, capsys):
    a = [_layer("tagger", 1e-3, (1.0e-3, 1.01e-3, 0.99e-3, 1.0e-3, 1.02e-3), 0.5), _layer("old", 1e-3, (1e-3,), 0.5)]
    slow = _layer("tagger", 2e-3, (2.0e-3, 2.02e-3, 1.98e-3, 2.0e-3, 2.04e-3), 0.25)
    b = [slow, _layer("fresh", 1e-3, (1e-3,), 0.5)]
    store.save_run(layers_record(a, 0))
    store.save_run(layers_record(b, 1))
    code, out, _ = run(store, "diff", "1", "2", "--json", capsys=capsys)
    doc = json.loads(out)
    assert code == EXIT_WORSE and doc["worse"] == ["tagger"]
    (row,) = doc["layers"]
    assert row["efficiency"]["before"] == pytest.approx(0.5) and row["efficiency"]["after"] == pytest.approx(0.25)
    assert doc["new_layers"] == ["fresh"] and doc["vanished_layers"] == ["old"]
    code, out, _ = run(store, "diff", "1", "2", capsys=capsys)  # the table names the layer too
    assert "tagger" in out and "slower" in out and "new layer: fresh" in out


def test_a_memory_ceiling_compares_the_best_variant(store, capsys):
    rng = np.random.default_rng(9)
    figs = history_figures(rng)
    # the second run reached DRAM read through another variant: still the same ceiling
    figs2 = [dataclasses.replace(f, variant="nt-store") if f.suite == "memory" else f for f in history_figures(rng)]
    store.save_run(survey_record(figs, 0))
    store.save_run(survey_record(figs2, 1))
    doc = json.loads(run(store, "diff", "1", "2", "--json", capsys=capsys)[1])
    assert all(c["present"] == "both" for c in doc["ceilings"])
