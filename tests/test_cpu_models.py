"""Kernels under other CPUs' code generation: every memory kernel, every peak kernel and the clock chain
compile, finish and verify.

One subprocess per LLVM CPU model, with `NUMBA_CPU_NAME` (and `NUMBA_CPU_FEATURES`) set before numba
loads, its own numba cache and a deadline; a kernel that never returns fails its model's test with
the kernel's name instead of stalling the suite. numba keeps the *host's* features when only the
name is set (numba.core.codegen), which changes scheduling but not the instruction set, so:

- a model whose instructions this CPU can execute runs with the model's own ISA (its feature list
  passed explicitly): its vector width, its kernels;
- a model it cannot execute runs with the model's scheduling and this CPU's instructions (the znver3 /
  znver4 scheduling is what once hung the clock chain), and its own-ISA run is skipped with the
  features this CPU lacks. Its peak blocks are still compiled (not run) for its own ISA.

Run it after touching any inline asm, hand-written IR or kernel.
"""

from __future__ import annotations

import json
import os
import platform
import re
import subprocess
import sys
import time
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import llvmlite.binding as ll
import pytest

# Instructions the compiler may emit for each model from ordinary IR and from the kernels' target intrinsics,
# in LLVM's feature names (from memory of LLVM's X86.td; x86-64-v2 as the x86-64 psABI levels define it).
# Features LLVM only emits through intrinsics no kernel calls (mwaitx, clzero, sha, rdseed ...) are left out:
# a host lacking them still executes every kernel compiled for the model.
_V2 = frozenset("sse sse2 sse3 ssse3 sse4.1 sse4.2 popcnt cx16 sahf".split())
_V3 = _V2 | frozenset("avx avx2 fma f16c bmi bmi2 lzcnt movbe".split())
_SKX = _V3 | frozenset("avx512f avx512cd avx512bw avx512dq avx512vl".split())
_ICX = _SKX | frozenset("avx512vnni avx512vbmi avx512vbmi2 avx512ifma avx512bitalg avx512vpopcntdq gfni vaes "
                        "vpclmulqdq".split())
_AMX = frozenset({"amx-tile", "amx-bf16", "amx-int8"})  # used only where Linux grants tile data
MODELS = {
    "x86-64-v2": _V2,
    "haswell": _V3,
    "znver3": _V3 | {"sse4a"},
    "skylake-avx512": _SKX,
    "icelake-server": _ICX,
    "znver4": _ICX | {"avx512bf16", "sse4a"},
    "sapphirerapids": _ICX | {"avx512bf16", "avx512fp16", "avxvnni"} | _AMX,
}
OTHERS = ("generic", "host")  # generic: baseline x86-64 (SSE2), numba's own default features ""; host: no variable
DEADLINE_S = 300  # one process compiling every kernel for a new model: 40-110 s on this shared 2-core host
IS_X86 = platform.machine() == "x86_64"
_T0 = time.monotonic()
HOST_LLVM = {f for f, on in ll.get_host_cpu_features().items() if on}  # LLVM's reading of CPUID


def _vector_bits(features) -> int:
    return 512 if "avx512f" in features else 256 if "avx" in features else 128


def _missing(model: str) -> list[str]:
    return sorted(MODELS[model] - _AMX - HOST_LLVM) if model in MODELS else []


def _plan(model: str) -> dict:
    """How the model's process runs: its env, the vector width its ISA has, the model's own features."""
    env = {k: v for k, v in os.environ.items() if k not in ("NUMBA_CPU_NAME", "NUMBA_CPU_FEATURES")}
    if model == "host":
        return {"env": env, "bits": _vector_bits(HOST_LLVM), "own": sorted(HOST_LLVM)}
    env["NUMBA_CPU_NAME"] = model
    if model == "generic":
        return {"env": env, "bits": 128, "own": []}
    own = sorted(MODELS[model])
    if _missing(model):  # the model's scheduling, this CPU's instructions (numba's default for a name alone)
        return {"env": env, "bits": _vector_bits(HOST_LLVM), "own": own}
    env["NUMBA_CPU_FEATURES"] = ",".join(f"+{f}" for f in own)
    return {"env": env, "bits": _vector_bits(own), "own": own}


_CHILDREN: dict[str, subprocess.Popen] = {}  # started here, killed at teardown if still running


def _run(model: str, cache_root: Path) -> dict:
    """The model's subprocess: its JSON lines (checks in the order they ran), return code and stderr."""
    plan = _plan(model)
    env = dict(plan["env"], NUMBA_CACHE_DIR=str(cache_root / f"numba-{model}"))
    code = f"import sys; sys.path.insert(0, {str(Path(__file__).parent)!r}); import test_cpu_models as t; t._worker()"
    job = {"model": model, "own": plan["own"]}
    child = subprocess.Popen([sys.executable, "-c", code, json.dumps(job)], env=env, stdout=subprocess.PIPE,
                             stderr=subprocess.PIPE)
    _CHILDREN[model] = child
    try:
        out, err = child.communicate(timeout=DEADLINE_S)
        hung = False
    except subprocess.TimeoutExpired:
        child.kill()
        out, err = child.communicate()
        hung = True
    lines = [json.loads(x) for x in out.decode(errors="replace").splitlines() if x.startswith("{")]
    return {"lines": lines, "rc": child.returncode, "hung": hung, "stderr": err.decode(errors="replace")[-3000:]}


# Models run JOBS at a time (compiling every kernel is CPU-bound: 40-60 CPU seconds per model here): the first
# test of the module starts all selected models, in the order their tests come.
JOBS = int(os.environ.get("EAVES_MODEL_JOBS", "0")) or min(2, len(os.sched_getaffinity(0)))


@pytest.fixture(scope="module")
def runs(request, tmp_path_factory):
    root = tmp_path_factory.mktemp("cpu-models")
    wanted = [item.callspec.params["model"] for item in request.session.items
              if item.module is sys.modules[__name__] and "model" in getattr(getattr(item, "callspec", None),
                                                                            "params", {})]
    pool = ThreadPoolExecutor(max_workers=JOBS)
    futures = {m: pool.submit(_run, m, root) for m in dict.fromkeys(wanted)}
    yield futures
    for f in futures.values():
        f.cancel()
    for child in _CHILDREN.values():
        if child.poll() is None:
            child.kill()
    pool.shutdown(wait=True)


def _result(model: str, runs) -> dict:
    r = runs[model].result()
    started = [x["start"] for x in r["lines"] if "start" in x]
    if r["hung"]:
        pytest.fail(f"{model}: no result within {DEADLINE_S} s; last kernel started: {started[-1:] or 'none'}")
    assert r["rc"] == 0, f"{model}: exit {r['rc']} after starting {started[-1:]}: {r['stderr']}"
    return r


# ---------------------------------------------------------------- the worker (runs in the model's process)


def _emit(**kw) -> None:
    print(json.dumps(dict(kw, t=round(time.monotonic() - _T0, 2))), flush=True)


def _check(name: str, fn) -> None:
    """Announce the kernel (so a hang names it), run it, report whether its checksum held."""
    _emit(start=name)
    try:
        ok = bool(fn())
    except Exception as e:  # a kernel that raises is a wrong kernel; keep going to report the others
        _emit(check=name, ok=False, error=f"{type(e).__name__}: {e}")
        return
    _emit(check=name, ok=ok)


def _memory_checks(threads_list) -> None:
    import numpy as np

    from eaves.kernels import MEMORY_KERNELS, PATTERN, memory as mem, thread_slices
    from eaves.kernels.streaming import aligned_empty

    sizes = (8 * 37, 4096 + 8 * 5 + 3)  # a few vector blocks plus a tail; the second ends mid-line
    n_max = max(sizes)
    a, b = aligned_empty(n_max), aligned_empty(n_max)
    _emit(check="aligned_empty is 64-byte aligned", ok=a.ctypes.data % 64 == 0 and b.ctypes.data % 64 == 0)
    _emit(registry=[f"{k.name}/{k.variant}" for k in MEMORY_KERNELS])  # labels as this process's target has them
    for k in MEMORY_KERNELS:
        for threads in threads_list:
            for n in sizes:
                def one(k=k, threads=threads, n=n):
                    bound = k.bind(a, b, n, threads)
                    sums = [bound(r) for r in (1, 3)]
                    return all(abs(got - want) <= 1e-12 * abs(want) for got, want in sums) and bound.final_check()
                _check(f"{k.name}/{k.variant} n={n} x{threads}", one)
    def refused(call, error) -> bool:
        try:
            call()
        except error:
            return True
        return False

    from numba.core.errors import TypingError

    from eaves.kernels import streaming as nt, vector as vec

    # a misaligned streaming destination is a ValueError, not a SIGSEGV from vmovntpd (which would end
    # this process and fail the test naming this check); a strided view is refused when typed, not
    # read densely past its end
    _check("streaming store refuses a misaligned destination",
           lambda: refused(lambda: nt.fill_stream(a[1:1 + 8 * 37], 1, 1, 1.0), ValueError)
           and refused(lambda: nt.copy_stream(b[1:1 + 8 * 37], a[:8 * 37], 1, 1), ValueError))
    _check("vector kernels refuse a strided view", lambda: refused(lambda: vec.read_sum(a[:2 * 296:2], 1, 1), TypingError))
    rng = np.random.default_rng(3)
    for threads in threads_list:
        n = sizes[1]
        x = a[:n]

        def touch():
            mem.first_touch(x, threads, 2.5)
            return bool((x == 2.5).all())  # numpy as the reference
        _check(f"first_touch x{threads}", touch)

        def counts():  # the final checks must be able to fail: one element off is seen
            mem.first_touch(x, threads, 1.0)
            y = b[:n]
            y[:] = x
            y[n - 2] = 7.0
            return mem.count_not(x, 1.0, threads) == 0 and mem.count_not(y, 1.0, threads) == 1 \
                and mem.mismatches(x, y, threads) == 1
        _check(f"count_not, mismatches x{threads}", counts)

        def pattern():
            mem.fill_pattern(x, threads, PATTERN)
            return bool((x == np.arange(n) % PATTERN).all())
        _check(f"fill_pattern x{threads}", pattern)

        for stride in (1, 3, 8, 16):
            def strided(stride=stride):
                mem.fill_pattern(x, threads, PATTERN)
                want = sum(x[lo:hi][::stride].sum() for lo, hi in thread_slices(n, threads))
                return mem.strided_sum(x, stride, 3, threads) == 3 * want
            _check(f"strided_sum stride={stride} x{threads}", strided)

        def gather():
            data = x[:2048]
            mem.fill_pattern(data, threads, PATTERN)
            index = np.empty(1000, np.int64)
            mem.random_indices(index, data.shape[0], 7, threads)
            # in range, and spread out: 1000 uniform draws from 2048 hit 2048 * (1 - exp(-1000 / 2048)) ~ 791
            # distinct positions on average (occupancy, common practice)
            if not ((index >= 0) & (index < data.shape[0])).all() or len(set(index.tolist())) < 700:
                return False
            want = float((index % PATTERN).sum())  # numpy on the indices alone
            return mem.pattern_sum_at(index, PATTERN, threads) == want \
                and mem.gather_sum(data, index, 3, threads) == 3 * float(data[index].sum()) == 3 * want
        _check(f"random_indices, pattern_sum_at, gather_sum x{threads}", gather)

    def chase():
        nxt = np.zeros(8 * 300, np.int64)
        order = rng.permutation(300).astype(np.int64)
        mem.build_cycle(nxt, order, 8)
        start = int(order[0]) * 8
        p, ok = start, True
        for loads in (1, 299, 300, 1234):  # a Python walk over the same links as the reference
            p = start
            for _ in range(loads):
                p = int(nxt[p])
            ok &= p == int(order[loads % 300]) * 8 == int(mem.chase(nxt, start, loads))
        return ok
    _check("build_cycle, chase", chase)


def _peak_checks(threads_list) -> None:
    from eaves.host import collect_host_facts
    from eaves.kernels import compute as K

    host = collect_host_facts()
    for threads in threads_list:
        _check(f"clock_chain x{threads}", lambda t=threads: K.clock_chain(3, t) == K.clock_expected(3, t))
    for k in K.kernels_for(host.features, platform.machine()):
        _emit(peak=k.name, bits=k.spec.bits)
        _check(f"peak {k.name}", lambda k=k: all(k.verify(k.run(r, t), r, t) for r in (2, 9) for t in threads_list))


def _own_isa_blocks(model: str, own: list[str]) -> None:
    """Every x86 peak block the model's own instructions allow, compiled for that ISA (not run)."""
    from eaves.kernels import compute as K, target as T

    if model == "host":
        return
    feats = set(own)
    string = ",".join(f"+{f}" for f in own)
    for k in K.REGISTRY:
        needs = {T.llvm_name(f) for f in k.requires}
        excluded = {T.llvm_name(f) for f in getattr(k, "lacks", ())} & feats  # the model would not choose it
        if k.arch not in (None, "x86_64") or not needs <= feats or excluded or (
                not k.spec.is_tile and k.spec.bits > _vector_bits(feats)):
            continue
        _emit(start=f"compile {k.name}")
        _emit(block=k.name, asm_summary=_summary(K.block_asm(k.spec, cpu=model, features=string)),
              fma="fma" in feats)


def _summary(asm: str) -> dict:
    from eaves.kernels import compute as K

    return {"madd": list(K.madd_instructions(asm)), "calls": re.findall(r"^\s*call\w*\s+(\S+)", asm, re.M),
            "regs": sorted(set(re.findall(r"%([xyzt]mm)\d+", asm)))}


def _worker() -> None:
    job = json.loads(sys.argv[1])
    from eaves.kernels import target as T, vector as vec
    from eaves.threads import usable_cpus

    threads_list = sorted({1, min(2, usable_cpus())})
    _emit(target=T.cpu_name(), vector_bits=vec.VECTOR_BITS, may_emit_avx2=T.may_emit(["avx2"]))
    _memory_checks(threads_list)
    sig = vec.read_sum.signatures[0]
    _emit(read_asm_regs=sorted(set(re.findall(r"%([xyz]mm)\d+", vec.read_sum.inspect_asm(sig)))))
    _peak_checks(threads_list)
    _own_isa_blocks(job["model"], job["own"])
    _emit(finished=True)


# ---------------------------------------------------------------- the tests


def _checks_hold(model: str, r: dict) -> None:
    lines = r["lines"]
    assert lines and lines[-1].get("finished"), f"{model}: the worker did not finish: {lines[-3:]}"
    checks = [x for x in lines if "check" in x]
    wrong = [x for x in checks if not x["ok"]]
    assert not wrong, f"{model}: {wrong}"
    names = " ".join(x["check"] for x in checks)
    from eaves.kernels import MEMORY_KERNELS  # every registry entry ran, and every other memory kernel

    registry = next(x["registry"] for x in lines if "registry" in x)
    assert len(registry) == len(MEMORY_KERNELS)
    for label in registry:
        assert f"{label} " in names, f"{model}: {label} never ran"
    for part in ("first_touch", "fill_pattern", "strided_sum", "gather_sum", "chase", "clock_chain", "peak "):
        assert part in names, f"{model}: no {part} check"


def _width_is(model: str, r: dict, bits: int) -> None:
    target = next(x for x in r["lines"] if "target" in x)
    regs = next(x["read_asm_regs"] for x in r["lines"] if "read_asm_regs" in x)
    assert target["vector_bits"] == bits, f"{model}: vector kernels at {target['vector_bits']} bits, ISA has {bits}"
    order = ["xmm", "ymm", "zmm"]
    widest = order[[128, 256, 512].index(bits)]
    assert widest in regs and not set(order[order.index(widest) + 1:]) & set(regs), f"{model}: read uses {regs}"
    peaks = {x["peak"]: x["bits"] for x in r["lines"] if "peak" in x}
    assert all(b <= bits for n, b in peaks.items() if "amx" not in n), f"{model}: wider than {bits}: {peaks}"
    assert any(n.startswith("fp64-fma-") and b == bits for n, b in peaks.items()), f"{model}: no {bits}-bit fp64"


@pytest.mark.skipif(not IS_X86, reason="x86 CPU models")
@pytest.mark.parametrize("model", [*MODELS, *OTHERS])
def test_every_kernel_finishes_and_verifies_under_the_model(model, runs):
    # the model's scheduling and (where this CPU can execute it) its instructions; checksums against
    # closed forms, numpy or a Python walk, as each check says
    r = _result(model, runs)
    _checks_hold(model, r)
    plan = _plan(model)
    target = next(x for x in r["lines"] if "target" in x)
    assert target["target"] == (ll.get_host_cpu_name() if model == "host" else model)
    _width_is(model, r, plan["bits"])
    if model == "generic":  # numba's default for generic is no features beyond SSE2: no VNNI, no pmadd, no FMA
        assert not target["may_emit_avx2"]


@pytest.mark.skipif(not IS_X86, reason="x86 CPU models")
@pytest.mark.parametrize("model", list(MODELS))
def test_the_models_own_instructions_run(model, runs):
    missing = _missing(model)
    if missing:
        pytest.skip(f"{model}'s own instructions cannot run on this CPU (LLVM reads no {', '.join(missing)} "
                    f"in CPUID); its scheduling ran with this CPU's instructions, its peak blocks compiled")
    r = _result(model, runs)
    _checks_hold(model, r)
    _width_is(model, r, _vector_bits(MODELS[model]))


# what each native path must compile to (Intel's and AMD's instruction set references, from memory)
_MNEMONIC = {"fma": "vfmadd", "bf16dot": "vdpbf16ps", "i8dot": "vpdpbusd", "i16dot": "vpdpwssd", "i8madd": "pmaddubsw",
             "i16madd": "pmaddwd", "amx_bf16": "tdpbf16ps", "amx_i8": "tdpbusd"}


@pytest.mark.skipif(not IS_X86, reason="x86 CPU models")
@pytest.mark.parametrize("model", [*MODELS, "generic"])
def test_peak_blocks_compile_for_the_models_own_instructions(model, runs):
    # compiled, not run, so it holds on any x86 host: no LLVM error for a target intrinsic, no libm call
    # in a block, and each native kernel emits its instruction at its width
    from eaves.kernels import compute as K

    r = _result(model, runs)
    blocks = {x["block"]: x for x in r["lines"] if "block" in x}
    assert blocks, f"{model}: no block compiled"
    for name, b in blocks.items():
        k = next(k for k in K.REGISTRY if k.name == name)
        s = b["asm_summary"]
        assert not s["calls"], f"{model}: {name} calls {s['calls']} inside a peak block"
        reg = "tmm" if k.spec.is_tile else {512: "zmm", 256: "ymm", 128: "xmm"}[k.spec.bits]
        assert reg in s["regs"], (model, name, s["regs"])
        if k.native and (k.spec.kind != "fma" or b["fma"]):
            found = " ".join(s["madd"])
            assert _MNEMONIC[k.spec.kind] in found and reg in found, (model, name, s["madd"])
    bits = _vector_bits(MODELS.get(model, ()))
    assert any(n.startswith(f"fp64-fma-{bits}x") for n in blocks), f"{model}: no {bits}-bit fp64 block"


AARCH64 = """
import json, re, llvmlite.binding as ll
from eaves.kernels import compute as K
triple = "aarch64-unknown-linux-gnu"
out = {}
for k in K.REGISTRY:
    if k.arch in (None, "aarch64") and set(k.requires) <= {"asimdhp"}:
        a = K.block_asm(k.spec, cpu="neoverse-n1", features="+neon,+fullfp16", triple=triple)
        out[k.name] = [list(K.madd_instructions(a)), re.findall(r"^\\s*bl\\s+(\\S+)", a, re.M)]
print(json.dumps(out))
"""


def test_aarch64_peak_blocks_compile():
    # never run anywhere (no AArch64 host yet): the peak blocks compiled for one (Neoverse N1 with FP16), so
    # at least LLVM's AArch64 backend accepts the IR, calls no library function and emits fmla. The clock
    # chain's inline asm cannot be compiled here: llvmlite registers no AArch64 asm parser, which LLVM needs
    # to emit any inline asm (it aborts the process: "Inline asm not supported by this streamer")
    done = subprocess.run([sys.executable, "-c", AARCH64], capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stderr[-3000:]
    blocks = json.loads(done.stdout.strip().splitlines()[-1])
    for name, (madd, calls) in blocks.items():
        assert not calls, f"{name} calls {calls}"
        if name.startswith(("fp64-fma", "fp32-fma", "fp16-fma")):
            assert any(i.startswith("fmla") for i in madd), (name, madd)
    # Arm's architecture reference (from memory): FMLA Vd.8H is the half-precision vector multiply-add
    assert any(i.startswith("fmla") and "8h" in i for i in blocks["fp16-fma-128x16"][0]), blocks
