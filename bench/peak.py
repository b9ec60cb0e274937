"""The host's theoretical multiply-add bound, so a measured rate above physics is caught as a broken kernel."""

from __future__ import annotations

import math
from dataclasses import dataclass

from eaves.errors import BrokenKernelError

TOLERANCE = 0.05  # a measured rate may exceed the bound by this fraction (clock noise) before it is refused
MAX_MADD_UNITS = 4  # more vector multiply-add pipes per core than any CPU we know of has (from memory)
# Most multiply-adds per cycle per core of an AMX tile unit (from memory: Intel describes the Sapphire Rapids
# tile unit as 1024 bf16 / 2048 int8 operations per cycle per core, i.e. one 16x16x32 bf16 or 16x16x64 int8
# tile product every 16 cycles; 1 MAC = 2 operations). A tile rate above this is a broken kernel.
MAX_TILE_MACS_PER_CYCLE = {"bf16": 512, "int8": 1024}


def theoretical_ops_per_s(cores: int, clock_hz: float, lanes: int, madd_units: int, ops_per_madd: int = 2) -> float:
    """cores x clock x vector lanes x multiply-add units x 2 (one multiply-add = 2 operations, common practice)."""
    return cores * clock_hz * lanes * madd_units * ops_per_madd


def lanes_of(vector_bits: int, math_bits: int) -> int:
    """Multiply-add lanes of one vector instruction: 512-bit registers hold 8 fp64 or 64 int8 lanes."""
    return max(1, vector_bits // math_bits)


@dataclass(frozen=True)
class TheoreticalBound:
    """A theoretical bound and how it was reached; `madd_units` is inferred from a measurement."""

    ops_per_s: float
    cores: int
    clock_hz: float
    lanes: int
    madd_units: int
    units_inferred: bool = True
    lanes_label: str = "lanes"  # what `lanes` counts: vector lanes, or a tile unit's MACs per cycle


def units_per_cycle(ops_per_s_one_core: float, clock_hz: float, lanes: int) -> float:
    """Measured vector multiply-adds per cycle per core: ops/s / clock / (lanes x 2)."""
    return ops_per_s_one_core / clock_hz / (2 * lanes)


def infer_madd_units(ops_per_s_one_core: float, clock_hz: float, lanes: int, name: str) -> int:
    """Whole multiply-add units that explain a measurement: its ratio rounded, at least 1.

    The ratio is rounded to the nearest unit when it lies within TOLERANCE above a whole number,
    else up: load from other processes only lowers a measured ratio (1.4 on a 2-unit core under
    contention), never raises it, so rounding 1.4 down would refuse an honest kernel.
    """
    per_cycle = units_per_cycle(ops_per_s_one_core, clock_hz, lanes)
    units = max(1, math.ceil(per_cycle - TOLERANCE))
    if units > MAX_MADD_UNITS:
        raise BrokenKernelError(f"compute: kernel {name} does {per_cycle:.1f} vector multiply-adds per cycle "
                                f"per core, more than {MAX_MADD_UNITS} units; a broken kernel, not a record")
    return units


def infer_tile_macs_per_cycle(ops_per_s_one_core: float, clock_hz: float, dtype: str, name: str) -> int:
    """A tile unit's MACs per cycle per core that explain a measurement: the power of two at or above it.

    As with vector units, a ratio within TOLERANCE above a power of two rounds down to it, and load
    from other processes only lowers a ratio; capped by MAX_TILE_MACS_PER_CYCLE (more is a broken kernel).
    """
    per_cycle = ops_per_s_one_core / clock_hz / 2
    cap = MAX_TILE_MACS_PER_CYCLE[dtype]
    if per_cycle > cap * (1 + TOLERANCE):
        raise BrokenKernelError(f"compute: kernel {name} does {per_cycle:.0f} {dtype} multiply-adds per cycle per "
                                f"core, more than a tile unit's {cap}; a broken kernel, not a record")
    return min(cap, 2 ** max(0, math.ceil(math.log2(max(per_cycle, 1.0) / (1 + TOLERANCE)))))


def check_below(name: str, measured_ops_per_s: float, bound: TheoreticalBound, tolerance: float = TOLERANCE) -> None:
    """Raise BrokenKernelError naming the kernel when a rate exceeds the bound by more than `tolerance`."""
    if measured_ops_per_s > bound.ops_per_s * (1 + tolerance):
        raise BrokenKernelError(
            f"compute: kernel {name} measured {measured_ops_per_s:.4g} op/s, above the theoretical bound "
            f"{bound.ops_per_s:.4g} op/s (+{tolerance:.0%}) = {bound.cores} cores x {bound.clock_hz:.4g} Hz x "
            f"{bound.lanes} {bound.lanes_label} x {bound.madd_units} units x 2; a broken kernel, not a record")
