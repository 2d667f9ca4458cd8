"""Memory a forward pass or a training step needs, and refusing tile, batch or patch settings that cannot fit.

A tile batch that does not fit in memory does not fail cleanly: the machine swaps, or the kernel's
out-of-memory killer ends the process (and maybe a colleague's) hours into a run. So tiled inference
estimates the peak memory of one forward pass from the net's layer graph before it starts, and refuses a
setting above the memory available, naming a batch or tile size that fits.

The estimate replays the graph in order with float32 activations: each layer's output (channels ×
(tile / its stride)² × batch) lives from the layer that makes it until the last layer that reads it, so skip
connections stay alive and plain chains hold two activations at a time; the peak of that sum is the estimate.
It leaves out the framework's scratch buffers, so it is a floor for the true peak; the check multiplies it by
HEADROOM (scripts/bench_memory.py measured the real peak at 1.09-1.40x the floor for the shipped configs).

A training step keeps every activation for the backward pass, so its estimate is all activations of a batch
of patches at once, times TRAIN_FACTOR (batch norm and ReLU outputs, which the layer graph folds into their
convolutions, and the gradients), plus the weights, their gradients and the optimiser's two moments.
"""

from __future__ import annotations

import math
import os
from collections.abc import Callable, Sequence

from fcnkit import geometry
from fcnkit.errors import ConfigError
from fcnkit.geometry import INPUT, Layer

# Growth of a training step's peak resident memory per byte of activations, measured from the peaks at
# batch 8 × 128² and 4 × 256² patches: 1.23 (unet), 1.41 (demo), 1.66 (fcn8s), 1.74 (tiny).
TRAIN_FACTOR = 2.0
HEADROOM = 1.5  # measured peak / floor: 1.09-1.40 over configs/*.toml at 1024² px x 2 (bench_memory.py)
MEMORY_ENV = "FCNKIT_MAX_MEMORY"  # optional cap, e.g. "4G": the most memory fcnkit may plan a forward pass for
_UNITS = {"": 1, "K": 2**10, "M": 2**20, "G": 2**30, "T": 2**40}


def channels(graph: Sequence[Layer], bands: int) -> dict[str, int]:
    """Output channels of every node (convolutions set them, concatenation sums them, the rest keep them)."""
    ch = {INPUT: bands}
    for layer in graph:
        if layer.op in ("conv", "deconv"):
            ch[layer.name] = layer.cout
        elif layer.op == "concat":
            ch[layer.name] = sum(ch[i] for i in layer.inputs)
        else:
            ch[layer.name] = ch[layer.inputs[0]]
    return ch


def forward_bytes(graph: Sequence[Layer], height: int, width: int, batch: int, bands: int,
                  itemsize: int = 4) -> int:
    """Peak bytes of the activations alive at once in one forward pass over ``batch`` inputs of height×width
    (each output freed after its last reader; see the module docstring)."""
    jump = geometry.jumps(graph)
    ch = channels(graph, bands)

    def size(name: str) -> int:
        j = jump[name]
        return ch[name] * math.ceil(height / j) * math.ceil(width / j) * batch * itemsize

    last_read = {name: i for i, layer in enumerate(graph) for name in layer.inputs}
    live = {INPUT: size(INPUT)}
    peak = live[INPUT]
    for i, layer in enumerate(graph):
        live[layer.name] = size(layer.name)
        peak = max(peak, sum(live.values()))
        for name in layer.inputs:
            if last_read.get(name) == i:
                live.pop(name, None)
    return peak


def peak_bytes(graph: Sequence[Layer], height: int, width: int, batch: int, bands: int) -> int:
    """The memory planned for a forward pass: the activation floor times HEADROOM."""
    return math.ceil(HEADROOM * forward_bytes(graph, height, width, batch, bands))


def parse_size(text: str) -> int:
    """Bytes from "512M", "4G", "1.5G" or a plain number of bytes."""
    t = text.strip().upper().removesuffix("B").removesuffix("I")
    unit = t[-1:] if t[-1:] in _UNITS else ""
    try:
        value = float(t[: len(t) - len(unit)])
    except ValueError:
        raise ConfigError(f"{MEMORY_ENV}: {text!r} is not a size (expected e.g. 512M, 4G or bytes)") from None
    if not value > 0:
        raise ConfigError(f"{MEMORY_ENV}: {text!r} must be positive")
    return int(value * _UNITS[unit])


def available_memory() -> int:
    """Bytes this process may use: MemAvailable from /proc/meminfo (Linux), else free physical pages
    (os.sysconf), capped by the FCNKIT_MAX_MEMORY environment variable when set."""
    avail = None
    try:
        with open("/proc/meminfo") as f:
            for line in f:
                if line.startswith("MemAvailable:"):
                    avail = int(line.split()[1]) * 1024
                    break
    except OSError:
        pass
    if avail is None:
        try:
            avail = os.sysconf("SC_AVPHYS_PAGES") * os.sysconf("SC_PAGE_SIZE")
        except (ValueError, OSError, AttributeError):
            avail = 2**62  # unknown: do not refuse
    cap = os.environ.get(MEMORY_ENV)
    return min(avail, parse_size(cap)) if cap else avail


def _gib(n: float) -> str:
    if n >= 2**28:
        return f"{n / 2**30:.2f} GiB"
    return f"{n / 2**20:.0f} MiB" if n >= 2**20 else f"{math.ceil(n / 2**10)} KiB"


def _over_budget(cost: Callable[[int], int], batch: int, available: int | None) -> tuple[int, int, int] | None:
    """None when ``cost(batch)`` bytes fit in ``available`` (default :func:`available_memory`); else the bytes
    needed, the bytes available and the largest smaller batch that fits (0 if none)."""
    available = available_memory() if available is None else available
    need = cost(batch)
    if need <= available:
        return None
    return need, available, max((b for b in range(1, batch) if cost(b) <= available), default=0)


def check_forward_memory(graph: Sequence[Layer], height: int, width: int, batch: int, bands: int, *,
                         factor: int = 1, available: int | None = None) -> int:
    """Refuse (ConfigError) a batch of height×width tiles whose forward pass would not fit in ``available``
    bytes (default :func:`available_memory`), suggesting a batch, or else a tile, that fits; returns the
    estimate in bytes."""
    over = _over_budget(lambda b: peak_bytes(graph, height, width, b, bands), batch, available)
    if over is None:
        return peak_bytes(graph, height, width, batch, bands)
    need, available, fits = over
    if fits:
        hint = f"use batch {fits} (--batch {fits}) or smaller tiles"
    else:
        side = max(height, width)
        while side > factor and peak_bytes(graph, min(side, height), min(side, width), 1, bands) > available:
            side = max(factor, side // 2 // factor * factor)
        if peak_bytes(graph, min(side, height), min(side, width), 1, bands) > available:
            hint = f"even one {side}x{side} px tile needs {_gib(peak_bytes(graph, side, side, 1, bands))}; " \
                   "free memory or use a smaller net"
        else:
            hint = f"use tile {side} with batch 1 (--tile {side} --batch 1)"
    tiles = f"{batch} tiles of {height}x{width} px need" if batch > 1 else f"one tile of {height}x{width} px needs"
    raise ConfigError(f"tile/batch: {tiles} about {_gib(need)} of memory for "
                      f"the forward pass, more than the {_gib(available)} available; {hint}")


def training_bytes(graph: Sequence[Layer], patch: int, batch: int, bands: int, params: int) -> int:
    """Memory of one training step on ``batch`` patches of patch×patch px: every activation kept for the
    backward pass (times TRAIN_FACTOR) and four float32 copies of the ``params`` weights (weights, gradients,
    two optimiser moments)."""
    jump = geometry.jumps(graph)
    ch = channels(graph, bands)
    acts = sum(ch[n] * math.ceil(patch / jump[n]) ** 2 for n in ch) * batch * 4
    return math.ceil(TRAIN_FACTOR * acts) + 16 * params


def check_training_memory(graph: Sequence[Layer], patch: int, batch: int, bands: int, params: int, *,
                          available: int | None = None) -> int:
    """Refuse (ConfigError) a train.batch × train.patch whose training step would not fit in ``available`` bytes
    (default :func:`available_memory`), naming a batch that fits; returns the estimate in bytes."""
    over = _over_budget(lambda b: training_bytes(graph, patch, b, bands, params), batch, available)
    if over is None:
        return training_bytes(graph, patch, batch, bands, params)
    need, available, fits = over
    hint = f"use train.batch = {fits}" if fits else "use a smaller train.patch"
    raise ConfigError(f"train.batch: {batch} patches of {patch}x{patch} px need about {_gib(need)} of memory for "
                      f"a training step, more than the {_gib(available)} available; {hint}")
