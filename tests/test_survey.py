"""`eaves survey`, `hosts`, `runs`, `show` through main([...]) and once in a real subprocess."""

import json
import os
import signal
import subprocess
import sys
import time

import pytest

from eaves.cli import main
from eaves.errors import EXIT_INPUT, EXIT_INTERRUPTED, EXIT_STORE
from eaves.store import Store
from eaves.threads import usable_cpus

TINY = ["--quick", "--sweep-top", "512KiB", "--samples", "3", "--sample-seconds", "0.002"]


@pytest.fixture()
def place(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    return tmp_path


def test_survey_stores_a_complete_run_with_charts_and_json(place, capsys):
    url = f"sqlite:///{place / 'store.db'}"
    code = main(["survey", *TINY, "--only", "memory", "--db", url, "--json", "doc.json", "--tag", "t1",
                 "--note", "first"])
    assert code == 0
    runs = Store(url).runs()
    assert len(runs) == 1 and runs[0].status == "complete" and runs[0].tag == "t1"
    stored = Store(url).load_run(runs[0].id)
    suites = {f.suite for f in stored.figures}
    assert {"sweep", "memory", "latency", "stride", "gather", "scaling"} <= suites
    # every figure keeps what it takes to reproduce it
    assert all(f.repetitions >= 1 and len(f.samples) == 3 for f in stored.figures)
    doc = json.loads((place / "doc.json").read_text())
    assert doc["schema_version"] == 1 and doc["run"]["uuid"] == runs[0].uuid
    assert doc["ceilings"]["memory"] and all("bytes_per_s" in c for c in doc["ceilings"]["memory"])
    assert doc["host"]["logical_cpus"] == os.cpu_count()
    charts = sorted(p.name for p in (place / "results").iterdir())
    assert any(n.endswith("-bandwidth.png") for n in charts) and any(n.endswith("-bandwidth.svg") for n in charts)
    out = capsys.readouterr().out
    assert "Memory ceilings" in out and "do not run it on a production host" in out

    assert main(["show", runs[0].uuid[:8], "--db", url]) == 0
    assert "Memory ceilings" in capsys.readouterr().out
    assert main(["show", str(runs[0].id), "--json", "-", "--db", url]) == 0
    assert json.loads(capsys.readouterr().out)["run"]["uuid"] == runs[0].uuid
    assert main(["runs", "--db", url]) == 0
    assert runs[0].uuid[:8] in capsys.readouterr().out
    assert main(["hosts", "--db", url]) == 0
    assert runs[0].host_key in capsys.readouterr().out


def test_survey_with_compute_adds_compute_ceilings(place, capsys):
    url = f"sqlite:///{place / 'store.db'}"
    assert main(["survey", *TINY, "--only", "compute", "--dtypes", "fp32", "--threads", "1", "--db", url,
                 "--json", "-"]) == 0
    doc = json.loads(capsys.readouterr().out)
    rows = doc["ceilings"]["compute"]
    assert rows and rows[0]["dtype"] == "fp32" and rows[0]["peak_flops_per_s"] > 0


@pytest.mark.parametrize("args,needle", [
    (["--threads", "0"], "--threads"),
    (["--threads", str(usable_cpus() + 1)], "--threads"),
    (["--max-memory", "12 parsecs"], "unknown unit"),
    (["--max-memory", "900TiB"], "available"),
    (["--dtypes", "fp8"], "fp8"),
    (["--step-seconds", "soon"], "--step-seconds"),
    (["--step-seconds", "-3"], "--step-seconds"),
    (["--charts", "/etc/hostname/charts"], "--charts"),
    (["--json", "/no/such/folder/doc.json"], "--json"),
    (["--bogus"], "unrecognized"),
])
def test_bad_input_is_one_line_exit_2_and_stores_nothing(place, capsys, args, needle):
    url = f"sqlite:///{place / 'store.db'}"
    assert main(["survey", *TINY, "--db", url, *args]) == EXIT_INPUT
    err = capsys.readouterr().err.strip()
    assert needle in err and len(err.splitlines()) == 1 and "Traceback" not in err
    assert not (place / "store.db").exists() or Store(url).runs() == []


def test_a_file_that_is_not_a_database_is_refused_and_left_untouched(place, capsys):
    target = place / "notes.db"
    target.write_bytes(b"these are my notes, not a database\n" * 10)
    before = target.read_bytes()
    assert main(["survey", *TINY, "--db", f"sqlite:///{target}"]) == EXIT_STORE
    err = capsys.readouterr().err.strip()
    assert "not an SQLite database" in err and len(err.splitlines()) == 1
    assert target.read_bytes() == before


def _eaves(args, cwd, **kw):
    return subprocess.Popen([sys.executable, "-m", "eaves", *args], cwd=cwd, stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True, **kw)


def test_survey_in_a_subprocess(tmp_path):
    proc = _eaves(["survey", *TINY, "--only", "memory", "--threads", "1"], tmp_path)
    out, err = proc.communicate(timeout=300)
    assert proc.returncode == 0, err
    assert "Memory ceilings" in out
    assert (tmp_path / "results" / "eaves.db").exists()
