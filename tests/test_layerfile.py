"""Reading the layer format (CSV and JSON), and every bad input it must refuse, all at once."""

from __future__ import annotations

import json

import pytest

from eaves.errors import InputError
from eaves.layerfile import read_layers

HEADER = "name,kind,dtype,threads,milliseconds,batch,m,n,k,c,h,w,r,s,groups,padding\n"


def write(tmp_path, text: str, name: str = "layers.csv"):
    path = tmp_path / name
    path.write_text(text)
    return path


def problems(path) -> list[str]:
    with pytest.raises(InputError) as err:
        read_layers(path)
    assert err.value.exit_code == 2
    return str(err.value).splitlines()


def test_csv_rows_become_layers_with_samples_in_seconds(tmp_path):
    path = write(tmp_path, HEADER
                 + "wren.head,dense,fp32,1,0.5,4,4,100,200,,,,,,,\n"
                 + "wren.head,dense,fp32,1,0.7,4,4,100,200,,,,,,,\n"
                 + "wren.stem,conv2d,fp64,2,3,,,1,16,3,32,32,3,3,,1\n")
    head, stem = read_layers(path)
    assert head.seconds == pytest.approx((0.5e-3, 0.7e-3)) and head.median_seconds == pytest.approx(0.6e-3)
    assert head.shape == {"m": 4, "n": 100, "k": 200} and head.batch == 4
    assert stem.shape["padding"] == 1 and stem.batch == 1 and stem.threads == 2  # conv batch is n
    assert stem.where == f"{path}:4"


def test_json_layers_with_sample_lists_and_line_numbers(tmp_path):
    doc = {"layers": [
        {"name": "a", "kind": "attention", "dtype": "fp32", "threads": 1, "seconds": [1e-4, 2e-4, 3e-4],
         "batch": 2, "shape": {"heads": 4, "q_len": 8, "k_len": 8, "head_dim": 16}},
        {"name": "b", "kind": "elementwise", "dtype": "int8", "threads": 1, "seconds": 1e-6, "flops": 10,
         "bytes": 20},
    ]}
    path = write(tmp_path, json.dumps(doc, indent=2), "layers.json")
    a, b = read_layers(path)
    assert a.seconds == (1e-4, 2e-4, 3e-4) and a.shape["batch"] == 2
    assert b.flops == 10 and b.bytes == 20 and b.shape == {}
    text = path.read_text().splitlines()
    assert '"name": "b"' in text[int(b.where.rsplit(":", 1)[1])]  # the line after the brace


def test_every_bad_row_is_reported_with_file_line_and_field(tmp_path):
    path = write(tmp_path, HEADER
                 + "ok,dense,fp32,1,1,,4,4,4,,,,,,,\n"
                 + ",dense,fp32,1,1,,4,4,4,,,,,,,\n"  # 3: missing name
                 + "t1,dense,fp32,1,abc,,4,4,4,,,,,,,\n"  # 4: non-numeric time
                 + "t2,dense,fp32,1,-1,,4,4,4,,,,,,,\n"  # 5: negative time
                 + "t3,dense,fp32,1,0,,4,4,4,,,,,,,\n"  # 6: zero time
                 + "t4,dense,fp32,1,nan,,4,4,4,,,,,,,\n"  # 7: NaN
                 + "t5,dense,fp32,1,inf,,4,4,4,,,,,,,\n"  # 8: infinity
                 + "k1,convolution,fp32,1,1,,,,,,,,,,,\n"  # 9: unknown kind
                 + "d1,dense,fp12,1,1,,4,4,4,,,,,,,\n"  # 10: unknown dtype
                 + "g1,conv2d,fp32,1,1,,,1,8,30,8,8,3,3,4,\n"  # 11: channels not divisible by groups
                 + "o1,conv2d,fp32,1,1,,,1,8,3,2,2,5,5,,\n"  # 12: output size below 1
                 + "m1,dense,fp32,1,1,,4,,4,,,,,,,\n"  # 13: missing shape parameter n
                 + "x1,dense,fp32,1,1,,4,4,4,,,,3,,,\n")  # 14: parameter the kind does not take
    lines = problems(path)
    expect = [(3, "name"), (4, "milliseconds"), (5, "milliseconds"), (6, "milliseconds"), (7, "milliseconds"),
              (8, "milliseconds"), (9, "kind"), (10, "dtype"), (11, "groups"), (12, "h"), (13, "n"), (14, "r")]
    assert len(lines) == len(expect)
    for line, (number, field) in zip(lines, expect):
        assert line.startswith(f"{path}:{number}: {field}: "), line
    assert "not divisible" in lines[8] and "below 1" in lines[9] and "not finite" in lines[4]


def test_header_problems(tmp_path):
    lines = problems(write(tmp_path, "name,kind,dtype,seconds,milliseconds,colour\nx,dense,fp32,1,1,red\n"))
    assert any(": colour: unknown column" in l for l in lines)
    assert any(":1: threads: missing column" in l for l in lines)
    assert any("exactly one time column" in l for l in lines)


def test_empty_files_and_files_without_rows(tmp_path):
    assert "empty file" in problems(write(tmp_path, ""))[0]
    assert "empty file" in problems(write(tmp_path, "  \n\n", "blank.json"))[0]
    assert "no layers" in problems(write(tmp_path, HEADER, "header_only.csv"))[0]
    assert "no layers" in problems(write(tmp_path, '{"layers": []}', "none.json"))[0]
    with pytest.raises(InputError, match="no such file"):
        read_layers(tmp_path / "absent.csv")


def test_repeated_names_must_agree(tmp_path):
    path = write(tmp_path, HEADER + "a,dense,fp32,1,1,,4,4,4,,,,,,,\na,dense,fp32,1,1,,4,4,8,,,,,,,\n")
    (line,) = problems(path)
    assert line.startswith(f"{path}:3: name: ") and "repeats line 2" in line


def test_bad_json(tmp_path):
    assert ":3: (json): " in problems(write(tmp_path, '{"layers": [\n  {"name": "a",\n  oops}]}', "x.json"))[0]
    doc = [{"name": "a", "kind": "dense", "dtype": "fp32", "threads": 0, "seconds": [1, -2], "shape": {"m": 1}},
           {"name": "b", "kind": "dense", "dtype": "fp32", "threads": 1, "seconds": [], "colour": 1},
           {"name": "c", "kind": "dense", "dtype": "fp32", "threads": True, "milliseconds": 1,
            "shape": {"m": 1.5, "n": 2, "k": 2}}]
    path = write(tmp_path, json.dumps(doc, indent=1), "y.json")
    lines = problems(path)
    assert any(":2: threads: " in l for l in lines) and any(":2: seconds: " in l for l in lines)
    assert any(":2: n: missing" in l for l in lines)  # shape problems too, beside the others of the row
    assert any(": colour: unknown key" in l for l in lines)
    assert any(": threads: True is not a number" in l for l in lines)
    assert any(": m: 1.5 is not a whole number" in l for l in lines)
