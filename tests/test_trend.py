"""`eaves trend` and `eaves survey --check`: rolling baseline, drift flags, charts, bad input."""

from __future__ import annotations

import dataclasses
import json
import statistics

import numpy as np
import pytest
from history_fixtures import T0, fill_history, fill_wobbly_history, history_figures, survey_record, wobbly
from layer_fixtures import HOST_KEY, HOSTNAME
from rich.console import Console

from eaves.cli import build_parser, main
from eaves.verdicts import check_after_survey
from eaves.errors import EXIT_INPUT, EXIT_WORSE
from eaves.metrics import key_of
from eaves.noise import DEFAULT_NOISE_RUNS, DEFAULT_SPREAD, NOISE_MULTIPLE, steadiness
from eaves.store import Store
from eaves.trend import check_run, trend


def test_drift_is_flagged_from_the_run_it_starts_and_not_before(store):
    fill_history(store, 15, seed=11, drift_from=9, drift={"memory/copy/DRAM": 0.8})
    t = trend(store, HOSTNAME, window=5)
    dram = next(m for m in t.metrics if m.key.name() == "memory/copy/DRAM/1t")
    flags = [p.drifted for p in dram.points]
    assert flags[:9] == [False] * 9 and flags[9] is True
    assert dram.points[9].comparison.verdict == "lost"
    # the baseline of a run is the median of the medians of the 5 runs before it
    assert dram.points[9].baseline == pytest.approx(statistics.median(p.median for p in dram.points[4:9]))
    # once the drop has become the baseline, it is no longer drift
    assert dram.points[-1].baseline < 0.9 * dram.points[0].median
    quiet = [m for m in t.metrics if not m.key.name().startswith("memory/copy/DRAM")]
    assert not any(p.drifted for m in quiet for p in m.points)  # 1 % noise never crosses 3 %


def test_cli_filters_by_metric_and_date_and_draws_charts(store, tmp_path, capsys):
    fill_history(store, 8, seed=2, drift_from=7, drift={"latency/chase/DRAM": 1.25})
    since = (T0.replace(tzinfo=None)).isoformat()[:10]
    code = main(["trend", "--host", HOSTNAME, "--metric", "latency/*", "--since", "2026-02-04",
                 "--chart", str(tmp_path / "charts"), "--json", "-", "--db", store.url])
    doc = json.loads(capsys.readouterr().out)
    assert code == EXIT_WORSE  # the newest run's DRAM latency regressed
    assert {c["suite"] for c in doc["ceilings"]} == {"latency"} and since == "2026-02-01"
    assert all(p["started_at"] >= "2026-02-04" for c in doc["ceilings"] for p in c["points"])
    first = doc["ceilings"][0]["points"][0]
    assert first["baseline"] is not None  # runs before --since still form the first baseline
    dram = next(c for c in doc["ceilings"] if c["cache_level"] == "DRAM")
    assert dram["points"][-1]["drifted"] and dram["points"][-1]["comparison"]["verdict"] == "lost"
    charts = sorted((tmp_path / "charts").iterdir())
    assert len(charts) == 2 * len(doc["ceilings"]) and all(p.stat().st_size > 1000 for p in charts)


def test_table_output_lists_drift(store, capsys):
    fill_history(store, 7, seed=4, drift_from=6, drift={"compute/madd-peak": 0.7})
    assert main(["trend", "--host", HOSTNAME, "--metric", "compute", "--db", store.url]) == EXIT_WORSE
    out = capsys.readouterr().out
    assert "drift: compute/madd-peak/fp32/1t" in out and "lost" in out


@pytest.mark.parametrize("argv, needle", [
    (["--host", "nobody"], "no such host"),
    (["--host", HOSTNAME, "--since", "yesterday"], "not a date"),
    (["--host", HOSTNAME, "--metric", "nothing-like-this"], "no ceiling"),
    (["--host", HOSTNAME, "--window", "0"], "--window"),
])
def test_bad_input_is_one_line_exit_2(store, capsys, argv, needle):
    fill_history(store, 2)
    code = main(["trend", *argv, "--db", store.url])
    err = capsys.readouterr().err
    assert code == EXIT_INPUT and needle in err and len(err.strip().splitlines()) == 1


def test_survey_check_flags_a_failing_memory_module(store):
    # six quiet nights, then the same host with DRAM bandwidth down 30 % (a failing module)
    fill_history(store, 6, seed=8)
    rng = np.random.default_rng(99)
    bad = store.save_run(survey_record(history_figures(rng, scale={"memory/read/DRAM": 0.7,
                                                                    "memory/copy/DRAM": 0.7}), 6))
    check = check_run(store, bad, window=5)
    assert len(check.baseline_runs) == 5
    assert {k.name() for k, _, _ in check.regressions} == {
        "memory/read/DRAM/1t", "memory/read/DRAM/2t", "memory/copy/DRAM/1t", "memory/copy/DRAM/2t"}
    console = Console(record=True, width=200)
    assert check_after_survey(console, store.url, bad) == EXIT_WORSE
    text = console.export_text()
    assert "memory/read/DRAM/1t" in text and "ceiling(s) lost" in text
    good = store.save_run(survey_record(history_figures(rng), 7))
    assert check_after_survey(Console(record=True), store.url, good) == 0


def test_first_survey_starts_the_baseline_and_spooled_runs_are_not_checked(store):
    (uuid,) = fill_history(store, 1)
    console = Console(record=True)
    assert check_after_survey(console, store.url, uuid) == 0 and "starts its baseline" in console.export_text()
    assert check_after_survey(console, store.url, uuid, spooled=True) == 0
    assert "spooled" in console.export_text()


def test_survey_has_the_check_flag():
    args = build_parser().parse_args(["survey", "--quick", "--tag", "nightly", "--check"])
    assert args.check is True


def test_history_queries_on_each_backend(store_url):
    # the light history queries (medians, quartiles, samples on demand) on SQLite and PostgreSQL
    s = Store(store_url)
    uuids = fill_history(s, 7, seed=6, drift_from=6, drift={"memory/read/L2": 0.8})
    t = trend(s, HOSTNAME, patterns=["memory/read/L2*"], window=3)
    assert [m.key.name() for m in t.metrics] == ["memory/read/L2/1t", "memory/read/L2/2t"]
    assert all(m.latest.drifted and m.latest.comparison.p_value is not None for m in t.metrics)
    assert all(p.q1 <= p.median <= p.q3 for m in t.metrics for p in m.points)
    # the noise queries: runs started by a time, the judged run left out
    check = check_run(s, uuids[-1], window=3)
    assert {c.noise.runs for _, _, c in check.changes} == {6}
    third = s.load_run(s.resolve_run(uuids[2])).summary.started_at
    assert {n.runs for n in steadiness(s, HOST_KEY, until=third).values()} == {3}


def test_a_baseline_of_fewer_than_three_runs_reports_but_does_not_fail(store):
    # DRAM down 70 % (was 30 %): with two earlier runs the run-to-run floor is memory's provisional
    # default, NOISE_MULTIPLE x 15 %, and a move must pass it to be reported at all.
    fill_history(store, 2, seed=8)
    assert NOISE_MULTIPLE * DEFAULT_SPREAD["memory"] < 0.7
    bad = store.save_run(survey_record(history_figures(np.random.default_rng(3),
                                                       scale={"memory/read/DRAM": 0.3}), 2))
    console = Console(record=True, width=200)
    assert check_after_survey(console, store.url, bad) == 0
    text = console.export_text()
    assert "lost: memory/read/DRAM/1t" in text and "needs 3" in text
    assert main(["trend", "--host", HOSTNAME, "--db", store.url]) == 0  # the same rule for trend's exit code


def test_trend_and_check_hold_a_wobbling_host_to_its_own_wobble(store):
    # Every figure moves by up to +-5 % from run to run while its samples stay within 1 % (see
    # history_fixtures.wobbly): judged by the samples alone most moves would be drift.
    uuids = fill_wobbly_history(store, 13)
    t = trend(store, HOSTNAME)
    assert t.noise_runs == DEFAULT_NOISE_RUNS
    judged = [(i, p) for m in t.metrics for i, p in enumerate(m.points) if i >= 3]
    assert all(p.comparison.noise.source == "history" and p.comparison.noise.runs == min(i, 10) for i, p in judged)
    assert sum(p.drifted for _, p in judged) <= 0.05 * len(judged)
    second = [m.points[1].comparison.noise for m in t.metrics]  # one run before it: too few to learn from
    assert all(n.source == "default" and n.runs == 1 for n in second)
    # survey --check of the newest run: the same model, the run itself left out of its noise
    check = check_run(store, uuids[-1])
    assert all(c.noise.source == "history" and c.noise.runs == 10 for _, _, c in check.changes)
    assert len(check.moved) <= 0.05 * len(check.changes)


def test_check_still_catches_a_planted_drop_on_a_wobbling_host(store):
    fill_wobbly_history(store, 10)
    name = "memory/read/DRAM/2t"
    past = [{key_of(f).name(): f for f in store.load_run(i).figures} for i in range(6, 11)]
    baseline = statistics.median(p[name].median for p in past)  # the median of the 5 runs before
    figs = wobbly(history_figures(np.random.default_rng(5)), np.random.default_rng(6), 0.05)
    figs = [dataclasses.replace(f, samples=tuple(x * 0.8 * baseline / f.median for x in f.samples))
            if key_of(f).name() == name else f for f in figs]
    bad = store.save_run(survey_record(figs, 10))
    check = check_run(store, bad)
    (key, _, c), = [r for r in check.changes if r[0].name() == name]
    assert c.verdict == "lost" and c.change == pytest.approx(-0.2, abs=1e-6) and c.noise.floor < 0.2
    assert name in {k.name() for k, _, _ in check.regressions}
    console = Console(record=True, width=200)
    assert check_after_survey(console, store.url, bad) == EXIT_WORSE
    text = console.export_text()
    assert f"lost: {name}" in text and "run-to-run floor" in text and "learned from this host's runs" in text
