"""The SQL schema of the store: hosts, runs, measurements and placed layers (SQLAlchemy 2)."""

from __future__ import annotations

import datetime as dt
import uuid as uuidlib
from typing import Annotated, Any, Optional

from sqlalchemy import JSON, BigInteger, DateTime, Float, ForeignKey, Index, Integer, String, Text
from sqlalchemy.orm import DeclarativeBase, Mapped, mapped_column, relationship

# The alembic revision this eaves writes and expects (bench/migrations/versions); a test checks
# it is the head of the migration scripts.
SCHEMA_REVISION = "0004"

# Strings are Text on every backend (PostgreSQL refused a VARCHAR(64) GEMM label that SQLite kept).
# A bound stays only where it is part of the data (a UUID's 36 characters) or where an index needs
# it: PostgreSQL refuses a btree entry above 2704 bytes (a third of an 8 KiB page, PostgreSQL docs,
# "index row size exceeds maximum"), and 256 characters are at most 1024 bytes of UTF-8, so the two
# indexed text columns of one index fit. run_rows.check_fits refuses longer values before any write.
INDEXED_TEXT_CHARS = 256

intpk = Annotated[int, mapped_column(Integer, primary_key=True, autoincrement=True)]
plain_text = Annotated[str, mapped_column(Text)]
indexed_text = Annotated[str, mapped_column(Text, info={"max_chars": INDEXED_TEXT_CHARS})]
opt_float = Annotated[Optional[float], mapped_column(Float, nullable=True)]
opt_text = Annotated[Optional[str], mapped_column(Text, nullable=True)]


def utcnow() -> dt.datetime:
    """Now, in UTC (every stored time is)."""
    return dt.datetime.now(dt.timezone.utc)


def new_uuid() -> str:
    """A fresh random run UUID (version 4)."""
    return str(uuidlib.uuid4())


class Base(DeclarativeBase):
    type_annotation_map = {dict[str, Any]: JSON, list[Any]: JSON}


class Host(Base):
    """One hardware configuration of one machine: same hostname + new hardware = new row."""

    __tablename__ = "hosts"
    id: Mapped[intpk]
    host_key: Mapped[str] = mapped_column(Text, unique=True, info={"max_chars": INDEXED_TEXT_CHARS})
    hostname: Mapped[str] = mapped_column(Text, index=True, info={"max_chars": INDEXED_TEXT_CHARS})
    fingerprint: Mapped[plain_text]
    facts: Mapped[dict[str, Any]]
    first_seen: Mapped[dt.datetime] = mapped_column(DateTime(timezone=True), default=utcnow)
    runs: Mapped[list["Run"]] = relationship(back_populates="host")


class Run(Base):
    """One survey or one layer-timing session, written in a single transaction when it ends."""

    __tablename__ = "runs"
    id: Mapped[intpk]
    uuid: Mapped[str] = mapped_column(String(36), unique=True, default=new_uuid)
    host_id: Mapped[int] = mapped_column(ForeignKey("hosts.id"), index=True)
    kind: Mapped[str] = mapped_column(Text, default="survey")  # survey | layers
    started_at: Mapped[dt.datetime] = mapped_column(DateTime(timezone=True))
    ended_at: Mapped[Optional[dt.datetime]] = mapped_column(DateTime(timezone=True), nullable=True)
    status: Mapped[plain_text]  # complete | interrupted | failed
    eaves_version: Mapped[plain_text]
    params: Mapped[dict[str, Any]]
    facts: Mapped[dict[str, Any]]  # host facts as read when the run started (load, governor ...)
    tag: Mapped[opt_text]  # no index: never searched, and a long tag would not fit one
    note: Mapped[opt_text]
    git_describe: Mapped[opt_text]
    ceilings_run_uuid: Mapped[Optional[str]] = mapped_column(String(36), nullable=True)
    host: Mapped[Host] = relationship(back_populates="runs")
    measurements: Mapped[list["Measurement"]] = relationship(
        back_populates="run", cascade="all, delete-orphan", order_by="Measurement.id")
    placements: Mapped[list["Placement"]] = relationship(
        back_populates="run", cascade="all, delete-orphan", order_by="Placement.id")

    __table_args__ = (Index("ix_runs_host_status_started", "host_id", "status", "started_at"),)


class Measurement(Base):
    """One figure of a run; exactly one of the unit-named columns holds the median."""

    __tablename__ = "measurements"
    id: Mapped[intpk]
    run_id: Mapped[int] = mapped_column(ForeignKey("runs.id", ondelete="CASCADE"), index=True)
    suite: Mapped[indexed_text]  # memory | latency | stride | compute | gemm | clock
    kernel: Mapped[indexed_text]
    variant: Mapped[opt_text]  # path / width label
    dtype: Mapped[plain_text]
    threads: Mapped[int] = mapped_column(Integer)
    working_set_bytes: Mapped[Optional[int]] = mapped_column(BigInteger, nullable=True)
    cache_level: Mapped[opt_text]
    stride_elems: Mapped[Optional[int]] = mapped_column(Integer, nullable=True)
    shape: Mapped[opt_text]  # GEMM MxNxK
    bytes_per_s: Mapped[opt_float]
    ops_per_s: Mapped[opt_float]
    ns_per_load: Mapped[opt_float]
    hz: Mapped[opt_float]
    best: Mapped[opt_float]  # best sample, same unit as the filled column
    q1: Mapped[opt_float]
    q3: Mapped[opt_float]
    cv: Mapped[opt_float]
    samples: Mapped[list[Any]]  # every sample, same unit
    repetitions: Mapped[int] = mapped_column(Integer)
    min_seconds: Mapped[float] = mapped_column(Float)
    extra: Mapped[dict[str, Any]]  # e.g. cache-line traffic, vector width, BLAS kernel
    run: Mapped[Run] = relationship(back_populates="measurements")

    __table_args__ = (Index("ix_measurements_run_suite_kernel", "run_id", "suite", "kernel"),)


class Placement(Base):
    """One layer of a run placed under the ceilings of a survey run."""

    __tablename__ = "placements"
    id: Mapped[intpk]
    run_id: Mapped[int] = mapped_column(ForeignKey("runs.id", ondelete="CASCADE"), index=True)
    layer: Mapped[plain_text]
    kind: Mapped[plain_text]
    dtype: Mapped[plain_text]
    threads: Mapped[int] = mapped_column(Integer)
    batch: Mapped[Optional[int]] = mapped_column(Integer, nullable=True)
    seconds: Mapped[float] = mapped_column(Float)  # median
    samples: Mapped[list[Any]]  # seconds of every sample
    flops: Mapped[float] = mapped_column(Float)
    bytes: Mapped[float] = mapped_column(Float)
    flops_per_byte: Mapped[float] = mapped_column(Float)
    flops_per_s: Mapped[float] = mapped_column(Float)
    bytes_per_s: Mapped[float] = mapped_column(Float)
    attainable_flops_per_s: Mapped[float] = mapped_column(Float)
    efficiency: Mapped[float] = mapped_column(Float)
    bound: Mapped[plain_text]  # memory | compute | impossible
    roof: Mapped[plain_text]
    # the roofs the layer was held against and how close it came (in `extra` until migration 0004)
    macs: Mapped[opt_float]
    where: Mapped[plain_text]
    memory_roof: Mapped[plain_text]
    memory_roof_bytes_per_s: Mapped[float] = mapped_column(Float)
    memory_roof_kernel: Mapped[plain_text]
    compute_roof: Mapped[plain_text]
    compute_roof_ops_per_s: Mapped[float] = mapped_column(Float)
    ridge_flops_per_byte: Mapped[float] = mapped_column(Float)
    memory_efficiency: Mapped[float] = mapped_column(Float)
    compute_efficiency: Mapped[float] = mapped_column(Float)
    achievable_efficiency: Mapped[opt_float]
    consistent_level: Mapped[opt_text]
    threads_measured: Mapped[int] = mapped_column(Integer)
    threads_match: Mapped[plain_text]  # exact | nearest
    memory_threads_measured: Mapped[int] = mapped_column(Integer)
    extra: Mapped[dict[str, Any]]  # what only some placements have: items_per_s, reason
    run: Mapped[Run] = relationship(back_populates="placements")


class Quarantined(Base):
    """A spooled run the store refused for its content: it stays in the spool, and push skips it."""

    __tablename__ = "quarantine"
    id: Mapped[intpk]
    run_uuid: Mapped[str] = mapped_column(String(36), ForeignKey("runs.uuid", ondelete="CASCADE"), unique=True)
    reason: Mapped[plain_text]  # the store's own words, one line
    refused_by: Mapped[plain_text]  # the store's URL, password hidden
    refused_at: Mapped[dt.datetime] = mapped_column(DateTime(timezone=True), default=utcnow)
