"""Images to files: map each image of a list (files and folders, sharded under torchrun) with one model into
its label, confidence and uncertainty maps, overlay and area table (:mod:`fcnkit.outputs`)."""

from __future__ import annotations

import math
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from fcnkit.atomic import DISK_FULL, default_mode
from fcnkit.data.classes import ClassTable
from fcnkit.data.raster import DEFAULT_MAX_PIXELS
from fcnkit.errors import ConfigError, DataError, DiskFullError
from fcnkit.inference.engines import Engine, make_engine
from fcnkit.inference.scan import stream_scores
from fcnkit.model import Model

if TYPE_CHECKING:
    import torch

    from fcnkit.outputs import Maps, OutputOptions

IN_MEMORY_PIXELS = 4_000_000  # segment keeps the 8-bit maps of smaller images in memory, of larger ones on disk


def as_model(model_or_path: Model | str | Path) -> Model:
    """A model, or the model in a model file."""
    return model_or_path if isinstance(model_or_path, Model) else Model.load(model_or_path)


@dataclass
class SegmentResult:
    """The files written for one image (by kind: labels, confidence, uncertainty, overlay, areas_csv,
    areas_json) and its per-class area rows (id, name, pixels, share, area_m2)."""

    paths: dict[str, Path]
    areas: list[dict]
    size: tuple[int, int] = (0, 0)  # height, width
    nodata_pixels: int = 0  # pixels the input marks as nodata, left out of every output and of the areas
    notes: list[str] = field(default_factory=list)  # one line each: nodata met, areas unknown


def check_segment_outputs(model: Model, images: Sequence[Path], out_dir: Path,
                          outputs: OutputOptions | None = None, overwrite: bool = False) -> None:
    """Refuse, before any work, outputs that would replace an input (an image, the model file) or weights
    (:func:`fcnkit.destinations.check_outputs`), for every output name an image may get."""
    from fcnkit.destinations import check_outputs
    from fcnkit.outputs import output_names

    polygons = outputs.polygons if outputs is not None else None
    names = {out_dir / n for p in images for tiff in (False, True)
             for n in output_names(p.stem, tiff, polygons).values()}
    check_outputs(sorted(names), inputs=[model.path, *images], folders=[out_dir], overwrite=overwrite,
                  error=DataError)


def _prepare_folder(out_dir: Path) -> None:
    if out_dir.exists() and not out_dir.is_dir():
        raise DataError(f"{out_dir}: is a file, expected an output folder")
    try:
        out_dir.mkdir(parents=True, exist_ok=True)
    except OSError as e:
        raise DataError(f"{out_dir}: cannot create the output folder ({e.strerror})") from None


def segment_image(model_or_path: Model | str | Path, image_path: str | Path, out_dir: str | Path, *,
                  scan: str = "auto", tile: int | None = None, overlap: int | None = None, batch: int | None = None,
                  window: str | None = None, exact: bool = False,
                  tta: bool = False, pixel_size: float | tuple[float, float] | None = None,
                  max_pixels: int | None = DEFAULT_MAX_PIXELS, progress: bool = True, bf16: bool = False,
                  engine: Engine | str = "torch", preview: int = 1024, outputs: OutputOptions | None = None,
                  note: Callable[[str], None] | None = None, overwrite: bool = False) -> SegmentResult:
    """Map one image file (PNG, JPEG, or any GeoTIFF GDAL reads, of any size) into ``out_dir``.

    ``model_or_path`` is a :class:`~fcnkit.model.Model` or a model file. Writes
    ``STEM.labels``, ``STEM.confidence``, ``STEM.uncertainty`` (PNG for PNG/JPEG inputs up to 50 MP, else
    GeoTIFF on the input's grid; see :mod:`fcnkit.outputs`), ``STEM.overlay`` and ``STEM.areas.csv``/``.json``
    (and ``STEM.polygons`` when ``outputs`` asks for them; see :class:`fcnkit.outputs.OutputOptions`). Class
    scores stream from the scan straight into the
    8-bit maps, which are built in a hidden work folder inside ``out_dir``; every output is first completed
    there and only then moved to its final name, so a run that is stopped leaves no output at all for the image
    rather than some of them. ``note`` receives one-line notes (e.g. an automatic change of scan). Outputs
    of an earlier run are replaced only with ``overwrite``.
    """
    import shutil
    import tempfile

    from fcnkit.data.raster import alpha_hint, open_raster
    from fcnkit.outputs import SampledReads, class_maps, preview_step, write_outputs

    if pixel_size is not None and not all(math.isfinite(v) and v > 0 for v in np.atleast_1d(pixel_size)):
        raise ConfigError(f"pixel_size: {pixel_size!r} is not a positive number of metres")
    model = as_model(model_or_path)
    image_path, out_dir = Path(image_path), Path(out_dir)
    check_segment_outputs(model, [image_path], out_dir, outputs, overwrite)
    _prepare_folder(out_dir)
    raster = open_raster(image_path, max_pixels)
    work = Path(tempfile.mkdtemp(prefix=".fcnkit-work-", dir=out_dir))
    try:
        height, width, bands = raster.shape
        if bands != model.bands:
            raise DataError(f"{image_path}: has {bands} bands but the model expects {model.bands}" + alpha_hint(raster))
        raster.fill = model.normalisation[0]  # nodata pixels reach the net as the training mean: neutral inputs
        if not raster.masked:  # the preview's pixels, kept as mapping reads them (nodata images sample masks too)
            raster = SampledReads(raster, preview_step(raster.shape, preview))
        classes = model.classes or ClassTable.generic(model.num_classes)

        def maps(probs: torch.Tensor) -> Maps:
            if probs.shape[0] != classes.num_classes:
                raise ConfigError(f"model: gives {probs.shape[0]} class scores but its class table has "
                                  f"{classes.num_classes} classes")
            return class_maps(probs)

        bands = stream_scores(model, raster, scan=scan, tile=tile, overlap=overlap, batch=batch, window=window,
                              exact=exact, tta=tta, bf16=bf16, engine=engine, progress=progress,
                              desc=image_path.name, echo=note, note=note, post=maps)
        done = work / "done"
        done.mkdir()
        large = height * width > IN_MEMORY_PIXELS
        written = write_outputs(bands, raster, classes, done, image_path.stem, work=work if large else None,
                                pixel_size=pixel_size, preview=preview, options=outputs)
        final = {k: out_dir / p.name for k, p in written.paths.items()}
        mode = default_mode()
        for k, p in written.paths.items():  # renames within one file system: each is atomic, all follow at once
            p.chmod(mode)
            p.replace(final[k])
        return SegmentResult(final, written.areas, (height, width), written.nodata_pixels, written.notes)
    except (OSError, DiskFullError) as e:  # written in the work folder: name the file's final place
        if isinstance(e, DiskFullError):
            where, why = out_dir / Path(str(e.path)).name, e.reason
        elif e.errno in DISK_FULL:
            where, why = out_dir, e.strerror or str(e)
        else:
            raise
        raise DiskFullError(f"{where}: {why} while writing the maps of {image_path} (nothing was written under a "
                            "final name; free some space or write elsewhere)", where, why) from None
    finally:
        raster.close()
        shutil.rmtree(work, ignore_errors=True)


def find_images(inputs: Sequence[str | Path]) -> list[Path]:
    """Image files named directly or found (not recursively) in folders, sorted; DataError for a missing input
    or two inputs whose outputs would share a name."""
    from fcnkit.data.raster import RASTER_SUFFIXES

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


def segment_images(model_or_path: Model | str | Path, inputs: Sequence[str | Path], out_dir: str | Path, *,
                   rank: int | None = None, world: int | None = None, echo: Callable[[str], None] | None = None,
                   note: Callable[[str], None] | None = None, **options) -> list[SegmentResult]:
    """Map many images (files and folders) with one model; under torchrun each process takes its own shard.
    ``options`` are those of :func:`segment_image`; ``engine`` may also name a runtime ("torch",
    "onnxruntime"), built once for all images. ``echo`` receives a line per image mapped, ``note`` each
    distinct one-line note once."""
    model = as_model(model_or_path)
    files = shard(find_images(inputs), rank, world)
    # every image's outputs, before the first is mapped
    check_segment_outputs(model, files, Path(out_dir), options.get("outputs"), options.get("overwrite", False))
    engine = options.get("engine", "torch")
    if isinstance(engine, str) and engine != "torch":  # e.g. onnxruntime: build the session once
        options["engine"] = make_engine(engine, model)
    results, said = [], set()

    def once(text: str) -> None:
        if note is not None and text not in said:
            said.add(text)
            note(text)

    for path in files:
        start = time.perf_counter()
        res = segment_image(model, path, out_dir, note=once, **options)
        if echo is not None:
            h, w = res.size
            echo(f"{path}: {w}x{h} mapped in {time.perf_counter() - start:.1f} s -> {res.paths['labels']}")
        for text in res.notes:
            if note is not None:
                note(f"{path}: {text}")
        results.append(res)
    return results

