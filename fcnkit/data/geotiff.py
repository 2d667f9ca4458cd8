"""Writing GeoTIFFs a GIS understands, through GDAL (rasterio), streamed and atomic.

A raster is described by a :class:`RasterSpec` whose pixels come a band of rows at a time, so nothing the
size of the image is ever held in memory. It is written as a tiled GeoTIFF, one band of rows per write; for a
Cloud-Optimised GeoTIFF (the default) that file is a hidden stage which GDAL's COG driver then copies, tile by
tile, into the final layout with overviews. Everything a GIS needs lives inside the one file (GDAL's
GDAL_METADATA TIFF tag and standard TIFF tags), never in a sidecar (``.aux.xml``, ``.msk``):

* the CRS and affine transform (GeoTIFF keys), a nodata value and/or a per-dataset internal mask;
* a colour table for class maps; scale and offset (value × scale + offset) and a description per band;
* metadata items, e.g. the class names of a label map.

GDAL keeps a band's category names and raster attribute tables only in a ``.aux.xml`` sidecar for GeoTIFF
(checked with GDAL 3.10), so class names are written as band metadata items ``CLASS_<id>`` instead.
"""

from __future__ import annotations

import contextlib
import math
import warnings
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import rasterio
import rasterio.shutil
from rasterio.errors import NotGeoreferencedWarning
from rasterio.windows import Window

from fcnkit.atomic import atomic_output, partial_path
from fcnkit.data.classes import ClassTable
from fcnkit.data.raster import GeoRef
from fcnkit.errors import DataError

ROWS_PER_WRITE = 256
COG_BLOCK = 512
# Deflate at level 1: measured about 8x less compression time than level 6 for files about 8 % larger.
_COMPRESS = {"COMPRESS": "DEFLATE", "ZLEVEL": 1}
# No sidecar files: with PAM off GDAL drops what a GeoTIFF cannot hold instead of writing NAME.aux.xml;
# masks go inside the TIFF, not into NAME.msk.
_ENV = {"GDAL_PAM_ENABLED": "NO", "GDAL_TIFF_INTERNAL_MASK": "YES"}


@dataclass
class RasterSpec:
    """One output raster: its pixels come from ``rows(y0, y1)`` (rows y0..y1: h×W or h×W×B), its validity from
    ``valid(y0, y1)`` (h×W bool, True = data; None: no mask is written)."""

    shape: tuple[int, ...]
    dtype: np.dtype
    rows: Callable[[int, int], np.ndarray]
    valid: Callable[[int, int], np.ndarray] | None = None
    colormap: Sequence[tuple[int, int, int]] | None = None  # palette: index → RGB, for a class-id map
    nodata: float | None = None
    scale: float | None = None
    offset: float | None = None
    descriptions: Sequence[str] = ()
    band_tags: Mapping[str, str] = field(default_factory=dict)  # metadata items of band 1
    tags: Mapping[str, str] = field(default_factory=dict)  # metadata items of the dataset
    rgb: bool = False  # three bands shown as red, green, blue
    resampling: str = "nearest"  # how overviews are computed: "nearest" for classes, "average" for measurements

    @property
    def bands(self) -> int:
        return self.shape[2] if len(self.shape) == 3 else 1


def label_spec(classes: ClassTable, shape: tuple[int, int], rows: Callable[[int, int], np.ndarray],
               valid: Callable[[int, int], np.ndarray] | None = None) -> RasterSpec:
    """A class-id map: the classes' colour table (the ignore value in ``ignore_color``), the ignore value as
    nodata, and the class names as band metadata items ``CLASS_<id>``."""
    palette = np.array(classes.palette(), np.uint8).reshape(256, 3)
    return RasterSpec(shape, np.dtype(np.uint8), rows, valid, colormap=[tuple(int(v) for v in c) for c in palette],
                      nodata=classes.ignore, descriptions=("class id",),
                      band_tags={f"CLASS_{c.id}": c.name for c in classes.classes})


def write_geotiff(path: str | Path, spec: RasterSpec, geo: GeoRef | None, *, cog: bool = True,
                  work: Path | None = None, compress: str | None = "deflate", block: int = COG_BLOCK) -> None:
    """Write ``spec`` to ``path`` atomically: a COG with overviews (``cog``), or a tiled GeoTIFF.

    ``geo`` places it (None: no georeferencing). ``work`` holds the COG's stage file (default: beside
    ``path``). ``block`` is the tile side.
    """
    path = Path(path)
    with rasterio.Env(**_ENV), warnings.catch_warnings(), atomic_output(path) as tmp:
        warnings.simplefilter("ignore", NotGeoreferencedWarning)
        if not cog:
            _write_tiled(tmp, spec, geo, compress, block)
            return
        stage = partial_path((work or path.parent) / f"{path.stem}.stage.tif")
        try:
            _write_tiled(stage, spec, geo, None, block)  # uncompressed: read once, by the COG driver, at once
            options = {"COMPRESS": "DEFLATE", "LEVEL": 1} if compress else {"COMPRESS": "NONE"}
            try:
                rasterio.shutil.copy(stage, tmp, driver="COG", BLOCKSIZE=block, BIGTIFF="IF_SAFER",
                                     OVERVIEW_RESAMPLING=spec.resampling.upper(), **options)
            except Exception as e:  # GDAL reports disk-full and similar failures through several error types
                raise DataError(f"{path}: cannot write ({' '.join(str(e).split())})") from None
        finally:
            with contextlib.suppress(FileNotFoundError):
                stage.unlink()


def _write_tiled(target: Path, spec: RasterSpec, geo: GeoRef | None, compress: str | None, block: int) -> None:
    height, width = spec.shape[:2]
    bands = spec.bands
    big = height * width * bands * np.dtype(spec.dtype).itemsize > 2**31 - 2**25
    tiled = height >= 16 and width >= 16
    profile: dict = {"driver": "GTiff", "width": width, "height": height, "count": bands,
                     "dtype": np.dtype(spec.dtype).name, "BIGTIFF": "YES" if big else "NO",
                     "photometric": "RGB" if spec.rgb else ("PALETTE" if spec.colormap else "MINISBLACK")}
    if tiled:
        side = max(16, min(block, 16 * math.ceil(max(height, width) / 16)) // 16 * 16)
        profile.update(tiled=True, blockxsize=side, blockysize=side)
    if bands > 1:
        profile["interleave"] = "pixel"
    if compress:
        profile.update({k.lower(): v for k, v in _COMPRESS.items()})
    if spec.nodata is not None:
        profile["nodata"] = spec.nodata
    if geo is not None:
        profile.update(crs=geo.crs, transform=geo.transform)
    try:
        dst = rasterio.open(target, "w", **profile)
    except Exception as e:  # GDAL's creation errors come in several types
        raise DataError(f"{target}: cannot write a GeoTIFF ({' '.join(str(e).split())})") from None
    with dst:
        if spec.colormap is not None:
            dst.write_colormap(1, {i: tuple(c) for i, c in enumerate(spec.colormap)})
        for i, text in enumerate(spec.descriptions):
            dst.set_band_description(i + 1, text)
        if spec.scale is not None or spec.offset is not None:
            dst.scales = [spec.scale if spec.scale is not None else 1.0] * bands
            dst.offsets = [spec.offset if spec.offset is not None else 0.0] * bands
        if spec.tags:
            dst.update_tags(**spec.tags)
        if spec.band_tags:
            dst.update_tags(1, **spec.band_tags)
        for y0 in range(0, height, ROWS_PER_WRITE):
            y1 = min(y0 + ROWS_PER_WRITE, height)
            window = Window(0, y0, width, y1 - y0)
            data = np.asarray(spec.rows(y0, y1)).reshape(y1 - y0, width, bands)
            dst.write(np.moveaxis(data, -1, 0), window=window)
            if spec.valid is not None:
                dst.write_mask(np.where(np.asarray(spec.valid(y0, y1)), 255, 0).astype(np.uint8), window=window)
