"""Read layer timings from our CSV or JSON layer format, reporting every bad row at once.

Columns (CSV) or keys (JSON): name, kind, dtype, threads, and one time column, `seconds` or
`milliseconds`; optional batch, flops, bytes (explicit counts, which override the computed
ones) and the kind's shape parameters (see eaves.layers.KINDS). A layer timed several times is
written as several rows of the same name (CSV) or a list of times (JSON); the samples are kept.
Numbers must lie inside eaves.layers' bounds (MIN_SECONDS .. MAX_SECONDS, MAX_WHOLE, MAX_COUNT), so
nothing derived from a file is ever infinite or NaN; any other text or bytes give only InputError.
"""

from __future__ import annotations

import codecs
import csv
import io
import json
import math
from pathlib import Path
from typing import Any, Optional

from eaves.errors import InputError
from eaves.layers import (DTYPE_BYTES, KINDS, MAX_COUNT, MAX_SECONDS, MAX_WHOLE, MIN_COUNT, MIN_SECONDS, ZERO_OK,
                          LayerSpec, exact_counts, shape_problems)
from eaves.plain import unstorable

TIME_FIELDS = {"seconds": 1.0, "milliseconds": 1e-3}
REQUIRED = ("name", "kind", "dtype", "threads")
OPTIONAL = ("batch", "flops", "bytes")
SHAPE_FIELDS = tuple(sorted({p for k in KINDS.values() for p in k.params} - {"batch"}))
_IMAGE_KINDS = ("conv2d", "pooling", "batchnorm")  # their n is the batch
KNOWN = frozenset(REQUIRED + OPTIONAL + SHAPE_FIELDS + tuple(TIME_FIELDS))
TEXT_FIELDS = ("name", "kind", "dtype")
REPORT_DEPTH = 100  # a JSON file nested too deeply for the parser is reported where it passes this depth
_SHOWN_CHARS = 60  # a bad value is quoted up to this many characters, so each problem stays one line


class _Problems(list):
    """Problem lines of one file, each 'file:line: field: what is wrong'."""

    def __init__(self, path: str):
        super().__init__()
        self.path = path

    def add(self, line: Optional[int | str], field: str, message: str) -> None:
        self.append(f"{self.path}:{line}: {field}: {message}" if line else f"{self.path}: {field}: {message}")


def _empty(value: Any) -> bool:
    return value is None or (isinstance(value, str) and not value.strip())


def _shown(value: Any) -> str:
    """The value as written (repr), cut to a readable length."""
    text = repr(value)  # JSON integers are at most 40 digits here (_json_int), so repr never refuses one
    return text if len(text) <= _SHOWN_CHARS else text[:_SHOWN_CHARS - 3] + "..."


def _number(value: Any) -> Optional[float]:
    if isinstance(value, bool):
        return None
    try:
        return float(value)
    except OverflowError:  # a JSON integer beyond the float range
        return math.inf
    except (TypeError, ValueError):
        return None


def _positive(value: Any, field: str, line: int | str, problems: _Problems, whole: bool, zero_ok: bool = False,
              high: float = MAX_WHOLE):
    """A finite number above zero (or at zero, if allowed) and below `high`; whole if asked; None after
    a problem."""
    x = _number(value)
    if x is None:
        problems.add(line, field, f"{_shown(value)} is not a number")
    elif not math.isfinite(x):
        problems.add(line, field, f"{_shown(value)} is not finite")
    elif x < 0 or (x == 0 and not zero_ok):
        problems.add(line, field, f"{_shown(value)} " + ("is negative" if zero_ok else "must be above zero"))
    elif whole and x != int(x):
        problems.add(line, field, f"{_shown(value)} is not a whole number")
    elif x >= high:
        problems.add(line, field, f"{_shown(value)} is not below {_bound(high)}")
    else:
        return int(x) if whole else x
    return None


def _bound(x: float) -> str:
    return {MAX_WHOLE: "2**53", MAX_COUNT: "2**63"}.get(x, f"{x:g}")


def _seconds(value: Any, field: str, line: int | str, problems: _Problems) -> Optional[float]:
    """One time sample in seconds, inside (MIN_SECONDS, MAX_SECONDS)."""
    x = _positive(value, field, line, problems, False, high=math.inf)
    if x is None:
        return None
    s = x * TIME_FIELDS[field]
    if not MIN_SECONDS < s < MAX_SECONDS:
        limit = f"above {MIN_SECONDS:g} s" if s <= MIN_SECONDS else "below one day"
        problems.add(line, field, f"{_shown(value)} is not {limit}")
        return None
    return s


def _count(value: Any, field: str, line: int | str, problems: _Problems) -> Optional[float]:
    """An explicit FLOP or byte count: at least MIN_COUNT, below MAX_COUNT."""
    x = _positive(value, field, line, problems, False, high=MAX_COUNT)
    if x is not None and x < MIN_COUNT:
        problems.add(line, field, f"{_shown(value)} is below {MIN_COUNT} (a count of operations or bytes)")
        return None
    return x


def _field(name: str) -> str:
    """A column or key name as the field of a problem: as written, or quoted when it is not plain text."""
    return name if name.isprintable() and len(name) <= _SHOWN_CHARS else _shown(name)


def _text(value: Any, field: str, line: int | str, problems: _Problems) -> str:
    """A name, kind or dtype: any text but NUL (no SQL text column takes it) and lone surrogates
    (not Unicode text: no store, file or terminal takes them)."""
    text = "" if value is None else str(value)
    reason = unstorable(text)
    if reason:
        problems.add(line, field, reason)
    return text


def _row(raw: dict[str, Any], line: int | str, problems: _Problems, time_field: str) -> Optional[LayerSpec]:
    """One layer from one row's raw values, or None after adding its problems."""
    before = len(problems)
    for f in REQUIRED + (time_field,):
        if _empty(raw.get(f)):
            problems.add(line, f, "missing")
    name, kind, dtype = (_text(raw.get(f), f, line, problems).strip() for f in TEXT_FIELDS)
    kind, dtype = kind.lower(), dtype.lower()
    if kind and kind not in KINDS:
        problems.add(line, "kind", f"unknown kind {_shown(kind)} (known: {', '.join(KINDS)})")
    if dtype and dtype not in DTYPE_BYTES:
        problems.add(line, "dtype", f"unknown dtype {_shown(dtype)} (known: {', '.join(DTYPE_BYTES)})")
    threads = None if _empty(raw.get("threads")) else _positive(raw["threads"], "threads", line, problems, True)
    times = raw.get(time_field)
    times = times if isinstance(times, list) else ([] if _empty(times) else [times])
    if isinstance(raw.get(time_field), list) and not times:
        problems.add(line, time_field, "empty list")
    seconds = [_seconds(t, time_field, line, problems) for t in times]
    opt = {f: None if _empty(raw.get(f)) else
           _positive(raw[f], f, line, problems, True) if f == "batch" else _count(raw[f], f, line, problems)
           for f in OPTIONAL}
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
        given = {f for f in ("flops", "bytes") if not _empty(raw.get(f))}
        if len(problems) == before_shape and len(given) < 2:
            for f, message in shape_problems(kind, shape):
                problems.add(line, f, message)
            if len(problems) == before_shape and dtype in DTYPE_BYTES:
                _check_counted(kind, shape, dtype, given, line, problems)
    if len(problems) > before:
        return None
    return LayerSpec(name=name, kind=kind, dtype=dtype, threads=threads, seconds=tuple(seconds), shape=shape,
                     batch=opt["batch"] or (shape.get("n") if kind in _IMAGE_KINDS else None), flops=opt["flops"],
                     bytes=opt["bytes"], where=f"{problems.path}:{line}")


def _check_counted(kind: str, shape: dict, dtype: str, given: set, line: int | str, problems: _Problems) -> None:
    """The counts a shape implies (those the row does not give) must stay below MAX_COUNT."""
    flops, nbytes = exact_counts(kind, shape, dtype)
    for what, value in (("flops", flops), ("bytes", nbytes)):
        if what not in given and value >= MAX_COUNT:
            size = f"{float(value):.3g}" if value < 10**300 else "over 1e300"
            problems.add(line, "shape", f"counts {size} {what}, not below 2**63: check the shape values "
                         "or give explicit counts")


def _time_field(keys, line: int | str, problems: _Problems) -> Optional[str]:
    present = [f for f in TIME_FIELDS if f in keys]
    if len(present) == 1:
        return present[0]
    problems.add(line, "seconds", "give exactly one time column, seconds or milliseconds"
                 + (f" (found {', '.join(present)})" if present else ""))
    return None


def _merge(specs: list[tuple[int | str, LayerSpec]], problems: _Problems) -> list[LayerSpec]:
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
            problems.add(line, "name", f"layer {_shown(s.name)} repeats line {first_line[s.name]} with another "
                         "kind, dtype, threads, batch, shape or counts")
            continue
        merged[s.name] = LayerSpec(m.name, m.kind, m.dtype, m.threads, m.seconds + s.seconds, m.shape,
                                   m.batch, m.flops, m.bytes, m.where)
    return list(merged.values())


def _read_csv(text: str, problems: _Problems) -> list[tuple[int, LayerSpec]]:
    reader = csv.DictReader(io.StringIO(text, newline=""))  # lines end at \n, \r\n or \r, as editors count them
    out = []
    try:
        header = [h.strip().lower() for h in (reader.fieldnames or [])]
        if not header:
            return []
        reader.fieldnames = header
        for h in header:
            if h not in KNOWN:
                problems.add(1, _field(h) if h else "(blank)", "unknown column")
        for f in REQUIRED:
            if f not in header:
                problems.add(1, f, "missing column")
        time_field = _time_field(header, 1, problems)
        if problems:
            return []
        for row in reader:
            if None in row:
                problems.add(reader.line_num, "(extra)", f"{len(row[None])} more cells than columns")
                continue
            raw = {k: v for k, v in row.items() if k in REQUIRED + OPTIONAL + (time_field,)}
            raw["_shape"] = {k: v for k, v in row.items() if k in SHAPE_FIELDS}
            spec = _row(raw, reader.line_num, problems, time_field)
            if spec:
                out.append((reader.line_num, spec))
    except csv.Error as err:  # e.g. a cell above the csv module's field size limit
        problems.add(max(reader.line_num, 1), "(csv)", str(err))
    return out


def _json_int(digits: str):
    """JSON integers: exact while short; a very long one becomes a float (inf past the float range)
    instead of Python's int-length ValueError."""
    return int(digits) if len(digits) <= 40 else float(digits)


_DECODER = json.JSONDecoder(parse_int=_json_int)
_WHITESPACE = " \t\n\r"  # JSON's whitespace (RFC 8259, section 2)
_BETWEEN_ITEMS = _WHITESPACE + ","


def _skip(text: str, i: int) -> int:
    while i < len(text) and text[i] in _WHITESPACE:
        i += 1
    return i


def _layers_start(text: str) -> int:
    """Index of the "[" of the top-level object's "layers" list (its last "layers" key, the one
    json keeps), walking the members of a document already known to be valid JSON."""
    start, i = 0, _skip(text, 0) + 1
    while True:
        i = _skip(text, i)
        if text[i] == "}":
            return start
        key, i = json.decoder.scanstring(text, i + 1)
        i = _skip(text, _skip(text, i) + 1)  # past the colon
        if key == "layers":
            start = i
        _, i = _DECODER.raw_decode(text, i)
        i = _skip(text, i)
        if text[i] != ",":
            return start
        i += 1


def _item_lines(text: str, items_start: int, n: int) -> list[str]:
    """Where each element of the JSON array at `items_start` begins: its line, and its column too
    when another element begins on the same line (a compact file)."""
    starts, i = [], items_start + 1
    for _ in range(n):
        while text[i] in _BETWEEN_ITEMS:
            i += 1
        starts.append(i)
        _, i = _DECODER.raw_decode(text, i)
    places, line, pos, line_start = [], 1, 0, 0
    for i in starts:
        newlines = text.count("\n", pos, i)
        if newlines:
            line, line_start = line + newlines, text.rindex("\n", pos, i) + 1
        pos = i
        places.append((line, i - line_start + 1))
    per_line = {}
    for line, _ in places:
        per_line[line] = per_line.get(line, 0) + 1
    return [str(line) if per_line[line] == 1 else f"{line}:{col}" for line, col in places]


def _deep_line(text: str) -> int:
    """The line where the JSON text first nests deeper than REPORT_DEPTH (strings skipped)."""
    depth, line, in_string, escaped = 0, 1, False, False
    for c in text:
        if c == "\n":
            line += 1
        if in_string:
            escaped, in_string = (False, True) if escaped else (c == "\\", c != '"')
        elif c == '"':
            in_string = True
        elif c in "[{":
            depth += 1
            if depth > REPORT_DEPTH:
                return line
        elif c in "]}":
            depth -= 1
    return 1


def _read_json(text: str, problems: _Problems) -> list[tuple[int, LayerSpec]]:
    try:
        doc = _DECODER.decode(text)
    except json.JSONDecodeError as err:
        problems.add(err.lineno, "(json)", err.msg)
        return []
    except RecursionError:
        problems.add(_deep_line(text), "(json)", f"nested deeper than {REPORT_DEPTH} levels (a layer file needs 4)")
        return []
    if isinstance(doc, dict) and isinstance(doc.get("layers"), list):
        items, start = doc["layers"], _layers_start(text)
    elif isinstance(doc, list):
        items, start = doc, _skip(text, 0)
    else:
        problems.add(1, "layers", 'expected a list of layers or an object with a "layers" list')
        return []
    out = []
    for line, item in zip(_item_lines(text, start, len(items)), items):
        if not isinstance(item, dict):
            problems.add(line, "(layer)", "each layer must be an object")
            continue
        bad = [k for k in item if k not in REQUIRED + OPTIONAL + tuple(TIME_FIELDS) + ("shape",)]
        for k in bad:
            problems.add(line, _field(k), "unknown key (shape parameters go in \"shape\")")
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


def _text_of(path: Path) -> str:
    """The file as text; bytes that are not UTF-8 are reported by line."""
    try:
        data = path.read_bytes()
    except FileNotFoundError:
        raise InputError(f"{path}: no such file") from None
    except OSError as err:
        raise InputError(f"{path}: cannot read: {err.strerror or err}") from None
    data = data[len(codecs.BOM_UTF8):] if data.startswith(codecs.BOM_UTF8) else data
    try:
        return data.decode("utf-8")
    except UnicodeDecodeError as err:
        line = data.count(b"\n", 0, err.start) + 1
        raise InputError(f"{path}:{line}: (encoding): byte 0x{data[err.start]:02x} is not UTF-8 "
                         "(save the file as UTF-8)") from None


def read_layers(path: str | Path) -> list[LayerSpec]:
    """Layers of a CSV or JSON layer file (by suffix; JSON if the text starts with [ or {)."""
    path = Path(path)
    problems = _Problems(str(path))
    text = _text_of(path)
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
