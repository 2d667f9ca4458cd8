"""What a mapped image leaves behind: class-id map, confidence, uncertainty, overlay preview, class areas.

From the class probabilities, streamed from tiled inference in bands of rows, one pass derives three 8-bit maps
and the per-class pixel counts:

* labels      — the top class id per pixel (palette PNG with the classes' colours, or a palette TIFF);
* confidence  — the top class's probability × 255;
* uncertainty — the normalised entropy −Σ p log p / log C × 255 (0 = certain, 255 = all classes equally
  likely): the map that shows where labelling more pixels would help most.

Then a down-sampled colour overlay for a quick look, and a table of per-class pixel counts, fractions and
areas in m² (when the pixel size is known) as CSV and JSON. Maps are PNG for small non-TIFF inputs and tiled
TIFF otherwise; for a GeoTIFF input every raster output carries its georeferencing tags (the preview's pixel
scale multiplied by its down-sampling step), so the outputs open aligned in GIS software.
"""

from __future__ import annotations

import csv
import io
import json
import math
from collections.abc import Iterable, Sequence
from pathlib import Path
from typing import Any

import numpy as np

from fcnkit.atomic import atomic_output, write_text_atomic
from fcnkit.data.classes import ClassTable
from fcnkit.data.raster import TIFF_SUFFIXES, GeoTags, Raster, RasterSpec, RowStore, write_tiff_streamed
from fcnkit.errors import ConfigError

PNG_MAX_PIXELS = 50_000_000  # maps of larger images are written as tiled TIFF
BAND = 64  # rows per pass over the score store (keeps the temporaries of one pass small)
CAUTION = ("Statistical estimates from a model trained on few examples; verify with ground truth and qualified "
           "people before any medical, structural, flood or safety decision.")


def normalised_entropy(probs: np.ndarray, axis: int = -1) -> np.ndarray:
    """Shannon entropy of class probabilities divided by log C (Shannon 1948): 0 = certain, 1 = uniform."""
    p = np.clip(probs, 1e-12, 1.0)
    return (-(p * np.log(p)).sum(axis=axis) / math.log(probs.shape[axis])).astype(np.float32)


def to_byte(v: np.ndarray) -> np.ndarray:
    """Values in [0, 1] → uint8 0..255, rounded to nearest."""
    return np.clip(np.rint(v * 255.0), 0, 255).astype(np.uint8)


def class_maps(probs: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Labels, confidence and uncertainty (each uint8 h×w) from C×h×w probabilities."""
    labels = probs.argmax(0).astype(np.uint8)
    confidence = to_byte(np.take_along_axis(probs, labels[None].astype(np.intp), 0)[0])
    return labels, confidence, to_byte(normalised_entropy(probs, axis=0))


def overlay(rgb: np.ndarray, labels: np.ndarray, colors: Sequence[tuple[int, int, int]],
            alpha: float = 0.45) -> np.ndarray:
    """Class colours laid over an RGB image with opacity ``alpha``."""
    lut = np.zeros((256, 3), np.float32)
    lut[:len(colors)] = np.asarray(colors, np.float32)
    return np.rint((1 - alpha) * rgb.astype(np.float32) + alpha * lut[labels]).astype(np.uint8)


def area_rows(counts: np.ndarray, classes: ClassTable, pixel_area_m2: float | None) -> list[dict[str, Any]]:
    """One row per class: id, name, pixels, fraction of the image, area in m² (None when the pixel size is
    unknown). Area = pixel count × pixel area."""
    total = int(counts.sum())
    return [{"id": c.id, "name": c.name, "pixels": int(counts[c.id]),
             "fraction": float(counts[c.id] / total) if total else 0.0,
             "area_m2": float(counts[c.id] * pixel_area_m2) if pixel_area_m2 is not None else None}
            for c in classes.classes]


def areas_csv(rows: list[dict[str, Any]]) -> str:
    buf = io.StringIO()
    writer = csv.DictWriter(buf, ["id", "name", "pixels", "fraction", "area_m2"], lineterminator="\n")
    writer.writeheader()
    for r in rows:
        writer.writerow({**r, "fraction": f"{r['fraction']:.6f}",
                         "area_m2": "" if r["area_m2"] is None else f"{r['area_m2']:.4f}"})
    return buf.getvalue()


def output_names(stem: str, as_tiff: bool, geo: bool) -> dict[str, str]:
    """File names of one image's outputs, by kind."""
    ext = ".tif" if as_tiff else ".png"
    return {"labels": f"{stem}.labels{ext}", "confidence": f"{stem}.confidence{ext}",
            "uncertainty": f"{stem}.uncertainty{ext}", "overlay": f"{stem}.overlay{'.tif' if geo else '.png'}",
            "areas_csv": f"{stem}.areas.csv", "areas_json": f"{stem}.areas.json"}


def _write_png(path: Path, array: np.ndarray, palette: list[int] | None = None) -> None:
    from PIL import Image

    im = Image.fromarray(np.ascontiguousarray(array))
    if palette is not None:
        im = im.convert("P")  # "L" → "P" keeps values as palette indices
        im.putpalette(palette)
    with atomic_output(path) as tmp:
        im.save(tmp, format="PNG")


def _colormap(classes: ClassTable) -> np.ndarray:
    """TIFF palette (3×256 uint16) from the class colours."""
    return (np.array(classes.palette(), np.uint16).reshape(256, 3).T * 257).astype(np.uint16)


def write_outputs(scores: Iterable[tuple[int, np.ndarray]], raster: Raster, classes: ClassTable, folder: Path,
                  stem: str, *, work: Path | None, pixel_size: float | tuple[float, float] | None = None,
                  preview: int = 1024) -> tuple[dict[str, Path], list[dict[str, Any]]]:
    """Write every output of one image into ``folder`` (each atomically); return their paths and the area rows.

    ``scores`` are the image's class probabilities as (first row, C×h×W) bands from top to bottom, as tiled
    inference streams them. ``work`` holds the 8-bit maps between passes when the image is large (None: keep
    them in memory).
    """
    height, width, _ = raster.shape
    geo = raster.geo
    as_tiff = geo is not None or height * width > PNG_MAX_PIXELS or (
        raster.path is not None and raster.path.suffix.lower() in TIFF_SUFFIXES)
    names = output_names(stem, as_tiff, geo is not None)
    maps = {k: RowStore((height, width), np.uint8, work, k) for k in ("labels", "confidence", "uncertainty")}
    counts = np.zeros(256, np.int64)
    for top, band in scores:
        if band.shape[0] != classes.num_classes:
            raise ConfigError(f"model: gives {band.shape[0]} class scores but its class table has "
                              f"{classes.num_classes} classes")
        for y0 in range(0, band.shape[1], BAND):
            values = class_maps(np.asarray(band[:, y0:y0 + BAND]))
            for kind, v in zip(maps, values, strict=True):
                out = maps[kind].rows(top + y0, top + y0 + v.shape[0])
                out[:] = v
                del out
            counts += np.bincount(values[0].ravel(), minlength=256)

    paths = {k: folder / n for k, n in names.items()}
    tags = geo.extratags() if geo is not None else []
    for kind, store in maps.items():
        palette = kind == "labels"
        if as_tiff:
            spec = RasterSpec((height, width), np.dtype(np.uint8), lambda a, b, s=store: s.rows(a, b, write=False),
                              colormap=_colormap(classes) if palette else None, extratags=tags)
            write_tiff_streamed(paths[kind], spec)
        else:
            _write_png(paths[kind], store.whole(), classes.palette() if palette else None)

    step = max(1, math.ceil(max(height, width) / preview))
    rgb, small = _preview(raster, maps["labels"], step)
    picture = overlay(rgb, small, classes.colors)
    if geo is not None:
        write_tiff_streamed(paths["overlay"], RasterSpec(picture.shape, np.dtype(np.uint8),
                                                         lambda a, b: picture[a:b], extratags=geo.extratags(step)))
    else:
        _write_png(paths["overlay"], picture)

    area = _pixel_area(pixel_size, geo)
    rows = area_rows(counts[:classes.num_classes], classes, area)
    write_text_atomic(paths["areas_csv"], areas_csv(rows))
    doc = {"image": str(raster.path) if raster.path else None, "width": width, "height": height,
           "pixel_area_m2": area, "pixel_area_source": _area_source(pixel_size, area), "classes": rows,
           "caution": CAUTION}
    write_text_atomic(paths["areas_json"], json.dumps(doc, indent=2) + "\n")
    return paths, rows


def display_rgb(image: np.ndarray) -> np.ndarray:
    """H×W×3 uint8 for display: first three bands (or one, as grey), each stretched between its 2nd and 98th
    percentile, so 16-bit and float images show as well as 8-bit ones."""
    bands = image[..., :3] if image.shape[-1] >= 3 else np.repeat(image[..., :1], 3, axis=-1)
    out = np.empty(bands.shape, np.uint8)
    for b in range(3):
        v = bands[..., b].astype(np.float32)
        lo, hi = np.percentile(v, [2, 98]) if v.size else (0.0, 1.0)
        out[..., b] = np.clip((v - lo) / max(hi - lo, 1e-6) * 255, 0, 255).astype(np.uint8)
    return out


def strided_rgb(raster: Raster, step: int, offset: int = 0) -> np.ndarray:
    """Every ``step``-th pixel of the image from ``offset``, as display RGB, read a band of rows at a time
    (copies, so each band's full rows are freed at once)."""
    height, width, _ = raster.shape
    band = step * max(1, 512 // step)
    parts = [raster.read(y0, min(y0 + band, height), 0, width)[offset::step, offset::step].copy()
             for y0 in range(0, height, band)]
    return display_rgb(np.concatenate(parts))


def _preview(raster: Raster, labels: RowStore, step: int) -> tuple[np.ndarray, np.ndarray]:
    """Every ``step``-th pixel (from step // 2, so each sample sits mid-cell) of the image, as display RGB, and
    of the label map."""
    off = step // 2
    band = step * max(1, 512 // step)
    lab = [np.array(labels.rows(y0, min(y0 + band, labels.shape[0]), write=False)[off::step, off::step])
           for y0 in range(0, labels.shape[0], band)]
    return strided_rgb(raster, step, off), np.concatenate(lab)


def _pixel_area(pixel_size: float | tuple[float, float] | None, geo: GeoTags | None) -> float | None:
    """Pixel area in m²: from the option (side, or (width, height)) or else from the GeoTIFF's pixel scale."""
    if pixel_size is not None:
        sx, sy = (pixel_size, pixel_size) if isinstance(pixel_size, (int, float)) else pixel_size
        return float(sx) * float(sy)
    size = geo.pixel_size_m() if geo is not None else None
    return size[0] * size[1] if size else None


def _area_source(pixel_size: object, area: float | None) -> str | None:
    return None if area is None else ("pixel-size option" if pixel_size is not None else "GeoTIFF pixel scale")
