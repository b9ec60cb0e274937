"""A survey whose measurement is faked (invented figures, no kernel run) and a file made read-only
for real, for the tests of where a survey's run goes."""

from __future__ import annotations

import contextlib
import datetime as dt
import os
import subprocess
from pathlib import Path
from typing import Callable, Iterator, Optional

import pytest

from run_records import figures

# A quick memory-only survey whose options are all valid; its measurement is replaced by `fake_survey`.
ARGS = ["survey", "--quick", "--only", "memory", "--threads", "1", "--sweep-top", "512KiB"]


def fake_survey(monkeypatch, calls: list, during: Optional[Callable[[], None]] = None,
                interrupted_by: Optional[str] = None, with_figures: bool = True) -> None:
    """Replace eaves.commands.survey.run_survey: it records each call in `calls`, runs `during` (a fault
    injected while "measuring"), and returns a memory and latency run of invented figures."""
    from eaves.commands import survey as command
    from eaves.survey import SurveyOutcome, new_record

    def run_survey(host, options, progress=lambda m: None):
        calls.append(options)
        if during is not None:
            during()
        record = new_record(host, options, {"quick": True, "levels": {}, "failures": []})
        record.figures = [f for f in figures() if f.suite in ("memory", "latency")] if with_figures else []
        record.status = "interrupted" if interrupted_by else "complete"
        record.ended_at = dt.datetime.now(dt.timezone.utc)
        return SurveyOutcome(record, interrupted_by=interrupted_by)

    monkeypatch.setattr(command, "run_survey", run_survey)


@contextlib.contextmanager
def read_only(path: Path) -> Iterator[None]:
    """`path` made unwritable as the kernel sees it. As root, mode bits do not stop a write (root has
    CAP_DAC_OVERRIDE, capabilities(7)), so the file gets the immutable attribute (chattr(1) +i; it needs
    CAP_LINUX_IMMUTABLE and a file system that keeps the attribute); otherwise chmod 0444. Checked with
    access(2), which reports EPERM for an immutable file and EACCES for a mode that forbids the write."""
    if os.geteuid() == 0:
        done = subprocess.run(["chattr", "+i", str(path)], capture_output=True, text=True)
        if done.returncode != 0:
            pytest.skip(f"cannot make a file read-only as root here: chattr +i: {done.stderr.strip()}")
        undo = ["chattr", "-i", str(path)]
    else:
        mode = path.stat().st_mode
        path.chmod(0o444)
        undo = None
    try:
        assert not os.access(path, os.W_OK), f"{path} is still writable"
        yield
    finally:
        if undo:
            subprocess.run(undo, check=True)
        else:
            path.chmod(mode)
