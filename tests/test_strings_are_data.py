"""Strings are data (issue 18, item 4): tags, notes, layer and host names and paths are printed as
written -- never as rich markup, never as terminal control sequences -- kept exact in the JSON, and
escaped in the report.

Outside sources: the C0 and C1 control sets and ESC/BEL/CSI are ECMA-48 (ISO/IEC 6429); an xterm
title change is "ESC ] 0 ; text BEL" (xterm's control sequences document); rich's documented
behaviour is that `[...]` is markup unless escaped (rich docs, Console Markup: Escaping) and that
`Console(emoji=False)` leaves :codes: alone; HTML escaping is the standard library's html.escape
(the five HTML special characters, WHATWG HTML).
"""

from __future__ import annotations

import datetime as dt
import io
import json

import pytest
from rich.console import Console

import eaves.cli
from eaves.plain import plain, visible
from eaves.records import RunRecord
from eaves.store import Store
from layer_fixtures import CACHES, synthetic_figures

TITLE = "\x1b]0;title\x07"  # an xterm "set window title" sequence: ESC ] 0 ; title BEL
MARKUP = "[/x]"  # a closing tag with no opening one: rich raises MarkupError if it reads it as markup
HOSTILE = [MARKUP, TITLE, "[bold red]loud[/]", ":thumbs_up:", "tail\\", "csi\x9b31m", "del\x7f",
           "rlo\u202eevil", "<script>alert(1)</script>", "a & b \"q\" 'q'"]
RAW_CONTROLS = ("\x1b", "\x07", "\x9b", "\x7f", "\u202e")


def render(markup: str) -> str:
    """What a rich console shows for `markup` (no terminal, no wrapping)."""
    out = io.StringIO()
    Console(file=out, width=10_000, emoji=False, highlight=False, soft_wrap=True, color_system=None).print(markup)
    return out.getvalue()[:-1]


# ------------------------------------------------------------------ the helper itself

@pytest.mark.parametrize("text", HOSTILE)
def test_plain_text_renders_exactly_as_its_visible_form(text):
    shown = render(plain(text))
    assert shown == visible(text)
    assert not any(c in shown for c in RAW_CONTROLS)


def test_control_characters_are_spelled_as_escapes():
    # ECMA-48: C0 is U+0000..U+001F, DEL U+007F, C1 U+0080..U+009F
    assert visible(TITLE) == "\\x1b]0;title\\x07"
    assert visible("a\tb\nc\rd\x00e\x9bf\x7f") == "a\\tb\\nc\\rd\\x00e\\x9bf\\x7f"
    assert visible("x\u202ey") == "x\\u202ey"
    assert visible("line one\x1b\nline two", keep_newlines=True) == "line one\\x1b\nline two"
    assert visible("päth/ñame 名前") == "päth/ñame 名前"  # printable text is left alone
    assert visible(None) == ""


# ------------------------------------------------------------------ through the commands

def _store_hostile_runs(url: str) -> Store:
    store = Store(url)
    now = dt.datetime(2026, 3, 1, 2, 0, tzinfo=dt.timezone.utc)
    for i, (tag, note) in enumerate([(MARKUP, TITLE), (TITLE, MARKUP + " :thumbs_up: [bold]x")]):
        store.save_run(RunRecord(
            host_key="lab[/x]\x1b[2J-0badc0de", hostname="lab[/x]\x1b[2J", fingerprint="0badc0de0badc0de",
            host_facts={"caches": CACHES, "model": "<b>Invented</b>"}, started_at=now + dt.timedelta(minutes=i),
            eaves_version="test", params={}, kind="survey", status="complete",
            ended_at=now + dt.timedelta(minutes=i, seconds=30), tag=tag, note=note,
            git_describe="v1-[/x]", figures=synthetic_figures()))
    return store


def _cli(capsys, *argv):
    code = eaves.cli.main(list(argv))
    out, err = capsys.readouterr()
    return code, out, err


def _clean(text: str) -> None:
    assert "Traceback" not in text and "MarkupError" not in text
    assert not any(c in text for c in RAW_CONTROLS), repr(text)


def test_runs_hosts_show_print_stored_strings_as_written(tmp_path, capsys):
    store = _store_hostile_runs(f"sqlite:///{tmp_path / 'hostile.db'}")
    for argv in (("runs",), ("runs", "--host", "lab[/x]\x1b[2J"), ("hosts",), ("show", "latest"), ("show", "1")):
        code, out, err = _cli(capsys, *argv, "--db", store.url)
        assert code == 0, (argv, err)
        _clean(out + err)
        assert "[/x]" in out and "\\x1b[2J" in out  # the host name, as written
    code, out, _ = _cli(capsys, "show", "1", "--db", store.url)
    assert f"tag {MARKUP}" in out and "note: \\x1b]0;title\\x07" in out
    code, out, _ = _cli(capsys, "show", "2", "--db", store.url)
    assert "tag \\x1b]0;title\\x07" in out and ":thumbs_up: [bold]x" in out  # no emoji, no style
    code, out, _ = _cli(capsys, "show", "2", "--json", "-", "--db", store.url)
    run = json.loads(out)["run"]
    assert (run["tag"], run["note"], run["host_key"]) == (TITLE, MARKUP + " :thumbs_up: [bold]x",
                                                           "lab[/x]\x1b[2J-0badc0de")  # JSON: exact
    for argv, key in ((("runs",), "runs"), (("hosts",), "hosts")):
        code, out, _ = _cli(capsys, *argv, "--json", "-", "--db", store.url)
        assert code == 0 and "lab[/x]\x1b[2J-0badc0de" in {r["host_key"] for r in json.loads(out)[key]}
    code, out, err = _cli(capsys, "diff", "1", "2", "--db", store.url)
    assert code in (0, 1), err
    _clean(out + err)
    assert f"tag {MARKUP}" in out and "tag \\x1b]0;title\\x07" in out


def test_place_with_a_hostile_layer_name_stores_once_and_prints(tmp_path, capsys):
    from layer_fixtures import save_survey

    store = Store(f"sqlite:///{tmp_path / 'place.db'}")
    uuid = save_survey(store, synthetic_figures())
    layers = tmp_path / "layers.csv"
    names = [MARKUP, TITLE, "$\\frac{a}{$", "[bold]x[/bold]"]  # the third is broken mathtext for matplotlib
    layers.write_text("name,kind,dtype,threads,seconds,m,n,k\n"
                      + "".join(f'"{n}",dense,fp32,1,{0.001 * (i + 1)},64,512,512\n' for i, n in enumerate(names)))
    code, out, err = _cli(capsys, "place", str(layers), "--db", store.url, "--run", uuid, "--store",
                          "--chart", str(tmp_path / "roof.svg"))
    assert code == 0, err
    _clean(out + err)
    assert MARKUP in out and "\\x1b]0;title\\x07" in out and "[bold]x[/bold]" in out
    (run,) = store.runs(kind="layers")  # stored once: no rerun needed
    assert sorted(p.layer for p in store.load_run(run.id).placements) == sorted(names)  # exact in the store
    code, out, err = _cli(capsys, "place", str(layers), "--db", store.url, "--run", uuid, "--json", "-")
    assert code == 0 and sorted(l["layer"] for l in json.loads(out)["layers"]) == sorted(names)


def test_error_messages_show_paths_without_terminal_controls(tmp_path, capsys):
    code, out, err = _cli(capsys, "place", str(tmp_path / f"missing{TITLE}[/x].csv"),
                          "--db", f"sqlite:///{tmp_path / 'e.db'}")
    assert code == 2 and err.count("\n") == 1
    _clean(err)
    assert "missing\\x1b]0;title\\x07[/x].csv: no such file" in err


def test_report_escapes_markup_html_and_control_characters(tmp_path, capsys):
    store = _store_hostile_runs(f"sqlite:///{tmp_path / 'report.db'}")
    store.save_run(RunRecord(host_key="lab[/x]\x1b[2J-0badc0de", hostname="lab[/x]\x1b[2J",
                             fingerprint="0badc0de0badc0de", host_facts={"caches": CACHES, "model": "<b>Invented</b>"},
                             kind="survey", status="complete",
                             started_at=dt.datetime(2026, 3, 1, 3, 0, tzinfo=dt.timezone.utc), eaves_version="test",
                             params={}, tag="<script>alert(1)</script>", note="a & b", figures=synthetic_figures()))
    code, out, err = _cli(capsys, "report", "--host", "lab[/x]\x1b[2J", "--out", str(tmp_path / "out"),
                          "--db", store.url)
    assert code == 0, err
    _clean(out + err)
    (page,) = (tmp_path / "out").glob("report-*.html")
    html = page.read_text(encoding="utf-8")
    assert not any(c in html for c in RAW_CONTROLS)
    assert "\\x1b]0;title\\x07" in html and "lab[/x]\\x1b[2J" in html
    assert "<script>" not in html and "&lt;script&gt;alert(1)&lt;/script&gt;" in html
    assert "&lt;b&gt;Invented&lt;/b&gt;" in html and "a &amp; b" in html
