"""The CPU numba generates code for, which need not be the CPU the process runs on.

numba compiles for `NUMBA_CPU_NAME` (default: the host's model) with `NUMBA_CPU_FEATURES`; when
that variable is unset it keeps the *host's* feature list whatever the name, so the name alone
changes scheduling and tuning but not the instruction set (numba.core.codegen, 0.68). Kernels
are chosen by what the host can execute *and* what this target may emit: an LLVM target
intrinsic the target lacks is a fatal "Cannot select" error that ends the process, and an
explicit 512-bit vector on a 256-bit target is split in two (correct, but not the width its
label claims).
"""

from __future__ import annotations

import functools
import platform
import re

import llvmlite.binding as ll
from numba.core import config
from numba.core.codegen import get_host_cpu_features

# host.features names (from /proc/cpuinfo) -> LLVM's subtarget feature names, where they differ
# (from memory of LLVM's X86.td and AArch64Features.td)
LLVM_NAMES = {"sse4_1": "sse4.1", "sse4_2": "sse4.2", "sse3": "sse3", "avx512_vnni": "avx512vnni",
              "avx512_bf16": "avx512bf16", "avx512_fp16": "avx512fp16", "avx_vnni": "avxvnni",
              "amx_tile": "amx-tile", "amx_bf16": "amx-bf16", "amx_int8": "amx-int8", "amx_fp16": "amx-fp16",
              "asimdhp": "fullfp16", "asimd": "neon", "asimddp": "dotprod"}


def llvm_name(feature: str) -> str:
    return LLVM_NAMES.get(feature, feature)


def cpu_name() -> str:
    """The LLVM CPU model numba compiles for."""
    name = config.CPU_NAME
    return ll.get_host_cpu_name() if name in (None, "host") else name


def feature_string() -> str:
    """The feature string numba hands LLVM: NUMBA_CPU_FEATURES, else the host's (all of them, +/-)."""
    return config.CPU_FEATURES if config.CPU_FEATURES is not None else get_host_cpu_features()


def _settings(text: str) -> dict[str, bool]:
    out = {}
    for item in filter(None, (s.strip() for s in text.split(","))):
        if item[0] in "+-":
            out[item[1:]] = item[0] == "+"
    return out


def may_emit(features) -> bool:
    """True when the target has every feature (host.features names).

    The feature string decides where it names the feature (+ or -). A feature it does not name is
    the CPU model's default, which llvmlite cannot report: for the host's own model that default is
    what the host has (the caller checks the host), for any other model it counts as absent, so
    only portable kernels are chosen for such a target.
    """
    settings = _settings(feature_string())
    own_model = config.CPU_NAME in (None, "host")
    return all(settings.get(llvm_name(f), own_model) is True for f in features)


_PROBE = """
define void @probe(ptr %p) {
  %v = load <8 x double>, ptr %p, align 8
  %s = fadd <8 x double> %v, %v
  store <8 x double> %s, ptr %p, align 8
  ret void
}
"""


@functools.lru_cache(maxsize=None)
def vector_bits(cpu: str | None = None, features: str | None = None) -> int:
    """Widest float vector the target keeps in one register: a 512-bit add, compiled and read back.

    Non-x86 targets: 128 (NEON; LLVM does not put fixed-width vectors in SVE registers unless told
    the vector length).
    """
    if platform.machine() != "x86_64":
        return 128
    ll.initialize_native_target()
    ll.initialize_native_asmprinter()
    module = ll.parse_assembly(_PROBE)
    module.triple = ll.get_process_triple()
    tm = ll.Target.from_default_triple().create_target_machine(
        cpu=cpu or cpu_name(), features=feature_string() if features is None else features, opt=2)
    regs = set(re.findall(r"%([xyz])mm\d+", tm.emit_assembly(module)))
    return 512 if "z" in regs else 256 if "y" in regs else 128
