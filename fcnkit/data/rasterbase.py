"""What every region reader shares (:mod:`fcnkit.data.raster` is the front that picks one): where an image
lies (:class:`GeoRef`), the :class:`Raster` protocol, an in-memory array as a raster, and the pixel checks each
reader applies alike."""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Protocol

import numpy as np
from affine import Affine

from fcnkit.errors import DataError


@dataclass(frozen=True)
class GeoRef:
    """Where an image lies: its CRS (a rasterio CRS, or None for a bare pixel-to-map transform) and the affine
    transform from pixel (col, row) corners to CRS coordinates (GDAL's convention, always pixel-is-area: a
    pixel-is-point file's transform is shifted by half a pixel when read)."""

    crs: Any
    transform: Affine

    def scaled(self, step: int) -> GeoRef:
        """The grid of every ``step``-th pixel, each new pixel covering step × step old ones."""
        return GeoRef(self.crs, self.transform @ Affine.scale(step))


class Raster(Protocol):
    """Anything mapping can read: an image of ``shape`` (H, W, B) read one rectangle at a time."""

    path: Path | None
    shape: tuple[int, int, int]
    dtype: np.dtype
    geo: GeoRef | None
    masked: bool  # the file declares nodata, a mask or alpha (``valid`` may then return a mask)
    fill: Sequence[float] | None  # the values ``read`` puts into invalid pixels, per band (None: 0)

    def read(self, y0: int, y1: int, x0: int, x1: int) -> np.ndarray: ...

    def valid(self, y0: int, y1: int, x0: int, x1: int) -> np.ndarray | None: ...

    def close(self) -> None: ...


@dataclass
class ArrayRaster:
    """An in-memory (or memory-mapped) H×W or H×W×B array seen as a :class:`Raster` (every pixel valid)."""

    array: np.ndarray
    geo: GeoRef | None = None
    path: Path | None = None
    masked: bool = False
    fill: Sequence[float] | None = None

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

    def valid(self, y0: int, y1: int, x0: int, x1: int) -> None:
        return None

    def close(self) -> None:
        pass


def check_pixel_limit(path: Path, height: int, width: int, max_pixels: int | None) -> None:
    """The decoded-pixel guard every reader applies before decoding anything."""
    if max_pixels is not None and height * width > max_pixels:
        raise DataError(f"{path}: {width}x{height} = {height * width:,} pixels is above the limit of "
                        f"{max_pixels:,}; raise the pixel limit (max_pixels=, --max-pixels) if the file is trusted")


def check_finite(path: Path | None, data: np.ndarray, valid: np.ndarray | None, y0: int, y1: int) -> None:
    """NaN or infinite values in valid pixels would pass silently into every score they touch."""
    if data.dtype.kind != "f":
        return
    bad = ~np.isfinite(data).all(axis=-1)
    if valid is not None:
        bad &= valid
    if bad.any():
        raise DataError(f"{path}: {int(bad.sum())} NaN or infinite pixel values in rows {y0}..{y1 - 1} (expected "
                        "finite numbers; declare them nodata or fill them before use)")


def fill_invalid(data: np.ndarray, valid: np.ndarray | None, fill: Sequence[float] | None) -> np.ndarray:
    """``data`` (h×w×B) with ``fill`` (per band; None: 0) in the pixels where ``valid`` is False."""
    if valid is None or valid.all():
        return data
    values = np.zeros(data.shape[-1]) if fill is None else np.asarray(fill, np.float64)
    if data.dtype.kind in "ui":
        info = np.iinfo(data.dtype)
        values = np.clip(np.rint(values), info.min, info.max)
    data[~valid] = values.astype(data.dtype)
    return data


def supported_dtype(dtype: np.dtype) -> np.dtype:
    """The dtype readers return for a file's pixel type: uint8 and uint16 stay, other numbers become float32."""
    dtype = np.dtype(dtype)
    if dtype == np.bool_:
        return np.dtype(np.uint8)
    if dtype.kind == "u" and dtype.itemsize in (1, 2):
        return dtype.newbyteorder("=")
    return np.dtype(np.float32)
