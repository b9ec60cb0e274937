"""Issue 18, item 8: options that ended in a traceback or did something else than asked now end in one
line with exit code 2, or work: --sweep-top, run ids, --json paths, negative sizes, empty lists."""

from __future__ import annotations

import json
import os
import stat

import pytest

from eaves.cli import attach_negative_values, build_parser, main
from eaves.errors import EXIT_INPUT, InputError
from eaves.levels import detect_plateaus
from eaves.store import Store
from eaves.units import parse_name_list, parse_size
from survey_fakes import ARGS, fake_survey


def _one_line_error(capsys, *needles: str) -> str:
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "Traceback" not in err, err
    for needle in needles:
        assert needle in err, err
    return err


def _survey(place, monkeypatch, *args: str) -> tuple[int, list]:
    calls: list = []
    fake_survey(monkeypatch, calls)
    code = main([*ARGS, "--db", f"sqlite:///{place / 'store.db'}", *args])
    return code, calls


# -- --sweep-top ----------------------------------------------------------------------------

@pytest.mark.parametrize("top", ["1", "4KiB", "4096", "0.5KiB"])
def test_a_sweep_top_that_leaves_no_curve_is_refused_before_measuring(place, capsys, monkeypatch, top):
    code, calls = _survey(place, monkeypatch, "--sweep-top", top)
    assert code == EXIT_INPUT and calls == []
    _one_line_error(capsys, "--sweep-top", "at least two sizes")


@pytest.mark.parametrize("top", ["5KiB", "8KiB"])
def test_the_smallest_sweep_top_accepted_gives_a_curve_levels_can_read(place, capsys, monkeypatch, top):
    code, calls = _survey(place, monkeypatch, "--sweep-top", top)
    assert code == 0
    sizes = calls[0].memory_plan.sizes
    assert len(sizes) >= 2 and sizes == tuple(sorted(set(sizes)))
    # the consumer that raised "a curve needs at least two points" takes it
    assert detect_plateaus(list(sizes), [1e11 / (i + 1) for i in range(len(sizes))])


# -- run ids --------------------------------------------------------------------------------

# 20 digits (SQLite: OverflowError); just past PostgreSQL's integer; digits int() refuses, or not ASCII
TOO_LARGE = ["1" * 20, str(2**31), "²³", "١٢٣"]


@pytest.mark.parametrize("ref", TOO_LARGE)
@pytest.mark.parametrize("command", ["show", "diff", "place"])
def test_a_run_id_no_store_can_hold_is_refused_in_one_line(place, capsys, command, ref):
    url = f"sqlite:///{place / 'store.db'}"
    argv = {"show": ["show", ref], "diff": ["diff", "1", ref], "place": ["place", "layers.csv", "--run", ref]}
    assert main([*argv[command], "--db", url]) == EXIT_INPUT
    _one_line_error(capsys, "not a run id")


def test_the_largest_run_id_reaches_the_store_and_is_not_found(store_url, capsys):
    # 2**31 - 1: the top of PostgreSQL's integer (its documentation, "Numeric Types"), the runs' key type
    assert main(["show", str(2**31 - 1), "--db", store_url]) == EXIT_INPUT
    _one_line_error(capsys, "no such run")


# -- --json paths ---------------------------------------------------------------------------

def test_json_through_a_symlink_writes_its_target_and_keeps_the_link(place, capsys, monkeypatch):
    (place / "target.json").write_text("old\n")
    os.symlink("target.json", place / "link.json")
    code, _ = _survey(place, monkeypatch, "--json", "link.json")
    assert code == 0
    assert (place / "link.json").is_symlink() and os.readlink(place / "link.json") == "target.json"
    assert json.loads((place / "target.json").read_text())["schema"] == "eaves.run"


def test_json_replaces_a_regular_file_atomically_and_keeps_its_mode(place, capsys, monkeypatch):
    doc = place / "doc.json"
    doc.write_text("old\n")
    doc.chmod(0o640)
    before = doc.stat().st_ino
    code, _ = _survey(place, monkeypatch, "--json", "doc.json")
    assert code == 0
    after = doc.stat()
    # a new inode: the document was renamed over the old file (rename(2): atomic replacement), not rewritten
    assert after.st_ino != before and stat.S_IMODE(after.st_mode) == 0o640
    assert json.loads(doc.read_text())["schema"] == "eaves.run"
    assert sorted(p.name for p in place.iterdir() if p.name.endswith(".part")) == []


@pytest.mark.parametrize("device", ["/dev/null", "/dev/stdout"])
def test_json_to_a_device_writes_into_it_and_leaves_the_node(place, capfd, monkeypatch, device):
    node = os.stat(device)
    code, _ = _survey(place, monkeypatch, "--json", device)
    assert code == 0
    out = capfd.readouterr().out
    assert ('"schema": "eaves.run"' in out) == (device == "/dev/stdout")
    assert os.stat(device).st_ino == node.st_ino and os.stat(device).st_mode == node.st_mode


def test_json_to_a_full_device_is_one_line_and_the_run_is_still_stored(place, capsys, monkeypatch):
    if not os.path.exists("/dev/full"):
        pytest.skip("no /dev/full on this system")
    code, _ = _survey(place, monkeypatch, "--json", "/dev/full")
    assert code == EXIT_INPUT
    # /dev/full answers every write with ENOSPC (the Linux null(4)/full(4) manual page)
    _one_line_error(capsys, "--json /dev/full", "No space left on device", "the run is stored all the same")
    assert stat.S_ISCHR(os.stat("/dev/full").st_mode)
    assert len(Store(f"sqlite:///{place / 'store.db'}").runs()) == 1


def test_json_to_a_folder_is_refused_before_measuring(place, capsys, monkeypatch):
    (place / "out").mkdir()
    code, calls = _survey(place, monkeypatch, "--json", "out")
    assert code == EXIT_INPUT and calls == []
    _one_line_error(capsys, "--json out", "folder")


# -- negative sizes and empty lists ------------------------------------------------------------

@pytest.mark.parametrize("form", [["--max-memory", "-5GiB"], ["--max-memory=-5GiB"]], ids=["space", "equals"])
def test_a_negative_memory_cap_is_refused_naming_the_option(place, capsys, monkeypatch, form):
    code, calls = _survey(place, monkeypatch, *form)
    assert code == EXIT_INPUT and calls == []
    _one_line_error(capsys, "--max-memory", "'-5GiB' is negative")


def test_negative_values_are_attached_only_to_options_that_take_one():
    parser = build_parser("survey")
    words = ["survey", "--max-memory", "-5GiB", "--quick", "--note", "-3 degrees", "--sweep-top", "-.5"]
    assert attach_negative_values(words, parser) == [
        "survey", "--max-memory=-5GiB", "--quick", "--note=-3 degrees", "--sweep-top=-.5"]
    assert attach_negative_values(["survey", "--quick", "-5"], parser) == ["survey", "--quick", "-5"]


@pytest.mark.parametrize("option,value", [("--dtypes", ","), ("--dtypes", ""), ("--dtypes", " , ,"),
                                          ("--only", ","), ("--only", "")])
def test_an_empty_list_is_refused_not_read_as_everything(place, capsys, monkeypatch, option, value):
    code, calls = _survey(place, monkeypatch, f"{option}={value}")
    assert code == EXIT_INPUT and calls == []
    _one_line_error(capsys, option, "empty list")


@pytest.mark.parametrize("option,value,reason", [("--tag", "night\x00ly", "NUL"), ("--note", "a\ud800b", "surrogate")])
def test_a_tag_or_note_no_store_can_hold_is_refused_before_measuring(place, capsys, monkeypatch, option, value,
                                                                     reason):
    # PostgreSQL's text type refuses NUL (its documentation, "Character Types"); SQLite would keep it, so
    # a run tagged with one would be stored locally and refused by the fleet server later
    code, calls = _survey(place, monkeypatch, option, value)
    assert code == EXIT_INPUT and calls == []
    _one_line_error(capsys, option, reason)


def test_size_and_list_parsers_keep_their_contract_on_the_new_cases():
    assert parse_size("+4KiB") == 4096
    for bad in ("-5GiB", "-0", "0", "9" * 400, "1" + "0" * 30 + "TiB"):
        with pytest.raises(InputError):
            parse_size(bad, "--x")
    assert parse_name_list(" fp64, ,fp32 ", "--dtypes") == ["fp64", "fp32"]
    with pytest.raises(InputError, match="empty list"):
        parse_name_list(" , ", "--dtypes")
