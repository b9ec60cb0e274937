"""A whole survey: host facts, memory and compute ceilings, one run written to the store at the end."""

from __future__ import annotations

import datetime as dt
import subprocess
from dataclasses import dataclass, field
from typing import Callable, Optional, Sequence

from eaves import __version__, interrupts
from eaves.budget import MemoryBudget
from eaves.host import HostFacts
from eaves.levels import CacheCapacity, Plateau
from eaves.memory_survey import MemoryPlan, measure_memory
from eaves.records import Figure, RunRecord, StepFailure
from eaves.supervisor import Supervisor, binding_environment

Progress = Callable[[str], None]
# No core moves more than four full vector registers of data per cycle between its caches and
# registers (common practice: today's widest cores load two or three vectors and store one or two).
VECTORS_PER_CYCLE_BOUND = 4
CLOCK_HEADROOM = 1.5  # turbo above the nominal clock when no clock was measured


@dataclass(frozen=True)
class SurveyOptions:
    """What the user asked for; validated by the command before anything is measured."""

    quick: bool
    thread_counts: tuple[int, ...]
    budget: MemoryBudget
    memory_plan: MemoryPlan
    dtypes: Optional[tuple[str, ...]] = None
    tag: Optional[str] = None
    note: Optional[str] = None
    parts: tuple[str, ...] = ("memory", "compute")
    step_seconds: Optional[float] = None  # every step's deadline, instead of the one its plan gives


@dataclass
class SurveyOutcome:
    record: RunRecord
    plateaus: dict[int, list[Plateau]] = field(default_factory=dict)
    notes: list[str] = field(default_factory=list)
    interrupted_by: Optional[str] = None
    failures: list[StepFailure] = field(default_factory=list)  # steps that gave no figure, and why


def git_describe() -> Optional[str]:
    """`git describe --always --dirty` of the current directory, when it is a checkout."""
    try:
        out = subprocess.run(["git", "describe", "--always", "--dirty", "--tags"], capture_output=True,
                             text=True, timeout=5)
    except (OSError, subprocess.SubprocessError):
        return None
    return out.stdout.strip() or None if out.returncode == 0 else None


def reported_caches(host: HostFacts) -> tuple[list[CacheCapacity], dict[str, tuple[int, int, int]]]:
    """OS-reported data caches as capacities, and how each is shared (bytes, CPUs, instances)."""
    caps, shares = [], {}
    for c in sorted(host.caches, key=lambda c: c.level):
        if c.kind == "instruction":
            continue
        name = f"L{c.level}"
        caps.append(CacheCapacity(name, c.size_bytes))
        shares[name] = (c.size_bytes, c.shared_cpus or 1, c.instances or 1)
    return caps, shares


def new_record(host: HostFacts, options: SurveyOptions, params: dict) -> RunRecord:
    return RunRecord(host_key=host.host_key(), hostname=host.hostname, fingerprint=host.fingerprint(),
                     host_facts=host.to_dict(), started_at=dt.datetime.now(dt.timezone.utc),
                     eaves_version=__version__, params=params, tag=options.tag, note=options.note,
                     git_describe=git_describe())


def survey_params(options: SurveyOptions) -> dict:
    plan = options.memory_plan
    return {"quick": options.quick, "threads": list(options.thread_counts), "parts": list(options.parts),
            "max_memory_bytes": options.budget.cap_bytes, "sweep_sizes": list(plan.sizes),
            "sweep_threads": list(plan.sweep_threads), "points_per_octave": plan.points_per_octave,
            "min_seconds": plan.policy.min_seconds, "samples": plan.policy.samples,
            "dtypes": list(options.dtypes) if options.dtypes else None,
            "threading_layer": _threading_layer(), "thread_binding": binding_environment()}


def _threading_layer() -> Optional[str]:
    try:
        import numba

        return numba.threading_layer()
    except (ImportError, ValueError):
        return None


def run_survey(host: HostFacts, options: SurveyOptions, progress: Progress = lambda m: None) -> SurveyOutcome:
    """Measure everything the options ask for. Ctrl-C or SIGTERM ends it early with what was measured.

    The outcome's record has status complete or interrupted; the caller stores it.
    """
    record = new_record(host, options, survey_params(options))
    outcome = SurveyOutcome(record)
    with interrupts.stoppable() as stop, Supervisor(options.step_seconds) as runner:
        if "memory" in options.parts:
            caps, shares = reported_caches(host)
            memory = measure_memory(options.memory_plan, caps, progress, shares, sink=record.figures,
                                    runner=runner, failures=outcome.failures)
            outcome.plateaus = memory.plateaus
            outcome.notes += memory.notes
            record.params["memory_layout"] = memory.layout
            record.params["threading_layer"] = _threading_layer()
        if "compute" in options.parts:
            from eaves.compute import measure_compute

            policy = options.memory_plan.policy
            record.figures += measure_compute(host, list(options.thread_counts), policy, options.dtypes,
                                              options.budget.cap_bytes, progress,
                                              mode="quick" if options.quick else "full", runner=runner,
                                              failures=outcome.failures)
    kept, broken = within_physical_bounds(host, record.figures)
    record.figures[:] = kept
    outcome.failures += broken
    outcome.notes += consistency_notes(record.figures)
    outcome.interrupted_by = stop.signal
    record.status = "interrupted" if stop.signal else "complete"
    record.ended_at = dt.datetime.now(dt.timezone.utc)
    record.params["levels"] = {str(t): [_plateau_dict(p) for p in ps] for t, ps in outcome.plateaus.items()}
    record.params["failures"] = [f.to_dict() for f in outcome.failures]
    return outcome


def _plateau_dict(p: Plateau) -> dict:
    return {"name": p.name, "first_bytes": p.sizes[0], "last_bytes": p.sizes[-1], "edge_bytes": p.edge_bytes,
            "reported_bytes": p.reported_bytes, "bytes_per_s": p.bytes_per_s}


def memory_bound_bytes_per_s(host: HostFacts, threads: int, clock_hz: Optional[float]) -> Optional[float]:
    """The most bytes per second `threads` cores could move to and from registers (see the constant)."""
    clock = clock_hz or ((host.max_hz or host.nominal_hz or 0) * CLOCK_HEADROOM)
    if not clock or not host.vector_bits:
        return None
    return threads * clock * VECTORS_PER_CYCLE_BOUND * host.vector_bits / 8


def bound_violation(host: HostFacts, f: Figure, clock: Optional[float]) -> Optional[str]:
    """Why a figure cannot be honest: a bandwidth above what the cores can move, a load faster than a cycle."""
    if f.unit == "bytes_per_s":
        bound = memory_bound_bytes_per_s(host, f.threads, clock)
        if bound and f.best > bound:
            return (f"{f.kernel}/{f.variant} at {f.working_set_bytes} B x{f.threads}: {f.best:.3g} B/s is above "
                    f"the host's bound of {bound:.3g} B/s (a broken kernel, not a record)")
    if f.unit == "ns_per_load":
        cycle_ns = 1e9 / (clock or (host.max_hz or host.nominal_hz or 5e9) * CLOCK_HEADROOM)
        if f.best < cycle_ns:
            return (f"chase at {f.working_set_bytes} B: {f.best:.3g} ns per load is below one clock cycle "
                    f"({cycle_ns:.3g} ns): a broken kernel")
    return None


def within_physical_bounds(host: HostFacts, figures: Sequence[Figure]) -> tuple[list[Figure], list[StepFailure]]:
    """The figures a host can physically produce, and a failure for each one it cannot."""
    clocks = [f.best for f in figures if f.suite == "clock"]
    clock = max(clocks) * 1.05 if clocks else None
    kept, broken = [], []
    for f in figures:
        why = bound_violation(host, f, clock)
        if why is None:
            kept.append(f)
        else:
            broken.append(StepFailure(f"{f.suite} {f.kernel} x{f.threads}", why,
                                      {"suite": f.suite, "kernel": f.kernel, "variant": f.variant, "threads": f.threads,
                                       "working_set_bytes": f.working_set_bytes, "cache_level": f.cache_level}))
    return kept, broken


def consistency_notes(figures: Sequence[Figure]) -> list[str]:
    """Relations no honest host breaks; when one is broken a measurement was disturbed (noise)."""
    notes = []
    peaks = {(f.dtype, f.threads): f.median for f in figures if f.suite == "compute"}
    for f in figures:
        if f.suite == "gemm" and f.median > peaks.get((f.dtype, f.threads), float("inf")) * 1.02:
            notes.append(f"{f.dtype} GEMM {f.shape} x{f.threads} ran faster than the multiply-add peak measured "
                         f"at the same thread count: that peak was disturbed (another process?); rerun when quiet")
    reads = {(f.cache_level, f.threads): f.median for f in figures if f.suite == "memory" and f.kernel == "read"}
    for (level, threads), rate in reads.items():
        if level != "DRAM" and rate < reads.get(("DRAM", threads), 0.0):
            notes.append(f"{level} read x{threads} measured below DRAM read: a disturbed measurement; rerun when quiet")
    return list(dict.fromkeys(notes))
