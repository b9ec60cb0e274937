"""Built-in reference layers, timed on this host with the eaves timing method, for a real demo.

The scenario is our own: "reedling", a small on-device bird-call tagger of the (invented) Fennick
Marsh field lab. It runs a spectrogram patch through a convolution stem (im2col + GEMM), a
depthwise convolution, a residual add and ReLU, a layer norm, one attention block over frames,
a softmax over call classes, and a dense tagger head served at batch 1 to 256.
numpy runs them in fp32 and fp64; lower precisions have no fast numpy path, so none are timed.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Callable, Iterable, Optional

import numpy as np

from eaves.errors import BrokenKernelError
from eaves.layers import LayerSpec
from eaves.threads import use_threads
from eaves.timing import TimingPolicy, repeat_callable, sample

SCENARIO = "reedling (Fennick Marsh field lab bird-call tagger)"
NUMPY_TYPES = {"fp32": np.float32, "fp64": np.float64}  # the dtypes the reference layers run in
DENSE_BATCHES = (1, 2, 4, 8, 16, 32, 64, 128, 256)
SMALL_DENSE_BATCHES = (1, 16, 256)


@dataclass(frozen=True)
class ReferenceLayer:
    """A layer eaves can run: `build()` returns the timed call and an independent reference result."""

    name: str
    kind: str
    dtype: str
    shape: dict[str, int]
    build: Callable[[], tuple[Callable[[], Any], np.ndarray]]
    batch: Optional[int] = None


def _rng(dtype) -> Callable[..., np.ndarray]:
    gen = np.random.default_rng(20240611)
    return lambda *shape: gen.standard_normal(shape).astype(dtype)


def im2col(x: np.ndarray, r: int, s: int, padding: int) -> np.ndarray:
    """Columns of every r x s patch of x[c, h, w] (stride 1): shape (c*r*s, p*q)."""
    xp = np.pad(x, ((0, 0), (padding, padding), (padding, padding)))
    win = np.lib.stride_tricks.sliding_window_view(xp, (r, s), axis=(1, 2))  # c, p, q, r, s
    c, p, q = win.shape[:3]
    return win.transpose(0, 3, 4, 1, 2).reshape(c * r * s, p * q)


def _direct_conv(x: np.ndarray, w: np.ndarray, padding: int) -> np.ndarray:
    """Reference convolution by shifted sums over the kernel window (no im2col, no GEMM)."""
    k, c, r, s = w.shape
    xp = np.pad(x, ((0, 0), (padding, padding), (padding, padding)))
    p, q = xp.shape[1] - r + 1, xp.shape[2] - s + 1
    out = np.zeros((k, p, q), dtype=np.float64)
    for i in range(r):
        for j in range(s):
            out += np.einsum("kc,cpq->kpq", w[:, :, i, j].astype(np.float64), xp[:, i:i + p, j:j + q])
    return out


def _softmax(x: np.ndarray) -> np.ndarray:
    e = np.exp(x - x.max(axis=-1, keepdims=True))
    return e / e.sum(axis=-1, keepdims=True)


def _layernorm(x: np.ndarray, gamma: np.ndarray, beta: np.ndarray) -> np.ndarray:
    mean = x.mean(axis=-1, keepdims=True)
    var = x.var(axis=-1, keepdims=True)
    return (x - mean) / np.sqrt(var + 1e-5) * gamma + beta


def reference_layers(small: bool = False, dtypes: Iterable[str] = ("fp32", "fp64")) -> list[ReferenceLayer]:
    """The scenario's layers; `small` shrinks them for tests."""
    c, hw, k = (4, 12, 8) if small else (16, 48, 32)
    rows, cols = (16, 64) if small else (96, 256)
    heads, frames, head_dim = (2, 16, 16) if small else (4, 96, 32)
    width = 128 if small else 512
    batches = SMALL_DENSE_BATCHES if small else DENSE_BATCHES
    out: list[ReferenceLayer] = []
    for d in dtypes:
        t = NUMPY_TYPES[d]

        def stem(t=t):
            rnd = _rng(t)
            x, w = rnd(c, hw, hw), rnd(k, c, 3, 3)
            wm = w.reshape(k, -1)
            return (lambda: wm @ im2col(x, 3, 3, 1)), _direct_conv(x, w, 1).reshape(k, -1)

        def depthwise(t=t):
            rnd = _rng(t)
            x, w = rnd(k, hw, hw), rnd(k, 3, 3)
            xp = np.pad(x, ((0, 0), (1, 1), (1, 1)))
            win = np.lib.stride_tricks.sliding_window_view(xp, (3, 3), axis=(1, 2))
            expected = sum(w[:, i, j, None, None].astype(np.float64) * xp[:, i:i + hw, j:j + hw]
                           for i in range(3) for j in range(3))
            return (lambda: np.einsum("kpqrs,krs->kpq", win, w, optimize=False)), expected

        def add(t=t):
            rnd = _rng(t)
            a, b = rnd(k, hw, hw), rnd(k, hw, hw)
            o = np.empty_like(a)
            return (lambda: np.add(a, b, out=o)), a.astype(np.float64) + b

        def relu(t=t):
            a = _rng(t)(k, hw, hw)
            o = np.empty_like(a)
            return (lambda: np.maximum(a, 0, out=o)), np.where(a > 0, a, 0)

        def norm(t=t):
            rnd = _rng(t)
            x, g, b = rnd(rows, cols), rnd(cols), rnd(cols)
            return (lambda: _layernorm(x, g, b)), _layernorm(x.astype(np.float64), g, b)

        def softmax(t=t):
            x = _rng(t)(rows, cols)
            return (lambda: _softmax(x)), _softmax(x.astype(np.float64))

        def attend(t=t):
            rnd = _rng(t)
            q, kk, v = rnd(heads, frames, head_dim), rnd(heads, frames, head_dim), rnd(heads, frames, head_dim)
            scale = t(1.0 / np.sqrt(head_dim))

            def run():
                return _softmax(np.matmul(q, kk.transpose(0, 2, 1)) * scale) @ v

            q64, k64 = q.astype(np.float64), kk.astype(np.float64)
            expected = np.einsum("hqk,hkd->hqd", _softmax(np.einsum("hqd,hkd->hqk", q64, k64) * float(scale)), v)
            return run, expected

        out += [
            ReferenceLayer(f"reedling.stem.{d}", "conv2d", d,
                           dict(n=1, c=c, h=hw, w=hw, k=k, r=3, s=3, padding=1), stem, 1),
            ReferenceLayer(f"reedling.depthwise.{d}", "conv2d", d,
                           dict(n=1, c=k, h=hw, w=hw, k=k, r=3, s=3, padding=1, groups=k), depthwise, 1),
            ReferenceLayer(f"reedling.residual-add.{d}", "elementwise", d,
                           dict(elements=k * hw * hw, inputs=2, outputs=1), add),
            ReferenceLayer(f"reedling.relu.{d}", "elementwise", d,
                           dict(elements=k * hw * hw, inputs=1, outputs=1), relu),
            ReferenceLayer(f"reedling.frame-norm.{d}", "layernorm", d, dict(rows=rows, cols=cols), norm),
            ReferenceLayer(f"reedling.call-softmax.{d}", "softmax", d, dict(rows=rows, cols=cols), softmax),
            ReferenceLayer(f"reedling.attend.{d}", "attention", d,
                           dict(batch=1, heads=heads, q_len=frames, k_len=frames, head_dim=head_dim), attend, 1),
        ]
        out += [ReferenceLayer(f"reedling.tagger.b{b}.{d}", "dense", d, dict(m=b, n=width, k=width),
                               _dense_builder(t, b, width), b) for b in batches]
    return out


def _dense_builder(t, batch: int, width: int):
    def build():
        rnd = _rng(t)
        x, w = rnd(batch, width), rnd(width, width)
        o = np.empty((batch, width), dtype=t)
        return (lambda: np.matmul(x, w, out=o)), x.astype(np.float64) @ w
    return build


def time_layer(layer: ReferenceLayer, policy: TimingPolicy, threads: int = 1) -> LayerSpec:
    """Time one reference layer; its first timed result must match the independent reference."""
    fn, expected = layer.build()
    with use_threads(threads):
        timing = sample(repeat_callable(fn), policy)
    got = np.asarray(timing.results[0], dtype=np.float64)
    tol = 1e-3 if layer.dtype == "fp32" else 1e-9
    if got.shape != expected.shape or not np.allclose(got, expected, rtol=tol, atol=tol * 10):
        raise BrokenKernelError(f"reference layer {layer.name}: result differs from the reference computation")
    return LayerSpec(name=layer.name, kind=layer.kind, dtype=layer.dtype, threads=threads,
                     seconds=timing.seconds, shape=layer.shape, batch=layer.batch, where=f"builtin:{layer.name}")


def time_reference_layers(small: bool = False, policy: Optional[TimingPolicy] = None,
                          threads: int = 1, dtypes: Iterable[str] = ("fp32", "fp64")) -> list[LayerSpec]:
    """Time every reference layer on this host."""
    policy = policy or (TimingPolicy.tiny() if small else TimingPolicy.quick())
    return [time_layer(layer, policy, threads) for layer in reference_layers(small, dtypes)]
