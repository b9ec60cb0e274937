"""`eaves survey`: measure this host's memory and compute ceilings and log them as one run."""

from __future__ import annotations

import argparse
from pathlib import Path

from rich.progress import Progress, SpinnerColumn, TextColumn, TimeElapsedColumn

from eaves import interrupts
from eaves.budget import make_budget
from eaves.charts import bandwidth_chart, scaling_chart
from eaves.cli_options import add_db_option, add_json_option, check_json_path, json_to_stdout, write_json
from eaves.console import make_console, print_ceilings
from eaves.document import run_document
from eaves.errors import EXIT_BROKEN, EXIT_INTERRUPTED, EXIT_STORE, InputError, StoreError
from eaves.host import collect_host_facts
from eaves.memory_survey import MIN_SWEEP_BYTES, plan_memory
from eaves.outfile import write_text
from eaves.plain import plain, unstorable
from eaves.survey import SurveyOptions, reported_caches, run_survey
from eaves.timing import TimingPolicy
from eaves.threads import check_thread_counts, default_thread_counts
from eaves.units import format_bytes, parse_int_list, parse_name_list, parse_size

HELP = "measure this host's ceilings (memory bandwidth and latency per level, compute per dtype) and store them"
PARTS = ("memory", "compute")


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("--quick", action="store_true", help="fewer sizes and shorter samples (about a minute)")
    p.add_argument("--threads", metavar="LIST", help="thread counts, e.g. 1,2,4 (default 1, 2, 4 ... all CPUs)")
    p.add_argument("--max-memory", metavar="SIZE", help="memory cap, e.g. 4GiB (default a quarter of available)")
    p.add_argument("--tag", help="a label such as nightly")
    p.add_argument("--note", help="free text kept with the run")
    add_db_option(p)
    add_json_option(p, "the run (docs/json.md); with '-' the tables go to standard error")
    p.add_argument("--dtypes", metavar="LIST", help="compute dtypes, e.g. fp64,fp32,int8 (default all)")
    p.add_argument("--only", metavar="PARTS", help="memory, compute or both (default both)")
    p.add_argument("--charts", metavar="DIR", default="results", help="folder for the charts (default results)")
    p.add_argument("--sweep-top", metavar="SIZE", help="largest working set (default 4x the last-level cache)")
    p.add_argument("--samples", metavar="N", help="samples per figure (default 5 quick, 9 full)")
    p.add_argument("--sample-seconds", metavar="S", help="minimum seconds per sample (default 0.005 quick, 0.01 full)")
    p.add_argument("--step-seconds", metavar="S", help="give every measurement step at most S seconds once "
                   "compiled (default: ten times what its own plan needs, at least 40 s)")
    p.add_argument("--check", action="store_true", help="after saving, compare the run with this host's baseline "
                   "(median of its last 5 complete runs); exit 1 if a ceiling was lost (docs/comparing.md)")


def _options(args: argparse.Namespace, host) -> SurveyOptions:
    for option, text in (("--tag", args.tag), ("--note", args.note)):
        if text is not None and unstorable(text):
            raise InputError(f"{option}: {unstorable(text)}")
    counts = check_thread_counts(parse_int_list(args.threads, "--threads")) if args.threads else \
        default_thread_counts(host.usable_cpus)
    budget = make_budget(args.max_memory, host.mem_available_bytes)
    parts = tuple(parse_parts(args.only))
    dtypes = None
    if args.dtypes is not None:
        from eaves.compute import check_dtypes

        dtypes = tuple(check_dtypes(parse_name_list(args.dtypes, "--dtypes")))
    llc = host.last_level_cache()
    top = _sweep_top(args.sweep_top) if args.sweep_top is not None else None
    policy = _policy(args)
    plan = plan_memory(llc.size_bytes if llc else None, counts, budget, args.quick, policy=policy, top_bytes=top,
                       numa_nodes=host.numa_nodes, socket_cache_bytes=host.socket_cache_bytes())
    return SurveyOptions(args.quick, tuple(counts), budget, plan, dtypes, args.tag, args.note, parts,
                         _seconds_option(args.step_seconds, "--step-seconds", 0, 86400) if args.step_seconds else None)


def _sweep_top(text: str) -> int:
    """--sweep-top as bytes: above the sweep's first size, so the curve has at least two sizes."""
    top = parse_size(text, "--sweep-top")
    if top <= MIN_SWEEP_BYTES:
        raise InputError(f"--sweep-top {text}: must be above {format_bytes(MIN_SWEEP_BYTES)}, the sweep's "
                         "smallest working set (a bandwidth curve needs at least two sizes)")
    return top


def _seconds_option(text: str, option: str, low: float, high: float) -> float:
    """A number of seconds in (low, high], or a one-line InputError naming the option."""
    try:
        seconds = float(text)
    except ValueError:
        raise InputError(f"{option}: {text!r} is not a number") from None
    if not low < seconds <= high:
        raise InputError(f"{option}: {seconds} is outside ({low:g}, {high:g}]")
    return seconds


def _policy(args: argparse.Namespace) -> TimingPolicy:
    base = TimingPolicy.quick() if args.quick else TimingPolicy.full()
    samples, seconds = base.samples, base.min_seconds
    if args.samples:
        samples = parse_int_list(args.samples, "--samples")[0]
        if not 1 <= samples <= 1000:
            raise InputError(f"--samples: {samples} is outside 1..1000")
    if args.sample_seconds:
        seconds = _seconds_option(args.sample_seconds, "--sample-seconds", 0, 10)
    return TimingPolicy(min_seconds=seconds, samples=samples)


def parse_parts(text) -> list[str]:
    if text is None:
        return list(PARTS)
    parts = parse_name_list(text, "--only")
    for p in parts:
        if p not in PARTS:
            raise InputError(f"--only: unknown part {p!r} (use memory, compute or memory,compute)")
    return parts


def _check_charts_dir(folder: str) -> Path:
    path = Path(folder)
    try:
        path.mkdir(parents=True, exist_ok=True)
    except OSError as err:
        raise InputError(f"--charts {folder}: cannot create the folder: {err.strerror}") from err
    import os

    if not os.access(path, os.W_OK):
        raise InputError(f"--charts {folder}: folder is not writable")
    return path


def cautions(host, options: SurveyOptions) -> list[str]:
    lines = [
        f"eaves survey loads every core and the memory system while it runs: do not run it on a production "
        f"host serving traffic. Memory use is capped at {format_bytes(options.budget.cap_bytes)} (--max-memory).",
        "Sustained figures fall when the host throttles for heat or power; shared and virtual machines are noisy.",
    ]
    if host.virtual:
        lines.append(f"This host is a virtual machine ({host.hypervisor or 'hypervisor unknown'}): "
                     "other tenants can move every figure.")
    if host.load_average and host.load_average[0] > 0.25 * host.logical_cpus:
        lines.append(f"Load average is {host.load_average[0]:.2f} on {host.logical_cpus} CPUs: "
                     "another program is busy, expect lower and noisier figures.")
    return lines


def run(args: argparse.Namespace) -> int:
    host = collect_host_facts()
    options = _options(args, host)
    check_json_path(args.json)
    charts_dir = _check_charts_dir(args.charts)
    from eaves.destination import choose_destination

    destination = choose_destination(args.db)  # neither the store nor the spool takes a write: stop now
    console = make_console(stderr=json_to_stdout(args.json))
    for line in cautions(host, options):
        console.print(f"[yellow]![/] {line}")
    if destination.spooled:
        console.print(f"[yellow]![/] {plain(destination.store_reason)}; this run will be spooled to "
                      f"{plain(destination.spool)}")
    with Progress(SpinnerColumn(), TextColumn("{task.description}"), TimeElapsedColumn(),
                  console=console, transient=True) as bar:
        task = bar.add_task("starting")
        outcome = run_survey(host, options, lambda msg: bar.update(task, description=msg))
    record = outcome.record
    if outcome.interrupted_by and not record.figures:
        console.print(f"[red]interrupted by {outcome.interrupted_by} before any figure was measured: "
                      "nothing stored")
        return EXIT_INTERRUPTED
    saved, unstored = _save(record, destination)
    if saved is not None:
        console.print(("[yellow]" if saved.spooled else "[green]") + plain(saved.message))
    figures = record.figures
    levels = record.params.get("levels", {})
    title = f"{host.host_key()}  run {record.uuid[:8]}  ({record.status})"
    failures = record.params.get("failures") or []
    steady = _steadiness(args.db, record) if saved is not None and not saved.spooled else None
    print_ceilings(console, figures, levels, title, failures, steadiness=steady)
    if outcome.interrupted_by:  # leave at once: no charts
        console.print(f"[red]interrupted by {outcome.interrupted_by}"
                      + (": stored as an interrupted run" if saved is not None else ""))
    else:
        _charts(console, host, figures, levels, charts_dir / f"{host.hostname}-{record.uuid[:8]}")
    for note in outcome.notes:
        console.print(f"[yellow]note:[/] {note}", highlight=False)
    seconds = (record.ended_at - record.started_at).total_seconds()
    buffers = 3 * options.memory_plan.buffer_bytes // 2 if "memory" in options.parts else 0
    console.print(f"measured in {seconds:.1f} s; memory buffers {format_bytes(buffers)} "
                  f"(cap {format_bytes(options.budget.cap_bytes)})")
    doc = run_document(_run_meta(record, saved), record.host_facts, figures, steadiness=steady) \
        if args.json or unstored else None
    kept = _write_json(doc, args.json, saved)
    if unstored is not None:
        kept = kept or _keep_unstored(doc, charts_dir, record.uuid, unstored)
        console.print(f"[red]run {record.uuid} could not be stored: {plain(unstored)}; "
                      f"its JSON document is {plain(kept)}")
        return EXIT_STORE
    if outcome.interrupted_by:
        return EXIT_INTERRUPTED
    if failures:
        console.print(f"[red]{len(failures)} step(s) gave no figure (listed above); the run is stored with every "
                      "figure that was measured")
        return EXIT_BROKEN
    if args.check:
        from eaves.verdicts import check_after_survey

        return check_after_survey(console, args.db, record.uuid, spooled=saved.spooled)
    return 0


def _save(record, destination):
    """(Saved, None), or (None, the reason) when neither the store nor the spool took the run."""
    from eaves.models import new_uuid
    from eaves.transfer import save_or_spool

    record.uuid = record.uuid or new_uuid()  # named even when no store takes it
    try:
        with interrupts.deferred():  # a second Ctrl-C waits until the run is written
            return save_or_spool(record, destination.url, destination.spool, local=True), None
    except StoreError as err:
        return None, str(err)


def _write_json(doc, path, saved):
    """Write --json; returns the file it went to (None: no file, or stdout). A path that fails is a
    one-line error when the run was saved, and only a reason to fall back when it was not."""
    if not path:
        return None
    try:
        write_json(doc, path)
    except InputError as err:
        if saved is not None:
            raise InputError(f"{err} (the run is stored all the same: {saved.uuid} in {saved.where})") from None
        return None
    return None if json_to_stdout(path) else path


def _keep_unstored(doc, folder: Path, uuid: str, reason: str) -> str:
    """Write the JSON document of a run no store took into the charts folder, else the temp folder;
    returns its path. StoreError when even that fails."""
    import tempfile

    from eaves.cli_options import json_text

    text, errors = json_text(doc), []
    for place in (folder, Path(tempfile.gettempdir())):
        path = str(place / f"unstored-run-{uuid}.json")
        try:
            write_text(path, text, "the unstored run's JSON")
            return path
        except InputError as err:
            errors.append(str(err))
    raise StoreError(f"run {uuid} is lost: {reason}; and {'; '.join(errors)}")


def _steadiness(url, record):
    """Run-to-run spread of this host's ceilings over its stored history (this run included), if any."""
    from eaves.errors import StoreError
    from eaves.noise import steadiness
    from eaves.store import Store, default_url

    try:
        store = Store(url or default_url())
        try:
            return steadiness(store, record.host_key) or None
        finally:
            store.close()
    except StoreError:
        return None


def _charts(console, host, figures, levels, stem: Path) -> None:
    caps, _ = reported_caches(host)
    if any(f.suite == "sweep" for f in figures):
        paths = bandwidth_chart(figures, levels, caps, stem.with_name(stem.name + "-bandwidth"),
                                f"{host.hostname}: bandwidth by working set")
        more = scaling_chart(figures, stem.with_name(stem.name + "-scaling"), f"{host.hostname}: thread scaling")
        console.print("charts: " + ", ".join(str(p) for p in paths + (more or [])))
    if any(f.suite in ("compute", "gemm") for f in figures):
        from eaves.compute import compute_ceilings, plot_compute

        png = stem.with_name(stem.name + "-compute.png")
        plot_compute(compute_ceilings(figures), str(png), str(png.with_suffix(".svg")))
        console.print(f"chart: {png}")


def _run_meta(record, saved) -> dict:
    return {"uuid": record.uuid, "host_key": record.host_key, "hostname": record.hostname, "kind": record.kind,
            "status": record.status, "started_at": record.started_at, "ended_at": record.ended_at,
            "tag": record.tag, "note": record.note, "git_describe": record.git_describe,
            "eaves_version": record.eaves_version, "params": record.params,
            "stored_in": saved.where if saved is not None else None}
