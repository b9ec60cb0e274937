"""Deliberate faults that prove a survey survives a kernel which hangs or crashes (EAVES_FAULT).

EAVES_FAULT="KIND:TEXT[;KIND:TEXT...]": before a step whose progress label contains TEXT, the
worker does KIND instead of the step. KIND is `spin` (a compiled loop that never returns and
never looks at signals), `sigill` (executes an illegal instruction), `sigsegv` (loads from
address 0) or `raise` (a Python error). Each announces itself on stderr first.
"""

from __future__ import annotations

import os
import platform
import signal
import sys

KINDS = ("spin", "sigill", "sigsegv", "raise")


def planned(environ=os.environ) -> list[tuple[str, str]]:
    """The (kind, label text) pairs EAVES_FAULT asks for; unknown kinds are ignored."""
    out = []
    for part in environ.get("EAVES_FAULT", "").split(";"):
        kind, _, text = part.partition(":")
        if kind.strip() in KINDS and text.strip():
            out.append((kind.strip(), text.strip()))
    return out


def maybe_inject(label: str) -> None:
    """Do the fault planned for this step, if any (the worker calls this before every step)."""
    for kind, text in planned():
        if text in label:
            print(f"eaves fault: {kind} in {label}", file=sys.stderr, flush=True)
            FAULTS[kind]()


def _spin() -> None:
    import numpy as np
    from numba import njit

    @njit(cache=False, nogil=True)
    def forever(flag):
        while flag[0] == 0:  # nothing in the loop writes flag[0]: it never ends
            flag[1] += 1
        return flag[1]

    forever(np.zeros(2, np.int64))


def _illegal_instruction() -> None:
    """Run `ud2` (x86) or `udf #0` (AArch64) from an executable page; the kernel sends SIGILL."""
    import ctypes
    import mmap

    code = b"\x0f\x0b" if platform.machine() in ("x86_64", "AMD64", "i686") else b"\x00\x00\x00\x00"
    try:
        page = mmap.mmap(-1, mmap.PAGESIZE, prot=mmap.PROT_READ | mmap.PROT_WRITE | mmap.PROT_EXEC)
    except (OSError, ValueError):  # a policy forbidding writable code: the signal itself
        os.kill(os.getpid(), signal.SIGILL)
        return
    page.write(code)
    address = ctypes.addressof(ctypes.c_char.from_buffer(page))
    ctypes.CFUNCTYPE(None)(address)()


def _bad_address() -> None:
    import ctypes

    ctypes.string_at(64, 8)  # not 0: ctypes reads nothing from a null pointer


def _raise() -> None:
    raise RuntimeError("a deliberate error (EAVES_FAULT)")


FAULTS = {"spin": _spin, "sigill": _illegal_instruction, "sigsegv": _bad_address, "raise": _raise}
