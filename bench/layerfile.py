"""Read layer timings from our CSV or JSON layer format, reporting every bad row at once.

Columns (CSV) or keys (JSON): name, kind, dtype, threads, and one time column, `seconds` or
`milliseconds`; optional batch, flops, bytes (explicit counts, which override the computed
ones) and the kind's shape parameters (see eaves.layers.KINDS). A layer timed several times is
written as several rows of the same name (CSV) or a list of times (JSON); the samples are kept.
"""

from __future__ import annotations

import csv
import json
import math
import re
from pathlib import Path
from typing import Any, Optional

from eaves.errors import InputError
from eaves.layers import DTYPE_BYTES, KINDS, ZERO_OK, LayerSpec, shape_problems

TIME_FIELDS = {"seconds": 1.0, "milliseconds": 1e-3}
REQUIRED = ("name", "kind", "dtype", "threads")
OPTIONAL = ("batch", "flops", "bytes")
SHAPE_FIELDS = tuple(sorted({p for k in KINDS.values() for p in k.params} - {"batch"}))
_IMAGE_KINDS = ("conv2d", "pooling", "batchnorm")  # their n is the batch
KNOWN = frozenset(REQUIRED + OPTIONAL + SHAPE_FIELDS + tuple(TIME_FIELDS))


class _Problems(list):
    """Problem lines of one file, each 'file:line: field: what is wrong'."""

    def __init__(self, path: str):
        super().__init__()
        self.path = path

    def add(self, line: Optional[int], field: str, message: str) -> None:
        self.append(f"{self.path}:{line}: {field}: {message}" if line else f"{self.path}: {field}: {message}")


def _empty(value: Any) -> bool:
    return value is None or (isinstance(value, str) and not value.strip())


def _number(value: Any) -> Optional[float]:
    if isinstance(value, bool):
        return None
    try:
        return float(value)
    except (TypeError, ValueError):
        return None


def _positive(value: Any, field: str, line: int, problems: _Problems, whole: bool, zero_ok: bool = False):
    """A finite number above zero (or at zero, if allowed); whole if asked; None after a problem."""
    x = _number(value)
    if x is None:
        problems.add(line, field, f"{value!r} is not a number")
    elif not math.isfinite(x):
        problems.add(line, field, f"{value!r} is not finite")
    elif x < 0 or (x == 0 and not zero_ok):
        problems.add(line, field, f"{value!r} must be above zero" if not zero_ok else f"{value!r} is negative")
    elif whole and x != int(x):
        problems.add(line, field, f"{value!r} is not a whole number")
    else:
        return int(x) if whole else x
    return None


def _row(raw: dict[str, Any], line: int, problems: _Problems, time_field: str) -> Optional[LayerSpec]:
    """One layer from one row's raw values, or None after adding its problems."""
    before = len(problems)
    for f in REQUIRED + (time_field,):
        if _empty(raw.get(f)):
            problems.add(line, f, "missing")
    name = str(raw.get("name") or "").strip()
    kind = str(raw.get("kind") or "").strip().lower()
    dtype = str(raw.get("dtype") or "").strip().lower()
    if kind and kind not in KINDS:
        problems.add(line, "kind", f"unknown kind {kind!r} (known: {', '.join(KINDS)})")
    if dtype and dtype not in DTYPE_BYTES:
        problems.add(line, "dtype", f"unknown dtype {dtype!r} (known: {', '.join(DTYPE_BYTES)})")
    threads = None if _empty(raw.get("threads")) else _positive(raw["threads"], "threads", line, problems, True)
    times = raw.get(time_field)
    times = times if isinstance(times, list) else ([] if _empty(times) else [times])
    if isinstance(raw.get(time_field), list) and not times:
        problems.add(line, time_field, "empty list")
    seconds = [_positive(t, time_field, line, problems, False) for t in times]
    opt = {f: None if _empty(raw.get(f)) else _positive(raw[f], f, line, problems, f == "batch") for f in OPTIONAL}
    shape: dict[str, int] = {}
    before_shape = len(problems)
    if kind in KINDS:
        params = KINDS[kind].params
        for f, v in raw.get("_shape", {}).items():
            if _empty(v):
                continue
            if f not in params:
                problems.add(line, f, f"not a parameter of kind {kind} (it takes {', '.join(params)})")
                continue
            x = _positive(v, f, line, problems, True, zero_ok=f in ZERO_OK)
            if x is not None:
                shape[f] = x
        if "batch" in params and opt["batch"] is not None:
            shape["batch"] = opt["batch"]
        if len(problems) == before_shape and (opt["flops"] is None or opt["bytes"] is None):
            for f, message in shape_problems(kind, shape):
                problems.add(line, f, message)
    if len(problems) > before:
        return None
    return LayerSpec(name=name, kind=kind, dtype=dtype, threads=threads,
                     seconds=tuple(s * TIME_FIELDS[time_field] for s in seconds), shape=shape,
                     batch=opt["batch"] or (shape.get("n") if kind in _IMAGE_KINDS else None), flops=opt["flops"],
                     bytes=opt["bytes"], where=f"{problems.path}:{line}")


def _time_field(keys, line: int, problems: _Problems) -> Optional[str]:
    present = [f for f in TIME_FIELDS if f in keys]
    if len(present) == 1:
        return present[0]
    problems.add(line, "seconds", "give exactly one time column, seconds or milliseconds"
                 + (f" (found {', '.join(present)})" if present else ""))
    return None


def _merge(specs: list[tuple[int, LayerSpec]], problems: _Problems) -> list[LayerSpec]:
    """Rows of the same name become one layer with all their samples, if they agree on the rest."""
    merged: dict[str, LayerSpec] = {}
    first_line: dict[str, int] = {}
    for line, s in specs:
        if s.name not in merged:
            merged[s.name], first_line[s.name] = s, line
            continue
        m = merged[s.name]
        same = (m.kind, m.dtype, m.threads, m.batch, dict(m.shape), m.flops, m.bytes) == \
               (s.kind, s.dtype, s.threads, s.batch, dict(s.shape), s.flops, s.bytes)
        if not same:
            problems.add(line, "name", f"layer {s.name!r} repeats line {first_line[s.name]} with another "
                         "kind, dtype, threads, batch, shape or counts")
            continue
        merged[s.name] = LayerSpec(m.name, m.kind, m.dtype, m.threads, m.seconds + s.seconds, m.shape,
                                   m.batch, m.flops, m.bytes, m.where)
    return list(merged.values())


def _read_csv(text: str, problems: _Problems) -> list[tuple[int, LayerSpec]]:
    reader = csv.DictReader(text.splitlines())
    header = [h.strip().lower() for h in (reader.fieldnames or [])]
    if not header:
        return []
    reader.fieldnames = header
    for h in header:
        if h not in KNOWN:
            problems.add(1, h or "(blank)", "unknown column")
    for f in REQUIRED:
        if f not in header:
            problems.add(1, f, "missing column")
    time_field = _time_field(header, 1, problems)
    if problems:
        return []
    out = []
    for row in reader:
        if None in row:
            problems.add(reader.line_num, "(extra)", f"{len(row[None])} more cells than columns")
            continue
        raw = {k: v for k, v in row.items() if k in REQUIRED + OPTIONAL + (time_field,)}
        raw["_shape"] = {k: v for k, v in row.items() if k in SHAPE_FIELDS}
        spec = _row(raw, reader.line_num, problems, time_field)
        if spec:
            out.append((reader.line_num, spec))
    return out


def _object_lines(text: str, items_start: int, n: int) -> list[int]:
    """Line number of each element of the JSON array starting at `items_start`."""
    decoder, lines, i = json.JSONDecoder(), [], items_start + 1
    for _ in range(n):
        while text[i] in " \t\r\n,":
            i += 1
        lines.append(text.count("\n", 0, i) + 1)
        _, i = decoder.raw_decode(text, i)
    return lines


def _read_json(text: str, problems: _Problems) -> list[tuple[int, LayerSpec]]:
    try:
        doc = json.loads(text)
    except json.JSONDecodeError as err:
        problems.add(err.lineno, "(json)", err.msg)
        return []
    if isinstance(doc, dict) and isinstance(doc.get("layers"), list):
        items, m = doc["layers"], re.search(r'"layers"\s*:\s*\[', text)
        start = m.end() - 1 if m else 0
    elif isinstance(doc, list):
        items, start = doc, text.index("[")
    else:
        problems.add(1, "layers", 'expected a list of layers or an object with a "layers" list')
        return []
    out = []
    for line, item in zip(_object_lines(text, start, len(items)), items):
        if not isinstance(item, dict):
            problems.add(line, "(layer)", "each layer must be an object")
            continue
        bad = [k for k in item if k not in REQUIRED + OPTIONAL + tuple(TIME_FIELDS) + ("shape",)]
        for k in bad:
            problems.add(line, k, "unknown key (shape parameters go in \"shape\")")
        time_field = _time_field(item.keys(), line, problems)
        shape = item.get("shape", {})
        if not isinstance(shape, dict):
            problems.add(line, "shape", "must be an object of shape parameters")
            shape = {}
        if bad or time_field is None:
            continue
        spec = _row({**item, "_shape": shape}, line, problems, time_field)
        if spec:
            out.append((line, spec))
    return out


def read_layers(path: str | Path) -> list[LayerSpec]:
    """Layers of a CSV or JSON layer file (by suffix; JSON if the text starts with [ or {)."""
    path = Path(path)
    problems = _Problems(str(path))
    try:
        text = path.read_text(encoding="utf-8-sig")
    except FileNotFoundError:
        raise InputError(f"{path}: no such file") from None
    except (OSError, UnicodeDecodeError) as err:
        raise InputError(f"{path}: cannot read: {getattr(err, 'strerror', None) or err}") from None
    if not text.strip():
        raise InputError(f"{path}: empty file, no layers")
    is_json = path.suffix.lower() == ".json" or text.lstrip()[:1] in "[{"
    rows = (_read_json if is_json else _read_csv)(text, problems)
    layers = _merge(rows, problems)
    if not layers and not problems:
        problems.add(None, "layers", "no layers in the file")
    if problems:
        raise InputError("\n".join(problems))
    return layers
