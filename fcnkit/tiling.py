"""Mapping images of any size: the choice of scan, tiled inference with blending, exact tiles, and the files.

Two scans produce the same thing, class scores streamed as finished bands of rows from top to bottom:
exact row streaming (:mod:`fcnkit.rowstream`, the default for config-built nets) and overlapping tiles, for
every other case (global layers, flip TTA, other runtimes, or tile settings asked for).

Tiles: the image is cut into overlapping tiles whose origins lie on multiples of the net's down-sampling
factor, so every tile sees the same pooling grid as the whole image. Tiles are read one batch at a time (the
next batch is read while the net runs), and each tile's class scores, weighted by a blending window
(:mod:`fcnkit.windows`), are added into a float32 buffer one tile row high and the image's width. When a row of
tiles is done, the rows above the next one receive nothing more: they are divided by their total weight and
handed on, so memory does not grow with the image's height. Because the tiles form a grid and the weights are
outer products, the total weight at a pixel is the product of two 1-D sums: no weight array is stored.

Tiles end at the image border instead of running past it, and a tile side lying on the border gets no taper,
so the net sees the same border the whole image has and weights never vanish there.

Exact tiles keep only the pixels at least the receptive-field radius (``tile margin`` of
:mod:`fcnkit.geometry`) away from any interior tile edge, centre-crop style: the result then equals
whole-image inference (to float rounding), which is impossible for nets with global layers.
"""

from __future__ import annotations

import copy
import math
import time
import weakref
from collections.abc import Callable, Iterator, Sequence
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np
import torch
from torch import nn

from fcnkit.data.raster import SEGMENT_MAX_PIXELS, ArrayRaster, Raster
from fcnkit.errors import ConfigError
from fcnkit.rowstream import NotStreamable, RowStreamer
from fcnkit.windows import check_window, window

if TYPE_CHECKING:
    from fcnkit.outputs import OutputOptions

Engine = Callable[[torch.Tensor], torch.Tensor]
IN_MEMORY_PIXELS = 4_000_000  # segment keeps the 8-bit maps of smaller images in memory, of larger ones on disk
# Measured with scripts/bench_tiling.py on a 2-core CPU: one pass of a 512×512 tile ran 1.4× faster per pixel
# than a batch of four (activations of a few tens of MB stay in the last-level cache).
AUTO_BATCH_PIXELS = 512 * 512
SCORES_IN_MEMORY_BYTES = 256 << 20  # predict_scores returns larger results as a memory map on a file
SCANS = ("auto", "rows", "tiles")
DEFAULT_TILE = 512


_PREPARED: weakref.WeakKeyDictionary[nn.Module, dict[str, tuple[tuple, object]]] = weakref.WeakKeyDictionary()


def prepared(model: nn.Module, what: str, build: Callable[[nn.Module], object]) -> object:
    """``build(model)`` (a BN-folded copy, a traced graph…), remembered for ``model`` as long as its weights
    are the same tensors, unchanged (their storage and in-place version counters), so mapping many images or
    bands with one model prepares it once; any change to the weights prepares it afresh."""
    try:
        state = tuple((t.data_ptr(), t._version) for t in (*model.parameters(), *model.buffers()))
    except RuntimeError:  # tensors made under inference mode carry no version counter: do not remember
        return build(model)
    entry = _PREPARED.setdefault(model, {})
    if what in entry and entry[what][0] == state:
        return entry[what][1]
    value = build(model)
    entry[what] = (state, value)
    return value


# --- geometry of the net ----------------------------------------------------------------------------------


@dataclass(frozen=True)
class NetGeometry:
    """What tiling needs to know about a net: its down-sampling factor, the margin exact tiles need (None when
    global layers make outputs depend on the whole input) and those layers' names."""

    factor: int
    margin: int | None
    global_layers: tuple[str, ...] = ()


def net_geometry(model: nn.Module) -> NetGeometry:
    """Read the geometry off ``model`` (any module whose graph :func:`fcnkit.nets.layer_graph` can trace)."""
    return prepared(model, "geometry", _read_geometry)  # type: ignore[return-value]


def _read_geometry(model: nn.Module) -> NetGeometry:
    from fcnkit.describe import describe_graph
    from fcnkit.nets import layer_graph

    try:
        d = describe_graph(layer_graph(model), parts=False)
    except Exception as e:  # tracing errors come in many types; all mean the graph cannot be read
        raise ConfigError(f"model: cannot read the net's geometry for tiling ({' '.join(str(e).split())})") from None
    return NetGeometry(int(d["output_stride"]), d["tile_margin"], tuple(d["global_layers"]))


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


# --- the forward pass -------------------------------------------------------------------------------------


def fuse_conv_bn(model: nn.Module) -> nn.Module:
    """A copy of ``model`` for inference in which each BatchNorm directly after a Conv2d in a Sequential is
    folded into the convolution's weights (same function, one pass less over memory)."""
    model = copy.deepcopy(model).eval()
    for seq in [m for m in model.modules() if isinstance(m, nn.Sequential)]:
        for i in range(len(seq) - 1):
            conv, bn = seq[i], seq[i + 1]
            if isinstance(conv, nn.Conv2d) and isinstance(bn, nn.BatchNorm2d) and bn.track_running_stats:
                seq[i] = torch.nn.utils.fusion.fuse_conv_bn_eval(conv, bn)
                seq[i + 1] = nn.Identity()
    return model


class Float32(nn.Module):
    """Runs the wrapped module in float32 even under bf16 autocast."""

    def __init__(self, module: nn.Module) -> None:
        super().__init__()
        self.module = module

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        with torch.autocast("cpu", enabled=False):
            return self.module(x.float())


def keep_float32(model: nn.Module, kinds: tuple[type[nn.Module], ...]) -> nn.Module:
    """Wrap every submodule of the given kinds in :class:`Float32` (in place)."""
    for parent in list(model.modules()):
        for name, child in parent.named_children():
            if isinstance(child, kinds):
                setattr(parent, name, Float32(child))
    return model


class TorchEngine:
    """The per-batch forward pass: normalised N×B×h×w float32 in, N×C×h×w float32 class scores out.

    Other engines (e.g. onnxruntime) are any callable with the same contract. With ``bf16`` the net runs under
    bfloat16 autocast, except transposed convolutions, whose bf16 CPU kernels are many times slower than float32
    ones for the large up-sampling kernels of FCNs (measured: 20x for kernel 16, stride 8)."""

    def __init__(self, model: nn.Module, bf16: bool = False) -> None:
        model = fuse_conv_bn(model)
        if bf16:
            model = keep_float32(model, (nn.ConvTranspose2d,))
        self.model = model.to(memory_format=torch.channels_last)
        self.bf16 = bf16

    def __call__(self, x: torch.Tensor) -> torch.Tensor:
        with torch.inference_mode(), torch.autocast("cpu", torch.bfloat16, enabled=self.bf16):
            return self.model(x).float()


def _scores(engine: Engine, x: torch.Tensor, tta: bool, logits: bool) -> torch.Tensor:
    """Class scores N×C×h×w (contiguous: softmax over C runs several times faster than on channels-last) of a
    batch, as probabilities or ``logits``, averaged over the four flips when ``tta``."""
    flips: list[tuple[int, ...]] = [(), (-1,), (-2,), (-2, -1)] if tta else [()]
    total = None
    for dims in flips:
        y = engine(x.flip(dims) if dims else x)
        y = (y.flip(dims) if dims else y).contiguous()
        y = y if logits else torch.softmax(y, dim=1)
        total = y if total is None else total.add_(y)
    return total / len(flips) if tta else total


def _load(raster: Raster, tiles: Sequence[Tile], mean: torch.Tensor, std: torch.Tensor) -> torch.Tensor:
    """Read and normalise a batch of equally shaped tiles as a channels-last N×B×h×w float32 tensor."""
    arr = np.stack([raster.read(t.row.start, t.row.stop, t.col.start, t.col.stop) for t in tiles])
    x = torch.from_numpy(arr.astype(np.float32, copy=False)).permute(0, 3, 1, 2)
    return x.sub_(mean).div_(std)  # a fresh array, so normalising in place is safe


def stream_scores(engine: Engine, raster: Raster, plan: TilePlan, *, mean: Sequence[float], std: Sequence[float],
                  batch: int, tta: bool = False, logits: bool = False, progress: bool = False,
                  desc: str = "tiles") -> Iterator[tuple[int, torch.Tensor]]:
    """Run every tile of ``plan`` and yield the blended class scores top to bottom, as (first row, C×h×W
    float32) bands that are final when yielded.

    Window-weighted scores are added into a buffer one tile row high and the image's width; once a tile row is
    done, the rows above the next tile row receive nothing more, so they are divided by their total weight and
    handed on, and the rest of the buffer moves up. Memory grows with the image's width, never its height.
    The next batch of tiles is read while the net runs.
    """
    from tqdm import tqdm

    bands = raster.shape[2]
    m = torch.tensor(mean, dtype=torch.float32).view(1, bands, 1, 1)
    s = torch.tensor(std, dtype=torch.float32).view(1, bands, 1, 1)
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
        nxt = pool.submit(_load, raster, groups[0], m, s)
        for i, group in enumerate(groups):
            x = nxt.result()
            if i + 1 < len(groups):
                nxt = pool.submit(_load, raster, groups[i + 1], m, s)
            if group[0].row != row:  # a tile row is done: hand on what is final, move the rest up
                yield top, _finish(buf, top, group[0].row.start, wy, wx)
                shift = group[0].row.start - top
                buf[:, :band_rows - shift] = buf[:, shift:].clone()
                buf[:, band_rows - shift:] = 0
                top, row = group[0].row.start, group[0].row
            y = _scores(engine, x, tta, logits)
            if buf is None:
                buf = torch.zeros(y.shape[1], band_rows, plan.width)
            for tile, scores in zip(group, y, strict=True):
                key = (*tile.shape, tile.row.rise, tile.row.fall, tile.col.rise, tile.col.fall)
                if key not in weights:
                    weights[key] = torch.from_numpy(plan.weights(tile))
                region = buf[:, tile.row.start - top:tile.row.stop - top, tile.col.start:tile.col.stop]
                region.addcmul_(scores, weights[key])
            bar.update(len(group))
            bar.set_postfix_str(f"{pixels * bar.n / bar.total / (time.perf_counter() - start):.2f} MP/s")
    yield top, _finish(buf, top, plan.height, wy, wx)


def _finish(buf: torch.Tensor, top: int, stop: int, wy: torch.Tensor, wx: torch.Tensor) -> torch.Tensor:
    """Rows top..stop of the buffer divided by their total blending weight (a new tensor)."""
    return buf[:, :stop - top] / (wy[top:stop, None] * wx[None, :])


def as_raster(image_or_reader: np.ndarray | Raster) -> Raster:
    return ArrayRaster(image_or_reader) if isinstance(image_or_reader, np.ndarray) else image_or_reader


def choose_scan(model: nn.Module, scan: str = "auto", *, tiles_asked: bool = False, tta: bool = False,
                engine: Engine | str | None = None) -> str:
    """How an image will be scanned: ``"rows"`` (exact row streaming, :mod:`fcnkit.rowstream`) or ``"tiles"``
    (overlapping tiles, blended). ``auto`` takes rows for a config-built net run by torch, unless flip TTA or
    tile settings (``tiles_asked``) call for tiles; ConfigError when ``rows`` is asked for and impossible."""
    if scan not in SCANS:
        raise ConfigError(f"scan: {scan!r} is not one of: {', '.join(SCANS)}")
    if scan == "tiles":
        return "tiles"
    conflicts = [name for name, bad in (("tta", tta), ("tile, overlap, batch or window", tiles_asked),
                                        ("engine", engine not in (None, "torch"))) if bad]
    if conflicts:
        if scan == "rows":
            raise ConfigError(f"scan: rows cannot be combined with {', '.join(conflicts)} (use scan tiles)")
        return "tiles"
    try:
        _streamer(model, False)
    except NotStreamable:
        if scan == "rows":
            raise
        return "tiles"
    return "rows"


def _streamer(model: nn.Module, bf16: bool) -> RowStreamer:
    return prepared(model, f"rows-bf16={bf16}", lambda m: RowStreamer(m, bf16))  # type: ignore[return-value]


def tiled_scores(model: nn.Module, raster: Raster, *, mean: Sequence[float] | None,
                 std: Sequence[float] | None, scan: str = "auto", tile: int | None = None,
                 overlap: int | None = None, batch: int | None = None, window: str | None = None,
                 exact: bool = False, tta: bool = False, logits: bool = False, bf16: bool = False,
                 engine: Engine | str | None = None, progress: bool = False,
                 desc: str = "tiles") -> Iterator[tuple[int, torch.Tensor]]:
    """Check the settings, choose the scan (:func:`choose_scan`) and stream the scores of ``raster`` as
    (first row, C×h×W float32) bands from top to bottom. The checks run at once, before the first band is
    asked for. Tile settings left as None take their defaults (512 px tiles, Hann window)."""
    from fcnkit.export import make_engine

    if batch is not None and batch < 1:
        raise ConfigError(f"batch: {batch} must be >= 1")
    if exact and tta:
        raise ConfigError("tta: flip test-time augmentation cannot be combined with exact tiling "
                          "(flipped tiles see different pooling grids)")
    height, width, bands = raster.shape
    mean = [0.0] * bands if mean is None else list(mean)
    std = [1.0] * bands if std is None else list(std)
    asked = any(v is not None for v in (tile, overlap, batch, window))
    if choose_scan(model, scan, tiles_asked=asked, tta=tta, engine=engine) == "rows":
        streamer = _streamer(model, bf16)
        check_forward_memory_of(model, streamer.band_rows(width), width, 1, bands)
        return streamer.stream(raster, mean=mean, std=std, logits=logits, progress=progress, desc=desc)
    plan = plan_tiles(net_geometry(model), height, width, tile=tile or DEFAULT_TILE, overlap=overlap,
                      window=window or "hann", exact=exact)
    batch = batch or auto_batch(plan)
    check_plan_memory(model, plan, batch, bands)
    if engine is None or isinstance(engine, str):
        engine = (prepared(model, f"engine-bf16={bf16}", lambda m: TorchEngine(m, bf16)) if engine in (None, "torch")
                  else make_engine(engine, model))
    return stream_scores(engine, raster, plan, mean=mean, std=std, batch=batch, tta=tta, logits=logits,
                         progress=progress, desc=desc)


def check_plan_memory(model: nn.Module, plan: TilePlan, batch: int, bands: int) -> None:
    """Refuse a tile and batch size whose forward pass would not fit in the memory available (fcnkit.memory)."""
    rows, cols = max(s.stop - s.start for s in plan.rows), max(s.stop - s.start for s in plan.cols)
    check_forward_memory_of(model, rows, cols, min(batch, len(plan.rows) * len(plan.cols)), bands)


def check_forward_memory_of(model: nn.Module, rows: int, cols: int, batch: int, bands: int) -> None:
    from fcnkit.memory import check_forward_memory
    from fcnkit.nets import layer_graph

    graph = prepared(model, "graph", layer_graph)
    check_forward_memory(graph, rows, cols, batch, bands, factor=net_geometry(model).factor)  # type: ignore[arg-type]


def _probe_classes(engine: Engine, bands: int, factor: int) -> int:
    with torch.inference_mode():
        return int(engine(torch.zeros(1, bands, 2 * factor, 2 * factor)).shape[1])


def predict_scores(model: nn.Module, image_or_reader: np.ndarray | Raster, *, mean: Sequence[float] | None = None,
                   std: Sequence[float] | None = None, scan: str = "auto", tile: int | None = None,
                   overlap: int | None = None, batch: int | None = None, window: str | None = None,
                   exact: bool = False, tta: bool = False, logits: bool = False, bf16: bool = False,
                   workdir: str | Path | None = None, engine: Engine | str | None = None,
                   progress: bool = False) -> np.ndarray:
    """Class probabilities (or ``logits``) C×H×W float32 of an H×W×B image, by row streaming or tiles.

    ``mean``/``std`` normalise the raw bands (default none). ``scan`` picks exact row streaming or
    overlapping tiles (:func:`choose_scan`); ``batch`` is the number of tiles per forward pass (default: as
    many as fit in about a quarter megapixel). Results above 256 MB are a memory map on a file
    in ``workdir`` (default: an unnamed temporary file). ``engine`` replaces the torch forward pass.
    """
    import tempfile

    raster = as_raster(image_or_reader)
    h, w, _ = raster.shape
    out: np.ndarray | None = None
    for y0, band in tiled_scores(model, raster, mean=mean, std=std, scan=scan, tile=tile, overlap=overlap,
                                 batch=batch, window=window, exact=exact, tta=tta, logits=logits, bf16=bf16,
                                 engine=engine, progress=progress):
        if out is None:
            shape = (band.shape[0], h, w)
            if workdir is None and np.prod(shape) * 4 <= SCORES_IN_MEMORY_BYTES:
                out = np.empty(shape, np.float32)
            else:  # an unnamed file (deleted on close) unless a work folder is given
                f = tempfile.NamedTemporaryFile(dir=workdir, prefix="scores-", suffix=".raw",
                                                delete=workdir is None)
                with f:
                    f.truncate(int(np.prod(shape)) * 4)
                    out = np.memmap(f, np.float32, "r+", shape=shape)
        out[:, y0:y0 + band.shape[1]] = band.numpy()
    assert out is not None
    return out


# --- whole images to files --------------------------------------------------------------------------------

_GENERIC_COLOURS = ((230, 159, 0), (86, 180, 233), (0, 158, 115), (240, 228, 66), (0, 114, 178), (213, 94, 0),
                    (204, 121, 167), (120, 120, 120))  # a colour-blind-safe set (Okabe & Ito 2008), then grey


@dataclass
class SegmentResult:
    """The files written for one image (by kind: labels, confidence, uncertainty, overlay, areas_csv,
    areas_json) and its per-class area rows (id, name, pixels, fraction, area_m2)."""

    paths: dict[str, Path]
    areas: list[dict]
    size: tuple[int, int] = (0, 0)  # height, width
    nodata_pixels: int = 0  # pixels the input marks as nodata, left out of every output and of the areas
    notes: list[str] = field(default_factory=list)  # one line each: nodata met, areas unknown


def _as_loaded(model_or_path: object):
    """A LoadedModel from a model file path, a LoadedModel, or a bare module (no normalisation, generic classes)."""
    from fcnkit.data.classes import ClassInfo, ClassTable
    from fcnkit.modelfile import LoadedModel, ModelMeta, load_model

    if isinstance(model_or_path, LoadedModel):
        return model_or_path
    if isinstance(model_or_path, nn.Module):
        k = int(getattr(model_or_path, "classes", 0)) or _probe_classes(model_or_path, _bands(model_or_path), 32)
        bands = _bands(model_or_path)
        table = ClassTable(tuple(ClassInfo(i, f"class {i}", _GENERIC_COLOURS[min(i, len(_GENERIC_COLOURS) - 1)])
                                 for i in range(k)))
        return LoadedModel(model_or_path.eval(), ModelMeta("module", {}, table, [0.0] * bands, [1.0] * bands, ""))
    return load_model(model_or_path)


def _bands(model: nn.Module) -> int:
    first = next((m for m in model.modules() if isinstance(m, nn.Conv2d)), None)
    if first is None:
        raise ConfigError("model: no convolution found to tell the number of input bands")
    return int(getattr(model, "bands", first.in_channels))


def _prepare_folder(out_dir: Path) -> None:
    from fcnkit.errors import DataError

    if out_dir.exists() and not out_dir.is_dir():
        raise DataError(f"{out_dir}: is a file, expected an output folder")
    try:
        out_dir.mkdir(parents=True, exist_ok=True)
    except OSError as e:
        raise DataError(f"{out_dir}: cannot create the output folder ({e.strerror})") from None


def segment_image(model_or_path: object, image_path: str | Path, out_dir: str | Path, *, scan: str = "auto",
                  tile: int | None = None, overlap: int | None = None, batch: int | None = None,
                  window: str | None = None, exact: bool = False,
                  tta: bool = False, pixel_size: float | tuple[float, float] | None = None,
                  max_pixels: int | None = SEGMENT_MAX_PIXELS, progress: bool = True, bf16: bool = False,
                  engine: Engine | str | None = None, preview: int = 1024,
                  outputs: OutputOptions | None = None) -> SegmentResult:
    """Map one image file (PNG, JPEG, or any GeoTIFF GDAL reads, of any size) into ``out_dir``.

    ``model_or_path`` is a model file, a :class:`~fcnkit.modelfile.LoadedModel` or a bare module. Writes
    ``STEM.labels``, ``STEM.confidence``, ``STEM.uncertainty`` (PNG for PNG/JPEG inputs up to 50 MP, else
    GeoTIFF on the input's grid; see :mod:`fcnkit.outputs`),
    ``STEM.overlay`` and ``STEM.areas.csv``/``.json`` (and ``STEM.polygons`` when ``outputs`` asks for them;
    see :class:`fcnkit.outputs.OutputOptions`). Class scores stream from the tiles straight into the
    8-bit maps, which are built in a hidden work folder inside ``out_dir``; every output is first completed
    there and only then moved to its final name, so a run that is stopped leaves no output at all for the image
    rather than some of them.
    """
    import shutil
    import tempfile

    from fcnkit.data.raster import alpha_hint, open_raster
    from fcnkit.errors import DataError
    from fcnkit.outputs import write_outputs

    if pixel_size is not None and not all(math.isfinite(v) and v > 0 for v in np.atleast_1d(pixel_size)):
        raise ConfigError(f"pixel_size: {pixel_size!r} is not a positive number of metres")
    loaded = _as_loaded(model_or_path)
    image_path, out_dir = Path(image_path), Path(out_dir)
    _prepare_folder(out_dir)
    raster = open_raster(image_path, max_pixels)
    work = Path(tempfile.mkdtemp(prefix=".fcnkit-work-", dir=out_dir))
    try:
        height, width, bands = raster.shape
        if bands != len(loaded.meta.mean):
            raise DataError(f"{image_path}: has {bands} bands but the model expects {len(loaded.meta.mean)}"
                            + alpha_hint(raster))
        raster.fill = loaded.meta.mean  # nodata pixels reach the net as the training mean: neutral inputs
        scores = tiled_scores(loaded.model, raster, mean=loaded.meta.mean, std=loaded.meta.std, scan=scan,
                              tile=tile, overlap=overlap, batch=batch, window=window, exact=exact, tta=tta,
                              logits=False, bf16=bf16, engine=engine, progress=progress, desc=image_path.name)
        done = work / "done"
        done.mkdir()
        large = height * width > IN_MEMORY_PIXELS
        written = write_outputs(((y0, band.numpy()) for y0, band in scores), raster, loaded.meta.classes,
                                done, image_path.stem, work=work if large else None, pixel_size=pixel_size,
                                preview=preview, options=outputs)
        final = {k: out_dir / p.name for k, p in written.paths.items()}
        for k, p in written.paths.items():  # renames within one file system: each is atomic, all follow at once
            p.replace(final[k])
        return SegmentResult(final, written.areas, (height, width), written.nodata_pixels, written.notes)
    finally:
        raster.close()
        shutil.rmtree(work, ignore_errors=True)


def find_images(inputs: Sequence[str | Path]) -> list[Path]:
    """Image files named directly or found (not recursively) in folders, sorted; DataError for a missing input
    or two inputs whose outputs would share a name."""
    from fcnkit.data.raster import RASTER_SUFFIXES
    from fcnkit.errors import DataError

    found: list[Path] = []
    for item in map(Path, inputs):
        if item.is_dir():
            images = sorted(p for p in item.iterdir() if p.is_file() and p.suffix.lower() in RASTER_SUFFIXES
                            and not p.name.startswith("."))
            if not images:
                raise DataError(f"{item}: no image files in this folder (expected {', '.join(RASTER_SUFFIXES)})")
            found += images
        elif item.exists():
            found.append(item)
        else:
            raise DataError(f"{item}: no such image file or folder")
    stems: dict[str, Path] = {}
    for p in found:
        if p.stem in stems:
            raise DataError(f"{p}: its outputs would overwrite those of {stems[p.stem]} (same name stem)")
        stems[p.stem] = p
    return found


def shard(items: Sequence, rank: int | None = None, world: int | None = None) -> list:
    """Every ``world``-th item from ``rank`` on; by default the rank and world size torchrun sets
    (RANK / WORLD_SIZE), or everything when not launched by it."""
    import os

    rank = int(os.environ.get("RANK", 0)) if rank is None else rank
    world = int(os.environ.get("WORLD_SIZE", 1)) if world is None else world
    if not 0 <= rank < world:
        raise ConfigError(f"rank: {rank} is not in 0..{world - 1}")
    return list(items[rank::world])


def segment_images(model_or_path: object, inputs: Sequence[str | Path], out_dir: str | Path, *,
                   rank: int | None = None, world: int | None = None, echo: Callable[[str], None] | None = None,
                   **options) -> list[SegmentResult]:
    """Map many images (files and folders) with one model; under torchrun each process takes its own shard.
    ``options`` are those of :func:`segment_image`; ``engine`` may also name a runtime ("torch",
    "onnxruntime"), built once for all images."""
    loaded = _as_loaded(model_or_path)
    files = shard(find_images(inputs), rank, world)
    engine = options.get("engine")
    if isinstance(engine, str) and engine != "torch":  # e.g. onnxruntime: build the session once
        from fcnkit.export import make_engine

        options["engine"] = make_engine(engine, loaded.model)
    results = []
    for path in files:
        start = time.perf_counter()
        res = segment_image(loaded, path, out_dir, **options)
        if echo is not None:
            h, w = res.size
            echo(f"{path}: {w}x{h} mapped in {time.perf_counter() - start:.1f} s -> {res.paths['labels']}")
            for note in res.notes:
                echo(f"{path}: {note}")
        results.append(res)
    return results

