"""One chart per ceiling over time: each run's median and quartiles, the rolling baseline, drift marked."""

from __future__ import annotations

import io
import re
from pathlib import Path
from typing import Any, Sequence

from eaves.charts import INK, PAPER, _pyplot, _style
from eaves.plain import visible
from eaves.compare import GAINED, LOST
from eaves.errors import InputError
from eaves.trend import MetricTrend, Trend

POINT, BASELINE, WORSE, BETTER = "#1b6f8a", "#8a857a", "#b3261e", "#3c8d2f"
SCALE = {"bytes_per_s": (1e9, "GB/s"), "ops_per_s": (1e9, "GOP/s"), "hz": (1e9, "GHz"), "ns_per_load": (1.0, "ns")}


def _draw(ax, m: MetricTrend, legend: bool = True) -> None:
    """One ceiling's history on `ax`: medians with quartile bars, the baseline, drift circled."""
    scale, label = SCALE.get(m.unit, (1.0, m.unit))
    _style(ax)
    xs = [p.run.started_at for p in m.points]
    ys = [p.median / scale for p in m.points]
    lo = [(p.median - p.q1) / scale for p in m.points]
    hi = [(p.q3 - p.median) / scale for p in m.points]
    ax.errorbar(xs, ys, yerr=[lo, hi], color=POINT, lw=1.2, marker="o", ms=3, elinewidth=0.8, capsize=0,
                label="run median, quartiles")
    base = [(p.run.started_at, p.baseline / scale) for p in m.points if p.baseline is not None]
    if base:
        bx, by = zip(*base)
        ax.plot(bx, by, color=BASELINE, lw=1.0, ls=(0, (4, 2)), label="baseline (median of earlier runs)")
    for colour, worse, name in ((WORSE, True, f"drift, {LOST}"), (BETTER, False, f"drift, {GAINED}")):
        pts = [(p.run.started_at, p.median / scale) for p in m.points
               if p.drifted and (p.comparison.verdict == LOST) == worse]
        if pts:
            ax.scatter(*zip(*pts), s=46, facecolors="none", edgecolors=colour, linewidths=1.6, zorder=5, label=name)
    ax.set_ylabel(label)
    if legend:
        ax.legend(loc="best", fontsize=7, frameon=False)


def _figure(m: MetricTrend, host: str) -> tuple[Any, Any]:
    plt = _pyplot()
    fig, ax = plt.subplots(figsize=(7.5, 3.0), facecolor=PAPER)
    _draw(ax, m)
    fig.autofmt_xdate()
    fig.suptitle(f"{visible(host)}: {visible(m.key.name())}", x=0.01, ha="left", fontsize=9, color=INK)
    fig.tight_layout()
    return plt, fig


def trend_grid_svg(metrics: Sequence[MetricTrend], host: str, columns: int = 3) -> str:
    """Several ceilings' histories as small panels of one SVG (one drawing: quick for a page)."""
    plt = _pyplot()
    rows = -(-len(metrics) // columns)
    fig, axes = plt.subplots(rows, columns, figsize=(3.6 * columns, 2.5 * rows), facecolor=PAPER, squeeze=False)
    import matplotlib.dates as mdates

    for ax, m in zip(axes.flat, metrics):
        _draw(ax, m, legend=False)
        ax.set_title(visible(m.key.name()), fontsize=8, color=INK, loc="left")
        ax.tick_params(labelsize=7)
        locator = mdates.AutoDateLocator(maxticks=4)
        ax.xaxis.set_major_locator(locator)
        ax.xaxis.set_major_formatter(mdates.ConciseDateFormatter(locator))
    for ax in list(axes.flat)[len(metrics):]:
        ax.set_visible(False)
    fig.suptitle(f"{visible(host)}: ceilings over time (dashed: baseline; circled: drift)", x=0.01, ha="left",
                 fontsize=9, color=INK)
    fig.subplots_adjust(left=0.06, right=0.98, top=1 - 0.45 / rows, bottom=0.25 / rows, wspace=0.28, hspace=0.55)
    buf = io.StringIO()
    fig.savefig(buf, format="svg", facecolor=PAPER, metadata={"Date": None})
    plt.close(fig)
    return buf.getvalue()


def file_stem(name: str) -> str:
    """A ceiling name as a safe file name."""
    return re.sub(r"[^A-Za-z0-9._-]+", "_", name).strip("_")


def save_trend_charts(t: Trend, folder: str) -> list[Path]:
    """Write one PNG and one SVG per ceiling into `folder`; returns the paths."""
    out = Path(folder)
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as err:
        raise InputError(f"--chart {folder}: cannot create the folder: {err.strerror}") from None
    written = []
    for m in t.metrics:
        plt, fig = _figure(m, t.host)
        stem = out / f"{file_stem(t.host)}-{file_stem(m.key.name())}"
        try:
            fig.savefig(stem.with_suffix(".png"), dpi=110, facecolor=PAPER)
            fig.savefig(stem.with_suffix(".svg"), facecolor=PAPER, metadata={"Date": None})
        except OSError as err:
            raise InputError(f"--chart {folder}: cannot write: {err.strerror}") from None
        finally:
            plt.close(fig)
        written += [stem.with_suffix(".png"), stem.with_suffix(".svg")]
    return written
