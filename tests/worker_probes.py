"""Functions the tests send to the worker as steps (module level, so the worker can import them)."""

import glob

import numpy as np


def thread_cpus(threads: int) -> list[str]:
    """After a numba parallel region with `threads` threads: every thread's allowed CPUs, as the OS reports
    them (/proc/self/task/*/status, Cpus_allowed_list)."""
    from numba import njit, prange

    from eaves.threads import use_threads

    @njit(parallel=True)
    def touch(a):
        for i in prange(a.shape[0]):
            a[i] += 1.0

    with use_threads(threads):
        touch(np.zeros(4096))
    out = []
    for path in sorted(glob.glob("/proc/self/task/*/status")):
        fields = dict(line.split(":", 1) for line in open(path) if ":" in line)
        out.append(fields["Cpus_allowed_list"].strip())
    return out


def threading_layer() -> str:
    import numba

    thread_cpus(1)
    return numba.threading_layer()
