"""Benchmark of tiled inference: speed against whole-image inference, against the CPU's matmul peak, bf16,
peak memory on a large mosaic, and time against image size. Random weights (speed does not depend on them).

    .venv/bin/python scripts/bench_tiling.py [--quick] [--mosaic-side 16384] [--out DIR]

Every figure is a ratio of timings taken in this one run, so a shared, noisy machine shifts both sides of
each ratio alike. Two scans are timed: exact row streaming (the default) and overlapping tiles. Targets
(issue 4): mapped MP/s ÷ naive whole-image NCHW float32 ≥ 2.5; ÷ whole-image channels_last ≥ 0.9; achieved
FLOP/s ÷ float32 matmul peak ≥ 0.5; peak RSS on a 16384×16384 4-band mosaic ≤ 1.5 GB; time per pixel for
1, 4, 16 and 64 MP within 10 % of each other.
"""

from __future__ import annotations

import argparse
import json
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import torch

from fcnkit import Model, load_config
from fcnkit.geometry import macs
from fcnkit.inference.engines import TorchEngine
from fcnkit.inference.scan import predict_scores
from fcnkit.inference.tiles import auto_batch, plan_tiles
from fcnkit.nets import layer_graph

ROOT = Path(__file__).resolve().parents[1]


def best_of(fn, repeats: int) -> float:
    """Shortest wall time of ``repeats`` calls (after one warm-up call): the least disturbed measurement."""
    fn()
    times = []
    for _ in range(repeats):
        t = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t)
    return min(times)


def matmul_peak(n: int = 2048, repeats: int = 5) -> float:
    """float32 FLOP/s of torch.mm on n×n matrices, the practical peak of this CPU with these threads."""
    a, b = torch.randn(n, n), torch.randn(n, n)
    return 2 * n**3 / best_of(lambda: torch.mm(a, b), repeats)


def random_net(config: str) -> Model:
    """The config's net with random weights and batch-norm statistics, normalising 8-bit pixels."""
    net = Model.build(load_config(config)).eval()
    net.set_normalisation([128.0] * net.bands, [64.0] * net.bands)
    for m in net.modules():  # non-trivial statistics, as after training
        if isinstance(m, torch.nn.BatchNorm2d):
            m.running_mean.uniform_(-0.2, 0.2)
            m.running_var.uniform_(0.5, 2.0)
    return net


def speed(config: str, side: int, repeats: int, peak: float, tile: int = 512) -> dict:
    """Whole-image baselines, then the default scan (exact row streaming) and overlapping tiles of ``tile`` px,
    each timed as predict_scores on a uint8 image in memory (reading, normalising, softmax included)."""
    net = random_net(config)
    bands = net.bands
    img = np.random.default_rng(0).integers(0, 255, (side, side, bands), dtype=np.uint8)
    x = torch.from_numpy(img).permute(2, 0, 1)[None].float().contiguous()
    mp = side * side / 1e6

    def naive():
        with torch.no_grad():
            net(x)

    cl_engine = TorchEngine(net)  # whole image, channels_last, BN folded, inference mode
    x_cl = x.contiguous(memory_format=torch.channels_last)

    def run(bf16=False, **kw):
        return lambda: predict_scores(net, img, bf16=bf16, **kw)

    t_naive = best_of(naive, repeats)
    t_cl = best_of(lambda: cl_engine(x_cl), repeats)
    t_rows = best_of(run(), repeats)
    t_tiles = best_of(run(scan="tiles", tile=tile), repeats)
    t_bf16 = best_of(run(True), repeats)
    agree = float((run()().argmax(0) == run(True)().argmax(0)).mean())
    graph = layer_graph(net.net)
    useful = 2 * macs(graph, side, side)
    plan = plan_tiles(net.geometry, side, side, tile=tile)
    executed = 2 * sum(macs(graph, *t.shape) for t in plan.tiles())
    return {
        "config": config, "image": f"{side}x{side}x{bands}", "tile": tile, "tile_batch": auto_batch(plan),
        "tiles": len(plan.tiles()), "overlap": plan.overlap,
        "naive_mp_s": mp / t_naive, "whole_cl_mp_s": mp / t_cl, "rows_mp_s": mp / t_rows, "tiles_mp_s": mp / t_tiles,
        "rows_over_naive": t_naive / t_rows, "rows_over_whole_cl": t_cl / t_rows,
        "rows_flops_over_peak": useful / t_rows / peak,
        "tiles_over_naive": t_naive / t_tiles, "tiles_over_whole_cl": t_cl / t_tiles,
        "tiles_useful_flops_over_peak": useful / t_tiles / peak,
        "tiles_executed_flops_over_peak": executed / t_tiles / peak,
        "whole_cl_flops_over_peak": useful / t_cl / peak,
        "bf16_speedup_rows": t_rows / t_bf16, "bf16_label_agreement": agree,
    }


CHILD = """
import json, resource, sys, time
import torch
sys.path.insert(0, {root!r})
from fcnkit import Model, load_config
from fcnkit.inference.segment import segment_image
net = Model.build(load_config({config!r})).eval()
net.set_normalisation([128.0] * net.bands, [64.0] * net.bands)
t = time.perf_counter()
res = segment_image(net, {image!r}, {out!r}, progress=False)
seconds = time.perf_counter() - t
hwm = next(int(line.split()[1]) for line in open("/proc/self/status") if line.startswith("VmHWM"))
again = None
if {again!r}:  # the same image once more, as the next file of a folder: model prepared, kernels built
    t = time.perf_counter()
    segment_image(net, {image!r}, {out!r} + "-again", progress=False)
    again = time.perf_counter() - t
print(json.dumps({{"seconds": seconds, "again": again, "maxrss_kb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss,
                  "hwm_kb": hwm, "labels": str(res.paths["labels"])}}))
"""


def segment_child(config: str, image: Path, out: Path, again: bool = False) -> dict:
    """segment_image in a fresh process: its wall time and its own peak resident set size (and, with ``again``,
    the time of a second run in the same process). The peak is read as VmHWM from /proc (the high-water mark
    of the child's own address space): Linux seeds a child's ru_maxrss at exec with the parent's peak, which
    here is the whole-image runs' memory."""
    code = CHILD.format(root=str(ROOT), config=config, image=str(image), out=str(out), again=again)
    run = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    return json.loads(run.stdout.strip().splitlines()[-1])


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="small sizes, one repeat (a smoke run)")
    ap.add_argument("--mosaic-side", type=int, default=16384)
    ap.add_argument("--out", default=None, help="folder for mosaics and outputs (default: a temporary folder)")
    ap.add_argument("--only", choices=("speed", "scaling", "mosaic"), help="run just one part")
    args = ap.parse_args()
    from fcnkit.data.scenes import write_mosaic

    side, repeats = (1024, 1) if args.quick else (2048, 3)
    scaling_sides = (256, 512, 1024) if args.quick else (1024, 2048, 4096, 8192)
    mosaic_side = 2048 if args.quick else args.mosaic_side
    print(f"torch {torch.__version__}, {torch.get_num_threads()} threads; the 2 cores may be shared with other "
          "work, so absolute speeds are noisy; ratios are taken within this run")
    peak = matmul_peak()
    print(f"float32 matmul peak (torch.mm 2048^3): {peak / 1e9:.1f} GFLOP/s")
    rows = (("demo", 512), ("fcn8s", 512), ("fcn8s", 1024))
    for config, tile in rows if args.only in (None, "speed") else ():
        r = speed(config, side, repeats, peak, tile)
        print(json.dumps(r))
        print(f"  {config} {r['image']}: whole-image NCHW {r['naive_mp_s']:.2f} MP/s, channels_last "
              f"{r['whole_cl_mp_s']:.2f} MP/s ({r['whole_cl_flops_over_peak']:.2f} of peak)\n"
              f"    rows (default scan, exact): {r['rows_mp_s']:.2f} MP/s | / naive NCHW {r['rows_over_naive']:.2f} "
              f"(target >= 2.5) | / whole channels_last {r['rows_over_whole_cl']:.2f} (target >= 0.9) | FLOP/s / "
              f"peak {r['rows_flops_over_peak']:.2f} (target >= 0.5) | bf16 speed-up {r['bf16_speedup_rows']:.2f} "
              f"(labels agree on {r['bf16_label_agreement']:.1%})\n"
              f"    tiles {tile} px (overlap {r['overlap']}, {r['tiles']} tiles, {r['tile_batch']} per pass): "
              f"{r['tiles_mp_s']:.2f} MP/s | / naive {r['tiles_over_naive']:.2f} | / whole channels_last "
              f"{r['tiles_over_whole_cl']:.2f} | useful FLOP/s / peak {r['tiles_useful_flops_over_peak']:.2f} "
              f"(executed incl. overlap {r['tiles_executed_flops_over_peak']:.2f})")

    work = Path(args.out) if args.out else Path(tempfile.mkdtemp(prefix="bench-tiling-"))
    work.mkdir(parents=True, exist_ok=True)
    sizes, seconds, warm = [], [], []
    for s in scaling_sides if args.only in (None, "scaling") else ():
        img = write_mosaic(work / f"scale{s}.tif", s, 1)
        r = segment_child("demo", img, work / f"scale{s}", again=True)
        sizes.append(s * s / 1e6)
        seconds.append(r["seconds"])
        warm.append(r["again"])
        print(f"  time vs pixels: {sizes[-1]:.0f} MP in {r['seconds']:.1f} s = {r['seconds'] / sizes[-1]:.2f} s/MP "
              f"in a fresh process; {r['again']:.1f} s = {r['again'] / sizes[-1]:.2f} s/MP as the next image")
    if sizes:
        warm_per_mp = np.array(warm) / np.array(sizes)
        print(f"  next-image s/MP: largest deviation from their mean "
              f"{np.abs(warm_per_mp / warm_per_mp.mean() - 1).max():.1%} (target: linear within 10%)")
        per_mp = np.array(seconds) / np.array(sizes)
        slope, fixed = np.polyfit(sizes, seconds, 1)  # a straight line: fixed set-up + time per megapixel
        residual = max(abs(t - (fixed + slope * mp)) / t for mp, t in zip(sizes, seconds, strict=True))
        print(f"  straight-line fit: {fixed:.2f} s fixed (model load, BN folding, graph tracing, first kernels) + "
              f"{slope:.3f} s/MP; largest deviation from the line {residual:.1%} (target: linear within 10%); "
              f"s/MP without the fixed part spread {np.ptp(per_mp) / per_mp.mean():.1%} raw, "
              f"{np.ptp((np.array(seconds) - fixed) / np.array(sizes)) / slope:.1%} after it")
    if args.only not in (None, "mosaic"):
        return
    mosaic = work / f"mosaic{mosaic_side}.tif"
    if not mosaic.exists():
        write_mosaic(mosaic, mosaic_side, 2)
    r = segment_child("demo", mosaic, work / "mosaic_out")
    print(f"  {mosaic_side}x{mosaic_side} 4-band mosaic: {r['seconds']:.0f} s "
          f"({mosaic_side**2 / 1e6 / r['seconds']:.2f} MP/s incl. reading and writing outputs), peak RSS "
          f"{r['hwm_kb'] / 2**20:.2f} GB (VmHWM of the child process; target <= 1.5 GB; its ru_maxrss, which "
          f"Linux seeds with the parent's peak, says {r['maxrss_kb'] / 2**20:.2f} GB)")
    print(f"  (this process's own peak RSS: {resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 2**20:.2f} GB)")
    print(f"outputs in {work}")


if __name__ == "__main__":
    main()
