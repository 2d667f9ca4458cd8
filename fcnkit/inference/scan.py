"""How an image is scanned, and its class scores.

Three scans give the same thing, class scores streamed as finished bands of rows from top to bottom:

* ``rows`` — exact row streaming (:mod:`fcnkit.inference.rowstream`): equal to whole-image inference, memory
  bounded by the image's width; the default wherever the net allows it;
* ``whole`` — the whole image in one forward pass: exact, for nets that cannot be streamed (global layers such
  as squeeze-and-excitation pooling, or layers row streaming does not know), while the image fits in memory;
* ``tiles`` — overlapping tiles blended by a window (:mod:`fcnkit.inference.tiles`): any net, any size, flip
  TTA, other runtimes; exact only with exact tiles on a net without global layers.

``auto`` takes the first exact scan that can run and says in one line when it must fall back to something
that is not exact, or when an option given (TTA, tile settings, another runtime) moves it to tiles.
"""

from __future__ import annotations

import tempfile
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import torch

from fcnkit.data.raster import ArrayRaster, Raster, open_raster
from fcnkit.errors import ConfigError, DataError
from fcnkit.inference.engines import Engine, make_engine, prepared
from fcnkit.inference.rowstream import NotStreamable, RowStreamer
from fcnkit.inference.tiles import DEFAULT_TILE, auto_batch, plan_tiles, stream_tiles
from fcnkit.inputrange import RangeCheck

if TYPE_CHECKING:
    from fcnkit.model import Model

SCANS = ("auto", "rows", "whole", "tiles")
SCORES_IN_MEMORY_BYTES = 256 << 20  # predict_scores returns larger results as a memory map on a file
WHOLE_BAND = 256  # rows per band handed on by the whole-image scan
POST_ROWS = 64  # rows per call of a band post-processing step outside row streaming


@dataclass(frozen=True)
class ScanChoice:
    """The scan an image gets, whether its scores equal whole-image inference, and why, when auto had to
    choose something else than exact rows (``note``, one line; None otherwise)."""

    scan: str
    exact: bool
    note: str | None = None


def _streamer(model: Model, bf16: bool) -> RowStreamer:
    return prepared(model, f"rows-bf16={bf16}", lambda m: RowStreamer(m, bf16))  # type: ignore[return-value]


def _whole_fits(model: Model, height: int, width: int) -> bool:
    from fcnkit.memory import available_memory, peak_bytes
    from fcnkit.nets import layer_graph

    try:
        graph = prepared(model, "graph", lambda m: layer_graph(m.net))
    except Exception:  # noqa: BLE001 - a net whose graph cannot be read: no estimate, so no whole-image pass
        return False
    return peak_bytes(graph, height, width, 1, model.bands) <= available_memory() // 2  # type: ignore[arg-type]


def choose_scan(model: Model, height: int, width: int, scan: str = "auto", *, tiles_asked: bool = False,
                exact: bool = False, tta: bool = False, engine: str | Engine = "torch") -> ScanChoice:
    """The scan for a height×width image (see module notes); ConfigError when the scan asked for cannot run.

    ``exact`` means one thing on every path: the scores must equal whole-image inference. Rows and whole
    passes always are; tiles then become exact tiles, and whatever cannot be exact (flip TTA, a net whose
    tiles cannot be exact) is refused instead of run. Every automatic change of scan is said in ``note``."""
    if scan not in SCANS:
        raise ConfigError(f"scan: {scan!r} is not one of: {', '.join(SCANS)}")
    if exact and tta:
        raise ConfigError("exact: flip TTA averages flipped passes, which never equal whole-image inference; "
                          "drop --tta or --exact")
    tiles_can_be_exact = model.geometry.margin is not None
    whole_image_layers = ("exact tiling is impossible: layers " + ", ".join(model.geometry.global_layers)
                          + " make every output depend on the whole image")
    if exact and scan == "tiles" and not tiles_can_be_exact:
        raise ConfigError(f"exact: {whole_image_layers}; use scan rows or whole")
    if scan == "tiles":
        return ScanChoice("tiles", exact)
    conflicts = [name for name, bad in (("flip TTA", tta), ("tile settings", tiles_asked),
                                        ("another engine", engine != "torch")) if bad]
    if conflicts:
        asked = " and ".join(conflicts)
        if scan != "auto":
            raise ConfigError(f"scan: {scan} cannot be combined with {asked} (use scan tiles)")
        if exact:
            if not tiles_can_be_exact:
                raise ConfigError(f"exact: {asked} need tiles, and {whole_image_layers}")
            return ScanChoice("tiles", True, f"{asked} asked for: scanning by exact tiles (equal to whole-image "
                              "inference)")
        return ScanChoice("tiles", False, f"{asked} asked for: scanning by blended tiles, not exact (equal to "
                          "whole-image inference only by rows, a whole pass or exact tiles; add --exact for those)")
    if scan in ("auto", "rows"):
        try:
            _streamer(model, False)
            return ScanChoice("rows", True)
        except NotStreamable as e:
            if scan == "rows":
                raise
            reason = str(e)
    if scan == "whole" or _whole_fits(model, height, width):
        return ScanChoice("whole", True, None if scan == "whole" else
                          f"the net cannot be streamed in rows ({reason}): one whole-image pass instead")
    if exact:
        if not tiles_can_be_exact:
            raise ConfigError(f"exact: the net cannot be streamed in rows ({reason}), the {width}x{height} image "
                              f"is too large for one pass, and {whole_image_layers}")
        return ScanChoice("tiles", True, f"the net cannot be streamed in rows ({reason}) and the {width}x{height} "
                          "image is too large for one pass: exact tiles")
    return ScanChoice("tiles", False, f"the net cannot be streamed in rows ({reason}) and the {width}x{height} image "
                      "is too large for one pass: blended tiles, not exact (add --exact for exact tiles)")


def _whole(engine: Engine, raster: Raster, model: Model, logits: bool) -> Iterator[tuple[int, torch.Tensor]]:
    """The whole image in one forward pass, handed on in bands of rows."""
    h, w, _ = raster.shape
    x = torch.from_numpy(raster.read(0, h, 0, w).astype(np.float32, copy=False)).permute(2, 0, 1)[None]
    y = engine(x)[0].contiguous()
    for y0 in range(0, h, WHOLE_BAND):
        band = y[:, y0:y0 + WHOLE_BAND]
        yield y0, band if logits else model.probabilities(band, dim=0)


def stream_scores(model: Model, raster: Raster, *, scan: str = "auto", tile: int | None = None,
                  overlap: int | None = None, batch: int | None = None, window: str | None = None,
                  exact: bool = False, tta: bool = False, logits: bool = False, bf16: bool = False,
                  engine: str | Engine = "torch", progress: bool = False, desc: str = "mapping",
                  echo: Callable[[str], None] | None = None, note: Callable[[str], None] | None = None,
                  post: Callable[[torch.Tensor], Any] | None = None) -> Iterator[tuple[int, Any]]:
    """Choose the scan (:func:`choose_scan`) and stream the class probabilities (the model's calibrated ones,
    or ``logits``) of ``raster`` as (first row, C×h×W float32) bands from top to bottom. The checks run at once,
    before the first band is asked for; ``echo`` receives the one-line note of an automatic choice. Tile
    settings left as None take their defaults (512 px tiles, Hann window, a batch of about a quarter megapixel).

    Every region read is checked against the model's training range (:mod:`fcnkit.inputrange`: ``note``, or a
    RangeWarning, when outside; DataError when far outside), and every band of scores must be finite: a NaN or
    inf anywhere in the net ends the scan with a DataError on every scan alike, never a plausible-looking map.
    ``post``, when given, turns each band into what is streamed instead (first row, ``post(band)``), after that
    check: in the row streaming workers, in parallel, or here on bands of at most POST_ROWS rows.
    """
    from fcnkit.memory import check_forward_memory
    from fcnkit.nets import layer_graph

    if batch is not None and batch < 1:
        raise ConfigError(f"batch: {batch} must be >= 1")
    height, width, bands = raster.shape
    where = str(raster.path or "image")
    if bands != model.bands:
        raise DataError(f"{where}: has {bands} bands but the model expects {model.bands}")
    if model.input_stats is not None:
        raster = RangeCheck(raster, model.input_stats, where=where, model=str(model.path or "the model"), note=note)
    asked = any(v is not None for v in (tile, overlap, batch, window))
    choice = choose_scan(model, height, width, scan, tiles_asked=asked, exact=exact, tta=tta, engine=engine)
    graph = prepared(model, "graph", lambda m: layer_graph(m.net))
    factor = model.plan.factor
    if choice.scan == "rows":
        streamer = _streamer(model, bf16)
        check_forward_memory(graph, streamer.band_rows(width), width, 1, bands, factor=factor)  # type: ignore[arg-type]
        return streamer.stream(raster, logits=logits, progress=progress, desc=desc, post=_checked(post, where))
    run = engine if callable(engine) else make_engine(engine, model, bf16)
    if choice.scan == "whole":
        _say(echo, choice)
        return _posted(_whole(run, raster, model, logits), post, where)
    plan = plan_tiles(model.geometry, height, width, tile=tile or DEFAULT_TILE, overlap=overlap,
                      window=window or "hann", exact=choice.exact)
    batch = batch or auto_batch(plan)
    rows, cols = max(s.stop - s.start for s in plan.rows), max(s.stop - s.start for s in plan.cols)
    check_forward_memory(graph, rows, cols, min(batch, len(plan.rows) * len(plan.cols)), bands,  # type: ignore[arg-type]
                         factor=factor)
    _say(echo, choice)
    return _posted(stream_tiles(run, raster, plan, batch=batch, tta=tta,
                                probabilities=None if logits else model.probabilities, progress=progress, desc=desc),
                   post, where)


def _checked(post: Callable[[torch.Tensor], Any] | None, where: str) -> Callable[[int, torch.Tensor], Any]:
    """A band's last step: the band (first row ``y0``), checked to be finite, then ``post`` of it (or itself)."""
    def run(y0: int, band: torch.Tensor) -> Any:
        # a sum is finite when every value is (and is faster to take than testing each); when it is not (or
        # merely overflowed), look for the culprit
        if not bool(torch.isfinite(band.sum())) and not bool(torch.isfinite(band).all()):
            bad = torch.nonzero(~torch.isfinite(band))[0].tolist()
            raise DataError(f"{where}: the model's class scores are NaN or infinite at row {y0 + bad[1]}, column "
                            f"{bad[2]} (its activations overflowed: pixel values far outside what it was trained "
                            "on, or a damaged model)")
        return band if post is None else post(band)
    return run


def _posted(bands: Iterator[tuple[int, torch.Tensor]], post: Callable[[torch.Tensor], Any] | None,
            where: str) -> Iterator[tuple[int, Any]]:
    """Each band checked to be finite, then ``post`` of it in pieces of at most POST_ROWS rows (its temporaries
    stay small), or the band itself."""
    step = _checked(post, where)
    for y0, band in bands:
        if post is None:
            yield y0, step(y0, band)
        else:
            for k in range(0, band.shape[1], POST_ROWS):
                yield y0 + k, step(y0 + k, band[:, k:k + POST_ROWS])


def _say(echo: Callable[[str], None] | None, choice: ScanChoice) -> None:
    """Pass on the note of an automatic choice, once every check has passed."""
    if choice.note and echo is not None:
        echo(choice.note)


def as_raster(image: np.ndarray | Raster | str | Path, max_pixels: int | None = None) -> Raster:
    """A region reader of an H×W×B (or H×W) array, an image file, or a reader already open."""
    if isinstance(image, np.ndarray):
        return ArrayRaster(image)
    if isinstance(image, (str, Path)):
        return open_raster(image, max_pixels)
    return image


def predict_scores(model: Model, image: np.ndarray | Raster | str | Path, *, logits: bool = False,
                   workdir: str | Path | None = None, max_pixels: int | None = None,
                   **options: object) -> np.ndarray:
    """Class probabilities (the model's calibrated ones, or ``logits``) C×H×W float32 of an image (an H×W×B
    array of raw pixels, an image file or an open reader), by the scan :func:`stream_scores` chooses
    (``options`` are its settings). Results above 256 MB are a memory map on a file in ``workdir`` (default: an
    unnamed temporary file)."""
    raster = as_raster(image, max_pixels)
    try:
        h, w, _ = raster.shape
        out: np.ndarray | None = None
        for y0, band in stream_scores(model, raster, logits=logits, **options):  # type: ignore[arg-type]
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
    finally:
        if raster is not image:
            raster.close()
    assert out is not None
    return out
