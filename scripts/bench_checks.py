"""Cost of the numeric checks of mapping, as ratios measured in one run: the input-range check of every region
read (fcnkit.inputrange, on float pixels, where it cannot be skipped) and the finite-scores check of every band,
against the same scan with them switched off. Row streaming's once-per-band test of its input (which keeps a
fused ReLU's NaN handling equal to a whole-image pass) runs in both. Each figure is the best of ``--repeats``
interleaved runs.

    .venv/bin/python scripts/bench_checks.py [--side 1024] [--repeats 3]
"""

from __future__ import annotations

import argparse
import time

import numpy as np
import torch

from fcnkit import Model
from fcnkit.inference import scan
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
    checked_step = scan._checked

    def unchecked_step(post, where):  # a band's last step without the finite-scores check
        return lambda y0, band: band if post is None else post(band)

    def run(checked: bool) -> float:
        model.input_stats = stats if checked else None
        scan._checked = checked_step if checked else unchecked_step
        tic = time.perf_counter()
        predict_scores(model, img, scan="rows", logits=True)
        return time.perf_counter() - tic

    best = {True: float("inf"), False: float("inf")}
    for _ in range(a.repeats):
        for checked in (False, True):
            best[checked] = min(best[checked], run(checked))
    scan._checked = checked_step
    print(f"demo net, {a.side}x{a.side} float32 4-band image, row streaming, best of {a.repeats}:")
    print(f"  without checks {best[False]:.2f} s, with checks {best[True]:.2f} s: ratio {best[True] / best[False]:.3f}")


if __name__ == "__main__":
    main()
