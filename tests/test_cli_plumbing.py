"""Issue 12, items 4-5: one --db, one --json PATH|- with one meaning on every listing command, one
console, our own verdict words, and commands that share code only through public modules."""

from __future__ import annotations

import ast
import datetime as dt
import json
from pathlib import Path

import pytest
from history_fixtures import fill_history
from layer_fixtures import HOSTNAME

from eaves.cli import COMMANDS, build_parser, main
from eaves.cli_options import DB_HELP
from eaves.compare import VERDICTS
from eaves.errors import EXIT_INPUT, EXIT_WORSE

JSON_COMMANDS = ("survey", "runs", "hosts", "show", "place", "profile-torch", "diff", "trend", "gate")
COMMANDS_DIR = Path(__file__).resolve().parents[1] / "bench" / "commands"


def _no_constants(word: str):
    # RFC 8259 (JSON) has no NaN or Infinity; Python's json reads them only through parse_constant
    raise AssertionError(f"{word} in a JSON document")


def _json(text: str) -> dict:
    """The whole of stdout must be one JSON document (no table before or after it)."""
    return json.loads(text, parse_constant=_no_constants)


def _actions(command: str) -> dict:
    parser = build_parser(command)
    sub = next(a for a in parser._actions if a.dest == "command")  # argparse keeps no public list
    return {a.dest: a for a in sub.choices[command]._actions}


@pytest.mark.parametrize("command", JSON_COMMANDS)
def test_every_listing_command_takes_json_path_or_dash_the_same_way(command):
    action = _actions(command)["json"]
    # argparse (its documentation, "nargs"): None takes exactly one value, so `--json` alone is refused
    assert action.option_strings == ["--json"] and action.nargs is None and action.metavar == "PATH|-"
    assert action.default is None and "'-': standard output" in action.help


@pytest.mark.parametrize("command", COMMANDS)
def test_db_is_one_option_with_one_help_text(command):
    action = _actions(command)["db"]  # every command reads or writes a store
    assert action.option_strings == ["--db"] and action.help == DB_HELP and action.default is None


def test_json_alone_is_refused_in_one_line(store, capsys):
    assert main(["runs", "--json", "--db", store.url]) == EXIT_INPUT
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "--json" in err and "Traceback" not in err


def test_runs_hosts_and_diff_print_json_to_stdout(store, capsys):
    uuids = fill_history(store, 3)
    assert main(["runs", "--json", "-", "--db", store.url]) == 0
    doc = _json(capsys.readouterr().out)
    assert doc["schema"] == "eaves.runs" and doc["schema_version"] == 1
    assert [r["uuid"] for r in doc["runs"]] == uuids[::-1]  # newest first
    for r in doc["runs"]:
        started, ended = (dt.datetime.fromisoformat(r[k]) for k in ("started_at", "ended_at"))  # ISO 8601
        assert started.utcoffset() == dt.timedelta(0) and r["seconds"] == (ended - started).total_seconds()
        assert r["host_key"].startswith(HOSTNAME) and r["kind"] == "survey" and r["figures"] > 0 and r["layers"] == 0

    assert main(["hosts", "--json", "-", "--db", store.url]) == 0
    doc = _json(capsys.readouterr().out)
    (host,) = doc["hosts"]
    assert doc["schema"] == "eaves.hosts" and host["hostname"] == HOSTNAME and host["runs"] == 3
    assert host["fingerprint"] == store.host_fingerprint(host["host_key"])
    assert dt.datetime.fromisoformat(host["last_seen"]) == max(
        dt.datetime.fromisoformat(r["started_at"]) for r in _runs(store, capsys))
    dt.datetime.fromisoformat(host["first_seen"])

    assert main(["diff", "1", "2", "--json", "-", "--db", store.url]) == 0
    doc = _json(capsys.readouterr().out)
    assert doc["schema"] == "eaves.diff" and doc["schema_version"] == 2
    assert doc["before"]["uuid"] == uuids[0] and doc["after"]["uuid"] == uuids[1] and doc["ceilings"]


def _runs(store, capsys) -> list:
    assert main(["runs", "--json", "-", "--db", store.url]) == 0
    return _json(capsys.readouterr().out)["runs"]


@pytest.mark.parametrize("argv, table", [
    (["runs"], "Runs in"), (["hosts"], "Hosts in"), (["diff", "1", "2"], "ceilings"),
    (["trend", "--host", HOSTNAME], "newest run against its baseline"), (["show", "1"], "Memory ceilings"),
])
def test_json_to_a_path_writes_the_same_document_and_the_table_still_prints(store, capsys, tmp_path, argv, table):
    fill_history(store, 3)
    assert main([*argv, "--json", "-", "--db", store.url]) in (0, EXIT_WORSE)
    to_stdout = _json(capsys.readouterr().out)
    path = tmp_path / "out.json"
    path.write_text("old\n")
    assert main([*argv, "--json", str(path), "--db", store.url]) in (0, EXIT_WORSE)
    assert table in capsys.readouterr().out
    assert _json(path.read_text()) == to_stdout
    assert not list(tmp_path.glob(".out.json.*"))  # eaves.outfile's temporary file is gone


@pytest.mark.parametrize("argv", [["runs"], ["hosts"], ["diff", "1", "2"], ["show", "1"],
                                  ["trend", "--host", HOSTNAME], ["gate", "--baseline", "1", "--candidate", "2"]])
def test_an_unwritable_json_path_is_refused_before_any_work(store, capsys, tmp_path, argv):
    fill_history(store, 2)
    assert main([*argv, "--json", str(tmp_path / "no" / "such" / "doc.json"), "--db", store.url]) == EXIT_INPUT
    captured = capsys.readouterr()
    assert captured.out == "" and len(captured.err.strip().splitlines()) == 1 and "--json" in captured.err


def test_verdicts_use_our_words_in_tables_and_json(store, capsys):
    fill_history(store, 5, seed=3, drift_from=4, drift={"memory/read/DRAM": 0.7, "latency/chase/DRAM": 0.7})
    assert main(["diff", "4", "5", "--json", "-", "--db", store.url]) == EXIT_WORSE
    doc = _json(capsys.readouterr().out)
    verdicts = {c["verdict"] for c in doc["ceilings"] if "verdict" in c}
    # a lower bandwidth is lost, a lower latency gained, the steady rest held
    assert verdicts == set(VERDICTS) == {"gained", "lost", "held"}
    by_name = {c["name"]: c["verdict"] for c in doc["ceilings"]}
    assert by_name["memory/read/DRAM/1t"] == "lost" and by_name["latency/chase/DRAM/1t"] == "gained"
    for argv in (["diff", "4", "5"], ["trend", "--host", HOSTNAME]):
        main([*argv, "--db", store.url])
        out = capsys.readouterr().out
        assert "lost" in out and not any(w in out for w in ("faster", "slower", "within noise")), out


def _imports(path: Path):
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.ImportFrom) and node.module:
            yield node.module, [a.name for a in node.names]
        elif isinstance(node, ast.Import):
            for a in node.names:
                yield a.name, []


@pytest.mark.parametrize("path", sorted(COMMANDS_DIR.glob("*.py")), ids=lambda p: p.name)
def test_commands_share_code_only_through_public_functions(path):
    assert not path.stem.startswith("_") or path.stem == "__init__", "no private helper modules among the commands"
    for module, names in _imports(path):
        assert not module.startswith("eaves.commands"), f"{path.name} imports the command module {module}"
        private = [n for n in names if n.startswith("_") and n != "__version__"]
        assert not private, f"{path.name} imports private {private} from {module}"


def test_a_console_for_a_pipe_is_wide_and_never_replaces_emoji_codes(monkeypatch, capsys):
    from eaves.console import PIPE_WIDTH, make_console

    monkeypatch.delenv("COLUMNS", raising=False)
    assert make_console().width == PIPE_WIDTH  # under pytest stdout is not a terminal
    monkeypatch.setenv("COLUMNS", "300")
    assert make_console().width == 300
    monkeypatch.setenv("COLUMNS", "wide")  # not a number: ignored, not a traceback
    console = make_console()
    assert console.width == PIPE_WIDTH
    # rich replaces :name: codes with emoji unless emoji=False (rich's documentation, "Emoji")
    console.print(":smile: :warning:")
    assert capsys.readouterr().out.strip() == ":smile: :warning:"


def test_hosts_and_runs_documents_on_each_backend(store_url, capsys):
    # the hosts query groups by host and reads its fingerprint and first sighting: PostgreSQL accepts
    # columns of the grouped primary key's row (its documentation, "GROUP BY Clause"), SQLite anything
    from eaves.store import Store

    fill_history(Store(store_url), 2)
    assert main(["hosts", "--json", "-", "--db", store_url]) == 0
    (host,) = _json(capsys.readouterr().out)["hosts"]
    assert host["runs"] == 2 and host["fingerprint"] and dt.datetime.fromisoformat(host["first_seen"]).utcoffset() \
        == dt.timedelta(0)
    assert main(["runs", "--json", "-", "--db", store_url]) == 0
    assert [r["id"] for r in _json(capsys.readouterr().out)["runs"]] == [2, 1]
