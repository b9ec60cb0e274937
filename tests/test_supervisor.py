"""The supervisor: a kernel that spins, dies of SIGILL or SIGSEGV, or raises costs one figure, never the survey.

The faults are real: `eaves.faults` runs a compiled loop that never ends, executes an illegal
instruction (ud2 / udf), and loads from an unmapped address, inside the worker process.
"""

import json
import operator
import os
import signal
import subprocess
import sys
import time

import psutil
import pytest

from eaves.cli import main
from eaves.errors import EXIT_BROKEN, EXIT_INTERRUPTED
from eaves.store import Store
from eaves.supervisor import Inline, Step, StepFailed, Supervisor, death_reason, step_seconds
from eaves.timing import TimingPolicy

TINY = ["--quick", "--sweep-top", "256KiB", "--samples", "3", "--sample-seconds", "0.002", "--only", "memory"]


def _fails(sup, label, what=None):
    with pytest.raises(StepFailed) as err:
        sup.run(Step(label, operator.add, (2, 3), seconds=2.0, what=what or {}))
    return err.value.failure


@pytest.mark.parametrize("kind,reason", [
    ("spin", "no result within 2 s"),
    ("sigill", "killed by SIGILL"),
    ("sigsegv", "killed by SIGSEGV"),
    ("raise", "RuntimeError: a deliberate error"),
])
def test_a_failed_step_says_why_and_the_next_step_runs(monkeypatch, kind, reason):
    monkeypatch.setenv("EAVES_FAULT", f"{kind}:broken step")
    with Supervisor() as sup:
        assert sup.run(Step("a good step", operator.add, (2, 3))) == 5
        started = time.monotonic()
        failure = _fails(sup, "a broken step", {"kernel": "read"})
        assert reason in failure.reason and failure.label == "a broken step" and failure.what == {"kernel": "read"}
        assert time.monotonic() - started < 30  # the 2 s deadline, plus a worker start
        assert sup.run(Step("a good step again", operator.mul, (4, 5))) == 20  # a fresh worker when it had to die


def test_the_inline_runner_reports_errors_the_same_way():
    with pytest.raises(StepFailed) as err:
        Inline().run(Step("divide", operator.truediv, (1, 0)))
    assert "ZeroDivisionError" in err.value.failure.reason


def test_death_reasons_name_the_signal():
    # signal numbers as the OS reports them through a negative return code (Python's subprocess convention)
    assert death_reason(-int(signal.SIGILL)).startswith("killed by SIGILL")
    assert death_reason(-int(signal.SIGBUS)).startswith("killed by SIGBUS")
    assert death_reason(3) == "the worker exited with status 3"


def test_deadlines_grow_with_the_plan_and_the_work():
    quick, full = TimingPolicy.quick(), TimingPolicy(min_seconds=0.5, samples=9)
    assert step_seconds(quick) >= 40
    assert step_seconds(full) > step_seconds(quick)
    assert step_seconds(quick, bytes_per_call=8 << 30) > step_seconds(quick, bytes_per_call=1 << 20)


def test_a_survey_with_three_broken_kernels_stores_the_rest_and_exits_4(tmp_path, monkeypatch, capsys):
    monkeypatch.chdir(tmp_path)
    monkeypatch.setenv("EAVES_FAULT", "spin:sweep write 16 KiB x1;sigill:stride 4 x1;sigsegv:stride 8 x1")
    url = f"sqlite:///{tmp_path / 'store.db'}"
    code = main(["survey", *TINY, "--threads", "1", "--step-seconds", "2", "--db", url, "--json", "doc.json"])
    assert code == EXIT_BROKEN
    out = capsys.readouterr().out
    assert "no result within 2 s" in out and "killed by SIGILL" in out and "killed by SIGSEGV" in out
    store = Store(url)
    run = store.load_run(store.runs()[0].id)
    assert run.summary.status == "complete"
    failed = {f["label"]: f["reason"] for f in run.params["failures"]}
    assert set(failed) == {"sweep write 16 KiB x1", "stride 4 x1", "stride 8 x1"}
    # every other figure was measured and stored; the failed ones are absent, not zero
    sweep_writes = {f.working_set_bytes for f in run.figures if f.suite == "sweep" and f.kernel == "write"}
    assert 16 * 1024 not in sweep_writes and 8 * 1024 in sweep_writes and 32 * 1024 in sweep_writes
    strides = {f.stride_elems for f in run.figures if f.suite == "stride"}
    assert strides == {1, 2, 16, 32}
    doc = json.loads((tmp_path / "doc.json").read_text())
    assert {f["label"] for f in doc["failures"]} == set(failed)


@pytest.mark.parametrize("signum", [signal.SIGINT, signal.SIGTERM], ids=["SIGINT", "SIGTERM"])
def test_a_stop_signal_ends_a_survey_whose_kernel_spins_within_two_seconds(tmp_path, signum):
    env = {**os.environ, "EAVES_FAULT": "spin:stride 2 x1"}
    proc = subprocess.Popen([sys.executable, "-m", "eaves", "survey", *TINY, "--threads", "1"], cwd=tmp_path,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=env)
    deadline = time.monotonic() + 240
    seen = ""
    while "eaves fault: spin" not in seen and time.monotonic() < deadline:
        seen += proc.stderr.readline()
    assert "eaves fault: spin in stride 2 x1" in seen, seen
    time.sleep(0.5)  # inside the compiled loop by now
    workers = psutil.Process(proc.pid).children()
    assert [w.cmdline()[1:3] for w in workers] == [["-m", "eaves.worker"]]
    sent = time.monotonic()
    proc.send_signal(signum)
    out, err = proc.communicate(timeout=60)
    took = time.monotonic() - sent
    assert proc.returncode == EXIT_INTERRUPTED, err
    assert took < 2.0, f"the survey took {took:.2f} s to stop"
    runs = Store(f"sqlite:///{tmp_path / 'results' / 'eaves.db'}").runs()
    assert len(runs) == 1 and runs[0].status == "interrupted" and runs[0].n_figures > 0
    assert "Traceback" not in err
    assert not workers[0].is_running()  # the spinning worker went with it


@pytest.mark.skipif(len(os.sched_getaffinity(0)) < 2, reason="pinning needs at least two usable CPUs")
def test_the_workers_numba_threads_are_pinned_one_per_cpu():
    from worker_probes import thread_cpus, threading_layer

    with Supervisor() as sup:
        if sup.run(Step("layer", threading_layer)) != "omp":
            pytest.skip("numba's threading layer is not OpenMP here: OMP_PROC_BIND does not apply")
        cpus = sup.run(Step("pinned threads", thread_cpus, (2,)))
    # the OS's own account (/proc/self/task/*/status): at least two threads each allowed a single CPU,
    # and not the same one
    single = [c for c in cpus if c.isdigit()]
    assert len(set(single)) >= 2, cpus
