"""Reading images and masks, writing label PNGs and TIFFs.

Images are returned H×W×B (always 3-D) in the file's own dtype: uint8, uint16 or float32 (other numeric types
become float32). TIFF goes through tifffile (any band count, contiguous or planar, striped or tiled); PNG and
JPEG through Pillow, whose decompression-bomb guard stays on. Every read has a pixel-count limit: a file
above it is refused with a DataError naming the file and the limit; ``max_pixels`` raises it. Every error
names the file.
"""

from __future__ import annotations

import contextlib
import logging
import threading
import warnings
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import tifffile
from PIL import Image

from fcnkit.atomic import atomic_output
from fcnkit.data.classes import ClassTable
from fcnkit.errors import DataError
from fcnkit.memory import available_memory

DEFAULT_MAX_PIXELS = 2**27
"""134 MP (e.g. 11585×11585): a 10k×10k labelled image fits; larger files need an explicit ``max_pixels``."""

IMAGE_SUFFIXES = (".png", ".jpg", ".jpeg", ".tif", ".tiff")
MASK_SUFFIXES = (".png", ".tif", ".tiff")
BIGTIFF_BYTES = 2**31  # above this many pixel bytes write BigTIFF (classic TIFF offsets are 32-bit)
TIFF_TILE = 256

_TIFF_MAGIC = (b"II*\x00", b"MM\x00*", b"II+\x00", b"MM\x00+")
_PNG_MAGIC = b"\x89PNG\r\n\x1a\n"
_PIL_LOCK = threading.Lock()  # Image.MAX_IMAGE_PIXELS is process-global


def read_image(path: str | Path, max_pixels: int | None = DEFAULT_MAX_PIXELS) -> np.ndarray:
    """Decode an image file to an H×W×B array in its own dtype (uint8, uint16 or float32)."""
    path = Path(path)
    if _is_tiff(path):
        return _read_tiff(path, max_pixels)
    with _open_pillow(path, max_pixels) as im:
        _refuse_16bit_colour_png(path)
        if im.mode == "P":
            im = im.convert("RGBA" if "transparency" in im.info else "RGB")
        arr = _decode_pillow(path, im)
    return _as_bands(path, _supported_dtype(path, arr))


def image_shape(path: str | Path) -> tuple[int, int, int]:
    """(H, W, bands) of an image file, read from its header without decoding the pixels."""
    path = Path(path)
    if _is_tiff(path):
        with _open_tiff(path) as tif:
            return _tiff_layout(path, tif)[0]
    with _open_pillow(path, None) as im:
        bands = (4 if "transparency" in im.info else 3) if im.mode == "P" else len(im.getbands())
        return im.height, im.width, bands


def read_mask(path: str | Path, classes: ClassTable, max_pixels: int | None = DEFAULT_MAX_PIXELS) -> np.ndarray:
    """Decode a mask to H×W uint8 class ids (or ``classes.ignore``).

    Accepted: a single-channel 8-bit PNG/TIFF of ids; a palette PNG whose indices are the ids (what
    ``write_label_png`` writes); an RGB(A) PNG/TIFF whose colours are the class colours, ``ignore_color``
    (or fully transparent) meaning unlabelled. Any other value or colour is a DataError naming the file.
    """
    path = Path(path)
    if path.suffix.lower() not in MASK_SUFFIXES:
        raise DataError(f"{path}: masks must be lossless ({', '.join(MASK_SUFFIXES)}), not {path.suffix or 'none'}")
    if _is_tiff(path):
        arr = _read_tiff(path, max_pixels)
    else:
        with _open_pillow(path, max_pixels) as im:
            _refuse_16bit_colour_png(path)
            if im.mode == "P":  # palette indices are the ids; decode without applying the palette
                arr = _decode_pillow(path, im)[..., None]
            else:
                arr = _as_bands(path, _decode_pillow(path, im))
    if arr.dtype != np.uint8:
        raise DataError(f"{path}: mask is {arr.dtype} (expected 8-bit class ids or 8-bit RGB colours)")
    if arr.shape[2] == 1:
        ids = arr[..., 0]
    elif arr.shape[2] in (3, 4):
        ids = _colours_to_ids(path, arr, classes)
    else:
        raise DataError(f"{path}: mask has {arr.shape[2]} bands (expected 1 band of ids or RGB colours)")
    _check_ids(path, ids, classes)
    return ids


def write_label_png(path: str | Path, ids: np.ndarray, classes: ClassTable) -> None:
    """Write H×W class ids as a palette PNG (indices = ids, colours from the class table), atomically."""
    ids = np.asarray(ids)
    if ids.ndim != 2 or ids.dtype != np.uint8:
        raise ValueError(f"ids: expected an H×W uint8 array, got {ids.dtype} {ids.shape}")
    im = Image.fromarray(ids, mode="L").convert("P")  # "L" → "P" keeps the values as indices
    im.putpalette(classes.palette())
    with atomic_output(path) as tmp:
        im.save(tmp, format="PNG")


def write_tiff(path: str | Path, array: np.ndarray, extratags: list[tuple] | None = None, *,
               compression: str | None = None) -> None:
    """Write an H×W or H×W×B array as a tiled TIFF (BigTIFF above 2 GiB), atomically.

    ``extratags`` are tifffile tuples ``(code, dtype, count, value, writeonce)``, e.g. GeoTIFF tags.
    ``compression`` is None or "zlib" (Deflate; readable everywhere without extra codecs).
    """
    array = np.asarray(array)
    with atomic_output(path) as tmp:
        tifffile.imwrite(tmp, array, bigtiff=array.nbytes > BIGTIFF_BYTES, extratags=extratags or (),
                         compression=compression, **tiff_layout_args(array.shape, array.dtype))


def tiff_layout_args(shape: tuple[int, ...], dtype: Any) -> dict[str, Any]:
    """tifffile arguments for our layout: pixel-interleaved bands, RGB when 3 uint8 bands, tiles when large."""
    h, w = shape[:2]
    bands = shape[2] if len(shape) == 3 else 1
    rgb = bands == 3 and np.dtype(dtype) == np.uint8
    args: dict[str, Any] = {"photometric": "rgb" if rgb else "minisblack"}
    if bands > 1:
        args["planarconfig"] = "contig"
    if h >= TIFF_TILE and w >= TIFF_TILE:
        args["tile"] = (TIFF_TILE, TIFF_TILE)
    return args


@contextlib.contextmanager
def quiet_tifffile() -> Iterator[None]:
    """Silence tifffile's log warnings about damaged structures while opening a file: the DataError raised for
    the file says what is wrong on one line."""
    log = logging.getLogger("tifffile")
    level = log.level
    log.setLevel(logging.ERROR)
    try:
        yield
    finally:
        log.setLevel(level)



# --- helpers -------------------------------------------------------------------------------------------------

def _is_tiff(path: Path) -> bool:
    """Decide by content (magic bytes), not by suffix; a missing file is reported by the caller's open."""
    try:
        with open(path, "rb") as f:
            head = f.read(8)
    except FileNotFoundError:
        raise DataError(f"{path}: file not found") from None
    except OSError as e:
        raise DataError(f"{path}: cannot read ({e.strerror or e})") from None
    if not head:
        raise DataError(f"{path}: empty file (0 bytes)")
    return head[:4] in _TIFF_MAGIC


def _limit_error(path: Path, pixels: int, max_pixels: int) -> DataError:
    return DataError(f"{path}: {pixels} pixels exceeds the limit of {max_pixels} "
                     "(raise it with max_pixels= or --max-pixels if the file is trusted)")


@contextlib.contextmanager
def _open_pillow(path: Path, max_pixels: int | None) -> Iterator[Image.Image]:
    """Open with Pillow under a pixel limit; the decompression-bomb guard stays on (raised, never removed)."""
    with _PIL_LOCK, warnings.catch_warnings():
        warnings.simplefilter("ignore", Image.DecompressionBombWarning)
        saved = Image.MAX_IMAGE_PIXELS
        if max_pixels is not None and saved is not None and max_pixels > saved:
            Image.MAX_IMAGE_PIXELS = max_pixels
        try:
            im = Image.open(path)
        except Image.DecompressionBombError:  # above twice Pillow's limit, hence above ours too
            limit = max_pixels if max_pixels is not None else 2 * (saved or 0)
            raise DataError(f"{path}: more pixels than the limit of {limit} "
                            "(raise it with max_pixels= or --max-pixels if the file is trusted)") from None
        except (OSError, SyntaxError, ValueError) as e:
            raise DataError(f"{path}: not a readable image ({_reason(e)})") from None
        finally:
            Image.MAX_IMAGE_PIXELS = saved
    try:
        if max_pixels is not None and im.width * im.height > max_pixels:
            raise _limit_error(path, im.width * im.height, max_pixels)
        yield im
    finally:
        im.close()


def _decode_pillow(path: Path, im: Image.Image) -> np.ndarray:
    try:
        im.load()
        return np.array(im)  # a writable copy: torch.from_numpy warns on read-only arrays
    except (OSError, SyntaxError, ValueError) as e:  # truncated or corrupt data
        raise DataError(f"{path}: corrupt or truncated image ({_reason(e)})") from None


def _refuse_16bit_colour_png(path: Path) -> None:
    """Pillow silently reduces 16-bit colour PNGs to 8 bits; refuse them rather than lose precision."""
    with open(path, "rb") as f:
        head = f.read(26)
    if head[:8] == _PNG_MAGIC and len(head) == 26 and head[24] == 16 and head[25] in (2, 4, 6):
        raise DataError(f"{path}: 16-bit colour PNG (Pillow reads only 8 bits of it; save it as 16-bit TIFF)")


def _reason(e: BaseException) -> str:
    return str(e).splitlines()[0] if str(e) else type(e).__name__


@contextlib.contextmanager
def _open_tiff(path: Path) -> Iterator[tifffile.TiffFile]:
    try:
        with quiet_tifffile():
            tif = tifffile.TiffFile(path)
    except Exception as e:  # tifffile raises TiffFileError, ValueError, struct.error… on garbage
        raise DataError(f"{path}: not a readable TIFF ({_reason(e)})") from None
    try:
        yield tif
    finally:
        tif.close()


def _tiff_layout(path: Path, tif: tifffile.TiffFile) -> tuple[tuple[int, int, int], str]:
    """((H, W, bands), axes) of the first series; every axis other than Y and X counts as bands."""
    try:
        with quiet_tifffile():
            series = tif.series[0] if tif.series else None
    except Exception as e:  # tifffile's series detection raises several types on damaged headers
        raise DataError(f"{path}: corrupt TIFF header ({_reason(e)})") from None
    if series is None:
        raise DataError(f"{path}: TIFF holds no image")
    axes, shape = series.axes, series.shape
    if "Y" not in axes or "X" not in axes:
        raise DataError(f"{path}: TIFF axes {axes!r} have no Y and X (expected a 2-D image with bands)")
    h, w = shape[axes.index("Y")], shape[axes.index("X")]
    if not np.prod(shape):
        raise DataError(f"{path}: image has no pixels (shape {tuple(shape)}; expected at least one pixel and band)")
    return (h, w, int(np.prod(shape)) // (h * w)), axes


def _read_tiff(path: Path, max_pixels: int | None) -> np.ndarray:
    with _open_tiff(path) as tif:
        (h, w, bands), axes = _tiff_layout(path, tif)
        if max_pixels is not None and h * w > max_pixels:
            raise _limit_error(path, h * w, max_pixels)
        _check_tiff_extent(path, tif)
        need, free = h * w * bands * tif.series[0].dtype.itemsize, available_memory()
        if need > free:
            raise DataError(f"{path}: decoding it needs {need / 2**30:.1f} GiB but {free / 2**30:.1f} GiB of memory "
                            f"is available ({h}x{w} px, {bands} bands)")
        try:
            with quiet_tifffile():
                arr = tif.series[0].asarray()
        except Exception as e:  # corrupt segments: tifffile raises several types
            raise DataError(f"{path}: corrupt or truncated TIFF ({_reason(e)})") from None
    if arr.ndim != len(axes) or arr.size != h * w * bands:  # tifffile returns what it could decode
        raise DataError(f"{path}: corrupt TIFF (decoded {arr.size} values, its header describes {h * w * bands})")
    order = [axes.index("Y"), axes.index("X")] + [i for i, a in enumerate(axes) if a not in "YX"]
    arr = np.ascontiguousarray(np.transpose(arr, order).reshape(h, w, bands))
    return _supported_dtype(path, arr)


def _check_tiff_extent(path: Path, tif: tifffile.TiffFile) -> None:
    """A truncated TIFF: some strip or tile would end past the end of the file."""
    size = path.stat().st_size
    for page in tif.series[0].pages:
        if page is None:
            continue
        ends = [o + n for o, n in zip(page.dataoffsets, page.databytecounts, strict=False) if n]
        if ends and max(ends) > size:
            raise DataError(f"{path}: truncated TIFF (pixel data runs to byte {max(ends)}, file has {size})")


def _supported_dtype(path: Path, arr: np.ndarray) -> np.ndarray:
    if arr.dtype == np.bool_:
        return arr.astype(np.uint8)
    if arr.dtype.kind == "u" and arr.dtype.itemsize in (1, 2):  # uint8/uint16, in native byte order
        return arr.astype(arr.dtype.newbyteorder("="), copy=False)
    if arr.dtype.kind in "uif":
        arr = arr.astype(np.float32)
        if not np.isfinite(arr).all():  # they would turn every loss, statistic and score they touch into NaN
            raise DataError(f"{path}: {int((~np.isfinite(arr)).sum())} NaN or infinite pixel values (expected "
                            "finite numbers; fill no-data pixels first)")
        return arr
    raise DataError(f"{path}: pixel type {arr.dtype} (expected 8- or 16-bit unsigned integers or floats)")


def _as_bands(path: Path, arr: np.ndarray) -> np.ndarray:
    if arr.ndim == 2:
        return arr[..., None]
    if arr.ndim == 3:
        return arr
    raise DataError(f"{path}: image has shape {arr.shape} (expected H×W or H×W×bands)")


def _colours_to_ids(path: Path, rgb: np.ndarray, classes: ClassTable) -> np.ndarray:
    """Map RGB(A) mask colours to ids; ignore_color and fully transparent pixels become the ignore value."""
    code = (rgb[..., 0].astype(np.uint32) << 16) | (rgb[..., 1].astype(np.uint32) << 8) | rgb[..., 2]
    table = {(r << 16) | (g << 8) | b: c.id for c in classes.classes for r, g, b in [c.color]}
    r, g, b = classes.ignore_color
    table[(r << 16) | (g << 8) | b] = classes.ignore
    keys = np.array(sorted(table), dtype=np.uint32)
    values = np.array([table[k] for k in keys], dtype=np.uint8)
    pos = np.minimum(np.searchsorted(keys, code), len(keys) - 1)
    known = keys[pos] == code
    if rgb.shape[2] == 4:
        transparent = rgb[..., 3] == 0
        known |= transparent
    if not known.all():
        bad = np.unique(code[~known])
        shown = ", ".join(f"#{int(c):06x}" for c in bad[:5]) + (" …" if len(bad) > 5 else "")
        raise DataError(f"{path}: {int((~known).sum())} pixels have colours not in classes.toml ({shown})")
    ids = values[pos]
    if rgb.shape[2] == 4:
        ids[transparent] = classes.ignore
    return ids


def _check_ids(path: Path, ids: np.ndarray, classes: ClassTable) -> None:
    counts = np.bincount(ids.ravel(), minlength=256)
    counts[:classes.num_classes] = 0
    counts[classes.ignore] = 0
    bad = np.flatnonzero(counts)
    if bad.size:
        shown = ", ".join(str(v) for v in bad[:8]) + (" …" if bad.size > 8 else "")
        raise DataError(f"{path}: {int(counts.sum())} pixels have ids not in classes.toml ({shown}; expected "
                        f"0..{classes.num_classes - 1} or ignore {classes.ignore})")
