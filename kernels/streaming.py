"""Non-temporal (streaming) stores: numba has no API for them, so an intrinsic emits LLVM IR.

A full cache line is written with one 64-byte vector store carrying LLVM's `nontemporal`
metadata; x86 compiles it to movnt stores that bypass the read-for-ownership of the line.
Destinations must be 64-byte aligned (see `aligned_empty`): the store claims `align 64`, and
vmovntpd faults on a misaligned address (SIGSEGV), so the kernels refuse one with ValueError.
The intrinsics index the data pointer densely: they accept C-contiguous arrays only.
"""

from __future__ import annotations

import numpy as np
from llvmlite import ir
from numba import njit, prange, types
from numba.core import cgutils
from numba.core.errors import TypingError
from numba.extending import intrinsic

from eaves.kernels.memory import FAST, LINE_ELEMS, _slice


def aligned_empty(n: int, dtype=np.float64, align: int = 64) -> np.ndarray:
    """An uninitialised 1-d array whose first element sits on an `align`-byte boundary."""
    itemsize = np.dtype(dtype).itemsize
    raw = np.empty(n * itemsize + align, dtype=np.uint8)
    offset = (-raw.ctypes.data) % align
    return raw[offset:offset + n * itemsize].view(dtype)


def _dense(*arrays):
    """Typing-time guard: lines and byte counts are taken from the data pointer as one dense run."""
    for a in arrays:
        if not (isinstance(a, types.Array) and a.ndim == 1 and a.layout == "C" and a.dtype == types.float64):
            raise TypingError(f"streaming kernels need a C-contiguous 1-d float64 array, got {a}")


def _line_ptr(builder, context, arrtype, arr, index):
    ary = context.make_array(arrtype)(context, builder, arr)
    ptr = builder.gep(ary.data, [index])
    return builder.bitcast(ptr, ir.VectorType(ir.DoubleType(), LINE_ELEMS).as_pointer())


def _nontemporal(builder, value, ptr):
    store = builder.store(value, ptr, align=64)
    store.set_metadata("nontemporal", builder.module.add_metadata([ir.IntType(32)(1)]))


@intrinsic
def stream_line_copy(typingctx, dst, src, i):
    """dst[i:i+8] = src[i:i+8] with a streaming store (i a multiple of 8)."""
    _dense(dst, src)

    def codegen(context, builder, sig, args):
        value = builder.load(_line_ptr(builder, context, sig.args[1], args[1], args[2]), align=8)
        _nontemporal(builder, value, _line_ptr(builder, context, sig.args[0], args[0], args[2]))
        return context.get_dummy_value()
    return types.void(dst, src, types.intp), codegen


@intrinsic
def stream_line_fill(typingctx, dst, i, value):
    """dst[i:i+8] = value with a streaming store (i a multiple of 8)."""
    _dense(dst)

    def codegen(context, builder, sig, args):
        vec_t = ir.VectorType(ir.DoubleType(), LINE_ELEMS)
        vec = ir.Constant(vec_t, ir.Undefined)
        for lane in range(LINE_ELEMS):
            vec = builder.insert_element(vec, args[2], ir.IntType(32)(lane))
        _nontemporal(builder, vec, _line_ptr(builder, context, sig.args[0], args[0], args[1]))
        return context.get_dummy_value()
    return types.void(dst, types.intp, types.float64), codegen


@intrinsic
def store_fence(typingctx):
    """Order streaming stores before what follows: `fence seq_cst` (x86 mfence, AArch64 dmb ish).

    Non-temporal stores are weakly ordered; the fence makes them visible before the thread's
    slice is reported done (a release fence would emit nothing on x86 and not order them)."""
    def codegen(context, builder, sig, args):
        builder.fence("seq_cst")
        return context.get_dummy_value()
    return types.void(), codegen


@njit(cache=True)
def _check_aligned(a):
    if a.ctypes.data % 64 != 0:
        raise ValueError("streaming stores need a 64-byte aligned destination (see aligned_empty)")


@njit(parallel=True, fastmath=FAST, cache=True)
def fill_stream(a, reps, nthreads, base):
    """`fill` with streaming stores for whole lines, ordinary stores for a last partial line."""
    _check_aligned(a)
    partial = np.zeros(nthreads)
    for t in prange(nthreads):
        lo, hi = _slice(t, nthreads, a.shape[0])
        x = a[lo:hi]
        lines = x.shape[0] // LINE_ELEMS
        for r in range(reps):
            v = base + r
            for k in range(lines):
                stream_line_fill(x, k * LINE_ELEMS, v)
            for i in range(lines * LINE_ELEMS, x.shape[0]):
                x[i] = v
        store_fence()
        partial[t] = x[0] + x[-1]
    return partial.sum()


@njit(parallel=True, fastmath=FAST, cache=True)
def copy_stream(dst, src, reps, nthreads):
    """`copy` with streaming stores for whole lines, ordinary stores for a last partial line."""
    _check_aligned(dst)
    partial = np.zeros(nthreads)
    for t in prange(nthreads):
        lo, hi = _slice(t, nthreads, src.shape[0])
        d = dst[lo:hi]
        s = src[lo:hi]
        lines = s.shape[0] // LINE_ELEMS
        for _ in range(reps):
            for k in range(lines):
                stream_line_copy(d, s, k * LINE_ELEMS)
            for i in range(lines * LINE_ELEMS, s.shape[0]):
                d[i] = s[i]
        store_fence()
        partial[t] = d[0] + d[-1]
    return partial.sum()


@intrinsic
def _memcpy(typingctx, dst, src, nbytes):
    """Copy `nbytes` from array src to array dst with LLVM's memcpy intrinsic, which the backend
    turns into a call to the C library's memcpy for sizes it does not know."""
    _dense(dst, src)

    def codegen(context, builder, sig, args):
        byte_ptr = ir.IntType(8).as_pointer()
        d = builder.bitcast(context.make_array(sig.args[0])(context, builder, args[0]).data, byte_ptr)
        s = builder.bitcast(context.make_array(sig.args[1])(context, builder, args[1]).data, byte_ptr)
        cgutils.raw_memcpy(builder, d, s, args[2], 1)
        return context.get_dummy_value()
    return types.void(dst, src, types.intp), codegen


@njit(parallel=True, cache=True)
def copy_memcpy(dst, src, reps, nthreads):
    """`copy` through memcpy, one call per thread slice and repetition."""
    partial = np.zeros(nthreads)
    for t in prange(nthreads):
        lo, hi = _slice(t, nthreads, src.shape[0])
        d = dst[lo:hi]
        s = src[lo:hi]
        for _ in range(reps):
            _memcpy(d, s, s.shape[0] * 8)
        partial[t] = d[0] + d[-1]
    return partial.sum()
