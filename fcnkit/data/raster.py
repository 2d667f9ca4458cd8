"""Large rasters: lazy region readers, streaming TIFF writers and GeoTIFF tag copying.

Tiled inference reads an image one tile at a time, so a reader here returns any rectangle of pixels as an
H×W×B array in the file's dtype without decoding the rest where the format allows it:

* TIFF / BigTIFF (tifffile): uncompressed contiguous data is memory-mapped; tiled or striped data, 8/16-bit or
  float, chunky or planar, is read one tile or strip at a time (the file's own segments), with a small cache
  of decoded segments shared by neighbouring tiles.
* PNG / JPEG (Pillow, via :func:`fcnkit.data.imageio.read_image`): these formats cannot be decoded in parts,
  so the whole image is decoded once, after its pixel count is checked against an explicit limit (Pillow's
  decompression-bomb guard stays on).

Writers stream a large raster to a tiled, deflate-compressed (Big)TIFF block by block through
:mod:`fcnkit.atomic`, optionally carrying a source GeoTIFF's georeferencing tags.
"""

from __future__ import annotations

import math
import os
from collections import OrderedDict
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Protocol

import numpy as np
import tifffile

from fcnkit.atomic import atomic_output
from fcnkit.data.imageio import quiet_tifffile
from fcnkit.errors import DataError

TIFF_SUFFIXES = (".tif", ".tiff")
PILLOW_SUFFIXES = (".png", ".jpg", ".jpeg")
RASTER_SUFFIXES = TIFF_SUFFIXES + PILLOW_SUFFIXES
SEGMENT_MAX_PIXELS = 2**31  # 2.1 gigapixels; the decoded-pixel guard for segment (raise it for larger files)

# GeoTIFF tags (GeoTIFF 1.0 specification, section 2.4): pixel scale, tie points, transformation matrix,
# GeoKey directory and its double and ASCII parameters.
PIXEL_SCALE, TIEPOINT, TRANSFORMATION, GEOKEYS, GEO_DOUBLES, GEO_ASCII = 33550, 33922, 34264, 34735, 34736, 34737
GEO_TAGS = (PIXEL_SCALE, TIEPOINT, TRANSFORMATION, GEOKEYS, GEO_DOUBLES, GEO_ASCII)
# GeoKeys read for areas (GeoTIFF 1.0, 6.3.1.1 and 6.3.1.3): model type 1 = projected, 2 = geographic;
# linear unit 9001 = metre (EPSG unit code).
_MODEL_TYPE_KEY, _LINEAR_UNITS_KEY, _PROJECTED, _METRE = 1024, 3076, 1, 9001


@dataclass(frozen=True)
class GeoTags:
    """The georeferencing tags of a GeoTIFF, as (code, datatype, count, value), ready to write again."""

    tags: tuple[tuple[int, int, int, Any], ...]

    def value(self, code: int) -> Any:
        return next((v for c, _, _, v in self.tags if c == code), None)

    def extratags(self, scale: int = 1) -> list[tuple[int, int, int, Any, bool]]:
        """tifffile ``extratags`` for an output at the same grid, or one down-sampled by ``scale``
        (pixel scale and the transformation's pixel-to-model columns multiplied by it)."""
        out = []
        for code, dtype, count, value in self.tags:
            if scale != 1 and code == PIXEL_SCALE:
                value = (value[0] * scale, value[1] * scale, *value[2:])
            elif scale != 1 and code == TRANSFORMATION:
                value = tuple(v * scale if i % 4 in (0, 1) and i < 12 else v for i, v in enumerate(value))
            out.append((code, dtype, 0 if dtype == 2 else count, value, True))
        return out

    def pixel_size_m(self) -> tuple[float, float] | None:
        """Pixel width and height in metres, when the grid is projected in metres and not rotated."""
        keys = _geokeys(self.value(GEOKEYS))
        if keys.get(_MODEL_TYPE_KEY, _PROJECTED) != _PROJECTED or keys.get(_LINEAR_UNITS_KEY, _METRE) != _METRE:
            return None
        scale = self.value(PIXEL_SCALE)
        if scale is not None and scale[0] > 0 and scale[1] > 0:
            return float(scale[0]), float(scale[1])
        m = self.value(TRANSFORMATION)
        if m is not None and m[1] == 0 and m[4] == 0:
            return abs(float(m[0])), abs(float(m[5]))
        return None


def _geokeys(directory: Sequence[int] | None) -> dict[int, int]:
    """Short (inline) GeoKey values from a GeoKeyDirectory: header of 4, then (key, location, count, value)."""
    if not directory or len(directory) < 4:
        return {}
    keys = {}
    for i in range(4, 4 + 4 * int(directory[3]), 4):
        key, location, _count, value = directory[i:i + 4]
        if location == 0:
            keys[int(key)] = int(value)
    return keys


def read_geotags(page: tifffile.TiffPage) -> GeoTags | None:
    found = tuple((code, int(page.tags[code].dtype), page.tags[code].count, page.tags[code].value)
                  for code in GEO_TAGS if code in page.tags)
    return GeoTags(found) if any(c in (PIXEL_SCALE, TIEPOINT, TRANSFORMATION) for c, *_ in found) else None


class Raster(Protocol):
    """Anything tiled inference can read: an image of ``shape`` (H, W, B) read one rectangle at a time."""

    path: Path | None
    shape: tuple[int, int, int]
    dtype: np.dtype
    geo: GeoTags | None

    def read(self, y0: int, y1: int, x0: int, x1: int) -> np.ndarray: ...

    def close(self) -> None: ...


@dataclass
class ArrayRaster:
    """An in-memory (or memory-mapped) H×W or H×W×B array seen as a :class:`Raster`."""

    array: np.ndarray
    geo: GeoTags | None = None
    path: Path | None = None

    def __post_init__(self) -> None:
        if self.array.ndim == 2:
            self.array = self.array[:, :, None]
        if self.array.ndim != 3:
            raise DataError(f"{self.path or 'image'}: expected an H×W×bands array, got shape {self.array.shape}")

    @property
    def shape(self) -> tuple[int, int, int]:
        return tuple(self.array.shape)  # type: ignore[return-value]

    @property
    def dtype(self) -> np.dtype:
        return self.array.dtype

    def read(self, y0: int, y1: int, x0: int, x1: int) -> np.ndarray:
        return self.array[y0:y1, x0:x1]

    def close(self) -> None:
        pass


class TiffRaster:
    """Region reader for a TIFF or BigTIFF (first image), decoding only the tiles or strips a region needs."""

    def __init__(self, path: str | Path, max_pixels: int | None, cache_bytes: int = 64 << 20) -> None:
        self.path = Path(path)
        try:
            with quiet_tifffile():
                self._tif = tifffile.TiffFile(self.path)
        except Exception as e:  # tifffile raises TiffFileError, ValueError, TypeError, struct.error… on damage
            raise DataError(f"{self.path}: not a readable TIFF ({_one_line(e)})") from None
        try:
            if not len(self._tif.pages):
                raise DataError(f"{self.path}: not a readable TIFF (it holds no image)")
            self._open(self._tif.pages.first, max_pixels)
        except BaseException:
            self._tif.close()
            raise
        self._cache: OrderedDict[int, np.ndarray] = OrderedDict()
        self._cache_bytes, self._cached = cache_bytes, 0

    def _open(self, page: tifffile.TiffPage, max_pixels: int | None) -> None:
        sep, depth, height, width, contig = page.shaped
        if depth != 1 or page.dtype is None:
            raise DataError(f"{self.path}: unsupported TIFF layout (depth {depth}, dtype {page.dtype})")
        if np.dtype(page.dtype).kind not in "buif":
            raise DataError(f"{self.path}: pixel type {page.dtype} (expected integers or real floats)")
        if not height * width * sep * contig:
            raise DataError(f"{self.path}: image has no pixels ({height}x{width}, {sep * contig} bands; expected "
                            "at least one pixel and one band)")
        if max_pixels is not None and height * width > max_pixels:
            raise DataError(f"{self.path}: {width}x{height} = {height * width:,} pixels is above the limit of "
                            f"{max_pixels:,}; raise the pixel limit if the file is trusted")
        self.page, self.shape, self.dtype = page, (height, width, sep * contig), np.dtype(page.dtype)
        self.geo = read_geotags(page)
        size = os.path.getsize(self.path)
        if len(page.dataoffsets) != len(page.databytecounts):
            raise DataError(f"{self.path}: corrupt TIFF ({len(page.dataoffsets)} segment offsets but "
                            f"{len(page.databytecounts)} segment sizes)")
        ends = [o + n for o, n in zip(page.dataoffsets, page.databytecounts, strict=True)]
        if not ends or max(ends) > size or 0 in page.databytecounts:
            raise DataError(f"{self.path}: truncated TIFF (image data ends at byte {max(ends, default=0):,}, "
                            f"file has {size:,})")
        # uncompressed chunky data: map just the rows a read needs (keeps resident memory to one tile's rows)
        self._contiguous = page.is_memmappable and (page.planarconfig == 1 or self.shape[2] == 1)
        if page.is_tiled:
            self._seg_h, self._seg_w = page.tilelength, page.tilewidth
        else:
            self._seg_h, self._seg_w = min(page.rowsperstrip, height), width
        self._rows, self._cols = math.ceil(height / self._seg_h), math.ceil(width / self._seg_w)
        expected = sep * self._rows * self._cols
        if len(page.dataoffsets) < expected:
            raise DataError(f"{self.path}: corrupt TIFF ({len(page.dataoffsets)} data segments, expected {expected} "
                            f"for {width}x{height} pixels in {self._seg_w}x{self._seg_h} segments)")

    def read(self, y0: int, y1: int, x0: int, x1: int) -> np.ndarray:
        out = self._read(y0, y1, x0, x1)
        if out.dtype.kind == "f" and not np.isfinite(out).all():  # NaN scores would pass silently into a map
            raise DataError(f"{self.path}: {int((~np.isfinite(out)).sum())} NaN or infinite pixel values in rows "
                            f"{y0}..{y1 - 1} (expected finite numbers; fill no-data pixels before mapping)")
        return out

    def _read(self, y0: int, y1: int, x0: int, x1: int) -> np.ndarray:
        if self._contiguous:
            _, width, bands = self.shape
            dtype = self.dtype.newbyteorder(self._tif.byteorder)
            rows = np.memmap(self.path, dtype, "r", offset=self.page.dataoffsets[0] + y0 * width * bands
                             * dtype.itemsize, shape=(y1 - y0, width, bands))
            out = rows[:, x0:x1].astype(self.dtype)
            del rows
            return out
        out = np.empty((y1 - y0, x1 - x0, self.shape[2]), self.dtype)
        planes = self.page.shaped[0]
        for r in range(y0 // self._seg_h, (y1 - 1) // self._seg_h + 1):
            for c in range(x0 // self._seg_w, (x1 - 1) // self._seg_w + 1):
                sy, sx = r * self._seg_h, c * self._seg_w
                a0, a1 = max(y0, sy), min(y1, sy + self._seg_h)
                b0, b1 = max(x0, sx), min(x1, sx + self._seg_w)
                for p in range(planes):
                    seg = self._segment((p * self._rows + r) * self._cols + c)
                    bands = slice(p, p + 1) if planes > 1 else slice(None)
                    out[a0 - y0:a1 - y0, b0 - x0:b1 - x0, bands] = seg[a0 - sy:a1 - sy, b0 - sx:b1 - sx]
        return out

    def _segment(self, index: int) -> np.ndarray:
        """One decoded tile or strip as rows×cols×samples (cached, least recently used dropped first)."""
        if index in self._cache:
            self._cache.move_to_end(index)
            return self._cache[index]
        page, fh = self.page, self._tif.filehandle
        with fh.lock:
            fh.seek(page.dataoffsets[index])
            data = fh.read(page.databytecounts[index])
        try:
            seg, _, shape = page.decode(data, index, jpegtables=page.jpegtables, jpegheader=page.jpegheader)
        except Exception as e:  # codecs raise many types; all mean a damaged or unsupported segment
            raise DataError(f"{self.path}: cannot decode TIFF segment {index} ({_one_line(e)})") from None
        if seg is None:
            raise DataError(f"{self.path}: TIFF segment {index} is empty")
        seg = seg.reshape(shape)[0]
        self._cache[index] = seg
        self._cached += seg.nbytes
        while self._cached > self._cache_bytes and len(self._cache) > 1:
            self._cached -= self._cache.popitem(last=False)[1].nbytes
        return seg

    def close(self) -> None:
        self._cache.clear()
        self._tif.close()


def _one_line(e: BaseException) -> str:
    return " ".join(str(e).split()) or type(e).__name__


def open_raster(path: str | Path, max_pixels: int | None) -> Raster:
    """A region reader for a TIFF/BigTIFF, PNG or JPEG file; DataError naming the file if it cannot be read."""
    path = Path(path)
    if not path.is_file():
        raise DataError(f"{path}: no such image file")
    suffix = path.suffix.lower()
    if suffix in TIFF_SUFFIXES:
        return TiffRaster(path, max_pixels)
    if suffix in PILLOW_SUFFIXES:
        from fcnkit.data.imageio import read_image

        return ArrayRaster(read_image(path, max_pixels=max_pixels), path=path)
    raise DataError(f"{path}: unsupported image type {suffix or '(none)'}; expected one of: "
                    + ", ".join(RASTER_SUFFIXES))


# --- writers --------------------------------------------------------------------------------------------


@dataclass
class RasterSpec:
    """How to write one output raster: its pixels come from ``rows(y0, y1)`` (an array of rows y0..y1)."""

    shape: tuple[int, ...]
    dtype: np.dtype
    rows: Callable[[int, int], np.ndarray]
    colormap: np.ndarray | None = None  # 3×256 uint16 palette for a class-id map
    extratags: list[tuple[int, int, int, Any, bool]] = field(default_factory=list)


def write_tiff_streamed(path: str | Path, spec: RasterSpec, *, tile: int = 256) -> None:
    """Write a tiled, deflate-compressed TIFF (BigTIFF above 2 GiB raw) one row of tiles at a time, atomically."""
    height, width = spec.shape[:2]
    bands = spec.shape[2] if len(spec.shape) == 3 else 1
    tile = min(tile, 16 * math.ceil(max(height, width) / 16))
    tile = max(16, tile // 16 * 16)

    def tiles() -> Iterator[np.ndarray]:
        for y0 in range(0, height, tile):
            block = np.asarray(spec.rows(y0, min(y0 + tile, height))).reshape(-1, width, bands)
            for x0 in range(0, width, tile):
                t = np.zeros((tile, tile, bands), spec.dtype)
                part = block[:, x0:x0 + tile]
                t[:part.shape[0], :part.shape[1]] = part
                yield t if bands > 1 else t[..., 0]

    big = height * width * bands * np.dtype(spec.dtype).itemsize > 2**31 - 2**25
    photometric = "palette" if spec.colormap is not None else ("rgb" if bands == 3 else "minisblack")
    with atomic_output(path) as tmp, tifffile.TiffWriter(tmp, bigtiff=big) as tif:
        tif.write(tiles(), shape=spec.shape, dtype=spec.dtype, tile=(tile, tile), compression="zlib",
                  compressionargs={"level": 1},  # 8x faster than the default level 6, files ~8 % larger
                  photometric=photometric, colormap=spec.colormap, extratags=spec.extratags,
                  planarconfig="contig" if bands > 1 else None, metadata=None)


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
