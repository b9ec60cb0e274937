"""The test-suite API: the `near_roof` pytest fixture (through pytester) and the plain functions."""

from __future__ import annotations

import alembic.runtime.migration  # noqa: F401  loaded before pytester snapshots sys.modules: a module
import numpy as np                # dropped by the snapshot and loaded again re-registers SQL functions
import pytest
from layer_fixtures import CACHES, save_survey, synthetic_figures

from eaves.errors import InputError
from eaves.expect import NoCeilings, RoofMiss, assert_roof, check_roof, host_model
from eaves.host import collect_host_facts
from eaves.store import Store
from eaves.timing import TimingPolicy

pytest_plugins = ["pytester"]
QUICK = TimingPolicy(min_seconds=0.002, samples=3)


def _store_for_this_host(path, scale: float = 1.0) -> str:
    """A temp store holding an (invented) survey filed under this host's key."""
    facts = collect_host_facts()
    store = Store(f"sqlite:///{path}")
    save_survey(store, synthetic_figures(scale), host_key=facts.host_key(), hostname=facts.hostname)
    return store.url


VECTOR_ADD_TEST = """
import numpy as np

a = np.ones(1 << 16); b = np.ones(1 << 16); c = np.empty(1 << 16)

def test_add_stays_near_its_roof(near_roof):
    check = near_roof(lambda: np.add(a, b, out=c), min_efficiency={min_eff}, flops=a.size,
                      bytes=3 * a.nbytes, dtype="fp64", policy=__import__("eaves.timing").timing.TimingPolicy(
                      min_seconds=0.002, samples=3))
    assert check.placed.bound == "memory"
"""


def test_fixture_passes_when_the_callable_is_near_enough(pytester, tmp_path):
    url = _store_for_this_host(tmp_path / "s.db")
    pytester.makepyfile(VECTOR_ADD_TEST.format(min_eff=1e-4))
    result = pytester.runpytest_subprocess("--eaves-db", url, "-p", "no:cacheprovider")
    result.assert_outcomes(passed=1)


def test_fixture_fails_with_the_efficiency_it_found(pytester, tmp_path):
    # roofs a thousand times above anything this host reaches: far below the required fraction
    url = _store_for_this_host(tmp_path / "s.db", scale=1000.0)
    pytester.makepyfile(VECTOR_ADD_TEST.format(min_eff=0.5))
    result = pytester.runpytest_subprocess("--eaves-db", url, "-p", "no:cacheprovider")
    result.assert_outcomes(failed=1)
    result.stdout.fnmatch_lines(["*of its memory roof*below the required 50.0%*"])


def test_no_stored_survey_is_an_error_with_the_way_out(pytester, tmp_path):
    empty = Store(f"sqlite:///{tmp_path / 'empty.db'}").url
    pytester.makepyfile(VECTOR_ADD_TEST.format(min_eff=0.1))
    result = pytester.runpytest_subprocess("--eaves-db", empty, "-p", "no:cacheprovider")
    result.assert_outcomes(errors=1)  # never a silent pass
    lines = [line for line in result.stdout.lines if "no stored survey" in line]
    assert lines and "eaves survey --quick" in lines[0]
    pytester.makeini(f"[pytest]\neaves_db = sqlite:///{tmp_path / 'absent.db'}\n")  # the ini option, no file
    result = pytester.runpytest_subprocess("-p", "no:cacheprovider")
    result.assert_outcomes(errors=1)


def test_plain_functions_for_other_runners(tmp_path):
    url = _store_for_this_host(tmp_path / "s.db")
    a, b = np.ones(4096), np.ones(4096)
    out = np.empty(4096)
    check = check_roof(lambda: np.add(a, b, out=out), 1e-4, db=url, flops=a.size, bytes=3 * a.nbytes,
                       dtype="fp64", policy=QUICK, name="add4k")
    assert check.passed and check.placed.layer == "add4k" and check.placed.memory_roof == "L2"
    # efficiency is achieved over attainable, from the median of the timed samples
    p = check.placed
    assert p.efficiency == pytest.approx(a.size / p.seconds / p.attainable_flops_per_s)
    model = host_model(url)
    x, w = np.ones((16, 64), np.float32), np.ones((64, 64), np.float32)
    dense = assert_roof(lambda: x @ w, 1e-5, model=model, kind="dense", shape=dict(m=16, n=64, k=64),
                        dtype="fp32", policy=QUICK)
    assert dense.placed.flops == 2 * 16 * 64 * 64
    with pytest.raises(RoofMiss, match="below the required"):
        assert_roof(lambda: x @ w, 1.0, model=host_model(_store_for_this_host(tmp_path / "big.db", 1000.0)),
                    kind="dense", shape=dict(m=16, n=64, k=64), dtype="fp32", policy=QUICK)
    with pytest.raises(NoCeilings, match="eaves survey --quick"):
        host_model(f"sqlite:///{tmp_path / 'nothing.db'}")
    with pytest.raises(InputError, match="flops and bytes"):
        check_roof(lambda: None, 0.5, model=model, flops=1.0)
    with pytest.raises(InputError, match="unknown kind"):
        check_roof(lambda: None, 0.5, model=model, kind="warp-drive")
    assert CACHES[2]["size_bytes"] == 1024 * 1024  # so the 96 KiB of a 4096-element add fit the L2 roof
