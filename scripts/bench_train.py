"""Training throughput of a config's net on this CPU: pixels/s and achieved FLOP/s as a fraction of a
float32 matrix-multiply peak measured in the same run.

FLOPs per training step are counted as 3 × 2 × MACs: the forward pass's multiply–accumulates from
fcnkit.geometry (2 FLOPs each), and the backward pass taken as twice the forward (gradients with respect to
inputs and to weights; a common rule of thumb). Batch-norm, ReLU, loss and optimiser work are not counted,
so the fraction is a slight underestimate. The peak is the best of several torch.mm calls on large square
float32 matrices. Timings on a shared machine are noisy: each figure is the best of a few repeats.

    .venv/bin/python scripts/bench_train.py [demo] [--batch 8] [--patch 128] [--steps 6]
"""

from __future__ import annotations

import argparse
import time

import torch
from torch.nn import functional as F

from fcnkit import geometry, load_config
from fcnkit.nets import build_model, layer_graph


def matmul_peak(n: int = 2048, repeats: int = 5) -> float:
    """float32 FLOP/s of torch.mm on n×n matrices (2n³ FLOPs per product), best of ``repeats``."""
    a, b = torch.randn(n, n), torch.randn(n, n)
    torch.mm(a, b)
    best = float("inf")
    for _ in range(repeats):
        tic = time.perf_counter()
        torch.mm(a, b)
        best = min(best, time.perf_counter() - tic)
    return 2 * n**3 / best


def step_time(cfg, batch: int, patch: int, steps: int, channels_last: bool, bf16: bool) -> float:
    """Best seconds per training step (forward, cross-entropy, backward, AdamW step) over ``steps``."""
    torch.manual_seed(0)
    fmt = torch.channels_last if channels_last else torch.contiguous_format
    model = build_model(cfg).to(memory_format=fmt).train()
    opt = torch.optim.AdamW(model.parameters(), lr=1e-3)
    x = torch.randn(batch, cfg.model.bands, patch, patch).contiguous(memory_format=fmt)
    y = torch.randint(0, cfg.model.num_classes, (batch, patch, patch))
    best = float("inf")
    for i in range(steps + 2):  # two warm-up steps
        tic = time.perf_counter()
        with torch.autocast("cpu", dtype=torch.bfloat16, enabled=bf16):
            logits = model(x)
        loss = F.cross_entropy(logits.float(), y)
        opt.zero_grad(set_to_none=True)
        loss.backward()
        opt.step()
        if i >= 2:
            best = min(best, time.perf_counter() - tic)
    return best


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("config", nargs="?", default="demo")
    ap.add_argument("--batch", type=int, default=8)
    ap.add_argument("--patch", type=int, default=128)
    ap.add_argument("--steps", type=int, default=6)
    ap.add_argument("--threads", type=int, default=0, help="torch threads (0 = torch's default)")
    args = ap.parse_args()
    if args.threads:
        torch.set_num_threads(args.threads)
    cfg = load_config(args.config)
    macs = geometry.macs(layer_graph(build_model(cfg)), args.patch, args.patch) * args.batch
    flops = 3 * 2 * macs
    before = matmul_peak()
    variants = (("float32 channels_last", True, False), ("float32 NCHW", False, False),
                ("bf16 autocast channels_last", True, True))
    times = [step_time(cfg, args.batch, args.patch, args.steps, cl, bf) for _, cl, bf in variants]
    after = matmul_peak()
    peak = max(before, after)  # the machine's best: a busy moment lowers one of the two measurements
    print(f"config {args.config}: batch {args.batch} x {args.patch}x{args.patch} px, {torch.get_num_threads()} "
          f"threads, {macs / 1e9:.2f} GMAC forward per step")
    print(f"float32 matmul peak (torch.mm 2048^2, this run): {before / 1e9:.1f} GFLOP/s before, "
          f"{after / 1e9:.1f} after; the higher is used")
    print(f"{'variant':<28}{'s/step':>9}{'Mpx/s':>9}{'GFLOP/s':>10}{'of peak':>9}")
    for (name, _, _), t in zip(variants, times, strict=True):
        px = args.batch * args.patch**2 / t
        print(f"{name:<28}{t:>9.3f}{px / 1e6:>9.3f}{flops / t / 1e9:>10.1f}{flops / t / peak:>9.2f}")
    print("FLOPs = 3 x 2 x forward MACs (backward taken as 2x forward); bf16 is compared with the float32 peak")


if __name__ == "__main__":
    main()
