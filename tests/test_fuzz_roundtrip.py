"""Arbitrary strings round-trip (issue 18, item 7): a tag, note and layer name of any text is stored
exactly on SQLite and PostgreSQL, comes back exactly from the store and from `show --json`, and
`runs`, `runs --host` and `show` print it as written (its visible form) without a traceback.

NUL is left out on purpose: PostgreSQL's text type cannot hold it (PostgreSQL docs, Character
Types: "the character with code zero cannot be stored"), so layer files refuse it at input
(test_fuzz_layerfile) and push quarantines a run that carries one. Lone surrogates are not
Unicode text (no UTF-8 encoding exists for them: RFC 3629), so they are left out too.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import json
import os

from hypothesis import HealthCheck, example, given, settings
from hypothesis import strategies as st

import eaves.cli
from eaves.plain import visible
from eaves.records import RunRecord
from eaves.store import Store
from run_records import figures, placement

ROUND_TRIP = settings(max_examples=int(os.environ.get("EAVES_FUZZ_EXAMPLES", 20)), deadline=None,
                      derandomize=not os.environ.get("EAVES_FUZZ_EXPLORE"), database=None,
                      suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow])
_TEXT = st.text(st.characters(exclude_categories=("Cs",), exclude_characters="\x00"), min_size=1, max_size=60)
RAW_CONTROLS = [chr(c) for c in (*range(0x00, 0x20), *range(0x7f, 0xa0))]


def _cli(capsys, *argv):
    code = eaves.cli.main(list(argv))
    out, err = capsys.readouterr()
    assert "Traceback" not in err, err
    return code, out, err


@ROUND_TRIP
@given(tag=_TEXT, note=_TEXT, layer=_TEXT)
@example(tag="[/x]", note="\x1b]0;title\x07", layer="[bold]x[/")
@example(tag=":thumbs_up:", note="tail\\", layer="$\\frac{a}{$")
@example(tag="\u202eevil", note="a\r\nb", layer=" padded ")
def test_any_string_round_trips_through_the_store_and_every_printer(store_url, capsys, tag, note, layer):
    store = Store(store_url)
    n = len(store.runs())
    started = dt.datetime(2026, 3, 1, 2, 0, tzinfo=dt.timezone.utc) + dt.timedelta(minutes=n)
    uuid = store.save_run(RunRecord(
        host_key="rack3-node07:f00dfeed", hostname="rack3-node07", fingerprint="f00dfeed",
        host_facts={"model": "Invented CPU 3000"}, started_at=started, eaves_version="test", params={},
        status="complete", ended_at=started + dt.timedelta(seconds=30), tag=tag, note=note,
        figures=figures(), placements=[dataclasses.replace(placement(), layer=layer)]))
    stored = store.load_run(store.resolve_run(uuid))
    assert (stored.summary.tag, stored.summary.note, stored.placements[0].layer) == (tag, note, layer)

    code, out, _ = _cli(capsys, "show", uuid, "--json", "-", "--db", store_url)
    doc = json.loads(out)
    assert code == 0 and (doc["run"]["tag"], doc["run"]["note"], doc["layers"][0]["layer"]) == (tag, note, layer)

    code, out, _ = _cli(capsys, "show", uuid, "--db", store_url)
    assert code == 0 and f", tag {visible(tag)}" in out and f"note: {visible(note)}" in out
    assert not any(c in out.replace("\n", "") for c in RAW_CONTROLS)
    for argv in (("runs", "--limit", "1"), ("runs", "--host", "rack3-node07", "--limit", "1")):
        code, out, _ = _cli(capsys, *argv, "--db", store_url)
        assert code == 0 and uuid[:8] in out
        assert not any(c in out.replace("\n", "") for c in RAW_CONTROLS)
    store.close()
