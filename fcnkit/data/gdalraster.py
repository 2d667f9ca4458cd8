"""The GDAL region reader (through rasterio): TIFF, BigTIFF, COG and VRT files, one window at a time.

GDAL decodes every compression it writes (none, Deflate with or without predictor, LZW, ZSTD, JPEG including
YCbCr, WebP, LERC, PackBits, LZMA), tiled or striped, pixel- or band-interleaved, 8/16/32-bit integers and
floats, any band count; tiles GDAL left out of a sparse file read as nodata (or 0). Only the blocks a window
needs are decoded, and GDAL's block cache (bounded to READ_CACHE_BYTES) serves neighbouring windows, so memory
stays bounded whatever the file's size. The full-resolution image is read; overviews are not.

A file holding several full-resolution images (GDAL lists them as subdatasets, e.g. a one-band-per-page TIFF)
is refused: GDAL alone would read the first page, another reader would stack the pages as bands, and the
reader used by ``check``, training and mapping must not guess.
"""

from __future__ import annotations

import contextlib
import functools
import os
import threading
import warnings
from collections.abc import Sequence
from pathlib import Path

import numpy as np
import rasterio
import rasterio.env
from rasterio.enums import ColorInterp, Interleaving, MaskFlags
from rasterio.errors import NotGeoreferencedWarning
from rasterio.windows import Window

from fcnkit.data.rasterbase import GeoRef, check_finite, check_pixel_limit, fill_invalid, supported_dtype
from fcnkit.errors import DataError

MAX_BANDS = 2048
# GDAL's block cache: by default 5 % of the machine's memory, which reading a large image fills (1.2 GB of
# decoded tiles on a 24 GB machine while mapping a 268 MP mosaic, most of the peak). 128 MB holds a few rows
# of tiles of a wide image, all that streaming reads need again. Set once per process unless the user has set
# GDAL_CACHEMAX.
READ_CACHE_BYTES = 128 << 20


@functools.cache
def _bound_block_cache() -> None:
    if "GDAL_CACHEMAX" not in os.environ:
        rasterio.env.set_gdal_config("GDAL_CACHEMAX", READ_CACHE_BYTES)  # an int: bytes


def _gdal() -> contextlib.AbstractContextManager:
    """GDAL's messages go to rasterio's error handler (hence to exceptions and logging) only inside a rasterio
    environment; outside one GDAL prints them on stderr. Every call into GDAL runs inside one."""
    return contextlib.nullcontext() if rasterio.env.hasenv() else rasterio.Env()


def _one_line(e: BaseException, path: Path) -> str:
    """GDAL's message on one line, the file named once (by the caller) rather than again inside it."""
    text = " ".join(str(e).replace(f"{path}: ", "").replace(str(path), path.name).split())
    return text or type(e).__name__


class GdalRaster:
    """Region reader for any raster GDAL opens (one image per file); see :mod:`fcnkit.data.raster`."""

    def __init__(self, path: str | Path, max_pixels: int | None, *, indices: bool = False) -> None:
        self.path = Path(path)
        self.fill: Sequence[float] | None = None
        self._lock = threading.Lock()  # a GDAL dataset handle is not safe for use by two threads at once
        _bound_block_cache()
        try:
            with _gdal(), warnings.catch_warnings():
                warnings.simplefilter("ignore", NotGeoreferencedWarning)
                self._ds = rasterio.open(self.path)
        except Exception as e:  # rasterio raises RasterioIOError and GDAL's CPLE_* errors, by cause
            raise DataError(f"{self.path}: not a readable {_kind(self.path)} ({_one_line(e, self.path)}; expected an "
                            "image GDAL can open, with at least one pixel and one band)") from None
        try:
            with _gdal():
                self._open(max_pixels, indices)
        except DataError:
            self._ds.close()
            raise
        except Exception as e:  # damaged headers surface while reading band properties, in several types
            self._ds.close()
            raise DataError(f"{self.path}: corrupt {_kind(self.path)} header ({_one_line(e, self.path)})") from None
        except BaseException:
            self._ds.close()
            raise

    def _open(self, max_pixels: int | None, indices: bool) -> None:
        ds, path = self._ds, self.path
        if ds.subdatasets:
            raise DataError(f"{path}: holds {len(ds.subdatasets)} images (pages or subdatasets); fcnkit reads one "
                            "image per file: write the pages as the bands of one image")
        if ds.count == 0 or ds.width == 0 or ds.height == 0:
            raise DataError(f"{path}: image has no pixels ({ds.width}x{ds.height}, {ds.count} bands; expected at "
                            "least one pixel and one band)")
        if ds.count > MAX_BANDS:  # GDAL's per-band bookkeeping grows with the square of the band count
            raise DataError(f"{path}: {ds.count} bands (fcnkit reads images of at most {MAX_BANDS} bands)")
        kinds = {np.dtype(d).kind for d in ds.dtypes}
        if not kinds <= set("buif"):
            raise DataError(f"{path}: pixel type {ds.dtypes[0]} (expected integers or real floats)")
        check_pixel_limit(path, ds.height, ds.width, max_pixels)
        if ds.driver == "GTiff":
            self._check_extent()
        interp = ds.colorinterp
        self._bands = [i + 1 for i, c in enumerate(interp) if c != ColorInterp.alpha]
        self.alpha_bands = [i + 1 for i, c in enumerate(interp) if c == ColorInterp.alpha]
        if not self._bands:
            raise DataError(f"{path}: holds only alpha bands (expected at least one data band)")
        self.palette: np.ndarray | None = None
        self._expand: np.ndarray | None = None  # palette → RGB lookup for images
        self._palette_alpha: np.ndarray | None = None
        if len(self._bands) == 1 and interp[self._bands[0] - 1] == ColorInterp.palette and ds.dtypes[0] == "uint8":
            cmap = ds.colormap(self._bands[0])
            table = np.zeros((256, 4), np.uint8)
            for k, rgba in cmap.items():
                if 0 <= k < 256:
                    table[k] = rgba
            self.palette = table[:, :3].copy()
            if not indices:
                self._expand = table[:, :3]
                if (table[:, 3] == 0).any():
                    self._palette_alpha = table[:, 3]
        dtypes = {np.dtype(ds.dtypes[b - 1]) for b in self._bands}
        raw = np.result_type(*dtypes)
        self._raw_dtype = raw
        self.dtype = np.dtype(np.uint8) if self._expand is not None else supported_dtype(raw)
        bands = 3 if self._expand is not None else len(self._bands)
        self.shape = (ds.height, ds.width, bands)
        flags = [ds.mask_flag_enums[b - 1] for b in self._bands]
        if any(MaskFlags.per_dataset in f for f in flags):
            self._mask = "dataset"
        elif all(MaskFlags.nodata in f for f in flags):
            self._mask = "nodata"
            self._nodata = [ds.nodatavals[b - 1] for b in self._bands]
        else:
            self._mask = "none"
        self.masked = self._mask != "none" or self._palette_alpha is not None
        georeferenced = ds.crs is not None or not ds.transform.is_identity
        self.geo = GeoRef(ds.crs, ds.transform) if georeferenced else None

    def _check_extent(self, most: int = 4_000_000) -> None:
        """A truncated TIFF: some tile or strip would end past the end of the file (checked from GDAL's TIFF
        metadata, before anything is decoded, so mapping does not fail hours into a large file)."""
        ds, size = self._ds, self.path.stat().st_size
        rows, cols = ds.block_shapes[0]
        ny, nx = -(-ds.height // rows), -(-ds.width // cols)
        bands = range(1, ds.count + 1) if ds.interleaving == Interleaving.band else (1,)
        if ny * nx * len(bands) > most:
            return
        for b in bands:
            for y in range(ny):
                for x in range(nx):
                    offset = ds.get_tag_item(f"BLOCK_OFFSET_{x}_{y}", "TIFF", bidx=b)
                    length = ds.get_tag_item(f"BLOCK_SIZE_{x}_{y}", "TIFF", bidx=b)
                    if offset and length and int(offset) + int(length) > size:
                        raise DataError(f"{self.path}: truncated TIFF (image data runs to byte "
                                        f"{int(offset) + int(length):,}, the file has {size:,})")

    def _raw(self, y0: int, y1: int, x0: int, x1: int) -> tuple[np.ndarray, np.ndarray | None]:
        """The window's data bands (h×w×B, the file's dtype) and its validity (None: all valid)."""
        window = Window(x0, y0, x1 - x0, y1 - y0)
        try:
            with self._lock, _gdal():
                data = self._ds.read(self._bands, window=window)
                mask = self._ds.read_masks(self._bands[0], window=window) if self._mask == "dataset" else None
        except Exception as e:  # GDAL's decoding errors come in several types; all mean damaged data
            raise DataError(f"{self.path}: truncated or corrupt image data in rows {y0}..{y1 - 1} "
                            f"({_one_line(e, self.path)})") from None
        data = np.moveaxis(data, 0, -1)
        if self._mask == "dataset":
            valid = mask > 0
        elif self._mask == "nodata":
            valid = np.zeros(data.shape[:2], bool)
            for b, nodata in enumerate(self._nodata):
                valid |= _differs(data[..., b], nodata)
        else:
            valid = None
        return data, valid

    def read(self, y0: int, y1: int, x0: int, x1: int) -> np.ndarray:
        data, valid = self._raw(y0, y1, x0, x1)
        if self._expand is not None:
            if self._palette_alpha is not None:
                seen = self._palette_alpha[data[..., 0]] > 0
                valid = seen if valid is None else valid & seen
            data = self._expand[data[..., 0]]
        data = np.ascontiguousarray(data, dtype=self.dtype)
        check_finite(self.path, data, valid, y0, y1)
        return fill_invalid(data, valid, self.fill)

    def valid(self, y0: int, y1: int, x0: int, x1: int) -> np.ndarray | None:
        if not self.masked:
            return None
        data, valid = self._raw(y0, y1, x0, x1)
        if self._palette_alpha is not None:
            seen = self._palette_alpha[data[..., 0]] > 0
            valid = seen if valid is None else valid & seen
        return valid

    def close(self) -> None:
        self._ds.close()


def _differs(band: np.ndarray, nodata: float) -> np.ndarray:
    """Where ``band`` differs from its nodata value (NaN-aware; a value the dtype cannot hold matches nothing)."""
    if np.isnan(nodata):
        return ~np.isnan(band)
    if band.dtype.kind in "ui":
        info = np.iinfo(band.dtype)
        if nodata != int(nodata) or not info.min <= nodata <= info.max:
            return np.ones(band.shape, bool)
        return band != int(nodata)
    return band != band.dtype.type(nodata)


def _kind(path: Path) -> str:
    return "VRT" if path.suffix.lower() == ".vrt" else "TIFF"
