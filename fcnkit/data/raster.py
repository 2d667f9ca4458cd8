"""Images as region readers: one front for every format, so mapping, ``check`` and training read alike.

``open_raster(path, max_pixels)`` picks the reader by format and returns a :class:`Raster`: an image of
``shape`` (H, W, B) and ``dtype`` read one rectangle at a time, with its georeferencing and validity.

* GDAL formats (TIFF, BigTIFF, COG, VRT) — :mod:`fcnkit.data.gdalraster`, through rasterio: every compression
  and layout GDAL reads, windowed reads (only the tiles or strips a region needs), nodata values, per-dataset
  masks and alpha bands.
* Pillow formats (PNG, JPEG) — :mod:`fcnkit.data.pillowraster`: these cannot be decoded in parts, so the
  whole image is decoded once, on the first read, after its pixel count is checked.

What every reader agrees on:

* **Bands** are the data bands. An alpha band (GDAL colour interpretation "alpha", or a PNG's alpha channel)
  is not data: it is read as the validity mask. Beware: GDAL marks band 4 of a 4-band 8-bit GeoTIFF written
  with PHOTOMETRIC=RGB (rasterio's default for 4 uint8 bands) as alpha, so an R, G, B, NIR image written that
  way reads as 3 bands with NIR as a mask; write such images with ``photometric="minisblack"``.
* **Pixel types**: uint8 and uint16 stay; every other numeric type becomes float32.
* **Validity**: ``valid(y0, y1, x0, x1)`` is a boolean mask (True = data) or None when every pixel is valid;
  ``read`` puts ``fill`` (one value per band, default 0) into invalid pixels, so a nodata value of −9999 or NaN
  never reaches a net. A pixel is valid when any band is (GDAL's rule for per-band nodata).
* **Errors**: a one-line DataError naming the file: unreadable, truncated, above the pixel limit, several
  images in one file (one-band-per-page TIFFs: stack the pages as bands), NaN or infinite values in valid
  pixels.
"""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path

import numpy as np

from fcnkit.data.rasterbase import (  # noqa: F401 - the front also offers what every reader shares
    ArrayRaster,
    GeoRef,
    Raster,
    check_finite,
    check_pixel_limit,
    fill_invalid,
    supported_dtype,
)
from fcnkit.errors import DataError
from fcnkit.inputfiles import require_regular

TIFF_SUFFIXES = (".tif", ".tiff")
GDAL_SUFFIXES = TIFF_SUFFIXES + (".vrt",)
PILLOW_SUFFIXES = (".png", ".jpg", ".jpeg")
RASTER_SUFFIXES = GDAL_SUFFIXES + PILLOW_SUFFIXES
DEFAULT_MAX_PIXELS = 2**31
"""2.1 gigapixels: the one guard against mistaken or hostile files (a header claiming 100 000 × 100 000 pixels)
for every command; raise it for larger images. Training and ``check`` hold an image in memory, mapping streams it."""

_TIFF_MAGIC = (b"II*\x00", b"MM\x00*", b"II+\x00", b"MM\x00+")


def open_raster(path: str | Path, max_pixels: int | None, *, indices: bool = False) -> Raster:
    """A region reader for an image file (GDAL: TIFF/BigTIFF/COG/VRT; Pillow: PNG/JPEG), chosen by content for
    TIFF and by suffix otherwise; a DataError naming the file if it cannot be read.

    ``indices`` keeps a palette image's indices as one band (for masks; the reader's ``palette`` then holds
    the colours) instead of expanding them to colours.
    """
    path = Path(path)
    require_regular(path, DataError)
    if not path.is_file():
        raise DataError(f"{path}: no such image file")
    if path.stat().st_size == 0:
        raise DataError(f"{path}: empty file (0 bytes)")
    suffix = path.suffix.lower()
    if suffix in GDAL_SUFFIXES or _is_tiff(path):
        from fcnkit.data.gdalraster import GdalRaster

        return GdalRaster(path, max_pixels, indices=indices)
    if suffix in PILLOW_SUFFIXES:
        from fcnkit.data.pillowraster import PillowRaster

        return PillowRaster(path, max_pixels, indices=indices)
    raise DataError(f"{path}: unsupported image type {suffix or '(none)'}; expected one of: "
                    + ", ".join(RASTER_SUFFIXES))


def alpha_hint(raster: Raster) -> str:
    """A clause for band-count errors when the file has alpha bands, which readers take as masks, not data."""
    alpha = getattr(raster, "alpha_bands", [])
    if not alpha:
        return ""
    which = ", ".join(str(b) for b in alpha)
    return (f" (its band {which} is marked as alpha and read as a validity mask, not data; an R, G, B, NIR image "
            "written with PHOTOMETRIC=RGB gets its NIR band marked so: rewrite it with PHOTOMETRIC=MINISBLACK)")


def _is_tiff(path: Path) -> bool:
    try:
        with open(path, "rb") as f:
            return f.read(4) in _TIFF_MAGIC
    except OSError as e:
        raise DataError(f"{path}: cannot read ({e.strerror or e})") from None


def read_whole(raster: Raster, rows: int = 1024) -> tuple[np.ndarray, np.ndarray | None]:
    """The whole image and its validity (None: every pixel valid), read a band of rows at a time into one
    array, after checking that it fits in the memory available."""
    from fcnkit.memory import available_memory

    h, w, b = raster.shape
    need, free = h * w * b * raster.dtype.itemsize, available_memory()
    if need > free:
        raise DataError(f"{raster.path}: decoding it needs {need / 2**30:.1f} GiB but {free / 2**30:.1f} GiB of "
                        f"memory is available ({h}x{w} px, {b} bands)")
    out = np.empty((h, w, b), raster.dtype)
    valid: np.ndarray | None = None
    for y0 in range(0, h, rows):
        y1 = min(y0 + rows, h)
        out[y0:y1] = raster.read(y0, y1, 0, w)
        v = raster.valid(y0, y1, 0, w)
        if v is not None and not v.all():
            if valid is None:
                valid = np.ones((h, w), bool)
            valid[y0:y1] = v
    return out, valid


# --- the row store ------------------------------------------------------------------------------------------


class RowStore:
    """An H×W(×C) array in a raw file inside ``folder`` (or in memory when ``folder`` is None), reached one
    band of rows at a time.

    Each access maps only the rows it needs and unmaps them afterwards, so resident memory stays at one
    band however large the array is, while the file system's cache does the buffering.
    """

    def __init__(self, shape: tuple[int, ...], dtype: np.dtype | type, folder: Path | None = None,
                 name: str = "array") -> None:
        self.shape, self.dtype = tuple(shape), np.dtype(dtype)
        self._row_bytes = int(np.prod(self.shape[1:])) * self.dtype.itemsize
        self.path: Path | None = None
        self._array: np.ndarray | None = None
        if folder is None:
            self._array = np.zeros(self.shape, self.dtype)
        else:
            self.path = Path(folder) / f"{name}.raw"
            with open(self.path, "wb") as f:  # sparse: blocks are allocated as they are written
                f.truncate(self.shape[0] * self._row_bytes)

    def rows(self, y0: int, y1: int, write: bool = True) -> np.ndarray:
        """Rows y0..y1 as an array backed by the store (a fresh memory map of just those rows)."""
        if self._array is not None:
            return self._array[y0:y1]
        return np.memmap(self.path, self.dtype, "r+" if write else "r", offset=y0 * self._row_bytes,
                         shape=(y1 - y0, *self.shape[1:]))

    def whole(self) -> np.ndarray:
        """The whole array (a memory map when on disk: touching all of it makes all of it resident)."""
        return self._array if self._array is not None else self.rows(0, self.shape[0])

    def bands(self, height: int) -> Iterator[tuple[int, int]]:
        for y0 in range(0, self.shape[0], height):
            yield y0, min(y0 + height, self.shape[0])
