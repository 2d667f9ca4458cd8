"""The input range: the pixel values a model was trained on, and how far a new image lies outside them.

Training records, per band, the pixel type, minimum, maximum and 1st and 99th percentiles of its images
(:func:`training_stats`, kept in the model file as ``fcnkit.input_stats``). Mapping and evaluation check every
region they read against it (:class:`RangeCheck`), with the training span ``max − min`` as the unit:

* more than ``NOTE_SPANS`` (a quarter) of a span below the minimum or above the maximum: a one-line note, once
  per image — the net extrapolates there (e.g. 16-bit reflectances 0–10000 into a net trained on 8-bit
  pixels, 39 spans above);
* more than ``REFUSE_SPANS`` (1000) spans outside: refused (DataError), as no rescaling of the same kind of
  measurement lands there (a fill value such as 1e30 or 3.4e38, damaged data), and values that large can
  overflow float32 activations into inf and NaN.

Models without recorded statistics (converted classifiers, files from before) are not checked.
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Callable, Sequence
from typing import Any

import numpy as np

from fcnkit.errors import DataError, ModelFileError

NOTE_SPANS = 0.25
REFUSE_SPANS = 1000.0
_SAMPLE = 1_000_000  # pixels per band the percentiles are taken from (an even stride through every image)


class RangeWarning(UserWarning):
    """An image lies outside the range of pixel values a model was trained on (see module notes)."""


def training_stats(images: Sequence[np.ndarray]) -> dict[str, Any]:
    """Per-band pixel type, minimum, maximum, 1st and 99th percentiles of H×W×B images (the percentiles from
    at most a million pixels per band, taken at an even stride)."""
    bands = images[0].shape[2]
    total = sum(x.shape[0] * x.shape[1] for x in images)
    step = max(1, total // _SAMPLE)
    extremes = [band_extremes(x.reshape(-1, bands)) for x in images]
    lo = np.min([e[0] for e in extremes], axis=0)
    hi = np.max([e[1] for e in extremes], axis=0)
    sample = np.concatenate([x.reshape(-1, bands)[::step] for x in images]).astype(np.float64)
    p01, p99 = np.percentile(sample, [1, 99], axis=0)
    dtypes = sorted({str(x.dtype) for x in images})
    return {"dtype": dtypes[0] if len(dtypes) == 1 else dtypes, "min": lo.tolist(), "max": hi.tolist(),
            "p01": p01.tolist(), "p99": p99.tolist(), "pixels": int(total)}


def check_stats(stats: Any, bands: int, where: str) -> dict[str, Any]:
    """The recorded statistics of a model file, checked; ModelFileError naming the key otherwise."""
    ok = isinstance(stats, dict) and all(
        isinstance(stats.get(k), list) and len(stats[k]) == bands
        and all(isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v) for v in stats[k])
        for k in ("min", "max")) and all(a <= b for a, b in zip(stats["min"], stats["max"], strict=True))
    if not ok:
        raise ModelFileError(f"{where}: metadata 'fcnkit.input_stats' must hold 'min' and 'max' lists of {bands} "
                             f"finite numbers with min <= max, got {str(stats)[:120]}")
    return stats


def bounds(stats: dict[str, Any], spans: float) -> tuple[np.ndarray, np.ndarray]:
    """Per band, the values ``spans`` training spans below the minimum and above the maximum."""
    lo, hi = np.asarray(stats["min"], np.float64), np.asarray(stats["max"], np.float64)
    span = np.where(hi > lo, hi - lo, np.maximum(np.abs(hi), 1.0))  # a constant band: its own magnitude
    return lo - spans * span, hi + spans * span


def band_extremes(flat: np.ndarray, lanes: int = 64) -> tuple[np.ndarray, np.ndarray]:
    """Per-column minimum and maximum (float64) of an N×B array. Reducing ``lanes`` pixels side by side first
    (rows of lanes × B values) keeps the reduction vectorised: over 20× faster than ``min(axis=0)`` on a few
    columns (measured on 4 bands)."""
    bands = flat.shape[1]
    n = len(flat) // lanes * lanes
    parts_lo, parts_hi = [], []
    if n:
        wide = flat[:n].reshape(-1, lanes * bands)
        parts_lo.append(wide.min(0).reshape(lanes, bands).min(0))
        parts_hi.append(wide.max(0).reshape(lanes, bands).max(0))
    if n < len(flat):
        parts_lo.append(flat[n:].min(0))
        parts_hi.append(flat[n:].max(0))
    return (np.min(parts_lo, axis=0).astype(np.float64), np.max(parts_hi, axis=0).astype(np.float64))


class RangeCheck:
    """A region reader (:class:`fcnkit.data.raster.Raster`) that checks every region read against a model's
    training statistics: ``note`` (default: a :class:`RangeWarning`) once, DataError when far outside."""

    def __init__(self, raster: Any, stats: dict[str, Any], *, where: str, model: str,
                 note: Callable[[str], None] | None = None) -> None:
        self.raster, self.stats, self.where, self.model = raster, stats, where, model
        self.note = note
        self.noted = False
        self.soft, self.hard = bounds(stats, NOTE_SPANS), bounds(stats, REFUSE_SPANS)
        dtype = np.dtype(raster.dtype) if hasattr(raster, "dtype") else None
        # integer pixels whose whole type lies inside the note bounds cannot be outside: nothing to check
        self.needless = dtype is not None and dtype.kind in "ui" and bool(
            (self.soft[0] <= np.iinfo(dtype).min).all() and (np.iinfo(dtype).max <= self.soft[1]).all())

    def __getattr__(self, name: str) -> Any:  # shape, dtype, path, geo, valid, masked…: the wrapped reader's
        return getattr(self.__dict__["raster"], name)

    def read(self, y0: int, y1: int, x0: int, x1: int) -> np.ndarray:
        region = self.raster.read(y0, y1, x0, x1)
        if not self.needless and region.size:
            self._check(region)
        return region

    def close(self) -> None:
        self.raster.close()

    def _check(self, region: np.ndarray) -> None:
        flat = region.reshape(-1, region.shape[-1])
        lo, hi = band_extremes(flat)
        trained = f"{self.model} was trained on"
        for b in range(flat.shape[1]):
            tmin, tmax = self.stats["min"][b], self.stats["max"][b]
            for value, far, near in ((lo[b], lo[b] < self.hard[0][b], lo[b] < self.soft[0][b]),
                                     (hi[b], hi[b] > self.hard[1][b], hi[b] > self.soft[1][b])):
                if far:
                    raise DataError(f"{self.where}: band {b + 1} holds {value:g}, far outside the range {tmin:g}.."
                                    f"{tmax:g} {trained} (over {REFUSE_SPANS:g} times that range beyond it: a "
                                    "fill value or damaged data?); mask, rescale or repair it")
                if near and not self.noted:
                    self.noted = True
                    text = (f"{self.where}: band {b + 1} has values to {value:g} ({region.dtype}), outside the range "
                            f"{tmin:g}..{tmax:g} ({_dtype(self.stats)}) {trained}; its results there are "
                            "extrapolation")
                    if self.note is not None:
                        self.note(text)
                    else:
                        warnings.warn(text, RangeWarning, stacklevel=2)


def _dtype(stats: dict[str, Any]) -> str:
    d = stats.get("dtype", "?")
    return "/".join(d) if isinstance(d, list) else str(d)
