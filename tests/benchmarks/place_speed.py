"""Time placing 10 000 layers (target <= 1 s) and drawing their chart (target <= 2 s).

Run: python tests/benchmarks/place_speed.py   (prints seconds; the model is synthetic test data)
"""

from __future__ import annotations

import random
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from layer_fixtures import CACHES, HOST_KEY, synthetic_figures  # noqa: E402

from eaves.layers import LayerSpec  # noqa: E402
from eaves.place import place_layers  # noqa: E402
from eaves.roofline import model_from_figures  # noqa: E402
from eaves.roofline_chart import draw_chart  # noqa: E402


def layers(n: int) -> list[LayerSpec]:
    rng = random.Random(7)
    out = []
    for i in range(n):
        kind = ("dense", "conv2d", "elementwise", "attention", "softmax")[i % 5]
        shape = {"dense": dict(m=rng.choice([1, 8, 64]), n=512, k=512),
                 "conv2d": dict(n=1, c=32, h=28, w=28, k=32, r=3, s=3, padding=1),
                 "elementwise": dict(elements=rng.randint(1, 10**6), inputs=2),
                 "attention": dict(batch=1, heads=4, q_len=64, k_len=64, head_dim=32),
                 "softmax": dict(rows=64, cols=512)}[kind]
        out.append(LayerSpec(f"l{i}", kind, rng.choice(["fp32", "fp64"]), rng.choice([1, 2]),
                             tuple(rng.uniform(1e-4, 1e-2) for _ in range(3)), shape))
    return out


def main() -> None:
    model = model_from_figures(synthetic_figures(), "bench", HOST_KEY, {"caches": CACHES})
    specs = layers(10_000)
    start = time.perf_counter()
    placed = place_layers(specs, model)
    place_s = time.perf_counter() - start
    import matplotlib  # import cost is not the chart's

    matplotlib.use("Agg")
    import matplotlib.pyplot  # noqa: F401

    with tempfile.TemporaryDirectory() as tmp:
        start = time.perf_counter()
        draw_chart(model, placed[:200], Path(tmp) / "roof.png")
        chart_s = time.perf_counter() - start
        start = time.perf_counter()
        draw_chart(model, placed, Path(tmp) / "all.png")
        chart_all_s = time.perf_counter() - start
    print(f"place 10000 layers: {place_s:.3f} s (target <= 1 s)")
    print(f"chart of 200 layers (PNG + SVG): {chart_s:.3f} s (target <= 2 s)")
    print(f"chart of 10000 layers (PNG + SVG): {chart_all_s:.3f} s")


if __name__ == "__main__":
    main()
