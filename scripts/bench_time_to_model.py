"""Time to a useful model, from nothing: render synthetic scenes, train demo on them, score the
best model on held-out scenes it never saw. Target: validation mean IoU ≥ 0.85 within 5 minutes of wall time
on 2 cores, data generation included.

Prints the training curve (epoch, seconds since the start including scene rendering, validation mIoU) and
the held-out test mIoU. Timings on a shared machine are noisy; the load average is printed with them.

    .venv/bin/python scripts/bench_time_to_model.py [--config demo] [--scenes 40] [--size 256]
        [--set threads=1 ...]
"""

from __future__ import annotations

import argparse
import csv
import os
import tempfile
import time
import tomllib
from pathlib import Path

import torch

from fcnkit import Model, load_config
from fcnkit.config import replace_section
from fcnkit.data.dataset import find_samples
from fcnkit.data.imageio import read_image, read_mask
from fcnkit.data.scenes import make_scenes
from fcnkit.metrics import segmentation_scores
from fcnkit.train import validate


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--config", default="demo")
    ap.add_argument("--scenes", type=int, default=40, help="training scenes (the trainer holds out its val split)")
    ap.add_argument("--test", type=int, default=10, help="held-out test scenes")
    ap.add_argument("--size", type=int, default=256, help="scene side in pixels")
    ap.add_argument("--seed", type=int, default=2026)
    ap.add_argument("--set", action="append", default=[], metavar="KEY=VALUE",
                    help="override a [train] key, value in TOML syntax (e.g. --set threads=1 --set bf16=true)")
    args = ap.parse_args()
    cfg = load_config(args.config)
    changes = {k: tomllib.loads(f"v = {v}")["v"] for k, v in (item.split("=", 1) for item in args.set)}
    if changes:
        cfg = replace_section(cfg, "train", **changes)
        print("overrides: " + ", ".join(f"train.{k} = {v!r}" for k, v in changes.items()))
    print(f"load average before: {os.getloadavg()[0]:.1f} on {os.cpu_count()} cores; torch threads "
          f"{cfg.train.threads or torch.get_num_threads()}")
    start = time.perf_counter()
    with tempfile.TemporaryDirectory() as tmp:
        train_dir = make_scenes(Path(tmp) / "train", args.scenes, args.size, args.seed)
        test_dir = make_scenes(Path(tmp) / "test", args.test, args.size, args.seed + 1)
        rendered = time.perf_counter() - start
        print(f"rendered {args.scenes} + {args.test} scenes of {args.size}x{args.size} px in {rendered:.1f} s")
        model = Model.build(cfg).fit(train_dir, out_dir=Path(tmp) / "run", progress=True)
        result = model.last_run
        trained = time.perf_counter() - start
        rows = list(csv.DictReader((Path(tmp) / "run" / "metrics.csv").open()))
        samples, classes = find_samples(test_dir)
        cm, _, _ = validate(model, [read_image(s.image) for s in samples],
                            [read_mask(s.mask, classes) for s in samples])
        test = segmentation_scores(cm)
    total = time.perf_counter() - start
    print(f"\n{'epoch':>5}{'seconds':>9}{'val mIoU':>10}{'train loss':>12}{'Mpx/s':>8}")
    for r in rows:
        print(f"{r['epoch']:>5}{float(r['seconds']) + rendered:>9.1f}{float(r['val_mean_iou']):>10.4f}"
              f"{float(r['train_loss']):>12.4f}{float(r['pixels_per_second']) / 1e6:>8.3f}")
    reached = next((float(r["seconds"]) + rendered for r in rows if float(r["val_mean_iou"]) >= 0.85), None)
    print(f"\nbest val mIoU {result.best_mean_iou:.4f} (epoch {result.best_epoch}); held-out test mIoU "
          f"{test['mean_iou']:.4f}, pixel accuracy {test['pixel_accuracy']:.4f}")
    print("per-class test IoU: " + ", ".join(f"{n} {v:.3f}" for n, v in zip(classes.names, test["iou"], strict=True)))
    print(f"val mIoU >= 0.85 first reached at {reached:.1f} s" if reached else "val mIoU 0.85 not reached")
    print(f"wall time: scenes {rendered:.1f} s, through training {trained:.1f} s, total {total:.1f} s "
          f"(target: 0.85 within 300 s); load average after: {os.getloadavg()[0]:.1f}")


if __name__ == "__main__":
    main()
