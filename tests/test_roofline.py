"""The roofline model built from a stored run: roofs, ridges, thread matching, the formula."""

from __future__ import annotations

import pytest
from layer_fixtures import CACHES, HOST_KEY, KIB, MIB, save_survey, synthetic_figures, temp_store

from eaves.errors import InputError, StoreError
from eaves.roofline import attainable, capacities_from_facts, model_from_figures, model_from_store


def test_attainable_is_the_roofline_formula_worked_by_hand():
    # Williams, Waterman and Patterson, "Roofline: an insightful visual performance model for
    # multicore architectures", CACM 2009: attainable = min(peak FLOP/s, intensity x peak bandwidth).
    # By hand: peak 16 GFLOP/s, bandwidth 8 GB/s -> ridge at 16 / 8 = 2 FLOP/byte.
    #   intensity 0.5  -> min(16, 0.5 x 8 = 4)  = 4 GFLOP/s (memory-bound)
    #   intensity 2    -> min(16, 2 x 8 = 16)   = 16 GFLOP/s (on the ridge)
    #   intensity 10   -> min(16, 10 x 8 = 80)  = 16 GFLOP/s (compute-bound)
    assert attainable(0.5, 16e9, 8e9) == pytest.approx(4e9)
    assert attainable(2.0, 16e9, 8e9) == pytest.approx(16e9)
    assert attainable(10.0, 16e9, 8e9) == pytest.approx(16e9)


def test_memory_roof_is_the_best_kernel_of_each_level_and_named():
    model = model_from_figures(synthetic_figures(), "u", HOST_KEY, {"caches": CACHES})
    by = {(r.level, r.threads): r for r in model.memory}
    assert by[("L1", 1)].value == 200e9 and by[("L1", 1)].kernel == "read"
    assert by[("L3", 1)].value == 55e9 and by[("L3", 1)].kernel == "write"  # write beats read there
    assert by[("DRAM", 2)].value == 30e9
    assert {r.level for r in model.memory} == {"L1", "L2", "L3", "DRAM"}  # the "L9" figure is ignored
    # capacities from the host facts: private L1/L2 grow with threads, the shared L3 does not
    assert by[("L1", 1)].capacity_bytes == 32 * KIB and by[("L1", 2)].capacity_bytes == 64 * KIB
    assert by[("L3", 1)].capacity_bytes == by[("L3", 2)].capacity_bytes == 16 * MIB


def test_compute_roofs_and_ridges():
    model = model_from_figures(synthetic_figures(), "u", HOST_KEY)
    assert model.compute_roof("fp32", 1, "peak").value == 100e9
    assert model.compute_roof("fp32", 1, "achievable").value == 80e9  # best GEMM shape
    assert model.compute_roof("fp32", 1, "achievable").detail == "512x512x512"
    assert model.compute_roof("int8", 1, "achievable") is None
    assert model.compute_roof("fp16", 1) is None
    ridge = next(r for r in model.ridges if r.memory == "DRAM" and r.compute == "fp32 peak" and r.threads == 1)
    assert ridge.flops_per_byte == pytest.approx(100e9 / 20e9)
    for r in model.ridges:  # every ridge is compute roof over memory roof of the same thread count
        c = next(x for x in model.compute if x.name == r.compute and x.threads == r.threads)
        m = next(x for x in model.memory if x.name == r.memory and x.threads == r.threads)
        assert r.flops_per_byte == pytest.approx(c.value / m.value)
    # without host facts the capacity falls back to the largest working set measured at the level
    assert model.memory_roofs(1)[0].capacity_bytes == 16 * KIB


def test_thread_counts_match_exactly_else_the_nearest():
    model = model_from_figures(synthetic_figures(threads=(1, 4)), "u", HOST_KEY)
    assert model.match_threads(4).how == "exact"
    assert model.match_threads(3).measured == 4 and model.match_threads(3).how == "nearest"
    assert model.match_threads(2).measured == 1
    assert model_from_figures(synthetic_figures(threads=(1, 3)), "u", HOST_KEY).match_threads(2).measured == 3  # tie
    assert model.match_threads(64).measured == 4


def test_capacities_from_facts_skip_instruction_caches():
    assert capacities_from_facts({"caches": CACHES}, 1) == {"L1": 32 * KIB, "L2": MIB, "L3": 16 * MIB}
    assert capacities_from_facts({}, 1) == {}


def test_model_from_store_takes_the_newest_complete_survey(tmp_path):
    store = temp_store(tmp_path)
    old = save_survey(store, synthetic_figures(scale=1.0), minutes_ago=60)
    new = save_survey(store, synthetic_figures(scale=2.0), minutes_ago=10)
    save_survey(store, synthetic_figures(scale=3.0), status="interrupted", minutes_ago=1)
    model = model_from_store(store, host=HOST_KEY)
    assert model.run_uuid == new and model.compute_roof("fp32", 1).value == 200e9
    assert model_from_store(store, run_ref=old[:8]).compute_roof("fp32", 1).value == 100e9
    with pytest.raises(StoreError) as err:
        model_from_store(store, run_ref="ffffffff")
    assert err.value.exit_code == 2
    with pytest.raises(StoreError, match="no complete survey run of host other"):
        model_from_store(store, host="other")


def test_a_run_without_ceilings_is_refused(tmp_path):
    store = temp_store(tmp_path)
    only_memory = [f for f in synthetic_figures() if f.suite == "memory"]
    uuid = save_survey(store, only_memory)
    with pytest.raises(InputError, match="no compute ceilings"):
        model_from_store(store, run_ref=uuid)
