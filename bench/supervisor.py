"""Measurements run in a watched worker process, so a kernel that hangs or crashes costs one figure, not the survey.

The survey process never runs a kernel itself. It sends one `Step` at a time to a worker
(`python -m eaves.worker`) and waits with a deadline: the step's own, or `COMPILE_SECONDS`
while numba compiles. A worker that misses the deadline is killed; one that dies of a signal
(SIGILL: an instruction this CPU lacks; SIGSEGV/SIGBUS: a bad address) is reported as such.
Either way the step becomes a `StepFailure` and the next step starts a fresh worker. Ctrl-C or
SIGTERM in the survey process kills the worker at once, wherever its kernel is.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from dataclasses import dataclass, field
from multiprocessing.connection import Connection
from typing import Any, Callable, Optional

from eaves.records import StepFailure
from eaves.timing import TimingPolicy

COMPILE_SECONDS = 300.0  # numba compiling a parallel kernel; emulated CPUs are tens of times slower
MIN_STEP_SECONDS = 40.0  # no step is given less: a loaded shared host stalls for seconds
# The slowest rates a survey allows for: no server of this century streams memory below 0.5 GB/s
# per call or multiplies below 0.5 GFLOP/s (from memory: a 2010 laptop core does several times more).
SLOW_BYTES_PER_S = 0.5e9
SLOW_OPS_PER_S = 0.5e9
POLL_SECONDS = 0.05  # how often the survey looks at the worker: a signal is acted on within this


@dataclass(frozen=True)
class Step:
    """One measurement for the worker: `func(*args)` (a module-level function), what it is, and its deadline."""

    label: str  # the progress line; names the kernel
    func: Callable[..., Any]
    args: tuple = ()
    seconds: float = MIN_STEP_SECONDS  # once compiled
    what: dict[str, Any] = field(default_factory=dict)  # identity of the figure(s) if it fails


class StepFailed(Exception):
    """A step ended without a result; `failure` says which and why."""

    def __init__(self, failure: StepFailure):
        super().__init__(f"{failure.label}: {failure.reason}")
        self.failure = failure


def step_seconds(policy: TimingPolicy, bytes_per_call: float = 0.0, ops_per_call: float = 0.0) -> float:
    """A step's deadline from its own plan: calibration and samples ten times over, plus every call
    it makes (warm-up, calibration, samples) at the slowest rate a host could have."""
    calibration = max(0.25, 25 * policy.min_seconds)
    sampling = policy.samples * 5 * policy.min_seconds
    slow_call = bytes_per_call / SLOW_BYTES_PER_S + ops_per_call / SLOW_OPS_PER_S
    return max(MIN_STEP_SECONDS, 10 * (calibration + sampling) + (policy.samples + 6) * slow_call)


def binding_environment(environ=os.environ) -> dict[str, str]:
    """OpenMP's thread binding for the worker: each numba thread on its own core for the whole survey, so
    the scheduler cannot move a thread between caches mid-sample. A user's own setting wins."""
    return {"OMP_PROC_BIND": environ.get("OMP_PROC_BIND", "close"), "OMP_PLACES": environ.get("OMP_PLACES", "cores")}


def _signal_name(returncode: int) -> str:
    try:
        return signal.Signals(-returncode).name
    except ValueError:
        return f"signal {-returncode}"


def death_reason(returncode: int) -> str:
    """Why a worker ended, in words: `killed by SIGILL (an instruction this CPU lacks)`."""
    if returncode >= 0:
        return f"the worker exited with status {returncode}"
    name = _signal_name(returncode)
    why = {"SIGILL": " (an instruction this CPU lacks)", "SIGSEGV": " (a bad memory access)",
           "SIGBUS": " (a bad memory access)", "SIGKILL": " (by the system: out of memory?)"}.get(name, "")
    return f"killed by {name}{why}"


class Supervisor:
    """One worker process at a time, started on demand; `run(step)` returns its result or raises StepFailed.

    `step_seconds` overrides every step's own deadline (the survey's --step-seconds).
    """

    def __init__(self, step_seconds: Optional[float] = None, compile_seconds: float = COMPILE_SECONDS):
        self.override = step_seconds
        self.compile_seconds = compile_seconds
        self._proc: Optional[subprocess.Popen] = None
        self._conn: Optional[Connection] = None

    def __enter__(self) -> "Supervisor":
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    # ------------------------------------------------------------ the worker
    def _start(self) -> None:
        to_child_r, to_child_w = os.pipe()
        to_parent_r, to_parent_w = os.pipe()
        env = dict(os.environ)
        # the worker imports what the survey imports (step functions are pickled by reference)
        env["PYTHONPATH"] = os.pathsep.join(p for p in sys.path if p)
        env.update(binding_environment(env))
        self._proc = subprocess.Popen(
            [sys.executable, "-m", "eaves.worker", str(to_child_r), str(to_parent_w)],
            pass_fds=(to_child_r, to_parent_w), stdin=subprocess.DEVNULL, stdout=2,  # the worker never writes on our stdout (--json -)
            env=env, start_new_session=False)
        os.close(to_child_r)
        os.close(to_parent_w)
        self._conn = _Duplex(to_parent_r, to_child_w)
        self._wait("the worker's start-up", self.compile_seconds, {})

    def _kill(self) -> None:
        proc, self._proc = self._proc, None
        if self._conn is not None:
            self._conn.close()
            self._conn = None
        if proc is not None and proc.poll() is None:
            proc.kill()
            proc.wait()

    def close(self) -> None:
        """Ask the worker to leave; kill it if it does not within a second."""
        if self._proc is not None and self._proc.poll() is None and self._conn is not None:
            try:
                self._conn.send(None)
                self._proc.wait(timeout=1.0)
            except (OSError, subprocess.TimeoutExpired):
                pass
        self._kill()

    # ------------------------------------------------------------ one step
    def run(self, step: Step) -> Any:
        """The step's result; StepFailed when it raised, crashed or missed its deadline.

        Any other exception here (KeyboardInterrupt from Ctrl-C or SIGTERM) kills the worker first.
        """
        try:
            if self._proc is None:
                self._start()
            assert self._conn is not None
            self._conn.send((step.label, step.func, step.args))
            return self._wait(step.label, self.override or step.seconds, step.what)
        except StepFailed:
            raise
        except BaseException:
            self._kill()
            raise

    def _fail(self, label: str, reason: str, what: dict) -> StepFailed:
        self._kill()
        return StepFailed(StepFailure(label=label, reason=reason, what=dict(what)))

    def _wait(self, label: str, seconds: float, what: dict) -> Any:
        assert self._proc is not None and self._conn is not None
        compiling = 0
        deadline = time.monotonic() + seconds
        while True:
            if self._conn.poll(POLL_SECONDS):
                try:
                    kind, value = self._conn.recv()
                except (EOFError, OSError):
                    code = self._proc.wait()
                    raise self._fail(label, death_reason(code), what) from None
                if kind == "compile":
                    compiling += value
                    deadline = time.monotonic() + (self.compile_seconds if compiling > 0 else seconds)
                elif kind in ("done", "ready"):
                    return value
                elif kind == "error":
                    raise StepFailed(StepFailure(label=label, reason=value, what=dict(what)))
                continue
            code = self._proc.poll()
            if code is not None:
                raise self._fail(label, death_reason(code), what)
            if time.monotonic() > deadline:
                limit = self.compile_seconds if compiling > 0 else seconds
                doing = "compilation did not finish" if compiling > 0 else "no result"
                raise self._fail(label, f"{doing} within {limit:.0f} s", what)


class _Duplex:
    """A message channel over two pipe ends, with multiprocessing's framing and pickling."""

    def __init__(self, read_fd: int, write_fd: int):
        self._r = Connection(read_fd, writable=False)
        self._w = Connection(write_fd, readable=False)

    def send(self, obj: Any) -> None:
        self._w.send(obj)

    def recv(self) -> Any:
        return self._r.recv()

    def poll(self, timeout: float) -> bool:
        return self._r.poll(timeout)

    def close(self) -> None:
        for c in (self._r, self._w):
            try:
                c.close()
            except OSError:
                pass


class Inline:
    """Runs steps in this process (tests that patch a kernel); exceptions become StepFailed like the worker's.

    Nothing here can stop a kernel that hangs: the survey always uses a Supervisor.
    """

    def run(self, step: Step) -> Any:
        from eaves.worker import describe_error

        try:
            return step.func(*step.args)
        except Exception as err:  # the worker reports these the same way
            raise StepFailed(StepFailure(label=step.label, reason=describe_error(err), what=dict(step.what))) from err

    def close(self) -> None:
        pass

    def __enter__(self) -> "Inline":
        return self

    def __exit__(self, *exc) -> None:
        pass


class Steps:
    """A runner with the survey around it: each step is announced, and a failed one is recorded, not raised."""

    def __init__(self, runner, progress: Callable[[str], None], failures: list[StepFailure]):
        self.runner, self.progress, self.failures = runner, progress, failures

    def run(self, label: str, func: Callable[..., Any], args: tuple, seconds: float, what: dict) -> Any:
        """The step's result, or None when it failed (the failure is appended to `failures`)."""
        self.progress(label)
        try:
            return self.runner.run(Step(label, func, args, seconds, what))
        except StepFailed as err:
            self.failures.append(err.failure)
            return None
