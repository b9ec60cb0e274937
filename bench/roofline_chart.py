"""Draw a host's roofs and the placed layers on log-log axes, as PNG and SVG files."""

from __future__ import annotations

import math
from collections import Counter
from pathlib import Path
from typing import Optional, Sequence

from eaves.records import PlacedLayer
from eaves.roofline import HostModel
from eaves.units import format_rate

# Our own look: warm paper background, ink-blue memory roofs, rust compute roofs.
PAPER, INK, GRID = "#fbf8f1", "#2b2d42", "#d9d4c7"
LEVEL_COLOURS = {"L1": "#1d3557", "L2": "#457b9d", "L3": "#6a9fb5", "DRAM": "#8d99ae"}
DTYPE_COLOURS = {"fp64": "#9b2915", "fp32": "#c44900", "fp16": "#e9a03b", "bf16": "#b07d2b",
                 "int8": "#5a7d2b", "int16": "#3f6634"}
KIND_MARKERS = {"dense": "o", "matmul": "o", "batched_matmul": "8", "conv2d": "s", "pooling": "v",
                "elementwise": "^", "softmax": "D", "layernorm": "P", "batchnorm": "p",
                "attention": "*", "embedding": "h", "lstm": "<", "gru": ">"}
WORST_LABELLED = 5


def _threads_shown(model: HostModel, placed: Sequence[PlacedLayer], threads: Optional[int]) -> int:
    if threads is not None:
        return threads
    if placed:
        return Counter(p.memory_threads_measured for p in placed).most_common(1)[0][0]
    return min(model.thread_counts())


def draw_chart(model: HostModel, placed: Sequence[PlacedLayer], path: str | Path,
               threads: Optional[int] = None, title: Optional[str] = None) -> list[Path]:
    """Write the chart to `path` and its sibling of the other format (.png and .svg); returns both."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    from eaves.plain import visible

    plt.rcParams["text.parse_math"] = False  # layer and host names are text: a "$" never starts mathtext
    t = _threads_shown(model, placed, threads)
    memory = model.memory_roofs(t)
    measured_t = memory[0].threads if memory else t
    compute = [r for r in model.compute if r.threads == measured_t] or list(model.compute)
    shown = [p for p in placed if p.flops_per_byte > 0]
    top = max([r.value for r in compute] + [p.flops_per_s for p in shown])
    ridges = [r.value / m.value for r in compute for m in memory]
    xs = [p.flops_per_byte for p in shown] + ridges
    x_lo = 10 ** math.floor(math.log10(min(xs) / 2)) if xs else 1e-2
    x_hi = 10 ** math.ceil(math.log10(max(xs) * 2)) if xs else 1e3

    fig, ax = plt.subplots(figsize=(9.5, 6.2), dpi=110)
    fig.patch.set_facecolor(PAPER)
    ax.set_facecolor(PAPER)
    ax.set_xscale("log")
    ax.set_yscale("log")
    ax.grid(True, which="major", color=GRID, linestyle=(0, (1, 3)), linewidth=0.8)
    ax.set_xlim(x_lo, x_hi)
    y_lo = min([m.value * x_lo for m in memory] + [p.flops_per_s for p in shown] or [top / 1e4]) / 2
    ax.set_ylim(y_lo, top * 2)
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)
    for r in compute:
        style = "-" if r.source == "peak" else (0, (5, 3))
        ax.axhline(r.value, color=DTYPE_COLOURS.get(r.dtype, INK), linestyle=style, linewidth=1.4, alpha=0.85)
        ax.text(x_hi, r.value, f" {r.name}  {format_rate(r.value, 'FLOP/s')}", va="center", ha="left",
                fontsize=7.5, color=DTYPE_COLOURS.get(r.dtype, INK))
    for m in memory:
        colour = LEVEL_COLOURS.get(m.level, INK)
        x_end = min(x_hi, top / m.value)  # each bandwidth roof ends where it meets the highest compute roof
        ax.plot([x_lo, x_end], [m.value * x_lo, m.value * x_end], color=colour, linewidth=1.6)
        y_label = m.value * x_lo * 1.6
        ax.text(x_lo * 1.15, y_label, f"{m.level} {format_rate(m.value, 'B/s')}", rotation=0, fontsize=7.5,
                color=colour, va="bottom", ha="left")
        for r in compute:
            if r.source == "peak":
                ax.plot([r.value / m.value], [r.value], marker="d", markersize=5, color=colour,
                        markeredgecolor=INK, markeredgewidth=0.5, zorder=4, linestyle="none")
    for kind in sorted({p.kind for p in shown}):
        pts = [p for p in shown if p.kind == kind]
        colours = ["#d62828" if p.bound == "impossible" else DTYPE_COLOURS.get(p.dtype, INK) for p in pts]
        ax.scatter([p.flops_per_byte for p in pts], [p.flops_per_s for p in pts], c=colours, s=26,
                   marker=KIND_MARKERS.get(kind, "o"), edgecolors=INK, linewidths=0.4, zorder=5, label=kind,
                   rasterized=len(shown) > 2000)  # thousands of SVG markers are slow to write and to view
    worst = sorted(shown, key=lambda p: (p.bound != "impossible", p.efficiency))[:WORST_LABELLED]
    for i, p in enumerate(worst):
        ax.annotate(visible(p.layer) + (" (impossible)" if p.bound == "impossible" else f" {p.efficiency:.1%}"),
                    (p.flops_per_byte, p.flops_per_s), xytext=(6, 7 - 11 * i), textcoords="offset points",
                    arrowprops=dict(arrowstyle="-", color=GRID, linewidth=0.6),
                    fontsize=7, color=INK)
    ax.set_xlabel("operational intensity (FLOP per byte of compulsory traffic)", color=INK)
    ax.set_ylabel("FLOP/s", color=INK)
    ax.tick_params(colors=INK, labelsize=8)
    ax.set_title(visible(title) if title else
                 f"{visible(model.host_key)} · run {model.run_uuid[:8]} · {measured_t} thread(s)",
                 loc="left", fontsize=10, color=INK)
    if shown:
        ax.legend(loc="lower right", fontsize=7, frameon=False, title="layer kind", title_fontsize=7)
    fig.tight_layout()
    path = Path(path)
    stem = path.with_suffix("") if path.suffix.lower() in (".png", ".svg") else path
    outputs = [stem.with_suffix(".png"), stem.with_suffix(".svg")]
    for out in outputs:
        out.parent.mkdir(parents=True, exist_ok=True)
        with plt.rc_context({"svg.fonttype": "none"}):  # SVG text stays text: searchable, smaller
            fig.savefig(out, facecolor=PAPER)
    plt.close(fig)
    return outputs
