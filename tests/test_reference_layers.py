"""The built-in reference layers: correct results, and rates that agree with numpy timed directly."""

from __future__ import annotations

import statistics
import time
from dataclasses import replace

import numpy as np
import pytest

from eaves.errors import BrokenKernelError
from eaves.layers import count
from eaves.reference_layers import im2col, reference_layers, time_layer, time_reference_layers
from eaves.threads import use_threads
from eaves.timing import TimingPolicy


def test_im2col_convolution_matches_a_loop_over_output_pixels():
    # reference: the convolution's definition, one output pixel at a time (numpy only for the dot)
    rng = np.random.default_rng(3)
    x, w = rng.standard_normal((3, 6, 5)), rng.standard_normal((4, 3, 3, 3))
    got = (w.reshape(4, -1) @ im2col(x, 3, 3, 1)).reshape(4, 6, 5)
    xp = np.pad(x, ((0, 0), (1, 1), (1, 1)))
    want = np.empty((4, 6, 5))
    for k in range(4):
        for i in range(6):
            for j in range(5):
                want[k, i, j] = np.sum(w[k] * xp[:, i:i + 3, j:j + 3])
    np.testing.assert_allclose(got, want, rtol=1e-12)


def test_every_small_reference_layer_is_timed_and_checked():
    specs = time_reference_layers(small=True, policy=TimingPolicy(min_seconds=0.0005, samples=3))
    kinds = {s.kind for s in specs}
    assert kinds == {"conv2d", "elementwise", "layernorm", "softmax", "attention", "dense"}
    assert {s.dtype for s in specs} == {"fp32", "fp64"}
    assert all(len(s.seconds) == 3 and min(s.seconds) > 0 for s in specs)
    assert len({s.name for s in specs}) == len(specs)
    for s in specs:
        assert count(s).flops > 0


def test_a_wrong_result_is_refused():
    layer = next(l for l in reference_layers(small=True) if l.kind == "dense")

    def broken():
        fn, expected = layer.build()
        return (lambda: fn() * 1.01), expected

    with pytest.raises(BrokenKernelError, match="differs from the reference"):
        time_layer(replace(layer, build=broken), TimingPolicy.tiny())


def _direct_seconds(fn, min_seconds: float) -> float:
    """np.matmul timed with perf_counter alone: enough calls to last min_seconds, per call."""
    reps, elapsed = 1, 0.0
    while elapsed < min_seconds:
        reps *= 2
        start = time.perf_counter()
        for _ in range(reps):
            fn()
        elapsed = time.perf_counter() - start
    return elapsed / reps


def test_dense_rate_agrees_with_numpy_matmul_timed_directly():
    # Reference library: numpy's matmul (BLAS), timed here without eaves. Each round times the layer
    # with eaves and then directly, back to back, and compares the fastest sample of each: another
    # process on a shared machine only ever slows a sample down, and many short samples (about three
    # calls each) are likely to find a quiet moment. The median of the rounds' ratios must be within
    # 5% of 1, so a counting or timing error of 2x cannot pass. Up to three attempts.
    layer = next(l for l in reference_layers(small=True, dtypes=("fp64",)) if l.name == "reedling.tagger.b256.fp64")
    policy = TimingPolicy(min_seconds=0.0005, samples=15)
    fn, _ = layer.build()
    for _attempt in range(3):
        ratios = []
        for _round in range(7):
            spec = time_layer(layer, policy)
            with use_threads(1):
                direct = min(_direct_seconds(fn, policy.min_seconds) for _ in range(policy.samples))
            ratios.append(direct / min(spec.seconds))  # eaves rate over direct rate, same FLOPs
        ratio = statistics.median(ratios)
        if abs(ratio - 1) <= 0.05:
            break
    assert count(spec).flops == 2 * 256 * 128 * 128
    assert ratio == pytest.approx(1.0, rel=0.05)
