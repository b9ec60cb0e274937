"""Time every layer of a PyTorch model on this host with forward hooks, as analyzer layer specs.

A layer is a module of a type eaves knows (timed whole, children included) or any module with no
children; each call of it in one forward pass is one layer. The model runs in inference mode:
untimed warm-up passes, then passes with hooks that read the clock before and after every layer.
As with every eaves figure, the repetition count is calibrated so that one sample lasts the
policy's minimum time, and each layer's sample is its time per call over those passes.
Work done outside any layer (functional calls in a forward method, `x + y`) shows only in the
whole-pass time, which is kept beside the layers.

Inputs are random floats of the given shape, or random token ids below the vocabulary when the
model's first layer is an Embedding. PyTorch is imported here only: nothing else needs it.
"""

from __future__ import annotations

import importlib
import json
import statistics
import warnings
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable, Optional, Sequence

from eaves.errors import InputError
from eaves.layers import LayerSpec
from eaves.timing import TimingPolicy, calibrate, clock_ns

try:
    import torch
except ImportError as err:  # pragma: no cover - the message is what matters
    raise InputError("profile-torch needs PyTorch: pip install 'eaves[torch]'") from err

from eaves.torch_kinds import counted, is_unit, type_name

TORCH_DTYPES = {"fp32": torch.float32, "bf16": torch.bfloat16, "int8": torch.float32}
BF16_FEATURES = ("avx512_bf16", "amx_bf16", "bf16", "svebf16")  # x86 and Arm names in /proc/cpuinfo
WARMUP_PASSES = 2


@dataclass(frozen=True)
class NotCounted:
    """A layer that ran and was timed, but whose operations eaves cannot count."""

    name: str
    module_type: str
    seconds: tuple[float, ...]
    reason: str

    @property
    def median_seconds(self) -> float:
        return statistics.median(self.seconds)


@dataclass(frozen=True)
class TorchProfile:
    """Every layer of one model timed on this host: counted layers, uncounted ones, whole passes."""

    model: str  # what was profiled, as the user named it
    input_shape: tuple[int, ...]
    dtype: str
    threads: int
    layers: tuple[LayerSpec, ...]
    not_counted: tuple[NotCounted, ...]
    pass_seconds: tuple[float, ...]  # one whole forward pass (hooks included), per sample
    repetitions: int  # forward passes per sample

    @property
    def layer_share(self) -> float:
        """Fraction of the median pass spent inside layers (the rest: functional code, hooks)."""
        inside = sum(s.median_seconds for s in self.layers) + sum(n.median_seconds for n in self.not_counted)
        passes = sorted(self.pass_seconds)
        return inside / passes[len(passes) // 2]


@dataclass
class _Call:
    """What the capture pass saw of one layer call."""

    name: str
    module: Any
    in_shapes: list
    kw_shapes: dict
    out_shape: Optional[tuple]
    distinct_elements: int


def load_factory(ref: str) -> Callable[[], Any]:
    """`package.module:function` -> the function (a factory returning an nn.Module)."""
    module_name, _, attr = ref.partition(":")
    if not module_name or not attr:
        raise InputError(f"MODEL: {ref!r} is not MODULE:FACTORY (e.g. eaves.torch_demo:tiny_tagger)")
    try:
        module = importlib.import_module(module_name)
    except ImportError as err:
        raise InputError(f"MODEL: cannot import {module_name}: {err}") from None
    factory = getattr(module, attr, None)
    if not callable(factory):
        raise InputError(f"MODEL: {module_name} has no callable {attr!r}")
    return factory


def parse_shape(text: str) -> tuple[int, ...]:
    """'1,3,224,224' -> (1, 3, 224, 224); every axis a whole number above zero."""
    try:
        shape = tuple(int(p) for p in text.replace("x", ",").split(","))
    except ValueError:
        raise InputError(f"--input-shape: {text!r} is not a comma-separated list of whole numbers") from None
    if not shape or any(n < 1 for n in shape):
        raise InputError(f"--input-shape: {text!r}: every axis must be at least 1")
    return shape


def check_dtype(dtype: str, features: Sequence[str]) -> None:
    """Refuse a dtype this host or this PyTorch cannot run natively, in one line."""
    if dtype not in TORCH_DTYPES:
        raise InputError(f"--dtype: {dtype!r} is not one of {', '.join(TORCH_DTYPES)}")
    if dtype == "bf16" and not set(BF16_FEATURES) & set(features):
        raise InputError("--dtype: bf16 needs native bf16 arithmetic (avx512_bf16 or amx_bf16 on x86, bf16 on "
                         "Arm); this host has none, and emulated timings would not be bf16's")
    if dtype == "int8" and set(torch.backends.quantized.supported_engines) <= {"none"}:
        raise InputError("--dtype: int8 needs a quantized engine; this PyTorch build has none")


def prepare(model, dtype: str):
    """The model in inference form at `dtype`; int8 quantizes its Linear layers dynamically."""
    model = model.eval()
    if dtype == "bf16":
        return model.to(torch.bfloat16)
    if dtype == "int8":
        with warnings.catch_warnings():  # the eager quantization API warns that it is deprecated
            warnings.simplefilter("ignore")
            return torch.ao.quantization.quantize_dynamic(model, {torch.nn.Linear}, dtype=torch.qint8)
    return model


def example_input(model, shape: tuple[int, ...], dtype: str):
    """Random input of `shape`: token ids if the first layer is an Embedding, else floats."""
    gen = torch.Generator().manual_seed(20240611)
    first = next((m for _, m in _layers(model)), None)
    if first is not None and type_name(first) == "Embedding":
        return torch.randint(0, first.num_embeddings, shape, generator=gen)
    return torch.randn(shape, generator=gen).to(TORCH_DTYPES[dtype])


def _layers(model):
    """(name, module) of every layer, in registration order, without descending into units."""
    def walk(prefix, module):
        children = list(module.named_children())
        if is_unit(module) or not children:
            yield prefix or type_name(module), module
            return
        for name, child in children:
            yield from walk(f"{prefix}.{name}" if prefix else name, child)
    yield from walk("", model)


def _shape(t) -> Optional[tuple]:
    return tuple(t.shape) if isinstance(t, torch.Tensor) else None


def _first_tensor(out):
    if isinstance(out, torch.Tensor):
        return out
    if isinstance(out, (tuple, list)):
        return next((o for o in out if isinstance(o, torch.Tensor)), None)
    return None


def _capture(model, layers, x) -> list[_Call]:
    """One untimed pass that records every layer call's shapes, in call order."""
    calls: list[_Call] = []

    def hook_for(name):
        def hook(module, args, kwargs, output):
            tensors = [a for a in args if isinstance(a, torch.Tensor)]
            kw = {k: tuple(v.shape) for k, v in kwargs.items() if isinstance(v, torch.Tensor)}
            unique = {id(t): t for t in tensors + [v for v in kwargs.values() if isinstance(v, torch.Tensor)]}
            calls.append(_Call(name, module, [tuple(t.shape) for t in tensors], kw,
                               _shape(_first_tensor(output)), sum(t.numel() for t in unique.values())))
        return hook

    handles = [m.register_forward_hook(hook_for(n), with_kwargs=True) for n, m in layers]
    try:
        model(x)
    finally:
        for h in handles:
            h.remove()
    return calls


def _names(calls: list[_Call]) -> list[str]:
    """Layer names: the module's path, with '#2', '#3' for its later calls in one pass."""
    seen: dict[str, int] = {}
    out = []
    for c in calls:
        seen[c.name] = seen.get(c.name, 0) + 1
        out.append(c.name if seen[c.name] == 1 else f"{c.name}#{seen[c.name]}")
    return out


def _timed_passes(model, layers, x, reps: int, n_calls: int) -> tuple[list[int], int]:
    """Run `reps` passes with clock hooks; nanoseconds per call slot summed over passes, and the total."""
    totals = [0] * n_calls
    state = {"slot": 0, "start": 0}

    def pre(module, args):
        state["start"] = clock_ns()

    def post(module, args, output):
        totals[state["slot"]] += clock_ns() - state["start"]
        state["slot"] += 1

    handles = [h for _, m in layers for h in (m.register_forward_pre_hook(pre), m.register_forward_hook(post))]
    try:
        start = clock_ns()
        for _ in range(reps):
            state["slot"] = 0
            model(x)
            if state["slot"] != n_calls:
                raise InputError(f"model: {state['slot']} layer calls in a pass, {n_calls} in the first: "
                                 "eaves needs the same layers on every pass (no data-dependent branches)")
        elapsed = clock_ns() - start
    finally:
        for h in handles:
            h.remove()
    return totals, elapsed


def profile_module(model, x, *, name: str, dtype: str = "fp32", threads: int = 1,
                   policy: Optional[TimingPolicy] = None) -> TorchProfile:
    """Time every layer of a prepared `model` on input `x` (see the module docstring)."""
    policy = policy or TimingPolicy.quick()
    previous = torch.get_num_threads()
    torch.set_num_threads(threads)
    try:
        with torch.inference_mode():
            for _ in range(WARMUP_PASSES):
                model(x)
            layers = list(_layers(model))
            calls = _capture(model, layers, x)
            n = len(calls)
            reps = calibrate(lambda r: _timed_passes(model, layers, x, r, n), policy)
            samples, passes = [], []
            for _ in range(policy.samples):
                totals, elapsed = _timed_passes(model, layers, x, reps, n)
                samples.append([t * 1e-9 / reps for t in totals])
                passes.append(elapsed * 1e-9 / reps)
    finally:
        torch.set_num_threads(previous)
    specs, uncounted = [], []
    for i, (call, layer_name) in enumerate(zip(calls, _names(calls))):
        seconds = tuple(max(s[i], 1e-9) for s in samples)  # a clock tick is the floor of a time
        layer_dtype = "int8" if dtype == "int8" and "quantized" in type(call.module).__module__ else \
            ("fp32" if dtype == "int8" else dtype)
        c = None if call.out_shape is None else counted(call.module, call.in_shapes, call.out_shape, layer_dtype,
                                                        call.kw_shapes, call.distinct_elements)
        if c is None or c.kind is None:
            reason = c.reason if c is not None else "output is not a tensor"
            uncounted.append(NotCounted(layer_name, type_name(call.module), seconds, reason))
            continue
        specs.append(LayerSpec(name=layer_name, kind=c.kind, dtype=layer_dtype, threads=threads, seconds=seconds,
                               shape=dict(c.shape), batch=c.batch, flops=c.flops, bytes=c.bytes,
                               where=f"{name}:{layer_name}"))
    return TorchProfile(name, tuple(x.shape), dtype, threads, tuple(specs), tuple(uncounted), tuple(passes), reps)


def profile_factory(ref: str, input_shape: tuple[int, ...], *, dtype: str = "fp32", threads: int = 1,
                    policy: Optional[TimingPolicy] = None) -> TorchProfile:
    """Build the model `ref` names (MODULE:FACTORY), prepare it at `dtype` and profile it."""
    factory = load_factory(ref)
    torch.manual_seed(20240611)  # random initialisation, the same on every run
    model = factory()
    if not isinstance(model, torch.nn.Module):
        raise InputError(f"MODEL: {ref} returned {type(model).__name__}, not a torch.nn.Module")
    model = prepare(model, dtype)
    x = example_input(model, input_shape, dtype)
    try:
        return profile_module(model, x, name=ref, dtype=dtype, threads=threads, policy=policy)
    except (RuntimeError, ValueError, TypeError) as err:  # the model refused the input
        first = str(err).strip().splitlines()[0] if str(err).strip() else type(err).__name__
        raise InputError(f"--input-shape {','.join(map(str, input_shape))}: {ref} failed on it: {first}") from None


def write_layer_file(profile: TorchProfile, path: str | Path) -> Path:
    """The counted layers as a JSON layer file that `eaves place FILE` reads back; uncounted ones beside."""
    def row(s: LayerSpec) -> dict:
        r = {"name": s.name, "kind": s.kind, "dtype": s.dtype, "threads": s.threads, "seconds": list(s.seconds),
             "shape": dict(s.shape)}
        r.update({k: v for k, v in (("batch", s.batch), ("flops", s.flops), ("bytes", s.bytes)) if v is not None})
        return r

    doc = {"source": {"model": profile.model, "input_shape": list(profile.input_shape), "dtype": profile.dtype,
                      "threads": profile.threads, "pass_seconds": list(profile.pass_seconds)},
           "layers": [row(s) for s in profile.layers],
           "not_counted": [{"name": n.name, "module_type": n.module_type, "seconds": list(n.seconds),
                            "reason": n.reason} for n in profile.not_counted]}
    path = Path(path)
    try:
        path.write_text(json.dumps(doc, indent=1, allow_nan=False) + "\n", encoding="utf-8")
    except OSError as err:
        raise InputError(f"--layers-out {path}: cannot write: {err.strerror}") from None
    return path

