"""Data pipeline figures: scene rendering speed, patch sampling speed, mosaic writing speed and memory.

    .venv/bin/python scripts/bench_data.py [--mosaic 16384]

Timings on a shared machine are noisy, so each figure is also given as a ratio measured in this run: scene
time against its 0.1 s budget, augmented against plain patches, mosaic peak memory against the image's size.
"""

from __future__ import annotations

import argparse
import resource
import tempfile
import time
from pathlib import Path

import numpy as np
import torch

from fcnkit.data.patches import PatchDataset
from fcnkit.data.scenes import render_scene, write_mosaic


def _rss_mb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024  # Linux reports KiB


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--mosaic", type=int, default=8192, help="mosaic side in pixels (default 8192)")
    ap.add_argument("--scenes", type=int, default=20, help="256×256 scenes to time (default 20)")
    args = ap.parse_args()
    torch.set_num_threads(1)  # as in DataLoader workers

    render_scene(256, np.random.default_rng(0))
    t, cpu = time.perf_counter(), time.process_time()
    for i in range(args.scenes):
        render_scene(256, np.random.default_rng([1, i]))
    per_scene = (time.perf_counter() - t) / args.scenes
    per_scene_cpu = (time.process_time() - cpu) / args.scenes  # less sensitive to other processes
    print(f"render 256×256×4 scene: {per_scene * 1000:.1f} ms wall, {per_scene_cpu * 1000:.1f} ms CPU "
          f"({per_scene_cpu / 0.1:.2f} of the 0.1 s budget; {0.065536 / per_scene_cpu:.2f} MP/s per core)")

    big_image, big_mask = render_scene(1024, np.random.default_rng(2))
    rates = {}
    for augment in (False, True):
        ds = PatchDataset([big_image], [big_mask], 128, 200, balanced=True, augment=augment, seed=0)
        ds[0]
        cpu = time.process_time()
        for i in range(len(ds)):
            ds[i]
        rates[augment] = len(ds) / (time.process_time() - cpu)
    print(f"128×128×4 balanced patches per CPU second: {rates[False]:.0f} plain, {rates[True]:.0f} augmented "
          f"(augmented ÷ plain = {rates[True] / rates[False]:.2f})")

    side = args.mosaic
    with tempfile.TemporaryDirectory() as tmp:
        before = _rss_mb()
        t, cpu = time.perf_counter(), time.process_time()
        write_mosaic(Path(tmp) / "m.tif", side, 0, mask_path=Path(tmp) / "m_labels.tif")
        seconds, cpu = time.perf_counter() - t, time.process_time() - cpu
        grew = _rss_mb() - before
        size_mb = (Path(tmp) / "m.tif").stat().st_size / 2**20
    image_mb = side * side * 4 / 2**20
    print(f"mosaic {side}×{side}×4 + labels: {seconds:.1f} s wall, {cpu:.1f} s CPU "
          f"({side * side / 1e6 / cpu:.1f} MP per CPU second), file "
          f"{size_mb:.0f} MiB; peak RSS grew {grew:.0f} MiB = {grew / image_mb:.3f} of the image's "
          f"{image_mb:.0f} MiB (process peak {_rss_mb():.0f} MiB, of which {before:.0f} before writing)")


if __name__ == "__main__":
    main()
