"""The roofline chart: both files written, every roof drawn and labelled."""

from __future__ import annotations

import xml.etree.ElementTree as ET

from layer_fixtures import CACHES, HOST_KEY, synthetic_figures

from eaves.layers import LayerSpec
from eaves.place import place_layers
from eaves.roofline import model_from_figures
from eaves.roofline_chart import draw_chart


def test_chart_draws_every_roof_and_the_worst_layers(tmp_path):
    model = model_from_figures(synthetic_figures(), "0badc0de-run", HOST_KEY, {"caches": CACHES})
    layers = [LayerSpec(f"wren.{i}", "dense", "fp32", 1, (1e-3 * (i + 1),), dict(m=16, n=256, k=256)) for i in range(8)]
    layers.append(LayerSpec("wren.fast", "dense", "fp32", 1, (1e-9,), dict(m=16, n=256, k=256)))  # impossible
    layers.append(LayerSpec("wren.emb", "embedding", "fp32", 1, (1e-5,), dict(tokens=8, dim=64)))  # no FLOPs
    placed = place_layers(layers, model)
    png, svg = draw_chart(model, placed, tmp_path / "roof.svg")
    assert png.suffix == ".png" and png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    text = "".join(ET.parse(svg).getroot().itertext())
    for label in ("L1", "L2", "L3", "DRAM", "fp32 peak", "fp64 peak", "int8 peak", "fp32 achievable"):
        assert label in text, label
    assert "wren.fast (impossible)" in text and "wren.7" in text  # the worst few are labelled
    assert "wren.0 " not in text  # the best is not
