"""Whole images and masks, read through the one reader front (:func:`fcnkit.data.raster.open_raster`), and
small label PNGs and TIFFs written.

Images are returned H×W×B (always 3-D) in uint8, uint16 or float32 (other numeric types become float32), by
the same readers mapping uses, so ``check``, training and mapping always see the same pixels. Every read has a
pixel-count limit: a file above it is refused with a DataError naming the file and the limit; ``max_pixels``
raises it. Invalid pixels (nodata, masked, transparent) come back filled with their band's mean over the
image's valid pixels, so they are neutral to a net and to band statistics; :func:`read_image_valid` also
returns where they are.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
from PIL import Image

from fcnkit.atomic import atomic_output
from fcnkit.data.classes import ClassTable
from fcnkit.data.raster import DEFAULT_MAX_PIXELS, GeoRef, open_raster, read_whole
from fcnkit.errors import DataError

IMAGE_SUFFIXES = (".png", ".jpg", ".jpeg", ".tif", ".tiff")
MASK_SUFFIXES = (".png", ".tif", ".tiff")


def read_image(path: str | Path, max_pixels: int | None = DEFAULT_MAX_PIXELS) -> np.ndarray:
    """Decode an image file to an H×W×B array (uint8, uint16 or float32); invalid pixels hold their band's
    mean over the valid ones."""
    return read_image_valid(path, max_pixels)[0]


def read_image_valid(path: str | Path, max_pixels: int | None = DEFAULT_MAX_PIXELS,
                     ) -> tuple[np.ndarray, np.ndarray | None]:
    """The image (as :func:`read_image`) and its validity mask (H×W bool, True = data; None: all valid)."""
    image, valid, _ = read_image_geo(path, max_pixels)
    return image, valid


def read_image_geo(path: str | Path, max_pixels: int | None = DEFAULT_MAX_PIXELS,
                   ) -> tuple[np.ndarray, np.ndarray | None, GeoRef | None]:
    """The image, its validity (see :func:`read_image_valid`) and its georeferencing (None: none)."""
    raster = open_raster(path, max_pixels)
    try:
        image, valid = read_whole(raster)
    finally:
        raster.close()
    if valid is not None and valid.any():
        mean = image[valid].astype(np.float64).mean(axis=0)
        if image.dtype.kind in "ui":
            mean = np.rint(mean)
        image[~valid] = mean.astype(image.dtype)
    return image, valid, raster.geo


def image_shape(path: str | Path) -> tuple[int, int, int]:
    """(H, W, bands) of an image file, read from its header without decoding the pixels."""
    raster = open_raster(path, None)
    raster.close()
    return raster.shape


def read_mask(path: str | Path, classes: ClassTable, max_pixels: int | None = DEFAULT_MAX_PIXELS) -> np.ndarray:
    """Decode a mask to H×W uint8 class ids (or ``classes.ignore``).

    Accepted: a single-band 8-bit PNG/TIFF of ids; a palette PNG/TIFF (when every colour it uses is a class
    colour of classes.toml, or the ignore colour, its pixels take the ids of their colours, whatever order the
    palette lists them in; otherwise the indices are the ids, as ``write_label_png`` writes them); an RGB
    PNG/TIFF whose colours are the class colours, ``ignore_color`` meaning unlabelled. Transparent, masked and
    nodata pixels are unlabelled. Any other value or colour is a DataError naming the file.
    """
    path = Path(path)
    if path.suffix.lower() not in MASK_SUFFIXES:
        raise DataError(f"{path}: masks must be lossless ({', '.join(MASK_SUFFIXES)}), not {path.suffix or 'none'}")
    raster = open_raster(path, max_pixels, indices=True)
    try:
        if raster.dtype != np.uint8:
            raise DataError(f"{path}: mask is {raster.dtype} (expected 8-bit class ids or 8-bit RGB colours)")
        arr, valid = read_whole(raster)
        palette = getattr(raster, "palette", None)
    finally:
        raster.close()
    if arr.shape[2] == 1:
        ids = arr[..., 0]
        if palette is not None:
            ids = _palette_ids(ids, palette, classes)
    elif arr.shape[2] == 3:
        ids = _colours_to_ids(path, arr, classes, valid)
    else:
        raise DataError(f"{path}: mask has {arr.shape[2]} bands (expected 1 band of ids or RGB colours)")
    if valid is not None:
        ids[~valid] = classes.ignore
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


def write_tiff(path: str | Path, array: np.ndarray, *, compression: str | None = None) -> None:
    """Write an H×W or H×W×B array as a (tiled when large) TIFF without georeferencing, atomically, through
    GDAL; ``compression`` is None or "deflate". Bands are written as data (never alpha)."""
    from fcnkit.data.geotiff import RasterSpec, write_geotiff

    array = np.asarray(array)
    spec = RasterSpec(array.shape, array.dtype, lambda y0, y1: array[y0:y1])
    write_geotiff(path, spec, None, cog=False, compress=compression)


# --- helpers -------------------------------------------------------------------------------------------------

def _palette_ids(indices: np.ndarray, palette: np.ndarray, classes: ClassTable) -> np.ndarray:
    """Ids of a palette mask: by colour when every used palette entry is a class colour or the ignore colour
    (so a palette listing the classes in another order still gives the right ids), else the indices."""
    used = np.flatnonzero(np.bincount(indices.ravel(), minlength=256))
    by_colour = {c.color: c.id for c in classes.classes}
    by_colour.setdefault(classes.ignore_color, classes.ignore)
    colours = [tuple(int(v) for v in palette[i]) for i in used]
    if not all(c in by_colour for c in colours):
        return indices
    lut = np.arange(256, dtype=np.uint8)
    for i, c in zip(used, colours, strict=True):
        lut[i] = by_colour[c]
    return lut[indices]


def _colours_to_ids(path: Path, rgb: np.ndarray, classes: ClassTable, valid: np.ndarray | None) -> np.ndarray:
    """Map RGB mask colours to ids; ignore_color (and invalid pixels) become the ignore value."""
    code = (rgb[..., 0].astype(np.uint32) << 16) | (rgb[..., 1].astype(np.uint32) << 8) | rgb[..., 2]
    table = {(r << 16) | (g << 8) | b: c.id for c in classes.classes for r, g, b in [c.color]}
    r, g, b = classes.ignore_color
    table[(r << 16) | (g << 8) | b] = classes.ignore
    keys = np.array(sorted(table), dtype=np.uint32)
    values = np.array([table[k] for k in keys], dtype=np.uint8)
    pos = np.minimum(np.searchsorted(keys, code), len(keys) - 1)
    known = keys[pos] == code
    if valid is not None:
        known |= ~valid
    if not known.all():
        bad = np.unique(code[~known])
        shown = ", ".join(f"#{int(c):06x}" for c in bad[:5]) + (" …" if len(bad) > 5 else "")
        raise DataError(f"{path}: {int((~known).sum())} pixels have colours not in classes.toml ({shown})")
    return values[pos]


def _check_ids(path: Path, ids: np.ndarray, classes: ClassTable) -> None:
    counts = np.bincount(ids.ravel(), minlength=256)
    counts[:classes.num_classes] = 0
    counts[classes.ignore] = 0
    bad = np.flatnonzero(counts)
    if bad.size:
        shown = ", ".join(str(v) for v in bad[:8]) + (" …" if bad.size > 8 else "")
        raise DataError(f"{path}: {int(counts.sum())} pixels have ids not in classes.toml ({shown}; expected "
                        f"0..{classes.num_classes - 1} or ignore {classes.ignore})")
