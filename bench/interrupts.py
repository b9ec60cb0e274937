"""Stop a measurement cleanly on Ctrl-C or SIGTERM, and keep a second signal from cutting a save short.

Use in the survey (main thread only, as Python's signal handlers are):

    with interrupts.stoppable() as stop:      # SIGINT and SIGTERM end the block, no traceback
        for step in plan:
            record.figures.append(measure(step))
    record.status = "interrupted" if stop.signal else "complete"
    record.ended_at = utcnow()
    with interrupts.deferred():               # signals wait until the run is written
        saved = save_or_spool(record, url)
    return EXIT_INTERRUPTED if stop.signal else 0
"""

from __future__ import annotations

import contextlib
import os
import signal
import sys
import threading
from dataclasses import dataclass
from typing import Iterator, Optional

STOP_SIGNALS = (signal.SIGINT, signal.SIGTERM)


@dataclass
class Stop:
    """Which signal ended the block, if any (e.g. "SIGTERM")."""

    signal: Optional[str] = None


class _Stopped(KeyboardInterrupt):
    """Raised by the handler so that code catching KeyboardInterrupt treats SIGTERM like Ctrl-C."""

    def __init__(self, signum: int):
        super().__init__(signal.Signals(signum).name)
        self.signum = signum


def _raise_stop(signum: int, _frame) -> None:
    raise _Stopped(signum)


@contextlib.contextmanager
def _handlers(handler, signals=STOP_SIGNALS) -> Iterator[None]:
    if threading.current_thread() is not threading.main_thread():
        yield  # signal handlers can only be set from the main thread
        return
    previous = {s: signal.signal(s, handler) for s in signals}
    try:
        yield
    finally:
        for s, h in previous.items():
            signal.signal(s, h)


def install() -> dict:
    """Make SIGTERM end the process the way Ctrl-C does (a KeyboardInterrupt: exit 130, one message);
    the CLI calls it first thing, so start-up is covered too. Returns the handlers it replaced."""
    if threading.current_thread() is not threading.main_thread():
        return {}
    return {s: signal.signal(s, _raise_stop) for s in STOP_SIGNALS}


def restore(previous: dict) -> None:
    """Put back the handlers `install` (or `hold`) replaced."""
    for s, h in previous.items():
        signal.signal(s, h)


def hold() -> dict:
    """Ignore further stop signals (while the interrupted message is printed); returns the handlers replaced."""
    if threading.current_thread() is not threading.main_thread():
        return {}
    return {s: signal.signal(s, signal.SIG_IGN) for s in STOP_SIGNALS}


def exit_on_stop(code: int, message: str) -> None:
    """After the command returned: a stop signal now prints `message` and ends the process with `code`
    at once (Python's own shutdown is no place for a KeyboardInterrupt). Output is flushed first."""
    for stream in (sys.stdout, sys.stderr):
        with contextlib.suppress(Exception):
            stream.flush()

    def leave(_signum, _frame) -> None:
        with contextlib.suppress(Exception):
            sys.stdout.flush()
        with contextlib.suppress(OSError):
            os.write(2, (message + "\n").encode())
        os._exit(code)

    if threading.current_thread() is threading.main_thread():
        for s in STOP_SIGNALS:
            signal.signal(s, leave)


@contextlib.contextmanager
def stoppable() -> Iterator[Stop]:
    """Run the block until it ends or SIGINT/SIGTERM arrives; the signal ends it quietly and is
    recorded in the yielded Stop. Other exceptions pass through."""
    stop = Stop()
    try:
        with _handlers(_raise_stop):
            yield stop
    except _Stopped as err:
        stop.signal = signal.Signals(err.signum).name
    except KeyboardInterrupt:  # raised by the default handler before ours was set, or by a test
        stop.signal = "SIGINT"


@contextlib.contextmanager
def deferred() -> Iterator[list[int]]:
    """Hold SIGINT/SIGTERM while the block runs (the store write); if one came, raise
    KeyboardInterrupt after the block, once the run is safe."""
    received: list[int] = []
    with _handlers(lambda signum, _frame: received.append(signum)):
        yield received
    if received:
        raise _Stopped(received[0])
