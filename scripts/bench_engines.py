"""Speed of tiled inference with onnxruntime as the forward pass, against the PyTorch path, in one run.

For each net (the demo net and the FCN-8s-style net, random weights: speed does not depend on them) it times
(a) the bare forward pass on a batch of tiles and (b) whole tiled inference (``predict_scores``) of a
synthetic 4-band image, once with the PyTorch engine (conv+BN folded, channels_last) and once with
``OnnxEngine``; each figure is the best of ``--repeats`` runs, the engines' runs interleaved. Timings on a
shared machine are noisy, so the script prints ratios measured in the same process. Also checks that both
engines give the same labels.

    .venv/bin/python scripts/bench_engines.py [--side 2048] [--tile 512] [--batch 4] [--repeats 3]
"""

from __future__ import annotations

import argparse
import time
from collections.abc import Callable
from pathlib import Path

import numpy as np
import torch

from fcnkit import Model, load_config
from fcnkit.inference.engines import OnnxEngine, TorchEngine
from fcnkit.inference.scan import predict_scores

ROOT = Path(__file__).resolve().parent.parent


def best_of_each(repeats: int, fns: dict[str, Callable[[], object]]) -> dict[str, float]:
    """Best time of each function, the runs interleaved so a change in the machine's load hits all alike."""
    best = dict.fromkeys(fns, float("inf"))
    for _ in range(repeats):
        for name, fn in fns.items():
            tic = time.perf_counter()
            fn()
            best[name] = min(best[name], time.perf_counter() - tic)
    return best


def bench(config: str, side: int, tile: int, batch: int, repeats: int) -> None:
    cfg = load_config(ROOT / "fcnkit" / "configs" / config)
    net = Model.build(cfg).eval()
    bands = cfg.model.bands
    rng = np.random.default_rng(0)
    image = rng.integers(0, 256, size=(side, side, bands), dtype=np.uint8)
    net.set_normalisation([128.0] * bands, [64.0] * bands)
    torch_engine, ort_engine = TorchEngine(net), OnnxEngine(net)

    x = (128 + 64 * torch.randn(batch, bands, tile, tile)).contiguous(memory_format=torch.channels_last)
    torch_engine(x), ort_engine(x)  # warm-up
    mp = batch * tile * tile / 1e6
    fwd = best_of_each(repeats, {"torch": lambda: torch_engine(x), "ort": lambda: ort_engine(x)})
    t_fwd, o_fwd = fwd["torch"], fwd["ort"]

    def tiled(engine):
        return predict_scores(net, image, scan="tiles", tile=tile, batch=batch, engine=engine)

    labels_t = tiled(torch_engine).argmax(0)
    labels_o = tiled(ort_engine).argmax(0)
    whole = best_of_each(repeats, {"torch": lambda: tiled(torch_engine), "ort": lambda: tiled(ort_engine)})
    t_tiled, o_tiled = whole["torch"], whole["ort"]
    same = float((labels_t == labels_o).mean())
    img_mp = side * side / 1e6
    print(f"== {config}: {tile}x{tile} tiles, batch {batch}, {side}x{side} image ({img_mp:.1f} MP), "
          f"{torch.get_num_threads()} threads")
    print(f"  forward pass   torch {mp / t_fwd:7.2f} MP/s   onnxruntime {mp / o_fwd:7.2f} MP/s   "
          f"ORT / torch speed {t_fwd / o_fwd:.2f}")
    print(f"  tiled image    torch {img_mp / t_tiled:7.2f} MP/s   onnxruntime {img_mp / o_tiled:7.2f} MP/s   "
          f"ORT / torch speed {t_tiled / o_tiled:.2f}")
    print(f"  labels identical on {same:.4%} of pixels")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--side", type=int, default=2048)
    ap.add_argument("--tile", type=int, default=512)
    ap.add_argument("--batch", type=int, default=4)
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--configs", nargs="+", default=["demo.toml", "fcn8s.toml"])
    a = ap.parse_args()
    for config in a.configs:
        bench(config, a.side, a.tile, a.batch, a.repeats)


if __name__ == "__main__":
    main()
