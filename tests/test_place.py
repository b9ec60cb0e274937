"""Placing layers under a model, what-if precision, batching, and the `eaves place` command."""

from __future__ import annotations

import json
import subprocess
import sys

import pytest
from layer_fixtures import CACHES, HOST_KEY, KIB, save_survey, synthetic_figures, temp_store

import eaves.cli
from eaves.errors import InputError
from eaves.layers import LayerSpec
from eaves.place import Placer, as_dtype, place_layers
from eaves.roofline import model_from_figures


@pytest.fixture
def model():
    return model_from_figures(synthetic_figures(), "0badc0de-run", HOST_KEY, {"caches": CACHES})


def dense(seconds, m=64, n=512, k=512, dtype="fp32", threads=1, batch=None, name="d") -> LayerSpec:
    return LayerSpec(name, "dense", dtype, threads, (seconds,), dict(m=m, n=n, k=k), batch=batch, where=f"f.csv:{name}")


def test_compute_bound_layer_placement_worked_by_hand(model):
    # dense 64x512x512 fp32: 33.55 MFLOP over 1.31 MB -> 25.6 FLOP/B; the 1.31 MB working set fits the
    # 16 MiB L3 (55 GB/s at 1 thread) -> ridge 100e9 / 55e9 = 1.82 FLOP/B, so compute-bound at 100 GFLOP/s.
    # Timed at 1 ms: 33.55 GFLOP/s achieved -> efficiency 0.3355, headroom 2.98x.
    (p,) = place_layers([dense(1e-3)], model)
    assert p.flops == 2 * 64 * 512 * 512 and p.bytes == 4 * (64 * 512 + 512 * 512 + 64 * 512)
    assert p.flops_per_byte == pytest.approx(25.6)
    assert p.bound == "compute" and p.roof == "fp32 peak"
    assert p.attainable_flops_per_s == pytest.approx(100e9)
    assert p.efficiency == pytest.approx(p.flops_per_s / p.attainable_flops_per_s) == pytest.approx(0.33554432)
    assert p.headroom == pytest.approx(1 / p.efficiency)
    assert p.memory_roof == "L3" and p.consistent_level == "L3"
    assert p.compute_efficiency == pytest.approx(p.flops_per_s / 100e9)
    assert p.memory_efficiency == pytest.approx(p.bytes_per_s / 55e9)
    assert p.achievable_efficiency == pytest.approx(p.flops_per_s / 80e9)
    assert p.macs == p.flops / 2


def test_a_placement_in_json_keeps_the_keys_it_always_had(model):
    # The roofs a layer is held against became fields of PlacedLayer (and columns of the store,
    # migration 0004); the JSON documents keep schema_version 1: the same keys, under "extra" as before.
    (p,) = place_layers([dense(1e-3, batch=8)], model)
    d = json.loads(json.dumps(p.to_dict(), allow_nan=False))
    assert list(d) == ["layer", "kind", "dtype", "threads", "batch", "seconds", "samples", "flops", "bytes",
                       "flops_per_byte", "flops_per_s", "bytes_per_s", "attainable_flops_per_s", "efficiency",
                       "bound", "roof", "extra"]
    assert list(d["extra"]) == ["macs", "where", "working_set_bytes", "memory_roof", "memory_roof_bytes_per_s",
                                "memory_roof_kernel", "compute_roof", "compute_roof_ops_per_s",
                                "ridge_flops_per_byte", "memory_efficiency", "compute_efficiency",
                                "achievable_efficiency", "headroom", "consistent_level", "threads_measured",
                                "threads_match", "memory_threads_measured", "items_per_s"]
    assert d["extra"]["headroom"] == 1 / p.efficiency and d["extra"]["working_set_bytes"] == p.bytes
    assert d["extra"]["memory_roof"] == p.memory_roof and d["extra"]["where"] == "f.csv:d"
    assert d["samples"] == [1e-3] and d["extra"]["items_per_s"] == p.extra["items_per_s"]


def test_memory_bound_side_of_the_ridge(model):
    # elementwise add of 4M fp32 elements: 4M FLOP over 48 MiB, 1/12 FLOP/B; too big for any cache
    # -> DRAM 20 GB/s -> attainable 20e9 / 12 = 1.67 GFLOP/s.
    add = LayerSpec("add", "elementwise", "fp32", 1, (10e-3,), dict(elements=4 * 1024 * 1024, inputs=2))
    (p,) = place_layers([add], model)
    assert p.bound == "memory" and p.roof == "DRAM"
    assert p.attainable_flops_per_s == pytest.approx(20e9 / 12)
    assert p.consistent_level == "DRAM"  # 5 GB/s is within the DRAM roof
    assert p.efficiency == pytest.approx(p.memory_efficiency)  # on the slope both are the same


def test_small_working_set_is_held_against_its_cache_level(model):
    small = LayerSpec("relu", "elementwise", "fp32", 1, (1e-6,), dict(elements=1024))  # 8 KiB
    (p,) = place_layers([small], model)
    assert p.memory_roof == "L1" and p.working_set_bytes == 8 * KIB
    # bandwidth above the fit level's roof is consistent only with a faster level
    big = LayerSpec("add", "elementwise", "fp32", 1, (1.3e-3,), dict(elements=4 * 1024 * 1024, inputs=2))
    (q,) = place_layers([big], model)  # 50 MiB in 1.3 ms = 40 GB/s > DRAM's 20 GB/s
    assert q.bound == "impossible" or q.consistent_level in ("L1", "L2", "L3")


def test_a_layer_above_every_roof_is_flagged_impossible(model):
    (p,) = place_layers([dense(1e-7)], model)  # 335 TFLOP/s on a 100 GFLOP/s host
    assert p.bound == "impossible" and p.roof == "none"
    assert "above every roof of fp32" in p.extra["reason"]
    (ok,) = place_layers([dense(p.flops / 95e9)], model)  # 95% of the peak is placed normally
    assert ok.bound == "compute" and ok.efficiency == pytest.approx(0.95)


def test_thread_mismatch_uses_the_nearest_measured_count(model):
    (p,) = place_layers([dense(1e-3, threads=3)], model)
    assert p.threads_match == "nearest" and p.threads_measured == 2
    assert p.attainable_flops_per_s == pytest.approx(200e9)


def test_missing_compute_ceilings_are_listed_together(model):
    layers = [dense(1e-3, dtype="fp16", name="a"), dense(1e-3, name="b"), dense(1e-3, dtype="bf16", name="c")]
    with pytest.raises(InputError) as err:
        place_layers(layers, model)
    lines = str(err.value).splitlines()
    assert lines == ["f.csv:a: dtype: no compute ceilings for fp16 in run 0badc0de (measured: fp32, fp64, int8)",
                     "f.csv:c: dtype: no compute ceilings for bf16 in run 0badc0de (measured: fp32, fp64, int8)"]


def test_what_if_int8_quarters_the_bytes_and_raises_the_roof(model):
    (q,) = as_dtype([dense(1e-3, m=1)], model, "int8")
    assert q.as_bytes == pytest.approx(q.bytes / 4)
    assert q.as_flops_per_byte == pytest.approx(4 * q.flops_per_byte)  # common practice: int8 = fp32 / 4
    assert q.as_attainable_flops_per_s > q.attainable_flops_per_s
    with pytest.raises(InputError, match="unknown dtype"):
        as_dtype([dense(1e-3)], model, "fp8")
    with pytest.raises(InputError, match="--as-dtype: no compute ceilings for fp16"):
        as_dtype([dense(1e-3)], model, "fp16")


def test_batching_curve_throughput_is_batch_over_latency(model):
    curve = Placer(model).batch_curve(dense(1e-3, m=1, batch=1))
    for point in curve:
        assert point.items_per_s == pytest.approx(point.batch / point.latency_seconds)  # common practice
        assert point.latency_seconds == pytest.approx(point.flops / point.attainable_flops_per_s)
    intensities = [p.flops_per_byte for p in curve]
    assert intensities == sorted(intensities) and intensities[-1] > 50 * intensities[0]  # weights amortised
    assert curve[0].bound == "memory" and curve[-1].bound == "compute"
    attention = LayerSpec("att", "attention", "fp32", 1, (1e-3,), dict(batch=1, heads=4, q_len=64, k_len=64, head_dim=32))
    assert len(Placer(model).batch_curve(attention, (1, 8))) == 2
    with pytest.raises(InputError, match="no batch axis"):
        Placer(model).batch_curve(LayerSpec("s", "softmax", "fp32", 1, (1.0,), dict(rows=1, cols=2)))


def test_measured_throughput_is_batch_over_latency(model):
    (p,) = place_layers([dense(2e-3, m=32, batch=32)], model)
    assert p.extra["items_per_s"] == pytest.approx(32 / 2e-3)  # common practice


# ------------------------------------------------------------------ the command, in-process


@pytest.fixture
def cli():
    return eaves.cli.main


def _layer_file(tmp_path):
    path = tmp_path / "layers.csv"
    path.write_text("name,kind,dtype,threads,seconds,m,n,k\n"
                    "wren.head,dense,fp32,1,0.001,64,512,512\nwren.head,dense,fp32,1,0.0012,64,512,512\n"
                    "wren.proj,dense,fp64,2,0.002,64,512,512\n")
    return path


def test_place_command_table_json_and_chart(tmp_path, cli, capsys):
    store = temp_store(tmp_path)
    uuid = save_survey(store, synthetic_figures())
    out = tmp_path / "placed.json"
    code = cli(["place", str(_layer_file(tmp_path)), "--db", store.url, "--run", uuid[:8], "--json", str(out),
                "--chart", str(tmp_path / "roof.png"), "--as-dtype", "int8", "--batching"])
    assert code == 0
    text = capsys.readouterr().out
    assert "wren.head" in text and "what if: at int8" in text and "batching: wren.head" in text
    doc = json.loads(out.read_text())
    assert doc["ceilings_run"] == uuid and [l["layer"] for l in doc["layers"]] == ["wren.head", "wren.proj"]
    assert doc["layers"][0]["samples"] == [0.001, 0.0012]
    assert (tmp_path / "roof.png").stat().st_size > 0 and (tmp_path / "roof.svg").stat().st_size > 0
    assert cli(["place", str(_layer_file(tmp_path)), "--db", store.url, "--run", uuid, "--json", "-"]) == 0
    assert json.loads(capsys.readouterr().out)["layers"][1]["dtype"] == "fp64"


def test_place_file_with_store_keeps_the_placements_under_the_ceilings_host(tmp_path, cli, capsys):
    store = temp_store(tmp_path)
    uuid = save_survey(store, synthetic_figures())
    assert cli(["place", str(_layer_file(tmp_path)), "--db", store.url, "--run", uuid, "--store"]) == 0
    assert "stored as run" in capsys.readouterr().out
    (layers_run,) = store.runs(kind="layers")
    stored = store.load_run(layers_run.id)
    survey = store.load_run(store.resolve_run(uuid)).summary
    assert stored.ceilings_run_uuid == uuid and stored.summary.host_key == survey.host_key
    assert [p.layer for p in stored.placements] == ["wren.head", "wren.proj"]
    assert stored.placements[0].samples == (0.001, 0.0012)


def test_place_command_errors_are_one_line_each_and_exit_2(tmp_path, cli, capsys):
    store = temp_store(tmp_path)
    only_fp64 = [f for f in synthetic_figures() if f.dtype == "fp64" or f.suite == "memory"]
    uuid = save_survey(store, only_fp64)
    layers = _layer_file(tmp_path)
    assert cli(["place", str(layers), "--db", store.url, "--run", uuid]) == 2
    err = capsys.readouterr().err
    assert err.startswith("eaves: error: ") and f"{layers}:2: dtype: no compute ceilings for fp32" in err
    assert len(err.strip().splitlines()) == 1
    assert cli(["place", str(layers), "--db", store.url, "--run", "deadbeef"]) == 2
    assert "no such run" in capsys.readouterr().err
    bad = tmp_path / "bad.csv"
    bad.write_text("name,kind,dtype,threads,seconds,m,n,k\na,dense,fp32,1,-1,1,1,1\nb,relu,fp32,1,1,1,1,1\n"
                   "c,dense,fp32,1,1,1,1,\n")
    assert cli(["place", str(bad), "--db", store.url]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert err[0] == f"eaves: error: {bad}:2: seconds: '-1' must be above zero"
    assert err[1].startswith(f"{bad}:3: kind: unknown kind 'relu'") and err[2].startswith(f"{bad}:4: k: missing")
    assert len(err) == 3
    assert cli(["place", "--db", store.url]) == 2  # neither a file nor --builtin
    assert cli(["place", str(layers), "--db", str(tmp_path / "empty.db")]) in (2, 3)


def test_place_builtin_times_stores_and_links_the_ceilings(tmp_path, cli, capsys):
    from eaves.host import collect_host_facts

    store = temp_store(tmp_path)
    facts = collect_host_facts()
    # roofs far above any real layer, so timing noise cannot make a layer "impossible"
    uuid = save_survey(store, synthetic_figures(scale=1e4), host_key=facts.host_key(), hostname=facts.hostname)
    assert cli(["place", "--builtin", "--quick", "--db", store.url]) == 0
    out = capsys.readouterr().out
    assert "reedling.tagger.b256.fp32" in out and "stored as run" in out
    (layers_run,) = store.runs(kind="layers")
    stored = store.load_run(layers_run.id)
    assert stored.ceilings_run_uuid == uuid and stored.summary.status == "complete"
    names = {p.layer for p in stored.placements}
    assert {"reedling.stem.fp64", "reedling.attend.fp32", "reedling.tagger.b1.fp64"} <= names
    assert all(p.bound in ("memory", "compute") and p.seconds > 0 for p in stored.placements)
    for p in stored.placements:  # stored figures agree with the counts
        assert p.flops_per_s == pytest.approx(p.flops / p.seconds)


def test_place_end_to_end_in_a_subprocess(tmp_path):
    store = temp_store(tmp_path)
    uuid = save_survey(store, synthetic_figures())
    done = subprocess.run([sys.executable, "-m", "eaves", "place", str(_layer_file(tmp_path)), "--db", store.url,
                           "--run", uuid, "--json", "-"], capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stderr
    assert {l["bound"] for l in json.loads(done.stdout)["layers"]} <= {"memory", "compute"}
    bad = subprocess.run([sys.executable, "-m", "eaves", "place", str(tmp_path / "absent.csv"), "--db", store.url],
                         capture_output=True, text=True, timeout=120)
    assert bad.returncode == 2 and bad.stderr.strip() == f"eaves: error: {tmp_path / 'absent.csv'}: no such file"
