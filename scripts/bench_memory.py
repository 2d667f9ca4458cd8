"""How close fcnkit.memory's forward-pass estimate is to the real peak: for each shipped config, one tiled
forward pass (TorchEngine: BatchNorm folded, channels_last, inference mode) in a fresh process, peak resident
memory rise (ru_maxrss) ÷ the estimated activation floor. The memory check plans HEADROOM × the floor, so
every ratio printed should stay below HEADROOM.

    .venv/bin/python scripts/bench_memory.py [TILE] [BATCH]
"""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
CHILD = """
import resource, sys, torch
from fcnkit import Model, load_config
from fcnkit.inference.engines import TorchEngine
from fcnkit.memory import forward_bytes
from fcnkit.nets import layer_graph
torch.set_num_threads(1)
cfg = load_config(sys.argv[1]); tile, batch = int(sys.argv[2]), int(sys.argv[3])
net = Model.build(cfg).eval()
net.set_normalisation([0.0] * cfg.model.bands, [1.0] * cfg.model.bands)
floor = forward_bytes(layer_graph(net.net), tile, tile, batch, cfg.model.bands)
engine = TorchEngine(net)
engine(torch.zeros(1, cfg.model.bands, 64, 64))  # warm up: one-off allocations are not the pass's
x = torch.zeros(batch, cfg.model.bands, tile, tile).contiguous(memory_format=torch.channels_last)
before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
engine(x)
print(floor, resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024 - before)
"""


def main() -> None:
    from fcnkit.memory import HEADROOM

    tile = int(sys.argv[1]) if len(sys.argv) > 1 else 1024
    batch = int(sys.argv[2]) if len(sys.argv) > 2 else 2
    print(f"tile {tile}, batch {batch}; the check plans {HEADROOM} x the floor")
    print(f"{'config':<12}{'floor MiB':>11}{'measured MiB':>14}{'measured / floor':>18}")
    for config in sorted((ROOT / "fcnkit" / "configs").glob("*.toml")):
        out = subprocess.run([sys.executable, "-c", CHILD, str(config), str(tile), str(batch)], capture_output=True,
                             text=True, check=True).stdout.split()
        floor, rise = int(out[0]), int(out[1])
        print(f"{config.stem:<12}{floor / 2**20:>11.0f}{rise / 2**20:>14.0f}{rise / floor:>18.2f}")


if __name__ == "__main__":
    main()
