"""One chart per ceiling over time: each run's median and quartiles, the rolling baseline, drift marked."""

from __future__ import annotations

import io
import re
from pathlib import Path

from eaves.charts import INK, PAPER, _pyplot, _style
from eaves.compare import SLOWER
from eaves.errors import InputError
from eaves.trend import MetricTrend, Trend

POINT, BASELINE, WORSE, BETTER = "#1b6f8a", "#8a857a", "#b3261e", "#3c8d2f"
SCALE = {"bytes_per_s": (1e9, "GB/s"), "ops_per_s": (1e9, "GOP/s"), "hz": (1e9, "GHz"), "ns_per_load": (1.0, "ns")}


def _figure(m: MetricTrend, host: str):
    plt = _pyplot()
    scale, label = SCALE.get(m.unit, (1.0, m.unit))
    fig, ax = plt.subplots(figsize=(7.5, 3.0), facecolor=PAPER)
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
    for colour, worse, name in ((WORSE, True, "drift, worse"), (BETTER, False, "drift, better")):
        pts = [(p.run.started_at, p.median / scale) for p in m.points
               if p.drifted and (p.comparison.verdict == SLOWER) == worse]
        if pts:
            ax.scatter(*zip(*pts), s=46, facecolors="none", edgecolors=colour, linewidths=1.6, zorder=5, label=name)
    ax.set_ylabel(label)
    ax.legend(loc="best", fontsize=7, frameon=False)
    fig.autofmt_xdate()
    fig.suptitle(f"{host}: {m.key.name()}", x=0.01, ha="left", fontsize=9, color=INK)
    fig.tight_layout()
    return plt, fig


def trend_svg(m: MetricTrend, host: str) -> str:
    """The chart of one ceiling as SVG text (for pages that embed it)."""
    plt, fig = _figure(m, host)
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
