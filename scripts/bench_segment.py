"""Whole-process mapping: ``fcnkit segment`` against a naive whole-image script, and peak memory at 268 MP.

One synthetic 4-band GeoTIFF (a Kessmoor mosaic, 3000×3000 = 9 MP by default) and the demo net with random
weights are written first (in a child process, so this one stays small). Then, in interleaved rounds, two
fresh processes map it:

* ``fcnkit``: ``python -m fcnkit segment MODEL IMAGE --out DIR --quiet``, every default output (labels,
  confidence and uncertainty as Cloud-Optimised GeoTIFFs with overviews, overlay, preview card, area tables);
* ``naive``: the script below: import torch and fcnkit, load the model, read the image with rasterio, one
  whole-image NCHW float32 forward pass, argmax, write the labels as a GeoTIFF.

Each process's wall time and peak resident set (``ru_maxrss`` from ``os.wait4``: the child's own, since this
process stays smaller than it) are taken; the figure is naive time ÷ fcnkit time per round (>1: fcnkit
faster), median and spread. ``--memory`` also maps a 16384×16384 mosaic (268 MP) with ``fcnkit segment`` and
prints its peak resident set (target ≤ 1.5 GB).

    .venv/bin/python scripts/bench_segment.py [--side 3000] [--rounds 3] [--memory] [--work DIR]
"""

from __future__ import annotations

import argparse
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]

NAIVE = '''\
import sys

import numpy as np
import rasterio
import torch

from fcnkit import Model

model = Model.load(sys.argv[1]).eval()
with rasterio.open(sys.argv[2]) as src:
    image = src.read().astype(np.float32)  # B x H x W
    profile = src.profile
with torch.no_grad():
    logits = model(torch.from_numpy(image)[None])  # the whole image, NCHW, float32
labels = logits.argmax(1)[0].numpy().astype(np.uint8)
profile.update(count=1, dtype="uint8", nodata=None)
with rasterio.open(sys.argv[3], "w", **profile) as dst:
    dst.write(labels, 1)
'''

PREPARE = '''\
import sys
sys.path.insert(0, sys.argv[1])
sys.path.insert(0, sys.argv[1] + "/scripts")
from bench_mapping import random_model
from fcnkit.data.scenes import write_mosaic
random_model("demo").save(sys.argv[2])
for side, path in zip(sys.argv[3::2], sys.argv[4::2]):
    write_mosaic(path, int(side), 0)
'''


def run(cmd: list[str]) -> tuple[float, float]:
    """A child process's wall time (s) and peak resident set (GB); raises if it fails."""
    t = time.perf_counter()
    env = {**os.environ, "PYTHONPATH": str(ROOT)}  # the fcnkit of this checkout, in both processes
    proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, cwd=ROOT, env=env)
    _, status, usage = os.wait4(proc.pid, 0)
    seconds = time.perf_counter() - t
    err = proc.stderr.read().decode() if proc.stderr else ""
    proc.returncode = os.waitstatus_to_exitcode(status)
    if proc.returncode:
        raise RuntimeError(f"{' '.join(cmd)} failed ({proc.returncode}):\n{err}")
    return seconds, usage.ru_maxrss / 2**20  # Linux reports KiB


def spread(v: list[float]) -> str:
    return f"{statistics.median(v):.2f} ({min(v):.2f}–{max(v):.2f})"


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--side", type=int, default=3000)
    ap.add_argument("--rounds", type=int, default=3)
    ap.add_argument("--memory", action="store_true", help="also map a 268 MP mosaic and report its peak memory")
    ap.add_argument("--mosaic-side", type=int, default=16384)
    ap.add_argument("--work", default=None, help="folder for the inputs and outputs (default: a temporary one)")
    a = ap.parse_args()
    work = Path(a.work) if a.work else Path(tempfile.mkdtemp(prefix="bench-segment-"))
    work.mkdir(parents=True, exist_ok=True)
    model, image = work / "demo.safetensors", work / f"kessmoor{a.side}.tif"
    mosaic = work / f"mosaic{a.mosaic_side}.tif"
    todo = [(a.side, image)] + ([(a.mosaic_side, mosaic)] if a.memory else [])
    todo = [(s, p) for s, p in todo if not p.exists()]
    subprocess.run([sys.executable, "-c", PREPARE, str(ROOT), str(model), *[str(x) for s, p in todo for x in (s, p)]],
                   check=True)
    naive = work / "naive_segment.py"
    naive.write_text(NAIVE)
    py = sys.executable
    cmds = {"fcnkit": [py, "-m", "fcnkit", "segment", str(model), str(image), "--out", str(work / "out"), "--quiet",
                       "--overwrite"],
            "naive": [py, str(naive), str(model), str(image), str(work / "naive.labels.tif")]}
    print(f"{a.side}x{a.side} 4-band GeoTIFF ({a.side**2 / 1e6:.0f} MP), demo net, {os.cpu_count()} cores; "
          f"{a.rounds} interleaved rounds of two fresh processes; ratio: naive time / fcnkit time (>1: fcnkit faster)")
    times: dict[str, list[float]] = {k: [] for k in cmds}
    peaks: dict[str, list[float]] = {k: [] for k in cmds}
    for r in range(a.rounds):
        for k, cmd in cmds.items():
            s, gb = run(cmd)
            times[k].append(s)
            peaks[k].append(gb)
        print(f"  round {r + 1}: fcnkit {times['fcnkit'][-1]:.1f} s, naive {times['naive'][-1]:.1f} s, "
              f"ratio {times['naive'][-1] / times['fcnkit'][-1]:.2f}", flush=True)
    ratios = [n / f for n, f in zip(times["naive"], times["fcnkit"], strict=True)]
    print(f"whole process, naive / fcnkit segment: {spread(ratios)} (target >= 2.5); fcnkit {spread(times['fcnkit'])} "
          f"s, naive {spread(times['naive'])} s; peak RSS fcnkit {max(peaks['fcnkit']):.2f} GB, naive "
          f"{max(peaks['naive']):.2f} GB")
    if a.memory:
        s, gb = run([py, "-m", "fcnkit", "segment", str(model), str(mosaic), "--out", str(work / "mosaic_out"),
                     "--quiet", "--overwrite"])
        mp = a.mosaic_side**2 / 1e6
        print(f"{a.mosaic_side}x{a.mosaic_side} mosaic ({mp:.0f} MP): fcnkit segment {s:.0f} s ({mp / s:.2f} MP/s, "
              f"outputs included), peak RSS {gb:.2f} GB (target <= 1.5 GB)")
    print(f"files in {work}")


if __name__ == "__main__":
    main()
