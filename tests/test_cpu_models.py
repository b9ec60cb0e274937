"""Kernels under other CPUs' code generation: the clock chain and every peak kernel finish and verify."""

from __future__ import annotations

import json
import os
import platform
import subprocess
import sys
import textwrap

import pytest

from eaves.host import collect_host_facts

HOST = collect_host_facts()
_V2 = {"sse4_1", "sse4_2"}
_HSW = _V2 | {"avx", "avx2", "fma"}
_SKX = _HSW | {"avx512f", "avx512bw", "avx512cd", "avx512dq", "avx512vl"}
_ICX = _SKX | {"avx512_vnni", "avx512vbmi", "avx512ifma"}
# ISA features each LLVM CPU model targets, in host.features names (from memory of LLVM's X86.td)
MODELS = {
    "x86-64-v2": _V2,
    "haswell": _HSW,
    "znver3": _HSW,
    "skylake-avx512": _SKX,
    "icelake-server": _ICX,
    "znver4": _ICX | {"avx512_bf16"},
    "sapphirerapids": _ICX | {"avx512_bf16", "avx512_fp16", "avx_vnni", "amx_tile", "amx_bf16", "amx_int8"},
}
DEADLINE_S = 240  # compiling every kernel once under a new model; a hung loop never gets near it

SCRIPT = textwrap.dedent("""
    import json, sys
    from eaves.host import collect_host_facts
    from eaves.kernels import compute as K
    allowed = set(json.loads(sys.argv[1]))
    host = collect_host_facts()
    out = {"clock": K.clock_chain(2, 1) == K.clock_expected(2, 1), "peaks": {}}
    for k in K.kernels_for(host.features, __import__("platform").machine()):
        if set(k.requires) <= allowed:
            out["peaks"][k.name] = k.verify(k.run(2, 1), 2, 1)
    print(json.dumps(out))
""")


def _run_under(model: str, allowed: set[str], tmp_path) -> dict:
    env = dict(os.environ, NUMBA_CPU_NAME=model, NUMBA_CACHE_DIR=str(tmp_path / f"numba-{model}"))
    try:
        done = subprocess.run([sys.executable, "-c", SCRIPT, json.dumps(sorted(allowed))], env=env,
                              capture_output=True, text=True, timeout=DEADLINE_S)
    except subprocess.TimeoutExpired:
        pytest.fail(f"{model}: no result within {DEADLINE_S} s (a kernel loop that never exits)")
    assert done.returncode == 0, f"{model}: exit {done.returncode}: {done.stderr[-2000:]}"
    return json.loads(done.stdout.strip().splitlines()[-1])


@pytest.mark.skipif(platform.machine() != "x86_64", reason="x86 CPU models")
@pytest.mark.parametrize("model", sorted(MODELS))
def test_kernels_finish_and_verify_under_cpu_model(model, tmp_path):
    needs = MODELS[model] - {"amx_tile", "amx_bf16", "amx_int8"}  # tile kernels run only where granted
    missing = sorted(needs - set(HOST.features))
    if missing:
        pytest.skip(f"this CPU cannot execute {model} code (lacks {', '.join(missing)})")
    result = _run_under(model, MODELS[model] & set(HOST.features), tmp_path)
    assert result["clock"], f"{model}: clock chain checksum wrong"
    assert result["peaks"], f"{model}: no peak kernel ran"
    wrong = [name for name, ok in result["peaks"].items() if not ok]
    assert not wrong, f"{model}: checksums wrong for {wrong}"


def test_cpu_models_generic_and_host(tmp_path):
    # "generic" code runs on any CPU of the architecture; the host's own model is the default
    for model in ("generic", "host"):
        result = _run_under(model, set() if model == "generic" else set(HOST.features), tmp_path)
        assert result["clock"], f"{model}: clock chain checksum wrong"
        assert all(result["peaks"].values()), f"{model}: {result['peaks']}"
