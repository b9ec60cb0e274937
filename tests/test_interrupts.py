"""Crash safety with real processes: SIGINT/SIGTERM store an interrupted run, SIGKILL stores none."""

from __future__ import annotations

import os
import signal
import sqlite3
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import pytest

from eaves import interrupts
from eaves.store import Store
from run_records import record

HARNESS = textwrap.dedent("""
    import sys, time
    sys.path.insert(0, {tests!r})
    from eaves import interrupts
    from eaves.models import new_uuid
    from eaves.store import Store
    from run_records import figures, record
    url, mode = sys.argv[1], sys.argv[2]
    store = Store(url)
    rec = record(with_figures=False, status="running", uuid=new_uuid())
    if mode == "big-save":  # a finished run so large that its one transaction takes a while
        rec.figures = figures() * 4000
        rec.status = "complete"
        print("saving", rec.uuid, flush=True)
        store.save_run(rec)
        print("saved", flush=True)
        sys.exit(0)
    with interrupts.stoppable() as stop:
        for step in range(100000):  # a long fake sweep: one figure per step
            rec.figures.append(figures()[step % 5])
            if step == 20:
                print("measuring", rec.uuid, flush=True)
            time.sleep(0.005)
    rec.status = "interrupted" if stop.signal else "complete"
    rec.note = stop.signal
    with interrupts.deferred():
        store.save_run(rec)
    print("saved", len(rec.figures), flush=True)
    sys.exit(130 if stop.signal else 0)
""")


def _start(tmp_path: Path, url: str, mode: str) -> tuple[subprocess.Popen, str]:
    script = tmp_path / "harness.py"
    script.write_text(HARNESS.format(tests=str(Path(__file__).parent)))
    proc = subprocess.Popen([sys.executable, str(script), url, mode], stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True)
    first = proc.stdout.readline().split()
    assert first and first[0] in ("measuring", "saving"), proc.stderr.read()
    return proc, first[1]


@pytest.mark.parametrize("signum", [signal.SIGINT, signal.SIGTERM], ids=["SIGINT", "SIGTERM"])
def test_a_stop_signal_stores_the_run_as_interrupted_with_what_was_measured(store_url, tmp_path, signum):
    proc, uuid = _start(tmp_path, store_url, "sweep")
    time.sleep(0.2)
    proc.send_signal(signum)
    out, err = proc.communicate(timeout=60)
    assert proc.returncode == 130, err
    assert "Traceback" not in err
    measured = int(out.split()[-1])
    store = Store(store_url)
    run = store.load_run(store.resolve_run(uuid))
    assert run.summary.status == "interrupted" and run.summary.note == signum.name
    assert run.summary.n_figures == measured > 20
    assert store.latest_complete_run() is None


def test_sigkill_leaves_a_readable_store_and_no_complete_run(store_url, tmp_path):
    earlier = Store(store_url).save_run(record())
    proc, uuid = _start(tmp_path, store_url, "sweep")
    proc.kill()
    proc.communicate(timeout=60)
    store = Store(store_url)
    assert [r.uuid for r in store.runs()] == [earlier]
    assert store.load_run(store.resolve_run(earlier)).summary.status == "complete"


def test_sigkill_in_the_middle_of_the_save_leaves_all_or_nothing(store_url, tmp_path):
    proc, uuid = _start(tmp_path, store_url, "big-save")
    time.sleep(0.3)
    proc.kill()
    out, _ = proc.communicate(timeout=60)
    store = Store(store_url)
    if store_url.startswith("sqlite"):
        with sqlite3.connect(store_url.removeprefix("sqlite:///")) as conn:
            assert conn.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
    runs = store.runs()
    if "saved" in out:  # the machine was fast enough to commit before the kill
        assert [r.n_figures for r in runs] == [20000]
    else:
        assert runs == []  # the transaction died with the process: no partial run


def test_stoppable_turns_sigterm_into_a_quiet_stop_and_restores_handlers():
    before = signal.getsignal(signal.SIGTERM)
    done = []
    with interrupts.stoppable() as stop:
        done.append(1)
        os.kill(os.getpid(), signal.SIGTERM)
        time.sleep(1)  # the handler runs before this returns
        done.append(2)
    assert done == [1] and stop.signal == "SIGTERM"
    assert signal.getsignal(signal.SIGTERM) is before


def test_stoppable_lets_other_errors_through():
    with pytest.raises(ZeroDivisionError):
        with interrupts.stoppable():
            1 / 0


def test_deferred_holds_the_signal_until_the_save_is_done():
    saved = []
    with pytest.raises(KeyboardInterrupt):
        with interrupts.deferred():
            os.kill(os.getpid(), signal.SIGINT)
            time.sleep(0.05)
            saved.append("run")
    assert saved == ["run"]


# -- the eaves command itself: SIGINT and SIGTERM alike, from start-up on (issue 18) -------------------

TINY = ["--quick", "--only", "memory", "--threads", "1", "--sweep-top", "512KiB", "--samples", "3",
        "--sample-seconds", "0.002"]


def _catches(pid: int, signum: int) -> bool:
    """Whether process `pid` has a handler for `signum`: bit signum-1 of the SigCgt mask in
    /proc/PID/status (proc(5))."""
    try:
        status = Path(f"/proc/{pid}/status").read_text()
    except FileNotFoundError:
        return False
    mask = next(line.split()[1] for line in status.splitlines() if line.startswith("SigCgt:"))
    return bool(int(mask, 16) >> (signum - 1) & 1)


def _eaves(tmp_path: Path, *args: str) -> subprocess.Popen:
    return subprocess.Popen([sys.executable, "-m", "eaves", *args], cwd=tmp_path, stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True)


def _until_handlers_installed(proc: subprocess.Popen) -> None:
    deadline = time.monotonic() + 30
    while not _catches(proc.pid, signal.SIGTERM):
        assert proc.poll() is None and time.monotonic() < deadline, proc.stderr.read()
        time.sleep(0.001)


def _runs(url: str):
    store = Store(url, create=False)
    try:
        return [store.load_run(r.id) for r in store.runs()]
    finally:
        store.close()


@pytest.mark.parametrize("signum", [signal.SIGINT, signal.SIGTERM], ids=["SIGINT", "SIGTERM"])
def test_a_stop_signal_during_start_up_exits_130_with_the_one_message(tmp_path, signum):
    url = f"sqlite:///{tmp_path / 'store.db'}"
    proc = _eaves(tmp_path, "survey", *TINY, "--db", url)
    _until_handlers_installed(proc)  # the first thing main does; the command's modules still load
    proc.send_signal(signum)
    out, err = proc.communicate(timeout=120)
    assert proc.returncode == 130, err
    assert "Traceback" not in err and err.strip().splitlines()[-1] == "eaves: interrupted"
    assert not (tmp_path / "store.db").exists() or _runs(url) == []


@pytest.mark.parametrize("delay", [0.4, 1.5, 3.0])
def test_sigterm_at_any_moment_of_a_survey_exits_130_and_never_stores_an_empty_run(tmp_path, delay):
    url = f"sqlite:///{tmp_path / 'store.db'}"
    proc = _eaves(tmp_path, "survey", *TINY, "--db", url)
    _until_handlers_installed(proc)
    time.sleep(delay)
    if proc.poll() is not None:
        pytest.skip(f"the survey ended within {delay} s: no moment left to interrupt")
    proc.send_signal(signal.SIGTERM)
    out, err = proc.communicate(timeout=120)
    assert proc.returncode == 130, err
    assert "Traceback" not in err
    assert "interrupted by SIGTERM" in out or err.strip().splitlines()[-1] == "eaves: interrupted"
    runs = _runs(url) if (tmp_path / "store.db").exists() else []
    # a signal after the run was saved (while charts are drawn) leaves that complete run: still exit 130
    assert all(r.summary.status in ("interrupted", "complete") and r.figures for r in runs) and len(runs) <= 1


def test_a_stop_signal_after_the_command_returned_still_exits_130():
    script = textwrap.dedent("""
        import time
        from eaves import interrupts
        interrupts.exit_on_stop(130, "eaves: interrupted")
        print("ready", flush=True)
        time.sleep(60)
    """)
    proc = subprocess.Popen([sys.executable, "-c", script], stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            text=True)
    assert proc.stdout.readline().strip() == "ready"
    proc.send_signal(signal.SIGTERM)
    out, err = proc.communicate(timeout=30)
    assert proc.returncode == 130 and err.strip() == "eaves: interrupted"


def test_main_in_process_leaves_the_callers_handlers_as_they_were(tmp_path, capsys):
    from eaves.cli import main

    before = {s: signal.getsignal(s) for s in interrupts.STOP_SIGNALS}
    assert main(["show", "latest", "--db", f"sqlite:///{tmp_path / 'store.db'}"]) == 2
    assert {s: signal.getsignal(s) for s in interrupts.STOP_SIGNALS} == before
