"""The Pillow reader: PNG and JPEG, decoded whole on the first read (neither format can be decoded in parts).

What a photograph's file says about how to show it is applied, so images and masks line up as the person who
labelled them saw them:

* EXIF orientation (JPEG, and PNG's eXIf chunk) is applied, the shape included (Pillow's ``exif_transpose``);
* a palette image is expanded to its colours (or kept as indices, with its palette, for masks);
* an alpha channel (RGBA, LA, or a palette's transparency) is the validity mask, not a band;
* CMYK JPEGs (colours for print) are refused rather than read as four bands, and 16-bit colour PNGs are
  refused because Pillow would silently reduce them to 8 bits.

Pillow's decompression-bomb guard stays on: a larger explicit pixel limit raises it, never removes it.
"""

from __future__ import annotations

import contextlib
import threading
import warnings
from collections.abc import Iterator, Sequence
from pathlib import Path

import numpy as np
from PIL import Image, ImageOps

from fcnkit.data.rasterbase import check_pixel_limit, fill_invalid, supported_dtype
from fcnkit.errors import DataError

_PNG_MAGIC = b"\x89PNG\r\n\x1a\n"
_PIL_LOCK = threading.Lock()  # Image.MAX_IMAGE_PIXELS is process-global
_SWAPS_SIDES = (5, 6, 7, 8)  # EXIF orientations that transpose the image (EXIF 2.3, tag 0x0112)
_BANDS = {"1": 1, "L": 1, "LA": 1, "La": 1, "I": 1, "I;16": 1, "I;16L": 1, "I;16B": 1, "I;16N": 1, "F": 1,
          "RGB": 3, "RGBA": 3, "RGBa": 3, "RGBX": 3, "P": 3, "PA": 3}
_ALPHA = ("LA", "La", "RGBA", "RGBa", "PA")


def _reason(e: BaseException) -> str:
    return str(e).splitlines()[0] if str(e) else type(e).__name__


@contextlib.contextmanager
def open_pillow(path: Path, max_pixels: int | None) -> Iterator[Image.Image]:
    """Open with Pillow under a pixel limit (header only); the decompression-bomb guard stays on."""
    with _PIL_LOCK, warnings.catch_warnings():
        warnings.simplefilter("ignore", Image.DecompressionBombWarning)
        saved = Image.MAX_IMAGE_PIXELS
        if max_pixels is not None and saved is not None and max_pixels > saved:
            Image.MAX_IMAGE_PIXELS = max_pixels
        try:
            im = Image.open(path)
        except Image.DecompressionBombError:  # above twice Pillow's limit, hence above ours too
            limit = max_pixels if max_pixels is not None else 2 * (saved or 0)
            raise DataError(f"{path}: more pixels than the limit of {limit:,}; raise the pixel limit (max_pixels=, "
                            "--max-pixels) if the file is trusted") from None
        except (OSError, SyntaxError, ValueError) as e:
            raise DataError(f"{path}: not a readable image ({_reason(e)})") from None
        finally:
            Image.MAX_IMAGE_PIXELS = saved
    try:
        check_pixel_limit(path, im.height, im.width, max_pixels)
        yield im
    finally:
        im.close()


def refuse_16bit_colour_png(path: Path) -> None:
    """Pillow silently reduces 16-bit colour PNGs to 8 bits; refuse them rather than lose precision."""
    with open(path, "rb") as f:
        head = f.read(26)
    if head[:8] == _PNG_MAGIC and len(head) == 26 and head[24] == 16 and head[25] in (2, 4, 6):
        raise DataError(f"{path}: 16-bit colour PNG (Pillow reads only 8 bits of it; save it as 16-bit TIFF)")


def _orientation(im: Image.Image) -> int:
    try:
        return int(im.getexif().get(0x0112, 1))
    except Exception:  # a damaged EXIF block: Pillow raises several types; show the image as stored
        return 1


def palette_alpha(im: Image.Image) -> np.ndarray | None:
    """Per-index opacity of a palette image's transparency (None: fully opaque)."""
    t = im.info.get("transparency")
    if t is None:
        return None
    alpha = np.full(256, 255, np.uint8)
    if isinstance(t, int):
        alpha[t % 256] = 0
    else:
        values = np.frombuffer(bytes(t), np.uint8)[:256]
        alpha[:values.size] = values
    return alpha


class PillowRaster:
    """Reader for a PNG or JPEG file; see :mod:`fcnkit.data.raster` for what every reader agrees on."""

    geo = None

    def __init__(self, path: str | Path, max_pixels: int | None, *, indices: bool = False) -> None:
        self.path, self._limit, self._indices = Path(path), max_pixels, indices
        self.fill: Sequence[float] | None = None
        self.palette: np.ndarray | None = None
        refuse_16bit_colour_png(self.path)
        with open_pillow(self.path, max_pixels) as im:
            mode, w, h = im.mode, im.width, im.height
            orientation = _orientation(im)
            transparent = "transparency" in im.info
        if mode == "CMYK":
            raise DataError(f"{self.path}: CMYK JPEG (ink separations for print, not light); save it as RGB")
        if mode not in _BANDS:
            raise DataError(f"{self.path}: colour mode {mode} (expected grey, RGB, RGBA, palette or 16-bit grey)")
        if orientation in _SWAPS_SIDES:
            w, h = h, w
        bands = 1 if indices and mode == "P" else _BANDS[mode]
        dtype = {"I;16": np.uint16, "I;16L": np.uint16, "I;16B": np.uint16, "I;16N": np.uint16, "I": np.float32,
                 "F": np.float32}.get(mode, np.uint8)
        self.shape = (h, w, bands)
        self.dtype = supported_dtype(np.dtype(dtype))
        self.masked = mode in _ALPHA or (mode == "P" and transparent)
        self.alpha_bands = [bands + 1] if mode in _ALPHA else []
        self._data: np.ndarray | None = None
        self._valid: np.ndarray | None = None
        self._lock = threading.Lock()

    def _decode(self) -> None:
        with self._lock:
            if self._data is not None:
                return
            with open_pillow(self.path, self._limit) as im:
                try:
                    im.load()
                    im = ImageOps.exif_transpose(im)
                    alpha = None
                    if im.mode == "P" and self._indices:
                        pal = im.getpalette() or []
                        self.palette = np.zeros((256, 3), np.uint8)
                        colours = np.array(pal[:768], np.uint8).reshape(-1, 3)
                        self.palette[:len(colours)] = colours
                        data = np.array(im)[..., None]
                        opacity = palette_alpha(im)
                        alpha = None if opacity is None else opacity[data[..., 0]]
                    else:
                        if im.mode in ("P", "PA", "RGBa", "La"):
                            has_alpha = im.mode != "P" or "transparency" in im.info
                            im = im.convert(("LA" if im.mode == "La" else "RGBA") if has_alpha else "RGB")
                        arr = np.array(im)  # a writable copy: torch.from_numpy warns on read-only arrays
                        arr = arr[..., None] if arr.ndim == 2 else arr
                        if im.mode in ("LA", "RGBA"):
                            arr, alpha = arr[..., :-1], arr[..., -1]
                        elif im.mode == "RGBX":
                            arr = arr[..., :3]
                        data = arr
                except (OSError, SyntaxError, ValueError) as e:  # truncated or corrupt data
                    raise DataError(f"{self.path}: corrupt or truncated image ({_reason(e)})") from None
            data = np.ascontiguousarray(data.astype(self.dtype, copy=False))
            if data.shape != self.shape:  # the header and the pixels disagree: a damaged file
                raise DataError(f"{self.path}: corrupt image (decoded {data.shape}, its header says {self.shape})")
            if data.dtype.kind == "f" and not np.isfinite(data).all():
                raise DataError(f"{self.path}: {int((~np.isfinite(data)).sum())} NaN or infinite pixel values "
                                "(expected finite numbers)")
            self._valid = None if alpha is None or (alpha > 0).all() else alpha > 0
            self._data = data

    def read(self, y0: int, y1: int, x0: int, x1: int) -> np.ndarray:
        self._decode()
        valid = None if self._valid is None else self._valid[y0:y1, x0:x1]
        return fill_invalid(self._data[y0:y1, x0:x1].copy(), valid, self.fill)

    def valid(self, y0: int, y1: int, x0: int, x1: int) -> np.ndarray | None:
        self._decode()
        return None if self._valid is None else self._valid[y0:y1, x0:x1]

    def close(self) -> None:
        self._data = self._valid = None
