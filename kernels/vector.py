"""Bandwidth loops written as explicit LLVM vector IR, at the host's full vector width.

numba's loops are vectorised by LLVM, which on AVX-512 hosts prefers 256-bit vectors; an
L1-resident read then saturates the adders before the load ports. These intrinsics emit
`UNROLL` independent full-width vectors per block instead, so the width is the hardware's.
The width is that of the CPU numba compiles for (`target.vector_bits`), not the host's: under
`NUMBA_CPU_FEATURES` for a narrower model a wider vector would be split (and mislabelled).
Loads and stores claim only element alignment (any numpy array is safe); the survey's
buffers are 64-byte aligned, so no access splits a cache line. The intrinsics take
C-contiguous arrays only: they index the data pointer densely, so a strided view would be
read or written past its end.
"""

from __future__ import annotations

import numpy as np
from llvmlite import ir
from numba import njit, prange, types
from numba.core import cgutils
from numba.core.errors import TypingError
from numba.extending import intrinsic

from eaves.kernels import target
from eaves.kernels.memory import FAST, _slice

VECTOR_BITS = target.vector_bits()  # of the CPU numba compiles for
LANES = VECTOR_BITS // 64  # float64 lanes per vector
UNROLL = 8  # independent vectors per block: covers add latency x ports on current cores
BLOCK = LANES * UNROLL  # elements per block
WIDTH_LABEL = f"vector {VECTOR_BITS}-bit"

_VEC = ir.VectorType(ir.DoubleType(), LANES)
_INTP = ir.IntType(64)


def _vec_ptr(builder, base, index):
    return builder.bitcast(builder.gep(base, [index]), _VEC.as_pointer())


def _blocks(builder, nblocks, body):
    """Call body(offsets) for every block; offsets are the element index of each of its vectors."""
    with cgutils.for_range(builder, nblocks) as loop:
        start = builder.mul(loop.index, ir.Constant(_INTP, BLOCK))
        body([builder.add(start, ir.Constant(_INTP, k * LANES)) for k in range(UNROLL)])


def _data(context, builder, arrtype, arr):
    return context.make_array(arrtype)(context, builder, arr).data


def _dense(*arrays):
    """Typing-time guard: the block intrinsics index the data pointer as one dense run of float64."""
    for a in arrays:
        if not (isinstance(a, types.Array) and a.ndim == 1 and a.layout == "C" and a.dtype == types.float64):
            raise TypingError(f"vector blocks need a C-contiguous 1-d float64 array, got {a}")


@intrinsic
def sum_blocks(typingctx, arr, nblocks):
    """Sum of the first nblocks * BLOCK elements, in UNROLL vector accumulators."""
    _dense(arr)

    def codegen(context, builder, sig, args):
        base = _data(context, builder, sig.args[0], args[0])
        accs = [cgutils.alloca_once_value(builder, ir.Constant(_VEC, [0.0] * LANES)) for _ in range(UNROLL)]

        def body(offsets):
            for acc, off in zip(accs, offsets):
                builder.store(builder.fadd(builder.load(acc), builder.load(_vec_ptr(builder, base, off), align=8)), acc)

        _blocks(builder, args[1], body)
        total = builder.load(accs[0])
        for acc in accs[1:]:
            total = builder.fadd(total, builder.load(acc))
        s = builder.extract_element(total, ir.Constant(ir.IntType(32), 0))
        for lane in range(1, LANES):
            s = builder.fadd(s, builder.extract_element(total, ir.Constant(ir.IntType(32), lane)))
        return s
    return types.float64(arr, types.intp), codegen


@intrinsic
def fill_blocks(typingctx, arr, nblocks, value):
    """arr[:nblocks * BLOCK] = value with full-width vector stores."""
    _dense(arr)

    def codegen(context, builder, sig, args):
        base = _data(context, builder, sig.args[0], args[0])
        vec = cgutils.get_null_value(_VEC)
        for lane in range(LANES):
            vec = builder.insert_element(vec, args[2], ir.Constant(ir.IntType(32), lane))

        def body(offsets):
            for off in offsets:
                builder.store(vec, _vec_ptr(builder, base, off), align=8)

        _blocks(builder, args[1], body)
        return context.get_dummy_value()
    return types.void(arr, types.intp, types.float64), codegen


@intrinsic
def copy_blocks(typingctx, dst, src, nblocks):
    """dst[:nblocks * BLOCK] = src[...] with full-width vector loads and stores."""
    _dense(dst, src)

    def codegen(context, builder, sig, args):
        d = _data(context, builder, sig.args[0], args[0])
        s = _data(context, builder, sig.args[1], args[1])

        def body(offsets):
            values = [builder.load(_vec_ptr(builder, s, off), align=8) for off in offsets]
            for off, v in zip(offsets, values):
                builder.store(v, _vec_ptr(builder, d, off), align=8)

        _blocks(builder, args[2], body)
        return context.get_dummy_value()
    return types.void(dst, src, types.intp), codegen


@intrinsic
def axpy_blocks(typingctx, y, x, alpha, nblocks):
    """y = alpha * x + y over nblocks * BLOCK elements with full-width (fused where possible) multiply-adds."""
    _dense(y, x)

    def codegen(context, builder, sig, args):
        yp = _data(context, builder, sig.args[0], args[0])
        xp = _data(context, builder, sig.args[1], args[1])
        # fmuladd, not fma: fused where the target has FMA, a multiply and an add where it has not
        # (llvm.fma there becomes one libm call per lane)
        fma = cgutils.get_or_insert_function(builder.module, ir.FunctionType(_VEC, [_VEC] * 3),
                                             f"llvm.fmuladd.v{LANES}f64")
        a = cgutils.get_null_value(_VEC)
        for lane in range(LANES):
            a = builder.insert_element(a, args[2], ir.Constant(ir.IntType(32), lane))

        def body(offsets):
            for off in offsets:
                yv = _vec_ptr(builder, yp, off)
                builder.store(builder.call(fma, [a, builder.load(_vec_ptr(builder, xp, off), align=8),
                                                 builder.load(yv, align=8)]), yv, align=8)

        _blocks(builder, args[3], body)
        return context.get_dummy_value()
    return types.void(y, x, types.float64, types.intp), codegen


@njit(parallel=True, fastmath=FAST, cache=True)
def read_sum(a, reps, nthreads):
    """`memory.read_sum` at full vector width."""
    partial = np.zeros(nthreads)
    for t in prange(nthreads):
        lo, hi = _slice(t, nthreads, a.shape[0])
        x = a[lo:hi]
        nb = x.shape[0] // BLOCK
        total = 0.0
        for _ in range(reps):
            s = sum_blocks(x, nb)
            for i in range(nb * BLOCK, x.shape[0]):
                s += x[i]
            total += s
        partial[t] = total
    return partial.sum()


@njit(parallel=True, fastmath=FAST, cache=True)
def fill(a, reps, nthreads, base):
    """`memory.fill` at full vector width."""
    partial = np.zeros(nthreads)
    for t in prange(nthreads):
        lo, hi = _slice(t, nthreads, a.shape[0])
        x = a[lo:hi]
        nb = x.shape[0] // BLOCK
        for r in range(reps):
            v = base + r
            fill_blocks(x, nb, v)
            for i in range(nb * BLOCK, x.shape[0]):
                x[i] = v
        partial[t] = x[0] + x[-1]
    return partial.sum()


@njit(parallel=True, fastmath=FAST, cache=True)
def copy(dst, src, reps, nthreads):
    """`memory.copy` at full vector width."""
    partial = np.zeros(nthreads)
    for t in prange(nthreads):
        lo, hi = _slice(t, nthreads, src.shape[0])
        d = dst[lo:hi]
        s = src[lo:hi]
        nb = s.shape[0] // BLOCK
        for _ in range(reps):
            copy_blocks(d, s, nb)
            for i in range(nb * BLOCK, s.shape[0]):
                d[i] = s[i]
        partial[t] = d[0] + d[-1]
    return partial.sum()


@njit(parallel=True, fastmath=FAST, cache=True)
def axpy(y, x, alpha, reps, nthreads):
    """`memory.axpy` at full vector width."""
    partial = np.zeros(nthreads)
    for t in prange(nthreads):
        lo, hi = _slice(t, nthreads, x.shape[0])
        yy = y[lo:hi]
        xx = x[lo:hi]
        nb = xx.shape[0] // BLOCK
        for _ in range(reps):
            axpy_blocks(yy, xx, alpha, nb)
            for i in range(nb * BLOCK, xx.shape[0]):
                yy[i] = alpha * xx[i] + yy[i]
        partial[t] = yy[0]
    return partial.sum()
