"""Pictures of a survey: bandwidth against working set, and thread scaling (PNG and SVG)."""

from __future__ import annotations

from pathlib import Path
from typing import Optional, Sequence

from eaves.errors import InputError
from eaves.levels import CacheCapacity
from eaves.records import Figure
from eaves.units import format_bytes

# Our own look: warm paper background, muted ink, one colour per kernel.
PAPER = "#fbfaf6"
INK = "#33322e"
KERNEL_COLOURS = {"read": "#1b6f8a", "write": "#c2571a", "copy": "#6a4c93", "axpy": "#3c8d2f"}
BAND_COLOURS = ("#e9eef2", "#f4efe6")


def _pyplot():
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    plt.rcParams.update({"font.size": 9, "axes.edgecolor": INK, "axes.labelcolor": INK,
                         "xtick.color": INK, "ytick.color": INK, "svg.hashsalt": "eaves",
                         "svg.fonttype": "none", "text.parse_math": False})  # names are text, never mathtext
    return plt


def _style(ax) -> None:
    ax.set_facecolor(PAPER)
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)
    ax.grid(True, which="major", color="#d9d6cc", linewidth=0.6, linestyle=":")


def _save(fig, stem: Path) -> list[Path]:
    paths = [stem.with_suffix(".png"), stem.with_suffix(".svg")]
    try:
        stem.parent.mkdir(parents=True, exist_ok=True)
        fig.savefig(paths[0], dpi=130, facecolor=PAPER)
        fig.savefig(paths[1], facecolor=PAPER, metadata={"Date": None})
    except OSError as err:
        raise InputError(f"charts: cannot write {stem.parent}: {err.strerror}") from err
    return paths


def bandwidth_chart(figures: Sequence[Figure], levels: dict, reported: Sequence[CacheCapacity],
                    stem: Path, title: str) -> list[Path]:
    """Bandwidth (GB/s, log) against working set (log2) per kernel; the levels detected at one thread
    shaded, OS sizes marked."""
    plt = _pyplot()
    fig, ax = plt.subplots(figsize=(9, 4.8), facecolor=PAPER)
    _style(ax)
    sweep = [f for f in figures if f.suite == "sweep"]
    threads = sorted({f.threads for f in sweep})
    top_threads = threads[-1] if threads else 1
    # bands: the levels one thread sees, so they line up with the per-core sizes the OS reports
    bands = levels.get(str(threads[0])) or levels.get(threads[0]) or [] if threads else []
    for i, p in enumerate(bands):
        if p["name"] == "L?":  # a transition between levels: left unshaded
            continue
        ax.axvspan(p["first_bytes"] / 1.19, p["last_bytes"] * 1.19, color=BAND_COLOURS[i % 2], zorder=0, lw=0)
        mid = (p["first_bytes"] * p["last_bytes"]) ** 0.5
        ax.text(mid, 1.01, p["name"], transform=ax.get_xaxis_transform(), ha="center", va="bottom",
                color=INK, fontsize=9, fontweight="bold")
    for c in reported:
        ax.axvline(c.bytes, color="#8a857a", lw=0.8, ls=(0, (2, 2)), zorder=1)
        ax.text(c.bytes, 0.02, f" OS {c.name} {format_bytes(c.bytes)}", transform=ax.get_xaxis_transform(),
                rotation=90, va="bottom", ha="right", fontsize=7, color="#6b675d")
    for kernel, colour in KERNEL_COLOURS.items():
        for t in threads:
            pts = sorted((f.working_set_bytes, f.median) for f in sweep if f.kernel == kernel and f.threads == t)
            if not pts:
                continue
            xs, ys = zip(*pts)
            ax.plot(xs, [y / 1e9 for y in ys], color=colour, lw=1.6 if t == top_threads else 1.0,
                    ls="-" if t == top_threads else (0, (4, 2)), marker="o", ms=2.5,
                    label=f"{kernel}, {t} thread{'s' if t > 1 else ''}")
    ax.set_xscale("log", base=2)
    ax.set_yscale("log")
    ax.set_xlabel("working set (bytes, all threads together)")
    ax.set_ylabel("bandwidth (GB/s)")
    ax.xaxis.set_major_formatter(plt.FuncFormatter(lambda v, _: format_bytes(v).replace(" ", "")))
    ax.legend(loc="lower left", fontsize=7, ncol=2, frameon=False)
    fig.suptitle(title, x=0.01, ha="left", fontsize=10, color=INK)
    fig.tight_layout()
    paths = _save(fig, stem)
    plt.close(fig)
    return paths


def scaling_chart(figures: Sequence[Figure], stem: Path, title: str) -> Optional[list[Path]]:
    """DRAM bandwidth per kernel against thread count, with the ideal line from one thread."""
    rows = [f for f in figures if f.suite == "scaling"]
    if not rows:
        return None
    plt = _pyplot()
    fig, ax = plt.subplots(figsize=(6, 4.2), facecolor=PAPER)
    _style(ax)
    for kernel, colour in KERNEL_COLOURS.items():
        pts = sorted((f.threads, f.median) for f in rows if f.kernel == kernel)
        if not pts:
            continue
        xs, ys = zip(*pts)
        ax.plot(xs, [y / 1e9 for y in ys], color=colour, marker="s", ms=4, lw=1.5, label=kernel)
        ax.plot(xs, [ys[0] * x / xs[0] / 1e9 for x in xs], color=colour, lw=0.6, ls=":")
    ax.set_xlabel("threads")
    ax.set_ylabel("DRAM bandwidth (GB/s); dotted: linear from the first")
    ax.set_xticks(sorted({f.threads for f in rows}))
    ax.legend(frameon=False, fontsize=8)
    fig.suptitle(title, x=0.01, ha="left", fontsize=10, color=INK)
    fig.tight_layout()
    paths = _save(fig, stem)
    plt.close(fig)
    return paths
