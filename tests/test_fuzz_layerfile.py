"""Property tests of the layer-file reader (issue 18, items 5 and 7): any bytes or text, CSV or JSON,
give layers or our one InputError (exit 2) -- never another exception -- and every layer read has
finite times and counts inside eaves.layers' bounds; generated valid files read back exactly.

Outside sources: CSV quoting is RFC 4180 as Python's csv module writes it; JSON numbers and
strings as Python's json module writes them (RFC 8259); float text round-trips exactly through
repr (Python docs, "Floating Point Arithmetic": repr gives the shortest string that round-trips).
Settings are CI-friendly: derandomized, no example database, no deadline on a shared 2-core host;
EAVES_FUZZ_EXPLORE=1 EAVES_FUZZ_EXAMPLES=2000 searches afresh (keep what it finds as an @example).
"""

from __future__ import annotations

import csv
import io
import json
import math
import os
import uuid

import pytest
from hypothesis import HealthCheck, example, given, settings
from hypothesis import strategies as st

from eaves.errors import InputError
from eaves.layerfile import read_layers
from eaves.layers import DTYPE_BYTES, MAX_COUNT, MAX_SECONDS, MAX_WHOLE, MIN_SECONDS, count

FUZZ = settings(max_examples=int(os.environ.get("EAVES_FUZZ_EXAMPLES", 60)), deadline=None,
                derandomize=not os.environ.get("EAVES_FUZZ_EXPLORE"),
                database=None, suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow])
HEADER = "name,kind,dtype,threads,seconds,m,n,k,flops,bytes\n"


def _read(tmp_path, data: bytes, suffix: str):
    path = tmp_path / f"{uuid.uuid4().hex}{suffix}"
    path.write_bytes(data)
    try:
        layers = read_layers(path)
    except InputError as err:
        assert err.exit_code == 2
        assert all(line.startswith(str(path)) for line in str(err).splitlines()), str(err)
        return None
    for layer in layers:  # what got in is finite and inside the bounds
        assert all(MIN_SECONDS < s < MAX_SECONDS for s in layer.seconds)
        assert all(0 <= v < MAX_WHOLE for v in layer.shape.values()) and 0 < layer.threads < MAX_WHOLE
        c = count(layer)
        assert math.isfinite(c.flops) and math.isfinite(c.bytes) and 0 <= c.flops < MAX_COUNT
        assert 0 < c.bytes < MAX_COUNT
    return layers


# Cases found by hand or by Hypothesis, kept as explicit examples (issue 18 repros first).
_CSV_EXAMPLES = [
    HEADER + "a,dense,fp32,1,1e-320,2,2,2,,\n",  # a time below the float range's normal numbers
    HEADER + "a,dense,fp32,1,1,1e20,2,2,,\n",  # a shape value past 2**53
    HEADER + "a,dense,fp32,1,1,4194304,4194304,4194304000,,\n",  # counts past 2**63
    HEADER + "a,dense,fp32,1,1,2,2,2,1e-320,1e400\n",  # counts below one and infinite
    HEADER + "a,dense,fp32,1,100000,2,2,2,,\n",  # more than a day
    HEADER + "\"a\x00b\",dense,fp32,1,1,2,2,2,,\n",  # NUL: no SQL text column takes it
    HEADER + "\"" + "x" * 200_000 + "\",dense,fp32,1,1,2,2,2,,\n",  # above the csv module's field limit
    "name,kind\r\"a\rb\",dense\r",  # lone CR line ends
]
_JSON_EXAMPLES = [
    "[" * 100_000 + "]" * 100_000,  # RecursionError in the json module before
    '[{"name": "a", "kind": "dense", "dtype": "fp32", "threads": 1, "seconds": 1, "flops": ' + "9" * 5000 + "}]",
    '[{"name": "a", "kind": "dense", "dtype": "fp32", "threads": 1, "seconds": 1, "shape": {"m": 1e400}}]',
    '[{"name": "\\ud800", "kind": "dense", "dtype": "fp32", "threads": 1, "seconds": 1}]',  # a lone surrogate
    '{"\\u006cayers": [1, 2]}',  # the key spelled with an escape
    '{"layers": 1, "layers": [1, 2]}',  # json keeps the last of a repeated key
    "[1, 2, 3]",
    '[{"name": [[]], "kind": {}, "dtype": null, "threads": [1], "seconds": [[1]], "shape": []}]',
]


@FUZZ
@given(st.binary(max_size=400) | st.text(max_size=300).map(lambda t: t.encode("utf-8", "surrogatepass")))
@example(b"\xef\xbb\xbfname,kind\n\xff\xfe")
@example(b"name,kind,dtype,threads,seconds\n\x00,\x00,\x00,\x00,\x00\n")
@example(b'{"layers": [')
def test_any_bytes_give_layers_or_one_input_error(tmp_path, data):
    for suffix in (".csv", ".json"):
        _read(tmp_path, data, suffix)


_KEYS = st.sampled_from(["name", "kind", "dtype", "threads", "seconds", "milliseconds", "batch", "flops", "bytes",
                         "shape", "m", "n", "k", "c", "h", "w", "r", "s", "groups", "padding", "tokens", "dim"]) \
    | st.text(max_size=5)
_SCALAR = (st.none() | st.booleans() | st.integers(-2**70, 2**70) | st.floats() | st.sampled_from(sorted(DTYPE_BYTES))
           | st.sampled_from(["dense", "conv2d", "embedding", "attention", "lstm", "pooling"]) | st.text(max_size=8))
_VALUE = st.recursive(_SCALAR, lambda inner: st.lists(inner, max_size=3) | st.dictionaries(_KEYS, inner, max_size=4),
                      max_leaves=8)
_ROWS = st.lists(st.dictionaries(_KEYS, _VALUE, max_size=10), max_size=4)


@FUZZ
@given(_ROWS)
@example([{"name": "a", "kind": "dense", "dtype": "fp32", "threads": 1, "seconds": 1e-320,
           "shape": {"m": 2**70, "n": 2, "k": 2}}])
@example([{"name": "a", "kind": "embedding", "dtype": "int8", "threads": 1, "seconds": 1,
           "shape": {"tokens": 2**52, "dim": 2**52}}])
def test_near_valid_files_give_layers_or_one_input_error(tmp_path, rows):
    """Layer-shaped rows of wrong, huge, tiny, infinite and nested values, as JSON and as CSV."""
    _read(tmp_path, json.dumps(rows).encode(), ".json")
    _read(tmp_path, json.dumps({"layers": rows}, indent=1).encode(), ".json")
    columns = sorted({k for r in rows for k in r if k != "shape"} | {"name"})
    out = io.StringIO(newline="")
    w = csv.writer(out)
    w.writerow(columns)
    for r in rows:
        w.writerow(["" if r.get(c) is None else str(r.get(c)) for c in columns])
    _read(tmp_path, out.getvalue().encode("utf-8", "surrogatepass"), ".csv")


@pytest.mark.parametrize("text", _CSV_EXAMPLES)
def test_found_csv_cases_give_one_input_error(tmp_path, text):
    assert _read(tmp_path, text.encode("utf-8"), ".csv") is None


@pytest.mark.parametrize("text", _JSON_EXAMPLES)
def test_found_json_cases_give_one_input_error(tmp_path, text):
    assert _read(tmp_path, text.encode("utf-8", "surrogatepass"), ".json") is None


def test_the_issue_repros_name_line_and_field(tmp_path):
    with pytest.raises(InputError) as err:
        read_layers(_write(tmp_path, HEADER + "ok,dense,fp32,1,1,2,2,2,,\n"
                           "t,dense,fp32,1,1e-320,2,2,2,,\n" "s,dense,fp32,1,1,1e20,2,2,,\n", ".csv"))
    lines = str(err.value).splitlines()
    assert lines[0].endswith(":3: seconds: '1e-320' is not above 1e-12 s")
    assert lines[1].endswith(":4: m: '1e20' is not below 2**53") and len(lines) == 2
    with pytest.raises(InputError, match=r":1: \(json\): nested deeper than 100 levels"):
        read_layers(_write(tmp_path, "[" * 100_000 + "]" * 100_000, ".json"))
    with pytest.raises(InputError, match=r":3: \(encoding\): byte 0xff is not UTF-8"):
        read_layers(_write(tmp_path, HEADER.encode() + b"a,dense,fp32,1,1,2,2,2,,\n" + b"\xff\n", ".csv"))
    # a line separator is part of a cell (splitlines() used to split there and shift every line after it)
    (layer,) = read_layers(_write(tmp_path, HEADER + "a\u2028b,dense,fp32,1,1,2,2,2,,\n", ".csv"))
    assert layer.name == "a\u2028b" and layer.where.endswith(":2")
    # a compact JSON list: one line, so each bad layer is named by its column too
    with pytest.raises(InputError) as err:
        read_layers(_write(tmp_path, "[1, 2,\n 3]", ".json"))
    assert [l.split(": ")[0].rsplit(".json:", 1)[1] for l in str(err.value).splitlines()] == ["1:2", "1:5", "2"]


def _write(tmp_path, text, suffix):
    path = tmp_path / f"{uuid.uuid4().hex}{suffix}"
    path.write_bytes(text if isinstance(text, bytes) else text.encode("utf-8"))
    return path


# ------------------------------------------------------------------ valid files read back exactly

_NAME = st.text(st.characters(exclude_categories=("Cs",), exclude_characters="\x00"), min_size=1, max_size=30) \
    .map(str.strip).filter(bool)
_LAYER = st.fixed_dictionaries({
    "name": _NAME,
    "dtype": st.sampled_from(sorted(DTYPE_BYTES)),
    "threads": st.integers(1, 256),
    "seconds": st.lists(st.floats(1e-11, 8e4), min_size=1, max_size=3),
    "shape": st.fixed_dictionaries({"m": st.integers(1, 2**20), "n": st.integers(1, 2**20),
                                    "k": st.integers(1, 2**20)}),
})
_LAYERS = st.lists(_LAYER, min_size=1, max_size=6, unique_by=lambda l: l["name"])


def _same(layers, generated):
    assert [l.name for l in layers] == [g["name"] for g in generated]
    for l, g in zip(layers, generated):
        assert (l.kind, l.dtype, l.threads, dict(l.shape)) == ("dense", g["dtype"], g["threads"], g["shape"])
        assert l.seconds == tuple(g["seconds"])


@FUZZ
@given(_LAYERS)
@example([{"name": "[/x]\x1b]0;t\x07", "dtype": "fp32", "threads": 1, "seconds": [1e-11],
           "shape": {"m": 1, "n": 1, "k": 1}}])
def test_generated_json_files_read_back_exactly(tmp_path, generated):
    doc = {"layers": [{"name": g["name"], "kind": "dense", "dtype": g["dtype"], "threads": g["threads"],
                       "seconds": g["seconds"], "shape": g["shape"]} for g in generated]}
    for text in (json.dumps(doc, indent=1), json.dumps(doc), json.dumps(doc["layers"], ensure_ascii=False)):
        _same(read_layers(_write(tmp_path, text, ".json")), generated)


@FUZZ
@given(_LAYERS)
@example([{"name": "a\rb\nc,\"d\"", "dtype": "int8", "threads": 2, "seconds": [8e4, 1e-11],
           "shape": {"m": 3, "n": 4, "k": 5}}])
def test_generated_csv_files_read_back_exactly(tmp_path, generated):
    out = io.StringIO(newline="")
    w = csv.writer(out)
    w.writerow(HEADER.strip().split(","))
    for g in generated:
        for s in g["seconds"]:  # a layer timed several times: one row per sample
            w.writerow([g["name"], "dense", g["dtype"], g["threads"], repr(s), g["shape"]["m"], g["shape"]["n"],
                        g["shape"]["k"], "", ""])
    _same(read_layers(_write(tmp_path, out.getvalue(), ".csv")), generated)
