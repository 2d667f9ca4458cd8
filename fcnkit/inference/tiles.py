"""Overlapping tiles: plans on the net's grid, and blending their class scores into finished bands of rows.

The image is cut into overlapping tiles whose origins lie on multiples of the net's down-sampling factor, so
every tile sees the same pooling grid as the whole image. Tiles are read one batch at a time (the next batch is
read while the net runs), and each tile's class scores, weighted by a blending window (:mod:`fcnkit.windows`),
are added into a float32 buffer one tile row high and the image's width. When a row of tiles is done, the rows
above the next one receive nothing more: they are divided by their total weight and handed on, so memory does
not grow with the image's height. Because the tiles form a grid and the weights are outer products, the total
weight at a pixel is the product of two 1-D sums: no weight array is stored.

Tiles end at the image border instead of running past it, and a tile side lying on the border gets no taper,
so the net sees the same border the whole image has and weights never vanish there.

Exact tiles keep only the pixels at least the receptive-field radius (``tile margin`` of
:mod:`fcnkit.geometry`) away from any interior tile edge, centre-crop style: the result then equals
whole-image inference (to float rounding), which is impossible for nets with global layers.
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable, Iterator, Sequence
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass

import numpy as np
import torch

from fcnkit.data.raster import Raster
from fcnkit.errors import ConfigError
from fcnkit.inference.engines import Engine
from fcnkit.nets.graph import NetGeometry
from fcnkit.units import pixel_rate
from fcnkit.windows import check_window, window

DEFAULT_TILE = 512
# Measured with scripts/bench_tiling.py on a 2-core CPU: one pass of a 512×512 tile ran 1.4× faster per pixel
# than a batch of four (activations of a few tens of MB stay in the last-level cache).
AUTO_BATCH_PIXELS = 512 * 512


def default_overlap(geom: NetGeometry, tile: int) -> int:
    """Blend-mode overlap: the receptive-field radius rounded up to the factor, at most a quarter tile
    (a quarter tile when the net has global layers)."""
    f = geom.factor
    cap = max(f, tile // 4 // f * f)
    return cap if geom.margin is None else min(cap, math.ceil(geom.margin / f) * f)


# --- tile plans (pure) ------------------------------------------------------------------------------------


@dataclass(frozen=True)
class Span:
    """One tile along one axis: pixels start..stop, overlapping the previous tile by ``rise`` pixels and the
    next one by ``fall`` (0 at the image border)."""

    start: int
    stop: int
    rise: int
    fall: int


def plan_axis(length: int, tile: int, step: int, factor: int) -> tuple[Span, ...]:
    """Tiles of ``tile`` pixels covering 0..length, origins on multiples of ``factor``, spread evenly with
    gaps of at most ``step``; the last tile ends at the image end (up to factor−1 pixels longer)."""
    if length <= tile:
        return (Span(0, length, 0, 0),)
    # shrink the tiles to the smallest size that needs no more tiles, so no thin extra tile is computed
    overlap = tile - step
    n = math.ceil((length - overlap) / step)
    tile = min(tile, math.ceil((math.ceil((length - overlap) / n) + overlap) / factor) * factor)
    step = min(step, tile - overlap)
    last = (length - tile) // factor * factor
    n = math.ceil(last / step) + 1
    origins = [k * (last // factor) // max(n - 1, 1) * factor for k in range(n)]
    stops = [o + tile for o in origins[:-1]] + [length]
    return tuple(Span(o, s, stops[k - 1] - o if k else 0, s - origins[k + 1] if k + 1 < n else 0)
                 for k, (o, s) in enumerate(zip(origins, stops, strict=True)))


@dataclass(frozen=True)
class Tile:
    row: Span
    col: Span

    @property
    def shape(self) -> tuple[int, int]:
        return self.row.stop - self.row.start, self.col.stop - self.col.start


@dataclass(frozen=True)
class TilePlan:
    """A grid of tiles over an image and the window that blends them."""

    height: int
    width: int
    tile: int
    overlap: int
    factor: int
    window: str
    rows: tuple[Span, ...]
    cols: tuple[Span, ...]

    def tiles(self) -> list[Tile]:
        return [Tile(r, c) for r in self.rows for c in self.cols]

    def weights(self, tile: Tile) -> np.ndarray:
        """h×w float32 blending weights of one tile."""
        wy = window(self.window, tile.row.stop - tile.row.start, tile.row.rise, tile.row.fall)
        wx = window(self.window, tile.col.stop - tile.col.start, tile.col.rise, tile.col.fall)
        return np.outer(wy, wx).astype(np.float32)

    def total_weight(self, axis: int) -> np.ndarray:
        """Sum of all tiles' 1-D windows along ``axis`` (0 = rows, 1 = columns), float64."""
        spans, length = (self.rows, self.height) if axis == 0 else (self.cols, self.width)
        total = np.zeros(length)
        for s in spans:
            total[s.start:s.stop] += window(self.window, s.stop - s.start, s.rise, s.fall)
        return total


def plan_tiles(geom: NetGeometry, height: int, width: int, *, tile: int = 512, overlap: int | None = None,
               window: str = "hann", exact: bool = False) -> TilePlan:
    """Plan the tiles for an image; ConfigError naming the option when the request cannot be met.

    ``exact`` forces centre-crop tiles with an overlap of twice the tile margin, so every kept pixel has its
    whole receptive field inside its tile.
    """
    try:
        check_window(window)
    except ValueError as e:
        raise ConfigError(str(e)) from None
    f = geom.factor
    if tile < f:
        raise ConfigError(f"tile: {tile} is smaller than the net's down-sampling factor {f}")
    tile = tile // f * f
    if exact:
        if geom.margin is None:
            raise ConfigError("exact tiling is impossible: layers " + ", ".join(geom.global_layers)
                              + " make every output depend on the whole image; use a blending window instead")
        need = 2 * geom.margin
        if overlap is not None and overlap < need:
            raise ConfigError(f"overlap: {overlap} is below the {need} px (twice the tile margin {geom.margin}) "
                              "that exact tiling needs")
        overlap, window = max(overlap or 0, need), "none"
        if tile - overlap < f:
            raise ConfigError(f"tile: {tile} px is too small for exact tiling: the net needs a margin of "
                              f"{geom.margin} px on each side; use tile >= {math.ceil((need + f) / f) * f}")
    elif overlap is None:
        overlap = default_overlap(geom, tile)
    if overlap < 0:
        raise ConfigError(f"overlap: {overlap} must be >= 0")
    step = (tile - overlap) // f * f
    if step < f:
        raise ConfigError(f"overlap: {overlap} leaves no room in a tile of {tile} px (factor {f}); "
                          f"use overlap <= {tile - f}")
    return TilePlan(height, width, tile, overlap, f, window, plan_axis(height, tile, step, f),
                    plan_axis(width, tile, step, f))


def batches(plan: TilePlan, size: int) -> list[list[Tile]]:
    """The tiles of ``plan`` in forward passes of at most ``size`` equally shaped tiles, one tile row at a time
    (so each row of tiles is finished before the next begins)."""
    out: list[list[Tile]] = []
    for row in plan.rows:
        for col in plan.cols:
            tile = Tile(row, col)
            if out and len(out[-1]) < size and out[-1][0].shape == tile.shape and out[-1][0].row == row:
                out[-1].append(tile)
            else:
                out.append([tile])
    return out


def auto_batch(plan: TilePlan, pixels: int = AUTO_BATCH_PIXELS) -> int:
    """Tiles per forward pass when none is given: as many as keep one pass within ``pixels`` input pixels
    (at least one). Larger passes spill the activations out of the CPU's caches and run slower per pixel."""
    return max(1, pixels // (plan.tile * plan.tile))



# --- blending ---------------------------------------------------------------------------------------------


Probabilities = Callable[[torch.Tensor], torch.Tensor]  # logits N×C×h×w → class probabilities (over dim 1)


def _scores(engine: Engine, x: torch.Tensor, tta: bool, probabilities: Probabilities | None) -> torch.Tensor:
    """Class scores N×C×h×w (contiguous: softmax over C runs several times faster than on channels-last) of a
    batch, as ``probabilities`` of the logits (or the logits, when None), averaged over the four flips when
    ``tta``."""
    flips: list[tuple[int, ...]] = [(), (-1,), (-2,), (-2, -1)] if tta else [()]
    total = None
    for dims in flips:
        y = engine(x.flip(dims) if dims else x)
        y = (y.flip(dims) if dims else y).contiguous()
        y = y if probabilities is None else probabilities(y)
        total = y if total is None else total.add_(y)
    return total / len(flips) if tta else total


def _load(raster: Raster, tiles: Sequence[Tile]) -> torch.Tensor:
    """Read a batch of equally shaped tiles as an N×B×h×w float32 tensor of raw pixels."""
    arr = np.stack([raster.read(t.row.start, t.row.stop, t.col.start, t.col.stop) for t in tiles])
    return torch.from_numpy(arr.astype(np.float32, copy=False)).permute(0, 3, 1, 2)


def stream_tiles(engine: Engine, raster: Raster, plan: TilePlan, *, batch: int, tta: bool = False,
                 probabilities: Probabilities | None = None, progress: bool = False,
                 desc: str = "tiles") -> Iterator[tuple[int, torch.Tensor]]:
    """Run every tile of ``plan`` through ``engine`` (raw pixels in, logits out) and yield the blended class
    scores (``probabilities`` of the logits, or the logits when None) top to bottom, as (first row, C×h×W
    float32) bands that are final when yielded.

    Window-weighted scores are added into a buffer one tile row high and the image's width; once a tile row is
    done, the rows above the next tile row receive nothing more, so they are divided by their total weight and
    handed on, and the rest of the buffer moves up. Memory grows with the image's width, never its height.
    The next batch of tiles is read while the net runs.
    """
    from tqdm import tqdm

    groups = batches(plan, batch)
    wy = torch.from_numpy(plan.total_weight(0).astype(np.float32))
    wx = torch.from_numpy(plan.total_weight(1).astype(np.float32))
    weights: dict[tuple[int, ...], torch.Tensor] = {}  # by tile shape and overlaps (a handful of kinds)
    band_rows = max(r.stop - r.start for r in plan.rows)
    buf: torch.Tensor | None = None
    top, row = 0, plan.rows[0]  # image row of buf[:, 0]; the tile row being filled
    pixels = plan.height * plan.width / 1e6
    bar = tqdm(total=len(plan.rows) * len(plan.cols), unit="tile", desc=desc, disable=not progress, leave=False)
    start = time.perf_counter()
    with ThreadPoolExecutor(1) as pool, bar:
        nxt = pool.submit(_load, raster, groups[0])
        for i, group in enumerate(groups):
            x = nxt.result()
            if i + 1 < len(groups):
                nxt = pool.submit(_load, raster, groups[i + 1])
            if group[0].row != row:  # a tile row is done: hand on what is final, move the rest up
                yield top, _finish(buf, top, group[0].row.start, wy, wx)
                shift = group[0].row.start - top
                buf[:, :band_rows - shift] = buf[:, shift:].clone()
                buf[:, band_rows - shift:] = 0
                top, row = group[0].row.start, group[0].row
            y = _scores(engine, x, tta, probabilities)
            if buf is None:
                buf = torch.zeros(y.shape[1], band_rows, plan.width)
            for tile, scores in zip(group, y, strict=True):
                key = (*tile.shape, tile.row.rise, tile.row.fall, tile.col.rise, tile.col.fall)
                if key not in weights:
                    weights[key] = torch.from_numpy(plan.weights(tile))
                region = buf[:, tile.row.start - top:tile.row.stop - top, tile.col.start:tile.col.stop]
                region.addcmul_(scores, weights[key])
            bar.update(len(group))
            bar.set_postfix_str(pixel_rate(pixels * bar.n / bar.total, time.perf_counter() - start))
    yield top, _finish(buf, top, plan.height, wy, wx)


def _finish(buf: torch.Tensor, top: int, stop: int, wy: torch.Tensor, wx: torch.Tensor) -> torch.Tensor:
    """Rows top..stop of the buffer divided by their total blending weight (a new tensor)."""
    return buf[:, :stop - top] / (wy[top:stop, None] * wx[None, :])


