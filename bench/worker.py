"""The worker process: runs the survey's steps one at a time and reports each result, error or compilation.

Started by `eaves.supervisor.Supervisor` as `python -m eaves.worker READ_FD WRITE_FD`. It ignores
Ctrl-C (the survey process decides, and kills it), dies with its parent (Linux), and leaves when
its input closes. A kernel that crashes takes only this process down.
"""

from __future__ import annotations

import os
import signal
import sys
import traceback
from multiprocessing.connection import Connection
from typing import Any

from eaves.errors import EavesError


def describe_error(err: BaseException) -> str:
    """One line for a step that raised: our own errors as their message, others with their type and place."""
    if isinstance(err, EavesError):
        return str(err)
    frames = traceback.extract_tb(err.__traceback__)
    where = f" at {os.path.basename(frames[-1].filename)}:{frames[-1].lineno}" if frames else ""
    return f"{type(err).__name__}: {err}{where}"


def _die_with_parent() -> None:
    """Linux: the kernel sends SIGKILL to this process when the survey process ends, however it ends."""
    try:
        import ctypes

        PR_SET_PDEATHSIG = 1
        ctypes.CDLL(None, use_errno=True).prctl(PR_SET_PDEATHSIG, int(signal.SIGKILL), 0, 0, 0)
    except (OSError, AttributeError):
        pass


def _report_compilation(out: Connection) -> None:
    """Tell the survey when numba compiles, so a long compilation gets the compile deadline."""
    from numba.core import event

    class Compiling(event.Listener):
        def on_start(self, _event):
            out.send(("compile", 1))

        def on_end(self, _event):
            out.send(("compile", -1))

    event.register("numba:compile", Compiling())


def serve(inp: Connection, out: Connection) -> None:
    """Run steps until the input closes or a None arrives."""
    from eaves import faults

    _report_compilation(out)
    out.send(("ready", None))
    while True:
        try:
            message = inp.recv()
        except (EOFError, OSError):
            return
        if message is None:
            return
        label, func, args = message
        try:
            faults.maybe_inject(label)
            result: Any = func(*args)
        except Exception as err:
            out.send(("error", describe_error(err)))
            continue
        out.send(("done", result))


def main(argv: list[str]) -> int:
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    _die_with_parent()
    read_fd, write_fd = int(argv[0]), int(argv[1])
    inp, out = Connection(read_fd, writable=False), Connection(write_fd, readable=False)
    if os.getppid() == 1:  # the survey ended before we got here
        return 0
    serve(inp, out)
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
