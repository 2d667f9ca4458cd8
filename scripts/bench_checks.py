"""Cost of the numeric checks of mapping, as ratios measured in one run: the input-range check of every region
read (fcnkit.inputrange, on float pixels, where it cannot be skipped), the finite-scores check of every band,
and the finite-input test before each fused convolution + ReLU of row streaming, against the same scan with
them switched off. Each figure is the best of ``--repeats`` interleaved runs.

    .venv/bin/python scripts/bench_checks.py [--side 1024] [--repeats 3]
"""

from __future__ import annotations

import argparse
import time

import numpy as np
import torch

from fcnkit import Model
from fcnkit.inference import rowstream, scan
from fcnkit.inference.scan import predict_scores
from fcnkit.inputrange import training_stats


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--side", type=int, default=1024)
    ap.add_argument("--repeats", type=int, default=3)
    a = ap.parse_args()
    torch.set_num_threads(1)  # steadier on a shared machine
    torch.manual_seed(0)
    model = Model.build("demo")
    img = np.random.default_rng(0).random((a.side, a.side, 4)).astype(np.float32) * 200
    model.set_normalisation([100.0] * 4, [50.0] * 4)
    model.eval()
    stats = training_stats([img[:256, :256]])
    fused, finite = rowstream._conv_relu, scan._finite

    def unchecked_conv(x, m, stride, padding, dilation):
        return torch.ops.mkldnn._convolution_pointwise(x, m.weight, m.bias, list(padding), list(stride),
                                                       list(dilation), m.groups, "relu", [None], "")

    def run(checked: bool) -> float:
        model.input_stats = stats if checked else None
        rowstream._conv_relu = fused if checked else unchecked_conv
        scan._finite = finite if checked else (lambda bands, where: bands)
        tic = time.perf_counter()
        predict_scores(model, img, scan="rows", logits=True)
        return time.perf_counter() - tic

    best = {True: float("inf"), False: float("inf")}
    for _ in range(a.repeats):
        for checked in (False, True):
            best[checked] = min(best[checked], run(checked))
    rowstream._conv_relu, scan._finite = fused, finite
    print(f"demo net, {a.side}x{a.side} float32 4-band image, row streaming, best of {a.repeats}:")
    print(f"  without checks {best[False]:.2f} s, with checks {best[True]:.2f} s: ratio {best[True] / best[False]:.3f}")


if __name__ == "__main__":
    main()
