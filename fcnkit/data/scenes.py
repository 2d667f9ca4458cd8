"""Synthetic aerial land-cover scenes of Kessmoor, an invented moorland district, for demos and tests.

Five classes: open ground, water, vegetation, roofs and tracks, seen from above at about 0.5 m per pixel. The
scenes are built so that no per-pixel colour rule can label them and a net needs spatial context:

- roofs and tracks take their colours from the same distribution of built surfaces; roofs are compact
  rectangles with a lit and a shaded half, dark eaves and a cast shadow, tracks are long thin curves;
- tall objects (roofs, tree crowns) cast shade, which darkens and blues whatever it falls on until it looks
  like water; the shaded pixel keeps its own label, so the net must see the object beside it;
- textures at several scales, sensor noise, per-scene illumination, tint and a haze gradient.

The optional fourth band is near-infrared (NIR). Vegetation is bright and water dark in it: this is a physical
fact of remote sensing and common practice in land-cover mapping (chlorophyll-bearing leaves reflect strongly
in the NIR, water absorbs it), and it is why multispectral cameras carry an NIR band.

Every scene is a pure function of its random generator, so a seed reproduces a dataset exactly.
"""

from __future__ import annotations

import zlib
from pathlib import Path
from typing import Any

import numpy as np
from affine import Affine
from scipy import ndimage, special

from fcnkit.atomic import atomic_output
from fcnkit.data.classes import ClassInfo, ClassTable, write_classes
from fcnkit.data.imageio import write_label_png, write_tiff
from fcnkit.data.raster import GeoRef
from fcnkit.errors import ConfigError, DataError

SCENE_CLASSES = ClassTable((
    ClassInfo(0, "open ground", (201, 176, 122)),
    ClassInfo(1, "water", (38, 104, 196)),
    ClassInfo(2, "vegetation", (54, 150, 64)),
    ClassInfo(3, "roof", (212, 62, 52)),
    ClassInfo(4, "track", (246, 222, 80)),
))
GROUND, WATER, VEGETATION, ROOF, TRACK = range(5)

GRID_NAME = "Kessmoor local grid (fictional)"
GRID_ORIGIN = (40000.0, 90000.0)  # easting, northing of the mosaic's top-left corner, metres (invented)
KESSMOOR_CRS = (f'LOCAL_CS["{GRID_NAME}",LOCAL_DATUM["Kessmoor datum (fictional)",0],UNIT["metre",1],'
                'AXIS["Easting",EAST],AXIS["Northing",NORTH]]')
TIFF_TILE = 256

_AREA = 256.0 * 256.0  # object counts below are per 256×256 pixels


def render_scene(size: int | tuple[int, int], rng: np.random.Generator, nir: bool = True,
                 ) -> tuple[np.ndarray, np.ndarray]:
    """One scene: (image uint8 H×W×4 as R, G, B, NIR — or H×W×3 without NIR, mask uint8 H×W of class ids)."""
    h, w = (size, size) if isinstance(size, int) else size
    if h < 8 or w < 8:
        raise ConfigError(f"size = {size} (expected at least 8 pixels per side)")
    scale = h * w / _AREA
    label = np.full((h, w), GROUND, np.uint8)
    height = np.zeros((h, w), np.float32)  # above-ground height (pixel units) for the shadow sweep
    img = _ground(rng, h, w)

    veg = _fractal(rng, h, w, 48, 3) > rng.uniform(0.2, 1.2)
    img[veg] = _textured(rng, veg, (72, 100, 52), 175, _fractal(rng, h, w, 5, 2), 16, 28)
    label[veg] = VEGETATION

    water = _fractal(rng, h, w, 96, 3) > rng.uniform(1.3, 2.5)
    label[water] = WATER
    _rivers_and_tracks(rng, img, label, scale)
    _roofs(rng, img, label, height, scale)
    _trees(rng, img, label, height, scale)
    _shade(rng, img, height)
    return _expose(rng, img, nir), label


def _ground(rng: np.random.Generator, h: int, w: int) -> np.ndarray:
    """Bare soil and short grass: a per-scene base colour with texture at two scales; moderate NIR."""
    tex = 0.8 * _fractal(rng, h, w, 24, 3) + 0.4 * _value_noise(rng, h, w, 3)
    base = np.array([150, 130, 100, 118], np.float32) + rng.normal(0, 10, 4).astype(np.float32)
    return base + tex[..., None] * np.array([14, 13, 11, 18], np.float32)


def _textured(rng: np.random.Generator, where: np.ndarray, rgb: tuple[float, float, float], nir: float,
              tex: np.ndarray, amp_rgb: float, amp_nir: float) -> np.ndarray:
    """Pixel values (N×4) of a surface: base colour jittered per scene, modulated by a texture field."""
    base = np.array([*rgb, nir], np.float32) + rng.normal(0, 5, 4).astype(np.float32)
    t = tex[where][:, None]
    return base + t * np.array([amp_rgb, amp_rgb, amp_rgb * 0.8, amp_nir], np.float32)


def _built_colours(rng: np.random.Generator, n: int) -> np.ndarray:
    """n colours (n×4) of built surfaces — one distribution for roofs and tracks alike: grey to warm tan."""
    lum = rng.uniform(90, 185, n)
    warm = rng.uniform(-1, 1, n)
    out = np.stack([lum + 14 * warm, lum + 3 * warm, lum - 12 * warm, 0.8 * lum + 10], axis=1)
    return out.astype(np.float32)


def _rivers_and_tracks(rng: np.random.Generator, img: np.ndarray, label: np.ndarray, scale: float) -> None:
    """Streams 6–14 px wide, then dirt and gravel tracks 5–8 px wide with darker verges (never over water).

    Both are long smooth meandering curves; one distance transform serves them all. Water is painted here,
    after the lakes (already in ``label``) and the streams are known.
    """
    h, w = label.shape
    n_rivers, n_tracks = rng.poisson(0.3 * np.sqrt(scale)), rng.poisson(2.2 * np.sqrt(scale))
    curves = [_curve(rng, h, w) for _ in range(n_rivers + n_tracks)]
    half = np.concatenate([rng.uniform(3.0, 7.0, n_rivers), rng.uniform(2.0, 3.5, n_tracks)])
    inside, dist, which = _thick(h, w, curves, half)
    label[inside & (which < n_rivers)] = WATER
    water = label == WATER
    murk = (rng.uniform(40, 68), rng.uniform(52, 68), rng.uniform(56, 72))  # clear to silty: overlaps shade
    img[water] = _textured(rng, water, murk, 14, _fractal(rng, h, w, 16, 2), 3, 3)
    track = inside & (which >= n_rivers) & ~water
    if track.any():
        colours = _built_colours(rng, n_rivers + n_tracks)
        verge = 1.0 - 0.15 * np.clip(dist - half[which] + 1.0, 0.0, 1.0)
        ruts = 1.0 + 0.05 * _value_noise(rng, h, w, 2)
        img[track] = colours[which[track]] * (verge * ruts)[track][:, None]
        label[track] = TRACK


def _roofs(rng: np.random.Generator, img: np.ndarray, label: np.ndarray, height: np.ndarray, scale: float) -> None:
    """Buildings in hamlets: rotated rectangles 8–26 px long with a gable (lit and shaded halves) and eaves."""
    h, w = label.shape
    for _ in range(rng.poisson(3.0 * scale)):
        cy, cx = rng.uniform(0, h), rng.uniform(0, w)
        angle = rng.uniform(0, np.pi)
        n = rng.integers(2, 10)
        spread = rng.uniform(12, 40)
        colours = _built_colours(rng, n)
        for k in range(n):
            y, x = cy + rng.normal(0, spread), cx + rng.normal(0, spread)
            a, b = rng.uniform(4, 13), rng.uniform(3, 7)
            phi = angle + rng.normal(0, 0.08) + (np.pi / 2 if rng.random() < 0.25 else 0.0)
            _roof(img, label, height, (y, x), (a, b), phi, colours[k], rng.uniform(0.08, 0.25), rng.uniform(5, 12))


def _roof(img: np.ndarray, label: np.ndarray, height: np.ndarray, centre: tuple[float, float],
          half: tuple[float, float], phi: float, colour: np.ndarray, gable: float, tall: float) -> None:
    h, w = label.shape
    r = int(np.ceil(np.hypot(*half))) + 1
    y0, y1 = max(int(centre[0]) - r, 0), min(int(centre[0]) + r + 1, h)
    x0, x1 = max(int(centre[1]) - r, 0), min(int(centre[1]) + r + 1, w)
    if y0 >= y1 or x0 >= x1:
        return
    dy = np.arange(y0, y1, dtype=np.float32)[:, None] - centre[0]
    dx = np.arange(x0, x1, dtype=np.float32)[None, :] - centre[1]
    u = dx * np.cos(phi) + dy * np.sin(phi)
    v = -dx * np.sin(phi) + dy * np.cos(phi)
    inside = (np.abs(u) <= half[0]) & (np.abs(v) <= half[1])
    if not inside.any() or (label[y0:y1, x0:x1][inside] == WATER).any():
        return
    shading = np.where(v > 0, 1.0 + gable, 1.0 - gable)
    shading = np.where((np.abs(u) > half[0] - 1) | (np.abs(v) > half[1] - 1), 0.75, shading)  # eaves
    shading = np.where(np.abs(v) < 0.5, 1.0 + 1.5 * gable, shading)  # ridge
    patch = img[y0:y1, x0:x1]
    patch[inside] = colour * shading[inside][:, None]
    label[y0:y1, x0:x1][inside] = ROOF
    height[y0:y1, x0:x1][inside] = tall


def _trees(rng: np.random.Generator, img: np.ndarray, label: np.ndarray, height: np.ndarray, scale: float) -> None:
    """Single trees and copses: round crowns 2–5 px in radius, lit on one side, very bright in NIR."""
    h, w = label.shape
    n = rng.poisson(30 * scale)
    ys, xs = rng.uniform(0, h, n), rng.uniform(0, w, n)
    ok = np.isin(label[ys.astype(int), xs.astype(int)], (GROUND, VEGETATION, TRACK))
    ys, xs = ys[ok], xs[ok]
    if not ys.size:
        return
    dome = np.zeros((h, w), np.float32)  # crown surface, 1 at the trunk, 0 at the rim and outside
    for y, x, r in zip(ys, xs, rng.uniform(2.0, 5.0, ys.size), strict=True):
        y0, y1, x0, x1 = max(int(y - r), 0), min(int(y + r) + 2, h), max(int(x - r), 0), min(int(x + r) + 2, w)
        d2 = ((np.arange(y0, y1) - y)[:, None] ** 2 + (np.arange(x0, x1) - x)[None, :] ** 2) / (r * r)
        np.maximum(dome[y0:y1, x0:x1], np.sqrt(np.clip(1.0 - d2, 0.0, 1.0)), out=dome[y0:y1, x0:x1])
    inside = (dome > 0) & (label != ROOF) & (label != WATER)
    crown = np.array([48, 82, 40, 195], np.float32) + rng.normal(0, 4, 4).astype(np.float32)
    light = 0.55 + 0.45 * dome[inside] + 0.05 * _gauss(rng, int(inside.sum()))
    img[inside] = crown * light[:, None]
    label[inside] = VEGETATION
    height[inside] = np.maximum(height[inside], rng.uniform(4.0, 9.0) * dome[inside])


def _shade(rng: np.random.Generator, img: np.ndarray, height: np.ndarray) -> None:
    """Cast shadows by a height-field sweep towards a per-scene sun azimuth; shade is dark and bluish."""
    top = float(height.max())
    if top <= 0:
        return
    azimuth = rng.uniform(0, 2 * np.pi)
    drop = rng.uniform(0.5, 1.1)  # height lost per pixel along the ray (tangent of the sun's elevation)
    sy, sx = np.sin(azimuth), np.cos(azimuth)
    shaded = np.zeros(height.shape, bool)
    for k in range(1, int(np.ceil(top / drop)) + 1):
        caster = _shift(height, int(round(k * sy)), int(round(k * sx))) - k * drop
        shaded |= caster > height + 0.5
    factor = np.array([0.42, 0.47, 0.62, 0.45], np.float32) * rng.uniform(0.9, 1.1)
    img[shaded] *= factor


def _shift(a: np.ndarray, dy: int, dx: int) -> np.ndarray:
    """``a`` moved by (dy, dx) pixels, zero where nothing moved in."""
    h, w = a.shape
    out = np.zeros_like(a)
    if abs(dy) < h and abs(dx) < w:
        out[max(dy, 0):h + min(dy, 0), max(dx, 0):w + min(dx, 0)] = a[max(-dy, 0):h - max(dy, 0),
                                                                      max(-dx, 0):w - max(dx, 0)]
    return out


def _expose(rng: np.random.Generator, img: np.ndarray, nir: bool) -> np.ndarray:
    """Camera: illumination gain, colour tint, haze gradient, sensor noise; rounded to 8 bits."""
    h, w = img.shape[:2]
    gain = rng.uniform(0.75, 1.2) * rng.uniform(0.94, 1.06, 4).astype(np.float32)
    haze = 1.0 + 0.1 * _value_noise(rng, h, w, max(h, w))
    img *= haze[..., None] * gain
    img += _gauss(rng, img.size).reshape(img.shape) * rng.uniform(2.0, 5.0)
    out = np.clip(img, 0, 255).round().astype(np.uint8)
    return out if nir else np.ascontiguousarray(out[..., :3])


# --- geometry and noise helpers ----------------------------------------------------------------------------

def _value_noise(rng: np.random.Generator, h: int, w: int, cell: float) -> np.ndarray:
    """Smooth random field with features about ``cell`` pixels across: a Gaussian grid, smoothstep-interpolated."""
    gy, gx = int((h - 1) / cell) + 3, int((w - 1) / cell) + 3
    grid = rng.standard_normal((gy, gx), dtype=np.float32)
    y = np.arange(h, dtype=np.float32) / cell + rng.random(dtype=np.float32)
    x = np.arange(w, dtype=np.float32) / cell + rng.random(dtype=np.float32)
    fy, fx = np.floor(y), np.floor(x)
    iy, ix = fy.astype(np.int64), fx.astype(np.int64)
    ty, tx = y - fy, x - fx  # float32 throughout (float32 - int64 would promote to float64)
    ty, tx = ty * ty * (3 - 2 * ty), tx * tx * (3 - 2 * tx)
    cols = grid[:, ix] * (1 - tx) + grid[:, ix + 1] * tx  # along x on the grid rows (small), then along y
    step = cols[1:] - cols[:-1]
    return cols[iy] + step[iy] * ty[:, None]


# Standard normal quantiles at 256 equally likely levels: indexing it with random bytes draws approximately
# Gaussian noise (standard deviation 0.98) several times faster than Generator.standard_normal.
_GAUSS_LEVELS = special.ndtri((np.arange(256) + 0.5) / 256).astype(np.float32)


def _gauss(rng: np.random.Generator, n: int) -> np.ndarray:
    return _GAUSS_LEVELS[np.frombuffer(rng.bytes(n), np.uint8)]


def _fractal(rng: np.random.Generator, h: int, w: int, cell: float, octaves: int) -> np.ndarray:
    """Sum of value noise at ``octaves`` halving scales, scaled to unit standard deviation."""
    f = sum(0.5**k * _value_noise(rng, h, w, max(cell / 2**k, 1.0)) for k in range(octaves))
    return f / max(float(f.std()), 1e-6)


def _curve(rng: np.random.Generator, h: int, w: int, n: int | None = None,
           centre: tuple[float, float] | None = None) -> np.ndarray:
    """Points (N×2, y and x) of a smooth meandering path one pixel apart, ``n`` long (default 1.5 × the scene's
    side) and centred on ``centre`` (default a random point of the scene)."""
    n = int(1.5 * max(h, w)) if n is None else n
    knots = rng.normal(0, 0.02, n // 40 + 2)
    bend = np.interp(np.arange(n) / 40.0, np.arange(knots.size), knots)
    heading = rng.uniform(0, 2 * np.pi) + np.cumsum(bend)
    y0, x0 = (rng.uniform(0, h), rng.uniform(0, w)) if centre is None else centre
    y = y0 + np.cumsum(np.sin(heading)) - np.sin(heading).sum() / 2
    x = x0 + np.cumsum(np.cos(heading)) - np.cos(heading).sum() / 2
    return np.stack([y, x], axis=1)


def _thick(h: int, w: int, paths: list[np.ndarray], half: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Pixels within ``half[i]`` of path i, by one Euclidean distance transform.

    Returns (inside, distance to the nearest path point, index of that path).
    """
    seeds = np.full((h, w), -1, np.int64)
    for i, pts in enumerate(paths):
        yi, xi = np.round(pts[:, 0]).astype(np.int64), np.round(pts[:, 1]).astype(np.int64)
        keep = (yi >= 0) & (yi < h) & (xi >= 0) & (xi < w)
        seeds[yi[keep], xi[keep]] = i
    if (seeds < 0).all():
        return np.zeros((h, w), bool), np.full((h, w), np.inf, np.float32), np.zeros((h, w), np.int64)
    dist, (ny, nx) = ndimage.distance_transform_edt(seeds < 0, return_indices=True)
    which = seeds[ny, nx]
    return dist <= half[which], dist.astype(np.float32), which


# --- writing datasets and mosaics --------------------------------------------------------------------------

def scribble(label: np.ndarray, rng: np.random.Generator, strokes: int, ignore: int = 255,
             length: int = 30) -> np.ndarray:
    """Sparse labels as a person would scribble them: per class present, ``strokes`` short strokes (about 3 px
    wide and ``length`` px long) from random pixels of the class, clipped to it; every other pixel ``ignore``."""
    h, w = label.shape
    curves, owner = [], []
    for c in np.unique(label):
        ys, xs = np.nonzero(label == c)
        for k in rng.integers(ys.size, size=strokes):
            curves.append(_curve(rng, h, w, length, (float(ys[k]), float(xs[k]))))
            owner.append(c)
    out = np.full_like(label, ignore)
    if curves:
        inside, _, which = _thick(h, w, curves, np.ones(len(curves)))
        keep = inside & (label == np.asarray(owner, label.dtype)[which])
        out[keep] = label[keep]
    return out


def make_scenes(out_dir: str | Path, count: int, size: int, seed: int, nir: bool = True,
                strokes: int | None = None) -> Path:
    """Write ``count`` scenes as a dataset folder (images/, masks/, classes.toml); scene i depends on (seed, i).

    Images are 4-band TIFF (R, G, B, NIR) or, without NIR, RGB PNG; masks are palette PNGs of class ids.
    ``strokes`` keeps only that many scribbled strokes per class in each mask (the images stay the same).
    """
    for name, value, low in (("count", count, 1), ("size", size, 8), ("seed", seed, 0), ("strokes", strokes, 1)):
        if name == "strokes" and value is None:
            continue
        if not isinstance(value, int) or isinstance(value, bool) or value < low:
            raise ConfigError(f"{name} = {value!r} (expected an integer ≥ {low})")
    out = Path(out_dir)
    if out.exists() and (not out.is_dir() or any(out.iterdir())):
        raise DataError(f"{out}: exists and is not an empty folder (choose a new one; nothing is overwritten)")
    (out / "images").mkdir(parents=True, exist_ok=True)
    (out / "masks").mkdir(exist_ok=True)
    write_classes(out / "classes.toml", SCENE_CLASSES)
    for i in range(count):
        image, mask = render_scene(size, np.random.default_rng([seed, i]), nir)
        if strokes is not None:
            mask = scribble(mask, np.random.default_rng([seed, i, 1]), strokes, SCENE_CLASSES.ignore)
        stem = f"scene_{i:04d}"
        if nir:
            write_tiff(out / "images" / f"{stem}.tif", image)
        else:
            from PIL import Image

            with atomic_output(out / "images" / f"{stem}.png") as tmp:
                Image.fromarray(image).save(tmp, format="PNG")
        write_label_png(out / "masks" / f"{stem}.png", mask, SCENE_CLASSES)
    return out


def kessmoor_grid(pixel_size: float, origin: tuple[float, float] = GRID_ORIGIN) -> GeoRef:
    """The fictional Kessmoor local grid (a local engineering CRS in metres, with no place on Earth) with pixel
    (0, 0)'s corner at ``origin`` and square pixels of ``pixel_size`` metres, north up."""
    from rasterio.crs import CRS

    return GeoRef(CRS.from_wkt(KESSMOOR_CRS), Affine(pixel_size, 0.0, origin[0], 0.0, -pixel_size, origin[1]))


def feather_weights(length: int, start: int, stop: int, margin: int) -> np.ndarray:
    """Weights along one axis of a block spanning start..stop of an image ``length`` long, over its extended
    range start − margin .. stop + margin: 1 inside, a linear ramp through 0.5 at each edge shared with a
    neighbour, none beyond the image. Neighbouring blocks' weights sum to 1 everywhere (a partition of unity)."""
    x = np.arange(start - margin, stop + margin) + 0.5
    w = np.ones(x.size)
    if margin and start > 0:
        w = np.minimum(w, np.clip((x - (start - margin)) / (2 * margin), 0, 1))
    if margin and stop < length:
        w = np.minimum(w, np.clip(((stop + margin) - x) / (2 * margin), 0, 1))
    w[(x < 0) | (x > length)] = 0
    return w


def write_mosaic(path: str | Path, size: int | tuple[int, int], seed: int, *, nir: bool = True,
                 pixel_size: float = 0.5, geo: bool = True, mask_path: str | Path | None = None,
                 block: int = 1024, distinct: int | None = 16, feather: int = 24,
                 progress: bool = False) -> Path:
    """Write a large synthetic image as a tiled GeoTIFF (BigTIFF when large), block by block, with bounded memory.

    The mosaic is a grid of ``block``-sized scenes, like the seamlines of an orthomosaic, and, as orthomosaics
    do, it feathers its seams: each scene is rendered ``feather`` pixels larger on every side and cross-faded
    with its neighbours over 2 × ``feather`` pixels around each seamline, so no hard line runs through the
    image (one would look like a fault of the map). The labels keep the seamline itself: each pixel's class is
    that of the scene whose block holds it. Rendering costs about half a second per megapixel, so by default
    only ``distinct`` scenes are rendered and each block shows one of them under a random flip and quarter turn
    (``distinct=None`` renders every block afresh). Memory holds the rendered scenes, one row of blocks (as
    float32) and the labels compressed with Deflate — never the whole image. ``mask_path`` also writes the
    labels (a tiled GeoTIFF with the class colour table and names). ``geo`` places both on the fictional
    Kessmoor grid at ``pixel_size`` metres per pixel. Everything depends only on ``seed``.
    """
    from fcnkit.data.geotiff import RasterSpec, label_spec, write_geotiff

    h, w = (size, size) if isinstance(size, int) else size
    if h < 8 or w < 8 or block < TIFF_TILE or block % TIFF_TILE or (distinct is not None and distinct < 1) \
            or not 0 <= feather <= block // 4:
        raise ConfigError(f"size = {size}, block = {block}, distinct = {distinct}, feather = {feather} (expected "
                          f"sides ≥ 8, block a multiple of {TIFF_TILE}, distinct ≥ 1 or None, feather 0..block/4)")
    bands = 4 if nir else 3
    grid = kessmoor_grid(pixel_size) if geo else None
    pool: dict[int, tuple[np.ndarray, np.ndarray]] = {}
    m = feather

    def scene(by: int, bx: int) -> tuple[np.ndarray, np.ndarray]:
        """Block (by, bx) rendered ``m`` pixels larger on every side (image, labels)."""
        bh, bw = min(block, h - by * block), min(block, w - bx * block)
        rng = np.random.default_rng([seed, by, bx])
        if distinct is None:
            return render_scene((bh + 2 * m, bw + 2 * m), rng, nir)
        k = int(rng.integers(distinct))
        if k not in pool:
            pool[k] = render_scene(block + 2 * m, np.random.default_rng([seed, k]), nir)
        turns, flip = int(rng.integers(4)), bool(rng.integers(2))
        img, lab = (np.rot90(a, turns) for a in pool[k])
        if flip:
            img, lab = img[:, ::-1], lab[:, ::-1]
        return img[:bh + 2 * m, :bw + 2 * m], lab[:bh + 2 * m, :bw + 2 * m]

    stripe: dict[str, Any] = {"top": -1}
    label_rows: list[bytes] = []  # each row of blocks' labels, Deflate-compressed
    rows_of_blocks, cols_of_blocks = -(-h // block), -(-w // block)
    bar = None
    if progress:
        from tqdm import tqdm

        bar = tqdm(total=rows_of_blocks * cols_of_blocks, desc="mosaic", unit="scene")

    def blend(top: int, bh: int) -> tuple[np.ndarray, np.ndarray]:
        """Rows top..top+bh, one block column at a time: every block that reaches them, weighted (image), and
        the labels of the blocks that hold them."""
        out = np.empty((bh, w, bands), np.uint8)
        lab = np.empty((bh, w), np.uint8)
        own = top // block
        for cx in range(cols_of_blocks):
            X0, X1 = cx * block, min(cx * block + block, w)
            acc = np.zeros((bh, X1 - X0, bands), np.float32)
            for by in range(max(0, own - 1), min(rows_of_blocks, own + 2)):
                y0, y1 = by * block, min(by * block + block, h)
                a0, a1 = max(y0 - m, top), min(y1 + m, top + bh)  # stripe rows this block reaches
                if a1 <= a0:
                    continue
                wy = feather_weights(h, y0, y1, m)[a0 - (y0 - m):a1 - (y0 - m)]
                for bx in range(max(0, cx - 1), min(cols_of_blocks, cx + 2)):
                    x0, x1 = bx * block, min(bx * block + block, w)
                    c0, c1 = max(x0 - m, X0), min(x1 + m, X1)  # this block column's pixels it reaches
                    if c1 <= c0:
                        continue
                    img, blk = scene(by, bx)
                    wx = feather_weights(w, x0, x1, m)[c0 - (x0 - m):c1 - (x0 - m)]
                    weight = np.outer(wy, wx).astype(np.float32)[..., None]
                    acc[a0 - top:a1 - top, c0 - X0:c1 - X0] += img[a0 - (y0 - m):a1 - (y0 - m),
                                                                   c0 - (x0 - m):c1 - (x0 - m)] * weight
                    if by == own and bx == cx:
                        lab[:, X0:X1] = blk[m:m + bh, m:m + X1 - X0]
            out[:, X0:X1] = np.clip(np.rint(acc), 0, 255)
            if bar is not None:
                bar.update()
        return out, lab

    def image_rows(y0: int, y1: int) -> np.ndarray:
        top = y0 // block * block
        if stripe["top"] != top:
            img, lab = blend(top, min(block, h - top))
            stripe.update(top=top, image=img)
            if mask_path is not None:
                label_rows.append(zlib.compress(lab.tobytes(), 1))
        return stripe["image"][y0 - top:y1 - top]

    def mask_rows(y0: int, y1: int) -> np.ndarray:
        top = y0 // block * block
        if stripe.get("mask_top") != top:
            bh = min(block, h - top)
            stripe.update(mask_top=top, mask=np.frombuffer(zlib.decompress(label_rows[top // block]),
                                                           np.uint8).reshape(bh, w))
        return stripe["mask"][y0 - top:y1 - top]

    path = Path(path)
    try:
        write_geotiff(path, RasterSpec((h, w, bands), np.dtype(np.uint8), image_rows), grid, cog=False,
                      compress=None, block=TIFF_TILE)
    finally:
        if bar is not None:
            bar.close()
    if mask_path is not None:
        write_geotiff(mask_path, label_spec(SCENE_CLASSES, (h, w), mask_rows), grid, cog=False, block=TIFF_TILE)
    return path
