"""Records that fit every backend: a whole survey of every dtype, with the longest strings a user can
give, stored on SQLite and on a real PostgreSQL server and read back identical (issue 18, item 1)."""

from __future__ import annotations

import dataclasses
import random
import shutil
from pathlib import Path

import pytest
from sqlalchemy import create_engine, text

from eaves.compute import GEMM_PATHS, blas_info
from eaves.models import INDEXED_TEXT_CHARS
from eaves.records import Figure
from eaves.run_rows import RunRefused
from eaves.store import Store
from run_records import figures, placement, record
from store_backends import backend_url, pg_schema_url

REAL_STORE = Path(__file__).parent / "fixtures" / "zen3-kvm-2cpu" / "ten-quick-surveys.db"
DTYPES = ("fp64", "fp32", "fp16", "bf16", "int8", "int16")


def blas_label() -> str:
    """This host's BLAS as threadpoolctl reports it, joined the way compute.measure_gemm labels a GEMM."""
    info = blas_info()
    return " ".join(str(info[k]) for k in ("blas", "blas_version", "blas_architecture") if info.get(k)) \
        or "no BLAS found"


def incompressible(n: int, seed: int) -> str:
    """n characters no compressor shortens much (so no index or inline storage can hide them), with
    multi-byte UTF-8, spaces, quotes, newlines and markup-like brackets among them."""
    rng = random.Random(seed)
    alphabet = "abcdefghijklmnopqrstuvwxyzABCDEFGHIJKLMNOPQRSTUVWXYZ0123456789 -_.:/'\"[]\n\té µ漢🙂"
    return "".join(rng.choice(alphabet) for _ in range(n))


def every_dtype_figures() -> list[Figure]:
    """A compute part of a survey as compute.py labels it: madd peaks and GEMMs of every dtype."""
    out = []
    for d in DTYPES:
        for threads in (1, 2):
            out.append(Figure("compute", "madd-peak", d, threads, "ops_per_s", (1.1e11, 1.2e11, 1.15e11), 40, 0.01,
                              variant=f"{d} multiply-add, 512-bit vectors x 16 accumulators "
                                      f"(amx-{d} unavailable: the kernel refused the tile permission request)",
                              extra={"native": d in ("fp64", "fp32"), "accumulators": 16}))
            if d in GEMM_PATHS:
                out.append(Figure("gemm", "matmul", d, threads, "ops_per_s", (5.0e10, 5.1e10), 3, 0.05,
                                  working_set_bytes=3 * 1024 * 1024 * 4, shape="1024x1024x1024",
                                  variant=f"{GEMM_PATHS[d]} / {blas_label()}", extra={"path": GEMM_PATHS[d]}))
    return out


def real_memory_figures(folder: Path) -> list[Figure]:
    """The memory, latency and stride figures of a real quick survey (a copy of the fixture store:
    SQLite makes -wal and -shm files beside a WAL database even to read it)."""
    copy = folder / REAL_STORE.name
    shutil.copy(REAL_STORE, copy)
    source = Store(f"sqlite:///{copy}", create=False, check_schema=False)
    try:
        source.upgrade_schema()  # load_run reads through the models: the columns of this revision
        run_id = source.runs(limit=1)[0].id
        return list(source.load_run(run_id).figures)
    finally:
        source.close()


def maximal_record(folder: Path):
    rec = record(host="h" * INDEXED_TEXT_CHARS)
    rec.host_key = "k" * INDEXED_TEXT_CHARS
    rec.tag = incompressible(10_000, 1)
    rec.note = incompressible(50_000, 2)
    rec.git_describe = incompressible(2_000, 3)
    rec.figures = real_memory_figures(folder) + every_dtype_figures() + figures()
    rec.placements = [dataclasses.replace(placement(), layer=incompressible(5_000, 4 + i), roof=incompressible(300, 9),
                                          kind=incompressible(200, 10)) for i in range(3)]
    return rec


def test_the_labels_are_as_long_as_the_ones_postgresql_refused():
    # issue 18: the GEMM labels for fp16, bf16 and int8 ran to 105-124 characters, past VARCHAR(64);
    # here with this host's own BLAS name (openblas 0.3.31 Haswell on the dev VM: 104, 104, 123)
    lengths = {f.dtype: len(f.variant) for f in every_dtype_figures() if f.suite == "gemm"}
    assert all(lengths[d] > 64 for d in ("fp16", "bf16", "int8")), lengths
    assert max(len(f.variant) for f in every_dtype_figures()) >= 124


def test_a_survey_of_every_dtype_with_maximal_strings_reads_back_identical(store_url, tmp_path):
    store = Store(store_url)
    rec = maximal_record(tmp_path)
    uuid = store.save_run(rec)
    loaded = store.load_run(store.resolve_run(uuid))
    s = loaded.summary
    assert (s.tag, s.note, s.git_describe) == (rec.tag, rec.note, rec.git_describe)
    assert (s.hostname, s.host_key) == (rec.hostname, rec.host_key)
    assert list(loaded.figures) == rec.figures
    assert list(loaded.placements) == rec.placements
    assert sorted({f.dtype for f in loaded.figures if f.suite == "compute"}) == sorted(DTYPES)
    assert store.runs()[0].tag == rec.tag  # the listing query too


def test_a_string_above_an_index_bound_is_refused_by_name_before_any_write(store_url):
    store = Store(store_url)
    rec = record(host="n" * (INDEXED_TEXT_CHARS + 1))
    rec.host_key = "rack3-node07:f00dfeed"
    with pytest.raises(RunRefused) as err:
        store.save_run(rec)
    assert f"hosts.hostname is {INDEXED_TEXT_CHARS + 1} characters long, at most {INDEXED_TEXT_CHARS} fit" \
        in str(err.value)
    assert err.value.exit_code == 3 and "\n" not in str(err.value)
    assert store.runs() == [] and store.hosts() == []


def test_a_nul_character_is_refused_by_postgresql_but_kept_by_sqlite(tmp_path):
    # PostgreSQL documentation (Character Types): "the character with code zero (sometimes called NUL)
    # cannot be stored"; SQLite keeps any Python str. The spool test poisons runs with exactly this.
    poisoned = record(uuid=None)
    poisoned.tag = "nightly\x00"
    with backend_url("sqlite", tmp_path) as url:
        store = Store(url)
        assert store.load_run(store.resolve_run(store.save_run(poisoned))).summary.tag == "nightly\x00"
    with pg_schema_url() as url:
        store = Store(url)
        with pytest.raises(RunRefused) as err:
            store.save_run(dataclasses.replace(poisoned, uuid=None))
        assert "NUL" in err.value.reason and "\n" not in str(err.value)
        assert store.runs() == [] and store.hosts() == []  # one transaction: not even the host
        store.close()


def test_postgresql_columns_are_text_without_a_length(tmp_path):
    # information_schema.columns, PostgreSQL's own report of the table layout
    with pg_schema_url() as url:
        Store(url).close()
        engine = create_engine(url)
        with engine.connect() as conn:
            rows = conn.execute(text(
                "SELECT table_name, column_name, data_type, character_maximum_length FROM information_schema.columns "
                "WHERE table_schema = current_schema() AND data_type IN ('text', 'character varying') "
                "AND table_name <> 'alembic_version'")).all()
        engine.dispose()
    bounded = {(t, c): n for t, c, d, n in rows if d == "character varying"}
    assert bounded == {("runs", "uuid"): 36, ("runs", "ceilings_run_uuid"): 36, ("quarantine", "run_uuid"): 36}
    assert {("measurements", "variant"), ("runs", "tag"), ("placements", "layer")} <= {(t, c) for t, c, *_ in rows}


def test_a_measured_survey_of_every_dtype_is_stored_whole_on_each_backend(store_url, tmp_path, monkeypatch, capsys):
    # A real compute survey (short samples) of every dtype this host offers, with its real GEMM labels:
    # on PostgreSQL it used to be refused (labels of 105-124 characters in String(64)) and spooled.
    from eaves.cli import main

    monkeypatch.chdir(tmp_path)
    spool = tmp_path / "spool.db"
    monkeypatch.setenv("EAVES_SPOOL", str(spool))
    tag = incompressible(300, seed=5).replace("\x00", "")
    code = main(["survey", "--quick", "--only", "compute", "--threads", "1", "--samples", "2",
                 "--sample-seconds", "0.002", "--db", store_url, "--tag", tag, "--json", "doc.json"])
    capsys.readouterr()
    assert code == 0
    assert not spool.exists()  # stored where asked, nothing spooled
    import json

    doc = json.loads((tmp_path / "doc.json").read_text(encoding="utf-8"))
    store = Store(store_url)
    run = store.load_run(store.resolve_run(doc["run"]["uuid"]))
    store.close()
    assert run.summary.tag == tag and run.summary.status == "complete"
    stored = sorted((f.suite, f.kernel, f.dtype, f.variant or "", f.shape or "") for f in run.figures)
    measured = sorted((f["suite"], f["kernel"], f["dtype"], f.get("variant") or "", f.get("shape") or "")
                      for f in doc["figures"])
    assert stored == measured
    assert {"fp64", "fp32"} <= {f.dtype for f in run.figures if f.suite == "gemm"}
