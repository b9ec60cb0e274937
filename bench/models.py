"""The SQL schema of the store: hosts, runs, measurements and placed layers (SQLAlchemy 2)."""

from __future__ import annotations

import datetime as dt
import uuid as uuidlib
from typing import Annotated, Any, Optional

from sqlalchemy import JSON, BigInteger, DateTime, Float, ForeignKey, Index, Integer, String, Text
from sqlalchemy.orm import DeclarativeBase, Mapped, mapped_column, relationship

# The alembic revision this eaves writes and expects (bench/migrations/versions); a test checks
# it is the head of the migration scripts. SCHEMA_VERSION counts the revisions.
SCHEMA_REVISION = "0002"
SCHEMA_VERSION = 2

intpk = Annotated[int, mapped_column(Integer, primary_key=True, autoincrement=True)]
name64 = Annotated[str, mapped_column(String(64))]
opt_float = Annotated[Optional[float], mapped_column(Float, nullable=True)]
opt_text = Annotated[Optional[str], mapped_column(Text, nullable=True)]


def utcnow() -> dt.datetime:
    return dt.datetime.now(dt.timezone.utc)


def new_uuid() -> str:
    return str(uuidlib.uuid4())


class Base(DeclarativeBase):
    type_annotation_map = {dict[str, Any]: JSON, list[Any]: JSON}


class Host(Base):
    """One hardware configuration of one machine: same hostname + new hardware = new row."""

    __tablename__ = "hosts"
    id: Mapped[intpk]
    host_key: Mapped[str] = mapped_column(String(200), unique=True)
    hostname: Mapped[str] = mapped_column(String(200), index=True)
    fingerprint: Mapped[name64]
    facts: Mapped[dict[str, Any]]
    first_seen: Mapped[dt.datetime] = mapped_column(DateTime(timezone=True), default=utcnow)
    runs: Mapped[list["Run"]] = relationship(back_populates="host")


class Run(Base):
    """One survey or one layer-timing session, written in a single transaction when it ends."""

    __tablename__ = "runs"
    id: Mapped[intpk]
    uuid: Mapped[str] = mapped_column(String(36), unique=True, default=new_uuid)
    host_id: Mapped[int] = mapped_column(ForeignKey("hosts.id"), index=True)
    kind: Mapped[str] = mapped_column(String(16), default="survey")  # survey | layers
    started_at: Mapped[dt.datetime] = mapped_column(DateTime(timezone=True))
    ended_at: Mapped[Optional[dt.datetime]] = mapped_column(DateTime(timezone=True), nullable=True)
    status: Mapped[str] = mapped_column(String(16))  # complete | interrupted | failed
    eaves_version: Mapped[str] = mapped_column(String(32))
    params: Mapped[dict[str, Any]]
    facts: Mapped[dict[str, Any]]  # host facts as read when the run started (load, governor ...)
    tag: Mapped[Optional[str]] = mapped_column(String(100), nullable=True, index=True)
    note: Mapped[opt_text]
    git_describe: Mapped[Optional[str]] = mapped_column(String(200), nullable=True)
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
    suite: Mapped[str] = mapped_column(String(16))  # memory | latency | stride | compute | gemm | clock
    kernel: Mapped[name64]
    variant: Mapped[Optional[str]] = mapped_column(String(64), nullable=True)  # path / width label
    dtype: Mapped[str] = mapped_column(String(16))
    threads: Mapped[int] = mapped_column(Integer)
    working_set_bytes: Mapped[Optional[int]] = mapped_column(BigInteger, nullable=True)
    cache_level: Mapped[Optional[str]] = mapped_column(String(8), nullable=True)
    stride_elems: Mapped[Optional[int]] = mapped_column(Integer, nullable=True)
    shape: Mapped[Optional[str]] = mapped_column(String(64), nullable=True)  # GEMM MxNxK
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
    layer: Mapped[str] = mapped_column(String(200))
    kind: Mapped[str] = mapped_column(String(32))
    dtype: Mapped[str] = mapped_column(String(16))
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
    bound: Mapped[str] = mapped_column(String(16))  # memory | compute | impossible
    roof: Mapped[str] = mapped_column(String(64))
    extra: Mapped[dict[str, Any]]
    run: Mapped[Run] = relationship(back_populates="placements")
