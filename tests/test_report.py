"""`eaves report`: a self-contained page, escaped strings, and a real headless browser loading it."""

from __future__ import annotations

import base64
import os
import re
import shutil
import subprocess
import xml.etree.ElementTree as ET
from html.parser import HTMLParser

import numpy as np
import pytest
from history_fixtures import fill_history, layers_record
from layer_fixtures import HOSTNAME

from eaves.cli import main
from eaves.errors import EXIT_INPUT, InputError
from eaves.place import place_layers
from eaves.layers import LayerSpec
from eaves.report import build_report
from eaves.roofline import model_from_store
from eaves.store import Store

MARKUP = "<b>x</b><script>alert(1)</script>"
NOTE = 'night & "fog" <i>run</i>'


@pytest.fixture(scope="module")
def report_store(tmp_path_factory):
    """Eight nights of an invented host, the last one noted with markup, and placed layers, one
    of them named with HTML markup."""
    folder = tmp_path_factory.mktemp("report")
    store = Store(f"sqlite:///{folder / 'r.db'}")
    uuids = fill_history(store, 8, seed=21, drift_from=7, drift={"memory/read/DRAM": 0.8})
    with store.engine.begin() as conn:  # a note typed by a person
        conn.exec_driver_sql("UPDATE runs SET note = ? WHERE uuid = ?", (NOTE, uuids[-1]))
    model = model_from_store(store, uuids[-1])
    specs = [LayerSpec(MARKUP, "dense", "fp32", 1, (2e-4, 2.1e-4, 1.9e-4), dict(m=16, n=128, k=128)),
             LayerSpec("reedling.relu.fp32", "elementwise", "fp32", 1, (1e-6,), dict(elements=1152))]
    store.save_run(layers_record(place_layers(specs, model), 8, uuids[-1]))
    assert main(["report", "--host", HOSTNAME, "--out", str(folder), "--db", store.url]) == 0
    return store, folder / f"report-{HOSTNAME}.html"


class _Text(HTMLParser):
    """Text of every table cell, and every element name, of a page or DOM dump."""

    def __init__(self):
        super().__init__()
        self.cells, self.tags, self._in = [], [], False

    def handle_starttag(self, tag, attrs):
        self.tags.append((tag, dict(attrs)))
        if tag == "td":
            self._in, self._buf = True, ""

    def handle_endtag(self, tag):
        if tag == "td" and self._in:
            self.cells.append(self._buf)
            self._in = False

    def handle_data(self, data):
        if self._in:
            self._buf += data


def parse(text: str) -> _Text:
    p = _Text()
    p.feed(text)
    return p


def test_page_is_self_contained_and_escaped(report_store):
    _, path = report_store
    page = path.read_text(encoding="utf-8")
    p = parse(page)
    assert MARKUP in p.cells and NOTE in p.cells  # shown as text ...
    assert "<script" not in page and "<b>x" not in page and "<i>run" not in page  # ... never as markup
    assert not re.search(r"""(src|href)\s*=\s*["']?(https?:|//)""", page)  # nothing fetched from a network
    images = [a["src"] for t, a in p.tags if t == "img"]
    assert len(images) >= 3 and all(s.startswith("data:image/svg+xml;base64,") for s in images)
    for src in images:  # every chart is well-formed SVG
        root = ET.fromstring(base64.b64decode(src.split(",", 1)[1]))
        assert root.tag.endswith("svg")
    roofline = next(base64.b64decode(s.split(",", 1)[1]).decode() for s in images
                    if b"operational intensity" in base64.b64decode(s.split(",", 1)[1]))
    assert "&lt;b&gt;x&lt;/b&gt;" in roofline and "<script" not in roofline  # the label in the chart, escaped
    headings = re.findall(r"<h2>(.*?)</h2>", page)
    assert headings == ["Host", "Ceilings", "Bandwidth by working set", "Roofline", "Placed layers", "Trends", "Runs"]


def test_an_unknown_host_or_a_host_without_survey_is_refused(report_store, tmp_path, capsys):
    store, _ = report_store
    assert main(["report", "--host", "nobody", "--out", str(tmp_path), "--db", store.url]) == EXIT_INPUT
    assert len(capsys.readouterr().err.strip().splitlines()) == 1
    with pytest.raises(InputError, match="eaves survey --quick"):
        build_report(Store(f"sqlite:///{tmp_path / 'empty.db'}"), HOSTNAME)


# ---- a real browser: Debian's chromium, headless ------------------------------------------------

def _chromium() -> str:
    path = shutil.which("chromium") or shutil.which("chromium-browser")
    if path:
        return path
    if os.environ.get("CI"):
        pytest.fail("chromium is not installed: .ci/run installs it (.ci/chromium.sh); CI must not skip this test")
    pytest.skip("chromium is not installed (apt-get install -y chromium)")


def _browse(url: str, tmp_path, *extra: str) -> subprocess.CompletedProcess:
    args = [_chromium(), "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
            "--disable-background-networking", "--disable-component-update", "--disable-sync",
            f"--user-data-dir={tmp_path / 'profile'}", "--enable-logging=stderr", "--v=0", *extra, url]
    return subprocess.run(args, capture_output=True, text=True, timeout=120)


def _console_lines(stderr: str) -> list[str]:
    """Console messages chromium logs at --v=0 (errors, failed loads, script output)."""
    return [line for line in stderr.splitlines() if ":CONSOLE" in line]


def test_console_detection_catches_an_error(tmp_path):
    # the control: a page that does log a console error is caught by the same check
    bad = tmp_path / "bad.html"
    bad.write_text('<!DOCTYPE html><p>x</p><script>console.error("eaves-control-error")</script>')
    run = _browse(bad.as_uri(), tmp_path, "--dump-dom")
    assert any("eaves-control-error" in line for line in _console_lines(run.stderr))


def test_report_in_a_headless_browser(report_store, tmp_path):
    import matplotlib.image as mpimg

    _, path = report_store
    page = path.as_uri()
    dom_run = _browse(page, tmp_path, "--dump-dom")
    assert dom_run.returncode == 0, dom_run.stderr[-2000:]
    assert _console_lines(dom_run.stderr) == []
    dom = parse(dom_run.stdout)
    assert MARKUP in dom.cells  # the layer name is a text node in the live DOM
    assert not any(t in ("script", "b") for t, _ in dom.tags)  # no element came from a user string
    assert sum(1 for t, a in dom.tags if t == "img" and a.get("src", "").startswith("data:image/svg+xml")) >= 3
    shot = tmp_path / "shot.png"
    shot_run = _browse(page, tmp_path, f"--screenshot={shot}", "--window-size=1200,2400", "--hide-scrollbars")
    assert shot_run.returncode == 0 and shot.exists(), shot_run.stderr[-2000:]
    pixels = mpimg.imread(str(shot))
    colours = np.unique(pixels.reshape(-1, pixels.shape[-1]), axis=0)
    assert len(colours) > 50  # text, tables and charts, not a blank page
