"""Multiply-add peak and clock microkernels (numba + LLVM vector IR): the host's flat compute roofs.

Each peak kernel runs `accumulators` independent register-resident vector chains inside one
parallel region (one chain step = one vector multiply-add instruction). The vector code is
written as LLVM IR through a numba `@intrinsic`, which sidesteps the loop vectoriser and its
256-bit preference on AVX-512 hosts, and reaches instructions numba cannot express (half
precision, bf16 and 8/16-bit integer dot products) and the AMX tile unit. Every call returns
an int64 checksum the caller verifies against a closed form (float kernels) or a numpy
simulation (integer and tile kernels), so no work can be dropped by the compiler.
"""

from __future__ import annotations

import ctypes
import functools
import os
import platform
import re
from dataclasses import dataclass

import numpy as np
from llvmlite import ir
from numba import literally, njit, prange, types
from numba.extending import intrinsic

from eaves.kernels import target

import llvmlite.binding as _ll

_ll.initialize_native_asmparser()  # numba's object emitter needs it for the clock chain's inline asm

STEPS = 1024  # chain steps per block call; fp16 stays exact: seed + STEPS < 2**11
CHAIN_ADDS = 64  # dependent single-cycle adds per clock-chain block
CHAIN_BLOCKS = 256  # clock-chain blocks per repetition
INT8_PATTERN = 0x04030201  # unsigned bytes 1, 2, 3, 4 of the int8 kernel's fixed operand
INT16_PATTERN = 0x00030002  # signed halves 2, 3 of the int16 kernel's fixed operand

I8, I32, I64 = ir.IntType(8), ir.IntType(32), ir.IntType(64)
# AMX palette 1 tiles: at most 16 rows of 64 bytes each (Intel's instruction set reference, from memory).
# A tdp* instruction multiplies a 16 x 64-byte A tile by a 16 x 64-byte B tile into a 16 x 16 tile of
# 32-bit sums: M = 16 rows, N = 64 / 4 = 16 columns, K = 64 / element bytes (32 bf16 or 64 int8).
TILE_ROWS, TILE_COLSB = 16, 64
AMX_SEED = 20240611  # fixed generator seed of the tiles' operand data


class _BFloat(ir.Type):
    """LLVM's bfloat type, which llvmlite's IR builder does not name."""

    def _to_string(self):
        return "bfloat"

    def __eq__(self, other):
        return isinstance(other, _BFloat)

    def __hash__(self):
        return hash("bfloat")


ELEM = {"f64": ir.DoubleType(), "f32": ir.FloatType(), "f16": ir.HalfType()}


@dataclass(frozen=True)
class BlockSpec:
    """What one block call computes: `accumulators` chains of `bits`-wide vectors, STEPS steps each."""

    kind: str  # "fma" | "bf16dot" | "i8dot" | "i16dot" | "i8madd" | "i16madd" | "amx_bf16" | "amx_i8"
    elem: str  # accumulator element: "f64" "f32" "f16" or "i32"
    bits: int  # vector register width (AMX: the bits of one tile row)
    accumulators: int  # accumulator registers (AMX: C tiles)
    intrinsic: str | None = None  # LLVM target intrinsic, None: portable vector IR

    @property
    def is_tile(self) -> bool:
        return self.kind.startswith("amx")

    @property
    def acc_lanes(self) -> int:
        return self.bits // (16 if self.elem == "f16" else 64 if self.elem == "f64" else 32)

    @property
    def macs_per_instruction(self) -> int:
        """Multiply-adds one chain step does (per vector or tile instruction)."""
        if self.is_tile:  # M x N x K of one tile product (see TILE_ROWS)
            return TILE_ROWS * (TILE_COLSB // 4) * (TILE_COLSB // (2 if self.kind == "amx_bf16" else 1))
        # i8madd counts its int8 multiplies (4 per s32 lane: one vpmaddubsw ymm does 32), not the
        # widening vpmaddwd by 1s that sums its s16 pairs, so it counts like i8dot (vpdpbusd)
        per_lane = {"fma": 1, "bf16dot": 2, "i16dot": 2, "i8dot": 4, "i16madd": 2, "i8madd": 4}[self.kind]
        return self.acc_lanes * per_lane

    @property
    def macs_per_block(self) -> int:
        return STEPS * self.accumulators * self.macs_per_instruction


# ---------------------------------------------------------------- LLVM IR of one block


def _splat(builder, x, vec):
    v = builder.insert_element(ir.Constant(vec, ir.Undefined), x, ir.Constant(I32, 0))
    return builder.shuffle_vector(v, v, ir.Constant(ir.VectorType(I32, vec.count), [0] * vec.count))


def _to_bf16(builder, x):
    """double -> bfloat by truncating the float32 bits (no runtime-library call; exact for 1.0)."""
    bits = builder.bitcast(builder.fptrunc(x, ir.FloatType()), I32)
    half = builder.trunc(builder.lshr(bits, ir.Constant(I32, 16)), ir.IntType(16))
    return builder.bitcast(half, _BFloat())


def _declare(module, name, ret, args):
    fn = module.globals.get(name)
    return fn if fn is not None else ir.Function(module, ir.FunctionType(ret, args), name)


def _portable_dot(builder, acc, a, group, signed_a):
    """acc + sum over groups of `group` of ext(a) * sext(bytes or halves of acc): LLVM picks the instruction."""
    n = acc.type.count * group
    small = ir.VectorType(ir.IntType(32 // group), n)
    wide = ir.VectorType(I32, n)
    av = builder.sext(a, wide) if signed_a else builder.zext(a, wide)
    bv = builder.sext(builder.bitcast(acc, small), wide)
    prod = builder.mul(av, bv)
    out = acc
    for k in range(group):
        idx = ir.Constant(ir.VectorType(I32, acc.type.count), [j * group + k for j in range(acc.type.count)])
        out = builder.add(out, builder.shuffle_vector(prod, prod, idx))
    return out


# x86 integer multiply-add without VNNI (Intel's instruction set reference, from memory): pmaddubsw multiplies
# u8 x s8 and sums adjacent pairs into saturating s16; pmaddwd multiplies s16 x s16 and sums adjacent pairs
# into s32 (no saturation). Per register width: (pmaddubsw, pmaddwd) intrinsics.
PMADD = {128: ("llvm.x86.ssse3.pmadd.ub.sw.128", "llvm.x86.sse2.pmadd.wd"),
         256: ("llvm.x86.avx2.pmadd.ub.sw", "llvm.x86.avx2.pmadd.wd")}


def _madd_step(builder, spec: BlockSpec, av, c):
    """One chain step of the pmadd path: int16 acc + pmaddwd(a, acc); int8 acc + pmaddwd(pmaddubsw(a, acc), 1s).

    The 1s come from the run-time operand `c`, so LLVM cannot fold the widening pmaddwd into other code.
    """
    module = builder.module
    lanes = spec.acc_lanes
    vec, halves = ir.VectorType(I32, lanes), ir.VectorType(ir.IntType(16), 2 * lanes)
    ub_sw, wd = PMADD[spec.bits]
    pmaddwd = _declare(module, wd, vec, [halves, halves])
    if spec.kind == "i16madd":
        return lambda acc: builder.add(acc, builder.call(pmaddwd, [av, builder.bitcast(acc, halves)]))
    small = ir.VectorType(I8, 4 * lanes)
    pmaddubsw = _declare(module, ub_sw, halves, [small, small])
    ones = _splat(builder, builder.trunc(builder.fptosi(c, I32), ir.IntType(16)), halves)
    return lambda acc: builder.add(acc, builder.call(
        pmaddwd, [builder.call(pmaddubsw, [av, builder.bitcast(acc, small)]), ones]))


def _step_fn(builder, spec: BlockSpec, m, c):
    """Operands that stay fixed for a block, and the function doing one chain step on one accumulator."""
    module = builder.module
    if spec.kind == "fma":
        elem = ELEM[spec.elem]
        vec = ir.VectorType(elem, spec.acc_lanes)
        conv = (lambda v: v) if spec.elem == "f64" else (lambda v: builder.fptrunc(v, elem))
        mv, cv = _splat(builder, conv(m), vec), _splat(builder, conv(c), vec)
        # fmuladd: one fused instruction where the target has FMA (the same vfmadd / fmla as llvm.fma), a
        # multiply and an add where it has not; llvm.fma there becomes one libm call per lane, not a peak
        fma = _declare(module, f"llvm.fmuladd.v{spec.acc_lanes}{elem.intrinsic_name}", vec, [vec] * 3)
        return vec, lambda acc: builder.call(fma, [acc, mv, cv])
    if spec.kind == "bf16dot":
        vec = ir.VectorType(ir.FloatType(), spec.acc_lanes)
        pair = ir.VectorType(_BFloat(), 2 * spec.acc_lanes)
        av, bv = (_splat(builder, _to_bf16(builder, v), pair) for v in (m, c))
        fn = _declare(module, spec.intrinsic, vec, [vec, pair, pair])
        return vec, lambda acc: builder.call(fn, [acc, av, bv])
    # integer dot products: the fixed operand is a 32-bit pattern repeated, the other is the accumulator itself
    group = 4 if spec.kind in ("i8dot", "i8madd") else 2
    vec = ir.VectorType(I32, spec.acc_lanes)
    small = ir.VectorType(ir.IntType(32 // group), spec.acc_lanes * group)
    av = builder.bitcast(_splat(builder, builder.fptosi(m, I32), vec), small)
    if spec.kind in ("i8madd", "i16madd"):
        return vec, _madd_step(builder, spec, av, c)
    if spec.intrinsic:
        fn = _declare(module, spec.intrinsic, vec, [vec, small, small])
        return vec, lambda acc: builder.call(fn, [acc, av, builder.bitcast(acc, small)])
    return vec, lambda acc: _portable_dot(builder, acc, av, group, signed_a=(group == 2))


def _open_loop(builder, name: str):
    """Start a loop of STEPS iterations: its counter (a phi) and the block before it."""
    pre = builder.block
    loop = builder.append_basic_block(f"{name}.loop")
    builder.branch(loop)
    builder.position_at_end(loop)
    i = builder.phi(I64)
    i.add_incoming(ir.Constant(I64, 0), pre)
    return i, pre


def _close_loop(builder, i, name: str) -> None:
    """End the loop `_open_loop` started; the builder continues after it."""
    loop = builder.block
    done = builder.append_basic_block(f"{name}.done")
    nxt = builder.add(i, ir.Constant(I64, 1))
    i.add_incoming(nxt, loop)
    builder.cbranch(builder.icmp_unsigned("<", nxt, ir.Constant(I64, STEPS)), loop, done)
    builder.position_at_end(done)


def emit_block(builder, spec: BlockSpec, m, c, seed):
    """IR for one block: every accumulator starts at `seed`, runs STEPS steps; returns their i64 sum."""
    if spec.is_tile:
        return emit_tile_block(builder, spec, seed)
    vec, step = _step_fn(builder, spec, m, c)
    is_int = spec.elem == "i32"
    start = _splat(builder, builder.fptosi(seed, I32) if is_int else
                   (seed if spec.elem == "f64" else builder.fptrunc(seed, vec.element)), vec)
    i, pre = _open_loop(builder, "peak")
    accs = []
    for _ in range(spec.accumulators):
        p = builder.phi(vec)
        p.add_incoming(start, pre)
        accs.append(p)
    new = [step(p) for p in accs]
    for p, n in zip(accs, new):
        p.add_incoming(n, builder.block)
    _close_loop(builder, i, "peak")
    total = ir.Constant(I64, 0)
    wide = ir.VectorType(I64 if is_int else ir.DoubleType(), vec.count)
    for n in new:
        w = builder.sext(n, wide) if is_int else (n if spec.elem == "f64" else builder.fpext(n, wide))
        for k in range(vec.count):
            x = builder.extract_element(w, ir.Constant(I32, k))
            total = builder.add(total, x if is_int else builder.fptosi(x, I64))
    return total


# ---------------------------------------------------------------- AMX tiles: operands in tile registers


def tile_pairs(accumulators: int) -> list[tuple[int, int]]:
    """(A, B) operand tiles of each C tile: 4 C tiles use 2 A x 2 B, other counts share one A and one B."""
    if accumulators == 4:
        return [(0, 0), (0, 1), (1, 0), (1, 1)]
    return [(0, 0)] * accumulators


def tile_counts(accumulators: int) -> tuple[int, int]:
    pairs = tile_pairs(accumulators)
    return 1 + max(a for a, _ in pairs), 1 + max(b for _, b in pairs)


@functools.lru_cache(maxsize=None)
def tile_operands(spec: BlockSpec) -> np.ndarray:
    """The A tiles then the B tiles, each 16 rows of 64 bytes: small integers, so every sum is exact.

    bf16 values in -3..3 (exact in bf16; fp32 sums stay below 2**24); int8: A unsigned 0..127,
    B signed -64..63 (int32 sums stay below 2**31 over a block).
    """
    n_a, n_b = tile_counts(spec.accumulators)
    rng = np.random.default_rng(AMX_SEED)
    shape = (n_a + n_b, TILE_ROWS, TILE_COLSB)
    if spec.kind == "amx_bf16":
        v = rng.integers(-3, 4, (n_a + n_b, TILE_ROWS, TILE_COLSB // 2)).astype(np.float32)
        return (v.view(np.uint32) >> 16).astype(np.uint16).view(np.uint8).reshape(shape)
    a = rng.integers(0, 128, (n_a, TILE_ROWS, TILE_COLSB)).astype(np.uint8)
    b = rng.integers(-64, 64, (n_b, TILE_ROWS, TILE_COLSB)).astype(np.int8).view(np.uint8)
    return np.concatenate([a, b])


def _tile_config() -> bytearray:
    """ldtilecfg's 64 bytes: palette 1, then colsb (u16) of tiles 0..15 at 16, rows (u8) at 48."""
    cfg = bytearray(64)
    cfg[0] = 1
    for t in range(8):
        cfg[16 + 2 * t:18 + 2 * t] = TILE_COLSB.to_bytes(2, "little")
        cfg[48 + t] = TILE_ROWS
    return cfg


def emit_tile_block(builder, spec: BlockSpec, seed):
    """IR for one AMX block: C tiles start at `seed`, A and B tiles load once, STEPS rounds of one tdp per C.

    Tiles 0..accumulators-1 are C, then A, then B. The C tiles are stored at the end and summed to an i64.
    """
    module = builder.module
    void, ptr = ir.VoidType(), ir.PointerType()
    n_c = spec.accumulators
    n_a, n_b = tile_counts(n_c)
    if n_c + n_a + n_b > 8:
        raise ValueError(f"AMX block: {n_c} C + {n_a} A + {n_b} B tiles, only 8 exist")
    elem = ir.FloatType() if spec.elem == "f32" else I32
    row = ir.VectorType(elem, TILE_COLSB // 4)
    data = tile_operands(spec)
    blob = ir.ArrayType(I8, data.size)
    operands = ir.GlobalVariable(module, blob, module.get_unique_name("amx.operands"))
    operands.global_constant, operands.linkage, operands.align = True, "internal", 64
    operands.initializer = ir.Constant(blob, bytearray(data.tobytes()))
    cfg_type = ir.ArrayType(I8, 64)
    c_type = ir.ArrayType(row, TILE_ROWS * n_c)
    with builder.goto_entry_block():
        cfg = builder.alloca(cfg_type, name="amx.cfg")
        c_mem = builder.alloca(c_type, name="amx.c")
    cfg.align = c_mem.align = 64
    ldtilecfg = _declare(module, "llvm.x86.ldtilecfg", void, [ptr])
    load = _declare(module, "llvm.x86.tileloadd64", void, [I8, ptr, I64])
    store = _declare(module, "llvm.x86.tilestored64", void, [I8, ptr, I64])
    tdp = _declare(module, spec.intrinsic, void, [I8, I8, I8])
    release = _declare(module, "llvm.x86.tilerelease", void, [])
    stride = ir.Constant(I64, TILE_COLSB)

    def at(base, byte_offset):
        return builder.gep(builder.bitcast(base, I8.as_pointer()), [ir.Constant(I64, byte_offset)])

    builder.store(ir.Constant(cfg_type, _tile_config()), cfg)
    builder.call(ldtilecfg, [builder.bitcast(cfg, ptr)])
    start = _splat(builder, builder.fptosi(seed, I32) if spec.elem == "i32" else builder.fptrunc(seed, elem), row)
    for r in range(TILE_ROWS):
        builder.store(start, builder.gep(c_mem, [ir.Constant(I32, 0), ir.Constant(I32, r)]))
    for t in range(n_c):  # every C tile starts from the same seed rows
        builder.call(load, [ir.Constant(I8, t), builder.bitcast(c_mem, ptr), stride])
    for t in range(n_a + n_b):
        builder.call(load, [ir.Constant(I8, n_c + t), builder.bitcast(at(operands, t * TILE_ROWS * TILE_COLSB), ptr),
                            stride])
    i, _ = _open_loop(builder, "amx")
    for c, (a, b) in enumerate(tile_pairs(n_c)):
        builder.call(tdp, [ir.Constant(I8, c), ir.Constant(I8, n_c + a), ir.Constant(I8, n_c + n_a + b)])
    _close_loop(builder, i, "amx")
    for t in range(n_c):
        builder.call(store, [ir.Constant(I8, t), builder.bitcast(at(c_mem, t * TILE_ROWS * TILE_COLSB), ptr), stride])
    builder.call(release, [])  # the thread's tile state goes back to init: no 8 KiB saved per context switch
    wide = ir.VectorType(I64, row.count)
    acc = ir.Constant(wide, None)
    for r in range(TILE_ROWS * n_c):
        v = builder.load(builder.gep(c_mem, [ir.Constant(I32, 0), ir.Constant(I32, r)]))
        acc = builder.add(acc, builder.sext(v, wide) if spec.elem == "i32" else builder.fptosi(v, wide))
    total = ir.Constant(I64, 0)
    for k in range(row.count):
        total = builder.add(total, builder.extract_element(acc, ir.Constant(I32, k)))
    return total


@dataclass(frozen=True)
class AmxAccess:
    """Whether this process may use AMX tile data, and why not."""

    granted: bool
    reason: str


ARCH_REQ_XCOMP_PERM, XFEATURE_XTILEDATA = 0x1023, 18  # Linux asm/prctl.h
SYS_ARCH_PRCTL = 158  # x86_64 system call number (Linux unistd_64.h)


def _libc_syscall(*args) -> tuple[int, int]:
    libc = ctypes.CDLL(None, use_errno=True)
    libc.syscall.restype = ctypes.c_long
    rc = libc.syscall(*[ctypes.c_long(a) for a in args])
    return rc, ctypes.get_errno()


def request_amx(syscall=None, system: str | None = None, machine: str | None = None) -> AmxAccess:
    """Ask Linux for AMX tile data (arch_prctl ARCH_REQ_XCOMP_PERM); without it the first tile op faults."""
    system, machine = system or platform.system(), machine or platform.machine()
    if (system, machine) != ("Linux", "x86_64"):
        return AmxAccess(False, f"AMX permission is only requested on Linux x86_64, not {system} {machine}")
    call = syscall or _libc_syscall
    rc, err = call(SYS_ARCH_PRCTL, ARCH_REQ_XCOMP_PERM, XFEATURE_XTILEDATA)
    if rc != 0:
        return AmxAccess(False, f"Linux refused AMX tile data: arch_prctl(ARCH_REQ_XCOMP_PERM) failed with "
                                f"{os.strerror(err) if err else 'an unknown error'} (errno {err}); "
                                f"Linux 5.16 or newer and an AMX-enabled kernel are needed")
    return AmxAccess(True, "granted")


@functools.lru_cache(maxsize=1)
def amx_access() -> AmxAccess:
    """request_amx once per process (the permission holds for all its threads)."""
    return request_amx()


# ---------------------------------------------------------------- block specs and their numba entry points

SPECS: list[BlockSpec] = []


def _spec(*args, **kw) -> int:
    SPECS.append(BlockSpec(*args, **kw))
    return len(SPECS) - 1


@intrinsic
def _block(typingctx, index, m, c, seed):
    if not isinstance(index, types.IntegerLiteral):
        return None
    spec = SPECS[index.literal_value]

    def codegen(context, builder, signature, args):
        return emit_block(builder, spec, args[1], args[2], args[3])

    return types.int64(index, types.float64, types.float64, types.float64), codegen


@njit(parallel=True, cache=True)
def _peak(index, reps, nthreads, m, c):
    """`reps` blocks per thread, seeds 1..8 in turn (so no block is loop-invariant); int64 checksum."""
    partial = np.zeros(nthreads, np.int64)
    for t in prange(nthreads):
        total = 0
        for r in range(reps):
            total += _block(literally(index), m, c, float((r & 7) + 1))
        partial[t] = total
    return partial.sum()


@functools.lru_cache(maxsize=None)
def _entry(index: int):
    """The compiled `_peak` for one block, called directly: the dispatcher would retry int64 typing each call."""
    spec = SPECS[index]
    if spec.is_tile and not amx_access().granted:  # a tile instruction would raise SIGILL
        raise RuntimeError(f"AMX block {index}: {amx_access().reason}")
    m, c = OPERANDS[spec.kind]
    _peak(index, 1, 1, m, c)  # compile, or load from numba's cache
    sig = next(s for s in _peak.signatures if getattr(s[0], "literal_value", None) == index)
    return _peak.overloads[sig].entry_point


# ---------------------------------------------------------------- effective clock: a dependent add chain


def _chain_asm(arch: str) -> str | None:
    # register-register adds: some cores fold add-immediate chains at rename, faster than one per cycle
    one = {"x86_64": "addq $1, $0", "aarch64": "add $0, $0, $1"}.get(arch)
    return None if one is None else "\n\t".join([one] * CHAIN_ADDS)


def _chain_constraints(arch: str) -> str:
    # x86 `add` writes the flags: without the clobber, znver3/znver4 scheduling moves the loop's exit
    # compare above the asm and the loop never ends. AArch64 `add` (no `s`) leaves NZCV alone.
    return "=r,r,0,~{flags}" if arch == "x86_64" else "=r,r,0"


@intrinsic
def _add_chain(typingctx, x):
    import platform

    arch = platform.machine()
    text, constraints = _chain_asm(arch), _chain_constraints(arch)
    if text is None:
        return None

    def codegen(context, builder, signature, args):
        one = ir.Constant(I64, 1)
        return builder.asm(ir.FunctionType(I64, [I64, I64]), text, constraints, [one, args[0]], side_effect=True)

    return types.int64(types.int64), codegen


@njit(parallel=True, cache=True)
def clock_chain(reps, nthreads):
    """CHAIN_ADDS * CHAIN_BLOCKS dependent adds per repetition per thread; returns the total of all chains."""
    partial = np.zeros(nthreads, np.int64)
    for t in prange(nthreads):
        x = 0
        for _ in range(reps):
            for _ in range(CHAIN_BLOCKS):
                x = _add_chain(x)
        partial[t] = x
    return partial.sum()


def clock_expected(reps: int, nthreads: int) -> int:
    return nthreads * reps * CHAIN_BLOCKS * CHAIN_ADDS


# ---------------------------------------------------------------- checksums


def _wrap64(x: int) -> int:
    x &= (1 << 64) - 1
    return x - (1 << 64) if x >= 1 << 63 else x


@functools.lru_cache(maxsize=None)
def block_values(spec: BlockSpec) -> tuple[int, ...]:
    """What one block returns for seeds 1..8: closed form for floats, numpy int32 simulation for integers."""
    if spec.is_tile:
        return tile_block_values(spec)
    n = spec.accumulators * spec.acc_lanes
    if spec.kind == "fma":  # fma(acc, 1, 1) adds one per step, exactly
        return tuple(n * (s + STEPS) for s in range(1, 9))
    if spec.kind == "bf16dot":  # acc + 1*1 + 1*1 per step
        return tuple(n * (s + 2 * STEPS) for s in range(1, 9))
    # integers: every lane of every accumulator runs the same chain, so one int32 per seed suffices.
    # i8madd computes what i8dot does: its pmaddubsw never saturates, since the pattern's bytes are 1..4 and
    # |a0*b0 + a1*b1| <= (3 + 4) * 128 = 896 < 2**15 for any signed bytes b (tests simulate the saturation);
    # i16madd is i16dot (pmaddwd and vpdpwssd both wrap, neither saturates).
    group, pattern = (4, INT8_PATTERN) if spec.kind in ("i8dot", "i8madd") else (2, INT16_PATTERN)
    small = np.int8 if group == 4 else np.int16
    a = np.array([pattern], np.int32).view(np.uint8 if group == 4 else np.int16).astype(np.int32)
    acc = np.arange(1, 9, dtype=np.int32)
    with np.errstate(over="ignore"):
        for _ in range(STEPS):
            parts = acc.view(small).reshape(8, group).astype(np.int32)
            acc = acc + (parts * a).sum(axis=1, dtype=np.int32)
    return tuple(n * int(v) for v in acc)


def tile_products(spec: BlockSpec) -> np.ndarray:
    """What each C tile gains per tdp instruction, by numpy: A (16 x K) @ B (K x 16) in the tiles' layout.

    A B tile row k holds, for each of the 16 output columns, the `group` consecutive K entries
    (2 bf16 or 4 int8) k*group .. k*group+group-1 of that column (the tile unit's pair/quad layout).
    """
    data = tile_operands(spec)
    n_a, _ = tile_counts(spec.accumulators)
    if spec.kind == "amx_bf16":
        vals = (data.view(np.uint16).astype(np.uint32) << 16).view(np.float32).astype(np.float64)
        group = 2
    else:
        vals = np.concatenate([data[:n_a].astype(np.int64), data[n_a:].view(np.int8).astype(np.int64)])
        group = 4
    a, b = vals[:n_a], vals[n_a:]
    cols = TILE_COLSB // 4
    b_logical = b.reshape(len(b), TILE_ROWS, cols, group).transpose(0, 1, 3, 2).reshape(len(b), TILE_ROWS * group, cols)
    return np.stack([a[i] @ b_logical[j] for i, j in tile_pairs(spec.accumulators)])


@functools.lru_cache(maxsize=None)
def tile_block_values(spec: BlockSpec) -> tuple[int, ...]:
    """One AMX block's checksum for seeds 1..8: C tiles from the seed, STEPS products added in fp32 / int32."""
    dtype = np.float32 if spec.kind == "amx_bf16" else np.int32
    p = tile_products(spec).astype(dtype)
    out = []
    for s in range(1, 9):
        c = np.full(p.shape, s, dtype)
        with np.errstate(over="ignore"):
            for _ in range(STEPS):
                c = c + p
        out.append(int(c.astype(np.int64).sum()))
    return tuple(out)


def peak_expected(spec: BlockSpec, reps: int, nthreads: int) -> int:
    values = block_values(spec)
    per_thread = sum(values[s] * (reps // 8 + (1 if s < reps % 8 else 0)) for s in range(8))
    return _wrap64(nthreads * per_thread)


# ---------------------------------------------------------------- the registry

# The multiply-add operands the float kernels use: fma(acc, M, C) with M = C = 1 (run time values,
# so the compiler cannot fold them); the integer kernels pass their fixed operand in M.
OPERANDS = {"fma": (1.0, 1.0), "bf16dot": (1.0, 1.0), "i8dot": (float(INT8_PATTERN), 0.0),
            "i16dot": (float(INT16_PATTERN), 0.0), "amx_bf16": (0.0, 0.0), "amx_i8": (0.0, 0.0),
            "i8madd": (float(INT8_PATTERN), 1.0), "i16madd": (float(INT16_PATTERN), 0.0)}


@dataclass(frozen=True)
class PeakKernel:
    """One multiply-add peak kernel: what it computes, on which hosts, and how it is labelled."""

    name: str
    dtype: str  # the precision figure it stands for: fp64 fp32 fp16 bf16 int8 int16
    spec_index: int
    requires: tuple[str, ...]  # ISA features (host.features names), all needed
    arch: str | None  # "x86_64" / "aarch64" / None: any
    variant: str  # the path label shown with the figure
    native: bool  # True only when the dtype's own arithmetic runs in hardware
    math_bits: int  # bits of one multiply-add lane of the arithmetic actually done
    # ISA features numba's target must not have, or LLVM compiles another kernel (with VNNI it fuses
    # pmaddwd + paddd into vpdpwssd): the code generator's features decide, not the host's
    lacks: tuple[str, ...] = ()

    @property
    def spec(self) -> BlockSpec:
        return SPECS[self.spec_index]

    @property
    def macs_per_rep(self) -> int:
        """Multiply-adds per thread per repetition."""
        return self.spec.macs_per_block

    @property
    def ops_per_rep(self) -> int:
        """1 multiply-add = 2 operations (common practice)."""
        return 2 * self.macs_per_rep

    def run(self, reps: int, nthreads: int) -> int:
        m, c = OPERANDS[self.spec.kind]
        return int(_entry(self.spec_index)(self.spec_index, reps, nthreads, m, c))

    def verify(self, checksum: int, reps: int, nthreads: int) -> bool:
        return checksum == peak_expected(self.spec, reps, nthreads)

    def available(self, features, arch: str) -> bool:
        """The host executes it (`features`), numba's target may emit it, and (tiles) Linux granted AMX."""
        if not ((self.arch is None or self.arch == arch) and all(f in features for f in self.requires)):
            return False
        if any(target.may_emit([f]) for f in self.lacks):
            return False
        if not self.compilable():
            return False
        return not self.spec.is_tile or amx_access().granted

    def compilable(self) -> bool:
        """numba's target CPU has the features and the vector width (a missing target intrinsic is a fatal
        LLVM error that ends the process; a wider vector is split and its label would be wrong)."""
        return target.may_emit(self.requires) and (self.spec.is_tile or self.spec.bits <= target.vector_bits())


def _fp(dtype, elem, bits, accs, requires, arch, label, native=True, math_bits=None):
    idx = _spec("fma", elem, bits, accs)
    return PeakKernel(f"{dtype}-fma-{bits}x{accs}", dtype, idx, requires, arch, label, native,
                      math_bits or {"f64": 64, "f32": 32, "f16": 16}[elem])


def _fallback(k: PeakKernel, dtype: str) -> PeakKernel:
    """The fp32 kernel standing for a half-precision dtype the host cannot compute natively."""
    return PeakKernel(f"{dtype}-as-fp32-{k.spec.bits}x{k.spec.accumulators}", dtype, k.spec_index, k.requires, k.arch,
                      f"{dtype} storage, fp32 math ({k.variant}); not native", False, 32)


def _dot(dtype, bits, accs, requires, how):
    """Integer dot-product kernel: VNNI target intrinsic where `how` names one, else portable IR."""
    kind, sizes, mnemonic = (("i8dot", "u8 x s8", "vpdpbusd") if dtype == "int8" else ("i16dot", "s16 x s16", "vpdpwssd"))
    if how == "vnni":
        idx = _spec(kind, "i32", bits, accs, f"llvm.x86.avx512.{mnemonic}.{bits}")
        reg = {512: "zmm", 256: "ymm"}[bits]
        return PeakKernel(f"{dtype}-vnni-{bits}", dtype, idx, requires, "x86_64", f"{sizes} -> s32 ({mnemonic} {reg})",
                          True, 8 if dtype == "int8" else 16)
    return PeakKernel(f"{dtype}-ir-{bits}", dtype, _spec(kind, "i32", bits, accs), requires, None,
                      f"{sizes} -> s32, portable vector IR as compiled", False, 8 if dtype == "int8" else 16)


def _madd(dtype, bits, accs, requires):
    """Integer multiply-add through pmaddubsw/pmaddwd (SSSE3, AVX2): native 8/16-bit products, for hosts without
    VNNI (where the VNNI kernels stand, and LLVM would turn pmaddwd + paddd into vpdpwssd)."""
    kind, sizes, ops = (("i8madd", "u8 x s8 -> s16 pairs -> s32", "pmaddubsw + pmaddwd + paddd") if dtype == "int8"
                        else ("i16madd", "s16 x s16 -> s32", "pmaddwd + paddd"))
    idx = _spec(kind, "i32", bits, accs, PMADD[bits][0 if dtype == "int8" else 1])
    reg = {256: "ymm", 128: "xmm"}[bits]
    return PeakKernel(f"{dtype}-madd-{bits}", dtype, idx, requires, "x86_64", f"{sizes} ({ops} {reg})", True,
                      8 if dtype == "int8" else 16, lacks=("avx512_vnni", "avx_vnni"))


# width, accumulators, features needed, path
_DOTS = ((512, 16, ("avx512_vnni",), "vnni"), (256, 12, ("avx_vnni",), "vnni"), (128, 12, (), "ir"))
_X86 = "x86_64"
_AVX512 = ("avx512f",)
_F64 = [_fp("fp64", "f64", 512, 16, _AVX512, _X86, "llvm fma <8 x double>"),
        _fp("fp64", "f64", 256, 16, ("avx512f", "avx512vl"), _X86, "llvm fma <4 x double>"),
        _fp("fp64", "f64", 256, 12, ("avx2", "fma"), _X86, "llvm fma <4 x double>"),
        _fp("fp64", "f64", 128, 16, (), None, "llvm fma <2 x double>")]
_F32 = [_fp("fp32", "f32", 512, 16, _AVX512, _X86, "llvm fma <16 x float>"),
        _fp("fp32", "f32", 256, 16, ("avx512f", "avx512vl"), _X86, "llvm fma <8 x float>"),
        _fp("fp32", "f32", 256, 12, ("avx2", "fma"), _X86, "llvm fma <8 x float>"),
        _fp("fp32", "f32", 128, 16, (), None, "llvm fma <4 x float>")]

REGISTRY: list[PeakKernel] = [
    *_F64,
    *_F32,
    _fp("fp16", "f16", 512, 16, ("avx512_fp16",), _X86, "llvm fma <32 x half> (AVX-512 FP16)"),
    _fp("fp16", "f16", 256, 16, ("avx512_fp16", "avx512vl"), _X86, "llvm fma <16 x half> (AVX-512 FP16)"),
    _fp("fp16", "f16", 128, 16, ("asimdhp",), "aarch64", "llvm fma <8 x half> (Armv8.2 FP16)"),
    *[_fallback(k, "fp16") for k in _F32],
    PeakKernel("bf16-dot-512", "bf16", _spec("bf16dot", "f32", 512, 16, "llvm.x86.avx512bf16.dpbf16ps.512"),
               ("avx512_bf16",), _X86, "bf16 pairs into fp32 (vdpbf16ps)", True, 16),
    *[_fallback(k, "bf16") for k in _F32],
    *[_dot(d, bits, accs, req, label) for d in ("int8", "int16") for bits, accs, req, label in _DOTS],
    _madd("int8", 256, 12, ("avx2",)), _madd("int16", 256, 12, ("avx2",)),
    _madd("int8", 128, 12, ("ssse3",)), _madd("int16", 128, 12, ("sse2",)),
    PeakKernel("bf16-amx-4x", "bf16", _spec("amx_bf16", "f32", 8 * TILE_COLSB, 4, "llvm.x86.tdpbf16ps"),
               ("amx_tile", "amx_bf16"), _X86, "AMX bf16 tiles (tdpbf16ps), bf16 pairs into fp32", True, 16),
    PeakKernel("int8-amx-4x", "int8", _spec("amx_i8", "i32", 8 * TILE_COLSB, 4, "llvm.x86.tdpbusd"),
               ("amx_tile", "amx_int8"), _X86, "AMX int8 tiles (tdpbusd), u8 x s8 -> s32", True, 8),
]


def kernels_for(features, arch: str, dtype: str | None = None) -> list[PeakKernel]:
    """Registry entries this host can run and numba's target can compile (optionally of one dtype), native first."""
    ks = [k for k in REGISTRY if k.available(features, arch) and (dtype is None or k.dtype == dtype)]
    return sorted(ks, key=lambda k: not k.native)


def unavailable_reasons(features, arch: str, dtype: str | None = None) -> dict[str, str]:
    """Kernels the CPU has the features for but this process may not run, and why: AMX refused by the OS,
    or numba's target CPU (NUMBA_CPU_NAME / NUMBA_CPU_FEATURES) cannot emit them."""
    out = {}
    for k in REGISTRY:
        if not ((dtype is None or k.dtype == dtype) and (k.arch is None or k.arch == arch)
                and all(f in features for f in k.requires)):
            continue
        if k.spec.is_tile and not amx_access().granted:
            out[k.name] = amx_access().reason
        elif not k.compilable():
            out[k.name] = (f"numba compiles for {target.cpu_name()} (NUMBA_CPU_NAME, NUMBA_CPU_FEATURES), which "
                           f"does not switch on {', '.join(k.requires) or 'nothing it needs'} or has vectors of "
                           f"{target.vector_bits()} bits, not {k.spec.bits}")
    return out


# ---------------------------------------------------------------- what the compiler emits

_MADD = re.compile(r"^\s*(?:\{vex\}\s*)?(v?f(?:n)?m(?:add|la)\w*|vpdp\w+|tdp\w+|vdpbf16ps|vpmadd\w+|pmadd\w+|"
                   r"[su]dot|[su]mlal2?|"
                   r"mla|bfdot|bfmmla|fmla)\s+([^\n]*)", re.M)


def _width(operands: str) -> str:
    if re.search(r"%?tmm\d", operands):
        return "tmm/16x64B"
    m = re.search(r"%?([xyz])mm\d+", operands)
    if m:
        return {"x": "xmm/128", "y": "ymm/256", "z": "zmm/512"}[m.group(1)]
    m = re.search(r"\bv\d+\.(\d+)([bhsd])", operands)
    return f"{m.group(1)}{m.group(2)}/128" if m else "scalar"


def block_asm(spec: BlockSpec, cpu: str | None = None, features: str | None = None,
              triple: str | None = None) -> str:
    """The assembly LLVM emits for one block, compiled and never run.

    Default: for the CPU numba compiles for (its name and feature string, see kernels.target), so the
    instructions shown are those the survey runs; `cpu`, `features` and `triple` name another target.
    """
    import llvmlite.binding as ll

    if triple is None:
        ll.initialize_native_target()
        ll.initialize_native_asmprinter()
    else:
        ll.initialize_all_targets()
        ll.initialize_all_asmprinters()
    module = ir.Module("probe")
    module.triple = triple or ll.get_process_triple()
    fn = ir.Function(module, ir.FunctionType(I64, [ir.DoubleType()] * 3), "probe")
    builder = ir.IRBuilder(fn.append_basic_block("entry"))
    builder.ret(emit_block(builder, spec, *fn.args))
    machine = ll.Target.from_triple(module.triple) if triple else ll.Target.from_default_triple()
    tm = machine.create_target_machine(cpu=cpu or target.cpu_name(),
                                       features=target.feature_string() if features is None else features, opt=3)
    return tm.emit_assembly(ll.parse_assembly(str(module)))


def madd_instructions(asm: str) -> tuple[str, ...]:
    """Multiply-add mnemonics and register widths in an assembly text ('vfmadd213pd zmm/512')."""
    return tuple(sorted({f"{m.group(1)} {_width(m.group(2))}" for m in _MADD.finditer(asm)}))


@functools.lru_cache(maxsize=None)
def block_instructions(spec: BlockSpec) -> tuple[str, ...]:
    """Multiply-add mnemonics and register widths LLVM emits for the block for numba's target CPU."""
    return madd_instructions(block_asm(spec))

