"""One self-contained HTML page about a host: facts, ceilings, sweep, roofline, trends, runs.

No network and no script: charts are SVG embedded as data URIs, styles inline. Every string that
came from a person or a file (hostnames, tags, notes, layer names, host facts) goes through `esc`:
control characters spelled out (eaves.plain.visible), then html.escape; SVG text is escaped by
matplotlib's SVG writer.
"""

from __future__ import annotations

import base64
import html
import tempfile
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any, Mapping, Optional, Sequence

from eaves.ceilings import latency_ceilings, memory_ceilings
from eaves.errors import InputError
from eaves.plain import visible
from eaves.records import PlacedLayer, RunSummary, StoredRun
from eaves.units import format_bytes, format_figure, format_rate

if TYPE_CHECKING:
    from eaves.metrics import MetricKey
    from eaves.noise import RunNoise
    from eaves.store import Store
    from eaves.trend import MetricTrend

    Steadiness = Mapping[MetricKey, RunNoise]

MAX_TREND_PANELS = 12  # drifted ceilings first, then the main ones; all are listed in the trend table
FACTS = ("hostname", "vendor", "model", "arch", "logical_cpus", "physical_cores", "sockets", "numa_nodes",
         "vector_bits", "mem_total_bytes", "nominal_hz", "max_hz", "governor", "virtual", "hypervisor",
         "kernel", "python", "numpy", "numba")

STYLE = """
body{background:#fbfaf6;color:#33322e;font:14px/1.45 Georgia,'DejaVu Serif',serif;margin:0 auto;max-width:1100px;padding:24px}
h1{font-size:24px;border-bottom:3px double #33322e;padding-bottom:6px}
h2{font-size:18px;margin-top:34px;border-bottom:1px solid #d9d6cc}
table{border-collapse:collapse;margin:8px 0;font:13px 'DejaVu Sans Mono',monospace}
th,td{padding:3px 10px;border-bottom:1px solid #e6e2d6;text-align:right;vertical-align:top}
th{background:#f1ede2;text-align:left} td.l{text-align:left}
.worse{color:#b3261e;font-weight:bold} .better{color:#3c8d2f} .muted{color:#8a857a}
figure{margin:12px 0} figure img{max-width:100%;border:1px solid #e6e2d6;background:#fbfaf6}
figcaption{font-size:12px;color:#6b675d}
"""


@dataclass(frozen=True)
class Report:
    """The page and what went into it."""

    html: str
    host: str
    survey: RunSummary
    layers_run: Optional[RunSummary]
    charts: int


def esc(value: Any) -> str:
    """Text for HTML: control characters as visible escapes, then <, >, &, quotes as entities."""
    return html.escape(visible(value), quote=True)


def svg_img(svg: str, alt: str) -> str:
    """An SVG drawing as an <img> with a caption, embedded as a data URI (no file, no network)."""
    data = base64.b64encode(svg.encode("utf-8")).decode("ascii")
    return f'<figure><img alt="{esc(alt)}" src="data:image/svg+xml;base64,{data}"><figcaption>{esc(alt)}</figcaption></figure>'


def _table(head: Sequence[str], rows: Sequence[Sequence[Any]], left: int = 1) -> str:
    """An HTML table; cells are escaped; the first `left` columns align left."""
    th = "".join(f"<th>{esc(h)}</th>" for h in head)
    body = []
    for r in rows:
        cells = "".join(f'<td class="l">{esc(c)}</td>' if i < left else f"<td>{esc(c)}</td>" for i, c in enumerate(r))
        body.append(f"<tr>{cells}</tr>")
    return f"<table><tr>{th}</tr>{''.join(body)}</table>"


def _facts(run: StoredRun) -> str:
    facts = run.host_facts or run.facts or {}
    rows = [(k, format_bytes(facts[k]) if k.endswith("_bytes") and facts[k] else facts[k])
            for k in FACTS if k in facts and facts[k] is not None]
    caches = [f"L{c.get('level')} {c.get('kind')}: {format_bytes(c.get('size_bytes'))}"
              f" x{c.get('instances') or 1}" for c in facts.get("caches") or []]
    if caches:
        rows.append(("caches", "; ".join(caches)))
    return _table(("fact", "value"), rows, left=2)


STEADY_HEAD = "run-to-run spread"


def _steady(steady: Optional[Steadiness], suite: str, **fields: Any) -> tuple[str, ...]:
    """The run-to-run cell of one row, or no cell at all when the host has no such history."""
    if not steady:
        return ()
    from eaves.noise import lookup

    n = lookup(steady, suite, **fields)
    return (f"{n.spread:.1%} ({n.runs} runs)" if n else "-",)


def _ceilings(run: StoredRun, steady: Optional[Steadiness] = None) -> str:
    from eaves.compute import compute_ceilings

    figs = run.figures
    extra = (STEADY_HEAD,) if steady else ()
    parts = [_table(("level", "kernel", "threads", "bandwidth", "variant", "working set", "cv", *extra),
                    [(c.level + (f" ({c.caution})" if c.caution else ""), c.kernel, c.threads,
                      format_rate(c.bytes_per_s, "B/s"), c.variant,
                      format_bytes(c.working_set_bytes), f"{c.cv:.1%}",
                      *_steady(steady, "memory", cache_level=c.level, kernel=c.kernel, threads=c.threads))
                     for c in memory_ceilings(figs)], left=2)]
    lat = latency_ceilings(figs)
    if lat:
        parts.append(_table(("level", "latency", "working set", *extra),
                            [(c.level, f"{c.ns_per_load:.3g} ns", format_bytes(c.working_set_bytes),
                              *_steady(steady, "latency", cache_level=c.level)) for c in lat]))
    comp = compute_ceilings(figs) if any(f.suite in ("compute", "gemm") for f in figs) else []
    if comp:
        parts.append(_table(("dtype", "threads", "multiply-add peak", "best GEMM", "GEMM shape", "native",
                             *(("peak " + STEADY_HEAD,) if steady else ())),
                            [(c.dtype, c.threads, format_rate(c.peak_ops_per_s, "OP/s"),
                              format_rate(c.gemm_ops_per_s, "OP/s"), c.gemm_shape or "-", "yes" if c.native else "no",
                              *_steady(steady, "compute", dtype=c.dtype, threads=c.threads))
                             for c in comp]))
    if steady:
        from eaves.noise import NOISE_MULTIPLE

        parts.append(f'<p class="muted">{STEADY_HEAD}: the median change between consecutive complete surveys '
                     f"of this host; a change between two runs counts beyond {NOISE_MULTIPLE:g}x it.</p>")
    failures = run.params.get("failures") or []
    if failures:
        parts.append("<h3>Steps that gave no figure</h3>"
                     + _table(("step", "reason"), [(f.get("label", "?"), f.get("reason", "?")) for f in failures], left=2))
    return "".join(parts)


def _steadiness(store: Store, s: RunSummary) -> dict[MetricKey, RunNoise]:
    from eaves.noise import steadiness

    return steadiness(store, s.host_key, "survey", until=s.started_at)


def _sweep_svg(run: StoredRun, folder: Path) -> Optional[str]:
    from eaves.charts import bandwidth_chart
    from eaves.levels import CacheCapacity

    if not any(f.suite == "sweep" for f in run.figures):
        return None
    facts = run.host_facts or {}
    caps = [CacheCapacity(f"L{c['level']}", int(c["size_bytes"])) for c in facts.get("caches") or []
            if c.get("kind") != "instruction" and c.get("size_bytes") and c.get("level")]
    paths = bandwidth_chart(run.figures, run.params.get("levels", {}), caps, folder / "sweep",
                            f"{visible(run.summary.hostname)}: bandwidth by working set")
    return paths[1].read_text(encoding="utf-8")


def _roofline_svg(run: StoredRun, placed: Sequence[PlacedLayer], folder: Path) -> Optional[str]:
    from eaves.roofline import model_from_figures
    from eaves.roofline_chart import draw_chart

    model = model_from_figures(run.figures, run.summary.uuid, run.summary.host_key, run.host_facts or run.facts)
    if not model.memory or not model.compute:
        return None
    paths = draw_chart(model, placed, folder / "roofline.svg")
    return next(p for p in paths if p.suffix == ".svg").read_text(encoding="utf-8")


def _layers(placed: Sequence[PlacedLayer]) -> str:
    return _table(("layer", "kind", "dtype", "threads", "time", "FLOP/B", "achieved", "attainable", "efficiency",
                   "bound", "roof"),
                  [(p.layer, p.kind, p.dtype, p.threads, f"{p.seconds * 1e3:.3g} ms", f"{p.flops_per_byte:.3g}",
                    format_rate(p.flops_per_s, "FLOP/s"), format_rate(p.attainable_flops_per_s, "FLOP/s"),
                    f"{p.efficiency:.1%}", p.bound, p.roof) for p in placed], left=3)


def _trends(store: Store, host: str, window: int) -> tuple[str, int]:
    from eaves.trend import trend
    from eaves.trend_chart import trend_grid_svg

    t = trend(store, host, window=window, last=60)
    multi = [m for m in t.metrics if len(m.points) > 1]
    if not multi:
        return '<p class="muted">one survey run so far: trends need at least two.</p>', 0
    rows = []
    for m in t.metrics:
        c = m.latest.comparison
        rows.append((m.key.name(), len(m.points), format_figure(m.latest.baseline, m.unit),
                     format_figure(m.latest.median, m.unit), f"{c.change_pct:+.1f}%" if c else "-",
                     c.verdict if c else "no baseline", sum(p.drifted for p in m.points)))
    shown = sorted(multi, key=_panel_order)[:MAX_TREND_PANELS]
    charts = svg_img(trend_grid_svg(shown, host), "ceilings over time")
    table = _table(("ceiling", "runs", "baseline", "newest", "change", "verdict", "drifts"), rows)
    note = (f'<p class="muted">panels for {len(shown)} of {len(multi)} ceilings: drifted first, then the '
            "main ones; every ceiling is in the table; `eaves trend --chart DIR` draws them all.</p>"
            if len(multi) > len(shown) else "")
    return table + note + charts, 1


def _panel_order(m: MetricTrend) -> tuple[Any, ...]:
    """Drifted first; then bandwidth at the most threads, latency, compute peaks; then the rest."""
    k = m.key
    main = {"memory": 0, "latency": 1, "compute": 2}.get(k.suite, 3)
    if k.suite == "memory" and k.kernel != "read":
        main = 3
    return (not any(p.drifted for p in m.points), main, -k.threads if k.suite == "memory" else 0, k.sort_key())


def _runs(runs: Sequence[RunSummary]) -> str:
    return _table(("id", "uuid", "kind", "status", "started (UTC)", "tag", "git", "note", "figures", "layers"),
                  [(r.id, r.uuid[:8], r.kind, r.status, f"{r.started_at:%Y-%m-%d %H:%M}", r.tag or "",
                    r.git_describe or "", r.note or "", r.n_figures, r.n_placements) for r in runs], left=8)


def build_report(store: Store, host: str, window: int = 5) -> Report:
    """The page for `host` (host key or hostname): its newest complete survey and layers runs."""
    survey_id = store.latest_complete_run(host, kind="survey")
    if survey_id is None:
        raise InputError(f"--host {host}: no complete survey run in {store.shown_url} "
                         "(make one with `eaves survey --quick`)")
    survey = store.load_run(survey_id)
    layers_id = store.latest_complete_run(host, kind="layers")
    layers = store.load_run(layers_id) if layers_id is not None else None
    placed = layers.placements if layers else ()
    s = survey.summary
    sections = [f"<h1>eaves report: {esc(s.hostname)}</h1>",
                f'<p class="muted">host {esc(s.host_key)} · ceilings from run {s.id} ({esc(s.uuid)}) of '
                f"{s.started_at:%Y-%m-%d %H:%M} UTC"
                + (f" · layers from run {layers.summary.id} ({esc(layers.summary.uuid)})" if layers else "")
                + "</p>",
                "<h2>Host</h2>", _facts(survey), "<h2>Ceilings</h2>", _ceilings(survey, _steadiness(store, s))]
    charts = 0
    with tempfile.TemporaryDirectory(prefix="eaves-report-") as tmp:
        folder = Path(tmp)
        sweep = _sweep_svg(survey, folder)
        sections.append("<h2>Bandwidth by working set</h2>")
        if sweep:
            sections.append(svg_img(sweep, "bandwidth against working set"))
            charts += 1
        else:
            sections.append('<p class="muted">this run has no sweep (run a memory survey).</p>')
        sections.append("<h2>Roofline</h2>")
        roof = _roofline_svg(survey, placed, folder)
        if roof:
            sections.append(svg_img(roof, "roofline with placed layers"))
            charts += 1
        else:
            sections.append('<p class="muted">this run lacks memory or compute ceilings for a roofline.</p>')
    if placed:
        sections += ["<h2>Placed layers</h2>", _layers(placed)]
    trend_html, n = _trends(store, host, window)
    sections += ["<h2>Trends</h2>", trend_html]
    charts += n
    sections += ["<h2>Runs</h2>", _runs(store.runs(host=host, limit=50))]
    page = ("<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
            f"<title>eaves report: {esc(s.hostname)}</title><style>{STYLE}</style></head><body>"
            + "\n".join(sections) + "</body></html>\n")
    return Report(page, host, s, layers.summary if layers else None, charts)
