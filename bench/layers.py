"""Operation and byte counts of neural-network layer kinds, so a timing can be turned into rates.

Operations are FLOPs, two per multiply-accumulate (MAC); MACs are kept beside them. Bytes are the
compulsory traffic: weights, inputs and outputs at the dtype's width, each read or written once.
Intermediates that a fused kernel need not write (attention scores, LSTM gate pre-activations)
are not counted. Non-linear functions (exp, tanh, sigmoid, division) count as one FLOP each.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, replace
from typing import Callable, Mapping, Optional

DTYPE_BYTES = {"fp64": 8, "fp32": 4, "fp16": 2, "bf16": 2, "int8": 1, "int16": 2}
INDEX_BYTES = 8  # embedding indices are counted as int64, numpy's default integer


@dataclass(frozen=True)
class LayerSpec:
    """One timed layer as read from a file or measured by eaves: what it is and how long it took."""

    name: str
    kind: str
    dtype: str
    threads: int
    seconds: tuple[float, ...]  # one per sample
    shape: Mapping[str, int] = field(default_factory=dict)
    batch: Optional[int] = None
    flops: Optional[float] = None  # explicit override of the computed count
    bytes: Optional[float] = None  # explicit override, at `dtype` width
    where: str = ""  # "file:line" for messages

    @property
    def median_seconds(self) -> float:
        s = sorted(self.seconds)
        mid = len(s) // 2
        return s[mid] if len(s) % 2 else 0.5 * (s[mid - 1] + s[mid])


@dataclass(frozen=True)
class LayerCounts:
    """What one execution of a layer does and moves."""

    flops: float
    macs: Optional[float]  # None when the row overrode the FLOPs without a shape
    bytes: float
    weight_bytes: Optional[float] = None
    input_bytes: Optional[float] = None
    output_bytes: Optional[float] = None

    @property
    def flops_per_byte(self) -> float:
        return self.flops / self.bytes


@dataclass(frozen=True)
class _Tally:
    """Counts in elements, so the bytes follow from any dtype width."""

    macs: float
    flops: float
    weights: float
    inputs: float
    outputs: float
    fixed_bytes: float = 0.0  # traffic whose width does not follow the dtype (indices)


@dataclass(frozen=True)
class Kind:
    """A layer kind: its shape parameters (with defaults) and how to count it."""

    name: str
    params: tuple[str, ...]
    defaults: Mapping[str, int]
    tally: Callable[[Mapping[str, int]], _Tally]
    check: Callable[[Mapping[str, int]], list[tuple[str, str]]] = lambda s: []
    about: str = ""


def conv_out(size: int, kernel: int, stride: int, padding: int, dilation: int) -> int:
    """Output length of a convolution or pooling window along one axis."""
    return (size + 2 * padding - dilation * (kernel - 1) - 1) // stride + 1


def _matmul(s):
    b, m, n, k = s.get("b", 1), s["m"], s["n"], s["k"]
    macs = b * m * n * k
    return _Tally(macs, 2 * macs, b * k * n, b * m * k, b * m * n)


def _conv_pq(s) -> tuple[int, int]:
    p = conv_out(s["h"], s["r"], s["stride"], s["padding"], s["dilation"])
    q = conv_out(s["w"], s["s"], s["stride"], s["padding"], s["dilation"])
    return p, q


def _conv(s):
    p, q = _conv_pq(s)
    cg = s["c"] // s["groups"]
    macs = s["n"] * s["k"] * p * q * cg * s["r"] * s["s"]
    return _Tally(macs, 2 * macs, s["k"] * cg * s["r"] * s["s"], s["n"] * s["c"] * s["h"] * s["w"],
                  s["n"] * s["k"] * p * q)


def _conv_check(s):
    problems = []
    if s["c"] % s["groups"]:
        problems.append(("groups", f"channels c={s['c']} not divisible by groups={s['groups']}"))
    if s["k"] % s["groups"]:
        problems.append(("groups", f"filters k={s['k']} not divisible by groups={s['groups']}"))
    problems += _window_check(s)
    return problems


def _window_check(s):
    p, q = _conv_pq(s)
    if p < 1 or q < 1:
        return [("h" if p < 1 else "w", f"output size {p}x{q} is below 1 (window {s['r']}x{s['s']}, "
                 f"stride {s['stride']}, padding {s['padding']}, dilation {s['dilation']})")]
    return []


def _pool(s):
    p, q = _conv_pq(s)
    # one compare (max) or add (average) per window element; no multiply-accumulates
    ops = s["n"] * s["c"] * p * q * s["r"] * s["s"]
    return _Tally(0, ops, 0, s["n"] * s["c"] * s["h"] * s["w"], s["n"] * s["c"] * p * q)


def _elementwise(s):
    e = s["elements"]
    return _Tally(0, e * s["ops_per_element"], 0, e * s["inputs"], e * s["outputs"])


def _softmax(s):
    e = s["rows"] * s["cols"]
    # per element: max compare, subtract, exp, sum, divide
    return _Tally(0, 5 * e, 0, e, e)


def _layernorm(s):
    e = s["rows"] * s["cols"]
    # per element: mean add; variance subtract, square, add; normalise subtract, multiply; scale-shift FMA (2)
    return _Tally(0, 8 * e, 2 * s["cols"], e, e)


def _batchnorm(s):
    e = s["n"] * s["c"] * s["h"] * s["w"]
    # inference form: per-channel scale and shift folded into one multiply-add per element
    return _Tally(e, 2 * e, 4 * s["c"], e, e)


def _attention(s):
    bh = s["batch"] * s["heads"]
    q, k, d = s["q_len"], s["k_len"], s["head_dim"]
    macs = 2 * bh * q * k * d  # Q K^T and P V
    flops = 2 * macs + 5 * bh * q * k + bh * q * k  # + softmax + 1/sqrt(d) scaling
    return _Tally(macs, flops, 0, bh * (q * d + 2 * k * d), bh * q * d)


def _embedding(s):
    t, d = s["tokens"], s["dim"]
    return _Tally(0, 0, t * d, 0, t * d, fixed_bytes=t * INDEX_BYTES)


def _recurrent(gates: int, pointwise: int):
    def tally(s):
        b, x, h = s["batch"], s["input_size"], s["hidden_size"]
        macs = gates * b * h * (x + h)
        return _Tally(macs, 2 * macs + pointwise * b * h, gates * h * (x + h) + gates * h,
                      b * x + b * h * (2 if gates == 4 else 1), b * h * (2 if gates == 4 else 1))
    return tally


_CONV = dict(stride=1, padding=0, dilation=1, groups=1)
KINDS: dict[str, Kind] = {k.name: k for k in (
    Kind("dense", ("m", "n", "k"), {}, _matmul,
         about="x[m,k] @ w[k,n]; m rows (batch x tokens), k inputs, n outputs; weights w"),
    Kind("matmul", ("m", "n", "k"), {}, _matmul, about="a[m,k] @ b[k,n]; b counted as the second operand"),
    Kind("batched_matmul", ("b", "m", "n", "k"), {}, _matmul, about="b independent m x k by k x n products"),
    Kind("conv2d", ("n", "c", "h", "w", "k", "r", "s", "stride", "padding", "dilation", "groups"), _CONV,
         _conv, _conv_check, about="n images of c x h x w, k filters of r x s; groups=c is depthwise"),
    Kind("pooling", ("n", "c", "h", "w", "r", "s", "stride", "padding"), dict(stride=1, padding=0, dilation=1),
         _pool, _window_check, about="r x s window over n x c x h x w; one op per window element"),
    Kind("elementwise", ("elements", "inputs", "outputs", "ops_per_element"),
         dict(inputs=1, outputs=1, ops_per_element=1), _elementwise,
         about="add: inputs=2; ReLU: inputs=1"),
    Kind("softmax", ("rows", "cols"), {}, _softmax, about="over the last axis; 5 FLOPs per element"),
    Kind("layernorm", ("rows", "cols"), {}, _layernorm, about="over cols, with scale and shift; 8 FLOPs per element"),
    Kind("batchnorm", ("n", "c", "h", "w"), {}, _batchnorm, about="inference: one multiply-add per element"),
    Kind("attention", ("batch", "heads", "q_len", "k_len", "head_dim"), dict(batch=1), _attention,
         about="softmax(Q K^T / sqrt(d)) V; projections are separate dense layers"),
    Kind("embedding", ("tokens", "dim"), {}, _embedding, about="gather tokens rows of dim; no arithmetic"),
    Kind("lstm", ("batch", "input_size", "hidden_size"), dict(batch=1), _recurrent(4, 13),
         about="one time step: 4 gates; 13 pointwise FLOPs per hidden unit"),
    Kind("gru", ("batch", "input_size", "hidden_size"), dict(batch=1), _recurrent(3, 10),
         about="one time step: 3 gates; 10 pointwise FLOPs per hidden unit"),
)}
# Shape parameters that may be zero (everything else must be a positive whole number).
ZERO_OK = frozenset({"padding"})

# What a layer file may say, so every rate, intensity and JSON value derived from it stays finite.
MIN_SECONDS = 1e-12  # a time must be above this: no layer runs in under a picosecond (a unit mistake)
MAX_SECONDS = 86400.0  # and below one day
MAX_WHOLE = 2**53  # shape values, batch, threads: below it a float holds every whole number exactly (IEEE 754 binary64)
MIN_COUNT, MAX_COUNT = 1, 2**63  # FLOPs and bytes, given or counted from the shape: at least one, below 2**63


def exact_counts(kind: str, shape: Mapping[str, int], dtype: str) -> tuple[int, int]:
    """(FLOPs, bytes) of a countable shape as exact integers, to check against MAX_COUNT before any
    float conversion (a product of large shape values can exceed the float range)."""
    t = KINDS[kind].tally(full_shape(kind, shape))
    return t.flops, (t.weights + t.inputs + t.outputs) * DTYPE_BYTES[dtype] + t.fixed_bytes


def full_shape(kind: str, shape: Mapping[str, int]) -> dict[str, int]:
    """The shape with the kind's defaults filled in."""
    k = KINDS[kind]
    return {**k.defaults, **{p: v for p, v in shape.items() if p in k.params}}


def shape_problems(kind: str, shape: Mapping[str, int]) -> list[tuple[str, str]]:
    """(field, problem) for every missing or inconsistent shape parameter; empty when countable."""
    k = KINDS[kind]
    s = full_shape(kind, shape)
    missing = [p for p in k.params if p not in s]
    if missing:
        return [(p, f"missing (kind {kind} needs {', '.join(k.params)})") for p in missing]
    return k.check(s)


def count(spec: LayerSpec, dtype: Optional[str] = None) -> LayerCounts:
    """FLOPs, MACs and compulsory bytes of one execution, at `dtype` (default: the layer's own)."""
    dtype = dtype or spec.dtype
    width = DTYPE_BYTES[dtype]
    tally = None
    if spec.flops is None or spec.bytes is None:
        tally = KINDS[spec.kind].tally(full_shape(spec.kind, spec.shape))
    if tally is None:
        # both counts given: bytes are at the row's dtype width and scale with the width
        return LayerCounts(spec.flops, None, spec.bytes * width / DTYPE_BYTES[spec.dtype])
    w, i, o = tally.weights * width, tally.inputs * width, tally.outputs * width
    computed_bytes = w + i + o + tally.fixed_bytes
    flops = float(tally.flops) if spec.flops is None else spec.flops
    macs = float(tally.macs) if spec.flops is None else None
    if spec.bytes is None:
        return LayerCounts(flops, macs, float(computed_bytes), float(w), float(i), float(o))
    return LayerCounts(flops, macs, spec.bytes * width / DTYPE_BYTES[spec.dtype])


def with_batch(spec: LayerSpec, batch: int) -> LayerSpec:
    """The same layer at another batch size (dense: rows scale with it; attention: the batch axis)."""
    if spec.kind in ("dense", "matmul"):
        rows_per_item = spec.shape["m"] / (spec.batch or 1)
        shape = {**spec.shape, "m": max(1, int(math.ceil(rows_per_item * batch)))}
    elif spec.kind == "attention":
        shape = {**spec.shape, "batch": batch}
    else:
        raise ValueError(f"kind {spec.kind} has no batch axis eaves can vary")
    return replace(spec, shape=shape, batch=batch, flops=None, bytes=None)


BATCHABLE = ("dense", "matmul", "attention")
