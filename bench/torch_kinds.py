"""Map a PyTorch module and the real shapes of one call to the analyzer's layer kinds and counts.

Each mapped call becomes a `Counted`: a kind of eaves.layers with its shape, and explicit FLOPs or
bytes only where the kind's formula cannot say it alone (noted beside each case). A module type
with no mapping, or a call the kinds cannot express, becomes `reason` text instead: the profiler
lists it with its time as "not counted" and never drops it.

Recurrent layers (LSTM, GRU) are counted as the analyzer's one-step kind times the sequence length,
summed over layers and directions; their bytes are the compulsory traffic of the whole call (the
weights once, every step's input and output), as the analyzer counts any other layer.
MultiheadAttention is timed as one unit: its FLOPs are the three input projections, the attention
and the output projection, each counted by the analyzer's own kinds; its bytes are the weights,
the distinct query/key/value inputs and the output.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, Mapping, Optional

from eaves.layers import DTYPE_BYTES, KINDS, LayerSpec, conv_out, count

# FLOPs per output element of activations (our own counts; a non-linear function such as exp, tanh
# or erf counts as one FLOP, as in eaves.layers). Types not listed here are "not counted".
ACTIVATION_OPS = {
    "ReLU": 1, "ReLU6": 2, "LeakyReLU": 2, "Hardtanh": 2, "Threshold": 1, "PReLU": 2,
    "Sigmoid": 3,  # exp(-x), add 1, divide
    "Tanh": 1, "ELU": 3, "CELU": 3, "SELU": 4, "Softplus": 3, "Softsign": 3,
    "GELU": 5,  # erf form: x / sqrt2, erf, add 1, multiply 0.5, multiply x
    "SiLU": 4,  # sigmoid (3) and one multiply
    "Mish": 5, "Hardswish": 4, "Hardsigmoid": 3,
}
UNIT_TYPES = ("MultiheadAttention", "LSTM", "GRU")  # timed whole: their children are not separate layers


@dataclass(frozen=True)
class Counted:
    """One module call as the analyzer sees it, or the reason it cannot."""

    kind: Optional[str]
    shape: Mapping[str, int] = field(default_factory=dict)
    batch: Optional[int] = None
    flops: Optional[float] = None
    bytes: Optional[float] = None
    reason: str = ""  # non-empty: not counted, and why


def _not(reason: str) -> Counted:
    return Counted(None, reason=reason)


def _pair(v: Any) -> tuple[int, int]:
    return (int(v[0]), int(v[-1])) if isinstance(v, (tuple, list)) else (int(v), int(v))


def _numel(shape) -> int:
    return math.prod(shape) if shape else 1


def type_name(module) -> str:
    return type(module).__name__


def is_unit(module) -> bool:
    """Known types are timed whole, whatever children they hold (quantized Linear, attention)."""
    return _is_quantized_linear(module) or type_name(module) in UNIT_TYPES or type_name(module) in _MAPPERS


def _is_quantized_linear(module) -> bool:
    return type_name(module) == "Linear" and "quantized.dynamic" in type(module).__module__


def counted(module, in_shapes: list[tuple[int, ...]], out_shape: Optional[tuple[int, ...]], dtype: str,
            kwargs_shapes: Mapping[str, tuple[int, ...]] = {},
            distinct_input_elements: Optional[int] = None) -> Counted:
    """The analyzer's view of one call of `module` with these input and output shapes.

    `in_shapes` are the positional tensor arguments, `kwargs_shapes` the keyword ones;
    `distinct_input_elements` counts a tensor passed twice (self-attention) once."""
    if _is_quantized_linear(module):
        return _quantized_linear(module, in_shapes, out_shape)
    name = type_name(module)
    if name in ACTIVATION_OPS and out_shape is not None:
        return Counted("elementwise", dict(elements=_numel(out_shape), inputs=1, outputs=1,
                                           ops_per_element=ACTIVATION_OPS[name]))
    mapper = _MAPPERS.get(name)
    if mapper is None:
        return _not(f"no mapping for module type {name}")
    if not in_shapes and name != "MultiheadAttention":
        return _not(f"{name} called without a tensor input")
    if mapper is _attention:
        return _attention(module, in_shapes, out_shape, dtype, kwargs_shapes, distinct_input_elements)
    return mapper(module, in_shapes, out_shape, dtype, kwargs_shapes)


def _linear(module, ins, out, dtype, kw) -> Counted:
    x = ins[0]
    # dense: m rows = every leading axis (batch x tokens), k inputs, n outputs; 2 x m x k x n FLOPs
    return Counted("dense", dict(m=_numel(x[:-1]), n=module.out_features, k=module.in_features),
                   batch=x[0] if len(x) >= 2 else 1)


def _quantized_linear(module, ins, out) -> Counted:
    x = ins[0]
    m, k, n = _numel(x[:-1]), module.in_features, module.out_features
    # dynamically quantized: int8 weights, but activations arrive and leave in fp32
    return Counted("dense", dict(m=m, n=n, k=k), batch=x[0] if len(x) >= 2 else 1,
                   bytes=float(k * n * DTYPE_BYTES["int8"] + (m * k + m * n) * DTYPE_BYTES["fp32"]))


def _outputs_match(kind: str, shape: dict, out, one_d: bool) -> bool:
    s = {**KINDS[kind].defaults, **shape}
    p = conv_out(s["h"], s["r"], s["stride"], s["padding"], s.get("dilation", 1))
    q = conv_out(s["w"], s["s"], s["stride"], s["padding"], s.get("dilation", 1))
    return tuple(out[-1:]) == (q,) and p == 1 if one_d else tuple(out[-2:]) == (p, q)


def _image(x, one_d: bool) -> tuple[int, int, int, int]:
    """n, c, h, w of an image (or a sequence, as h = 1) input, batched or not."""
    if len(x) == (2 if one_d else 3):
        x = (1,) + tuple(x)
    return (x[0], x[1], 1, x[2]) if one_d else (x[0], x[1], x[2], x[3])


def _windowed(kind: str, shape: dict, out, one_d: bool, real_bytes: float, plain: bool) -> Counted:
    """The kind's own shape if it gives the real output size; else the same windows over an input
    counted as already padded (stride 1, no dilation): exact operation counts, real bytes."""
    if plain and _outputs_match(kind, shape, out, one_d):
        return Counted(kind, shape, batch=shape["n"])
    p, q = (1, out[-1]) if one_d else (out[-2], out[-1])
    padded = dict(shape, h=p + shape["r"] - 1, w=q + shape["s"] - 1, stride=1, padding=0)
    if kind == "conv2d":
        padded["dilation"] = 1
    return Counted(kind, padded, batch=shape["n"], bytes=real_bytes)


def _conv(module, ins, out, dtype, kw) -> Counted:
    one_d = type_name(module) == "Conv1d"
    n, c, h, w = _image(ins[0], one_d)
    r, s = (1, module.kernel_size[0]) if one_d else _pair(module.kernel_size)
    stride, dilation, pad = _pair(module.stride), _pair(module.dilation), module.padding
    pad = (0, 0) if isinstance(pad, str) else ((0, pad[0]) if one_d else _pair(pad))
    if one_d:  # the h axis has size 1 and a 1-wide window: its stride and dilation change nothing
        stride, dilation, pad = (stride[1],) * 2, (dilation[1],) * 2, (pad[1],) * 2
    symmetric = stride[0] == stride[1] and dilation[0] == dilation[1] and pad[0] == pad[1] \
        and module.padding_mode == "zeros" and not isinstance(module.padding, str)
    shape = dict(n=n, c=c, h=h, w=w, k=module.out_channels, r=r, s=s, stride=stride[0],
                 padding=pad[0], dilation=dilation[0], groups=module.groups)
    weights = module.out_channels * (c // module.groups) * r * s
    real = float(DTYPE_BYTES[dtype] * (weights + n * c * h * w + n * _numel(out[1:])))
    return _windowed("conv2d", shape, out, one_d, real, symmetric)


def _pool(module, ins, out, dtype, kw) -> Counted:
    name = type_name(module)
    one_d = name.endswith("1d")
    n, c, h, w = _image(ins[0], one_d)
    if name.startswith("Adaptive"):
        oh, ow = (1, out[-1]) if one_d else (out[-2], out[-1])
        if h % oh or w % ow:
            return _not(f"{name} from {h}x{w} to {oh}x{ow}: uneven windows have no analyzer kind")
        r, s = h // oh, w // ow
        plain = one_d or r == s
        shape = dict(n=n, c=c, h=h, w=w, r=r, s=s, stride=s, padding=0)
    else:
        k, st, pd = _pair(module.kernel_size), _pair(module.stride or module.kernel_size), _pair(module.padding)
        if one_d:
            k, st, pd = (1, k[0]), (st[0], st[0]), (pd[0], pd[0])
        plain = st[0] == st[1] and pd[0] == pd[1] and not getattr(module, "ceil_mode", False) \
            and _pair(getattr(module, "dilation", 1)) == (1, 1)
        shape = dict(n=n, c=c, h=h, w=w, r=k[0], s=k[1], stride=st[0], padding=pd[0])
    real = float(DTYPE_BYTES[dtype] * (n * c * h * w + n * _numel(out[1:])))
    return _windowed("pooling", shape, out, one_d, real, plain)


def _batchnorm(module, ins, out, dtype, kw) -> Counted:
    x = ins[0]
    n, c = x[0], x[1]
    rest = x[2:]
    h, w = (1, _numel(rest)) if len(rest) != 2 else rest
    return Counted("batchnorm", dict(n=n, c=c, h=h, w=w), batch=n)


def _layernorm(module, ins, out, dtype, kw) -> Counted:
    cols = _numel(module.normalized_shape)
    return Counted("layernorm", dict(rows=_numel(ins[0]) // cols, cols=cols))


def _softmax(module, ins, out, dtype, kw) -> Counted:
    x = ins[0]
    dim = module.dim if module.dim is not None else -1
    cols = x[dim]
    return Counted("softmax", dict(rows=_numel(x) // cols, cols=cols))


def _embedding(module, ins, out, dtype, kw) -> Counted:
    return Counted("embedding", dict(tokens=_numel(ins[0]), dim=module.embedding_dim))


def _attention(module, ins, out, dtype, kw, distinct_elements=None) -> Counted:
    shapes = list(ins) + [kw[k] for k in ("query", "key", "value") if k in kw]
    if len(shapes) < 3:
        return _not("MultiheadAttention called without query, key and value tensors")
    q, k, v = shapes[:3]
    seq_axis, batch_axis = (1, 0) if module.batch_first else (0, 1)
    if len(q) == 2:  # unbatched
        batch, lq, lk = 1, q[0], k[0]
    else:
        batch, lq, lk = q[batch_axis], q[seq_axis], k[seq_axis]
    e, heads = module.embed_dim, module.num_heads
    att = dict(batch=batch, heads=heads, q_len=lq, k_len=lk, head_dim=e // heads)
    parts = [LayerSpec("att", "attention", dtype, 1, (1.0,), att),
             LayerSpec("q", "dense", dtype, 1, (1.0,), dict(m=batch * lq, k=e, n=e)),
             LayerSpec("k", "dense", dtype, 1, (1.0,), dict(m=batch * lk, k=module.kdim, n=e)),
             LayerSpec("v", "dense", dtype, 1, (1.0,), dict(m=batch * lk, k=module.vdim, n=e)),
             LayerSpec("o", "dense", dtype, 1, (1.0,), dict(m=batch * lq, k=e, n=e))]
    flops = sum(count(p).flops for p in parts)
    weights = e * (e + module.kdim + module.vdim) + e * e
    inputs = distinct_elements if distinct_elements is not None else _numel(q) + _numel(k) + _numel(v)
    return Counted("attention", att, batch=batch, flops=float(flops),
                   bytes=float(DTYPE_BYTES[dtype] * (weights + inputs + _numel(out or q))))


def _recurrent(module, ins, out, dtype, kw) -> Counted:
    kind = type_name(module).lower()
    x = ins[0]
    if len(x) == 2:
        steps, batch = x[0], 1
    else:
        steps, batch = (x[1], x[0]) if module.batch_first else (x[0], x[1])
    dirs = 2 if module.bidirectional else 1
    if getattr(module, "proj_size", 0):
        return _not("LSTM with proj_size has no analyzer kind")
    flops = bytes_ = 0.0
    for layer in range(module.num_layers):
        size = module.input_size if layer == 0 else module.hidden_size * dirs
        step = count(LayerSpec("step", kind, dtype, 1, (1.0,),
                               dict(batch=batch, input_size=size, hidden_size=module.hidden_size)))
        flops += dirs * steps * step.flops
        bytes_ += dirs * (step.weight_bytes + steps * (step.input_bytes + step.output_bytes))
    shape = dict(batch=batch, input_size=module.input_size, hidden_size=module.hidden_size)
    return Counted(kind, shape, batch=batch, flops=flops, bytes=bytes_)


_MAPPERS = {
    "Linear": _linear, "NonDynamicallyQuantizableLinear": _linear,
    "Conv1d": _conv, "Conv2d": _conv,
    "MaxPool1d": _pool, "MaxPool2d": _pool, "AvgPool1d": _pool, "AvgPool2d": _pool,
    "AdaptiveAvgPool1d": _pool, "AdaptiveAvgPool2d": _pool, "AdaptiveMaxPool1d": _pool, "AdaptiveMaxPool2d": _pool,
    "BatchNorm1d": _batchnorm, "BatchNorm2d": _batchnorm,
    "LayerNorm": _layernorm, "Softmax": _softmax, "Embedding": _embedding,
    "MultiheadAttention": _attention, "LSTM": _recurrent, "GRU": _recurrent,
}
