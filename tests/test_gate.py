"""`eaves gate`: layers judged against their roofs before and after; a measured end-to-end case."""

from __future__ import annotations

import csv
import json
from dataclasses import replace

import numpy as np
import pytest
from history_fixtures import layers_record
from layer_fixtures import save_survey, synthetic_figures
from run_records import timed_layer

from eaves.cli import main
from eaves.errors import EXIT_INPUT, EXIT_WORSE
from eaves.gate import compare_layers, efficiency_samples
from eaves.noise import DEFAULT_SPREAD, NOISE_MULTIPLE
from eaves.place import place_layers
from eaves.reference_layers import reference_layers, time_layer
from eaves.roofline import model_from_store
from eaves.timing import TimingPolicy, calibrate, repeat_callable, sample


def gate(store, *argv, capsys):
    code = main(["gate", *argv, "--db", store.url])
    out, err = capsys.readouterr()
    return code, out, err


def test_efficiency_samples_scale_as_one_over_time():
    p = timed_layer("x", 2e-3, (1e-3, 2e-3, 4e-3), 0.5)
    assert efficiency_samples(p) == pytest.approx((1.0, 0.5, 0.25))


def test_loss_beyond_threshold_and_noise_fails_a_small_one_does_not():
    base = [timed_layer("a", 1e-3, (1.00e-3, 1.01e-3, 0.99e-3, 1.0e-3, 1.02e-3), 0.6),
            timed_layer("b", 1e-3, (1.00e-3, 1.01e-3, 0.99e-3, 1.0e-3, 1.02e-3), 0.6)]
    cand = [timed_layer("a", 1.2e-3, (1.20e-3, 1.21e-3, 1.19e-3, 1.2e-3, 1.22e-3), 0.5),  # 17 % loss
            timed_layer("b", 1.03e-3, (1.03e-3, 1.04e-3, 1.02e-3, 1.03e-3, 1.05e-3), 0.6 / 1.03)]  # 3 % loss
    result = compare_layers(base, cand, threshold=0.05)
    assert [c.layer for c in result.worse] == ["a"]
    assert compare_layers(base, cand, threshold=0.20).worse == ()


def test_stored_runs_new_and_vanished_layers(store, capsys):
    store.save_run(layers_record([timed_layer("keep", 1e-3, (1e-3, 1.01e-3, 0.99e-3), 0.5),
                                  timed_layer("gone", 1e-3, (1e-3,), 0.5)], 0))
    store.save_run(layers_record([timed_layer("keep", 1e-3, (1e-3, 1.02e-3, 0.98e-3), 0.5),
                                  timed_layer("<b>new</b>", 1e-3, (1e-3,), 0.5)], 1))
    code, out, _ = gate(store, "--baseline", "1", "--candidate", "2", "--json", "-", capsys=capsys)
    doc = json.loads(out)
    assert code == 0 and doc["new_layers"] == ["<b>new</b>"] and doc["vanished_layers"] == ["gone"]
    code, out, _ = gate(store, "--baseline", "1", "--candidate", "2", capsys=capsys)
    assert "new layer: <b>new</b>" in out and "vanished layer: gone" in out and "pass" in out


def test_bad_input_is_one_line_exit_2(store, tmp_path, capsys):
    survey = save_survey(store, synthetic_figures())
    store.save_run(layers_record([timed_layer("keep", 1e-3, (1e-3,), 0.5)], 0))
    bad = tmp_path / "bad.csv"
    bad.write_text("name,kind,dtype,threads,seconds,m,n,k\nx,dense,fp32,1,fast,4,4,4\n")
    cases = [
        (["--baseline", survey[:8], "--candidate", "2"], "has no placed layers"),  # a survey: no layers
        (["--baseline", "424242", "--candidate", "2"], "no such run"),
        (["--baseline", "2", "--candidate", str(bad), "--run", survey[:8]], "bad.csv:2: seconds"),
        (["--baseline", "2", "--candidate", str(tmp_path / "absent.csv")], "no such file"),
        (["--baseline", "2", "--candidate", "2", "--max-loss", "-5"], "--max-loss"),
    ]
    for argv, needle in cases:
        code, out, err = gate(store, *argv, capsys=capsys)
        assert code == EXIT_INPUT and needle in err and len(err.strip().splitlines()) == 1, (argv, err)


# ---- end to end, measured: one built-in layer, then a deliberately slower variant of it ----------

POLICY = TimingPolicy(min_seconds=0.005, samples=1)
SAMPLES = 7
MAX_LOSS = "50"  # a shared 2-core host can slow one side for a while; the slowed variant loses far more
LAYER = "reedling.relu.fp32"


def _write_layer_file(path, spec, seconds):
    """The analyzer's layer format: one CSV row per sample of the same layer."""
    with open(path, "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(["name", "kind", "dtype", "threads", "seconds", "elements", "inputs", "outputs"])
        for s in seconds:
            w.writerow([spec.name, spec.kind, spec.dtype, spec.threads, repr(s), spec.shape["elements"],
                        spec.shape["inputs"], spec.shape["outputs"]])


def _interleaved(*calls):
    """Seconds per call of each callable, sampled in turns so that a burst of load hits all of them."""
    reps = [calibrate(repeat_callable(c), TimingPolicy(min_seconds=0.005)) for c in calls]
    out = [[] for _ in calls]
    for _ in range(SAMPLES):
        for i, c in enumerate(calls):
            t = sample(repeat_callable(c), POLICY, reps[i])
            out[i] += t.seconds
    return [tuple(s) for s in out]


def test_gate_fails_a_slowed_layer_and_passes_an_unchanged_one(store, tmp_path, capsys):
    # Same stored ceilings for both sides (invented roofs: only the before/after relation matters).
    ceilings = save_survey(store, synthetic_figures())
    model = model_from_store(store, ceilings)
    layer = next(r for r in reference_layers(small=True, dtypes=("fp32",)) if r.name == LAYER)
    spec = time_layer(layer, TimingPolicy.tiny())  # checks the layer against its reference result
    fn, expected = layer.build()
    a = np.random.default_rng(1).standard_normal((8, 12, 12)).astype(np.float32)
    out = np.empty_like(a)

    def unvectorised():  # one numpy call per image row instead of one for the whole tensor
        for i in range(a.shape[0]):
            for j in range(a.shape[1]):
                np.maximum(a[i, j], 0, out=out[i, j])
        return out

    assert np.array_equal(unvectorised(), np.maximum(a, 0))
    base, same, slow = _interleaved(fn, fn, unvectorised)
    assert np.median(slow) > 3 * np.median(base)  # precondition: noise cannot hide a 3x loss
    placed = place_layers([replace(spec, seconds=base)], model)
    baseline = store.save_run(layers_record(placed, 0, ceilings))[:8]

    _write_layer_file(tmp_path / "slow.csv", spec, slow)
    code, text, _ = gate(store, "--baseline", baseline, "--candidate", str(tmp_path / "slow.csv"),
                         "--run", ceilings[:8], "--max-loss", MAX_LOSS, capsys=capsys)
    assert code == EXIT_WORSE and f"FAIL {LAYER}" in text

    _write_layer_file(tmp_path / "same.csv", spec, same)  # the unchanged code
    code, text, _ = gate(store, "--baseline", baseline, "--candidate", str(tmp_path / "same.csv"),
                         "--run", ceilings[:8], "--max-loss", MAX_LOSS, "--json", "-", capsys=capsys)
    doc = json.loads(text)
    assert code == 0 and doc["failed"] == [] and [r["layer"] for r in doc["layers"]] == [LAYER]


def _timed(name, seconds, efficiency_at_1ms=0.5):
    """A layer timed at `seconds` (five samples within 1 %) under a fixed roof."""
    samples = tuple(seconds * f for f in (1.0, 1.01, 0.99, 1.0, 1.005))
    return timed_layer(name, seconds, samples, efficiency_at_1ms * 1e-3 / seconds)


def test_the_gate_learns_each_layers_run_to_run_noise_from_stored_layers_runs(store, capsys):
    # Five stored layers runs in which "head" wobbles by up to +-5 % from run to run (invented data),
    # then a candidate run where "tagger" is 25 % slower than in the last one (20 % of its efficiency
    # lost) and "head" 8 % slower (7.4 % lost).
    rng = np.random.default_rng(12)
    for day in range(5):
        wobble = rng.uniform(0.95, 1.05, 2)
        store.save_run(layers_record([_timed("tagger", 1e-3 * wobble[0]), _timed("head", 2e-3 * wobble[1])], day))
    store.save_run(layers_record([_timed("tagger", 1.25e-3 * wobble[0]), _timed("head", 2e-3 * wobble[1] * 1.08)], 5))
    code, out, _ = gate(store, "--baseline", "5", "--candidate", "6", "--json", "-", capsys=capsys)
    doc = json.loads(out)
    rows = {r["layer"]: r["efficiency"] for r in doc["layers"]}
    # the candidate's run is left out of the noise it is judged against: runs 1-5
    assert all(r["noise"]["source"] == "history" and r["noise"]["runs"] == 5 for r in rows.values())
    head = rows["head"]
    # head: 8 % slower is beyond the samples' noise and --max-loss 5 %, but within its own wobble
    assert head["p_value"] < 0.05 and head["change_pct"] < -5 and head["verdict"] == "held"
    assert head["noise"]["floor_pct"] > -head["change_pct"]
    assert doc["failed"] == ["tagger"] and code == EXIT_WORSE
    # with the samples alone (the old rule) head would have failed too
    assert [c.layer for c in compare_layers(store.load_run(5).placements, store.load_run(6).placements).worse] \
        == ["tagger", "head"]


def test_too_few_layers_runs_hold_the_gate_to_the_measured_layers_default_and_say_so(store, capsys):
    store.save_run(layers_record([_timed("tagger", 1e-3)], 0))
    store.save_run(layers_record([_timed("tagger", 1.1e-3)], 1))  # 9 % of efficiency lost
    code, out, _ = gate(store, "--baseline", "1", "--candidate", "2", "--json", "-", capsys=capsys)
    (row,) = json.loads(out)["layers"]
    # until 3 layers runs exist: the layers default of eaves.noise (measured by tests/benchmarks/layer_noise.py)
    noise = row["efficiency"]["noise"]
    assert noise["source"] == "default" and noise["runs"] == 1
    assert noise["spread_pct"] == pytest.approx(100 * DEFAULT_SPREAD["layers"])
    assert noise["floor_pct"] == pytest.approx(100 * NOISE_MULTIPLE * DEFAULT_SPREAD["layers"])
    assert code == EXIT_WORSE
