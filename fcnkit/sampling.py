"""Reference samples of a label map: draw a stratified random sample of points, then assess the filled sample.

Drawing (:func:`draw_sample`): the strata are the mapped classes. The label map is read in bands of rows,
twice, and never whole: a first pass counts the pixels of each class; the sample size comes from the target
standard error of overall accuracy (Cochran 1977, see :mod:`fcnkit.assessment`) or is given, and is allocated
to classes in proportion to area with a minimum per class; for each class the ranks of its chosen pixels
(k-th pixel of the class in row-major order) are drawn in advance, without replacement, and a second pass
picks the pixels of those ranks. Every pixel of a class so has the same chance, and memory holds one band plus
the sample. The points are written as GeoPackage, GeoJSON or CSV, with an empty ``reference`` field for the
reference class a person assigns to each point (by its name or id), and optionally as image chips.

Assessing (:func:`assess_sample`): the filled sample, with the mapped pixel counts (from the label map or a
counts file) and the pixel area, gives the estimates of Olofsson et al. 2014, written as JSON and CSV.
"""

from __future__ import annotations

import csv
import io
import json
import math
import warnings
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from fcnkit.assessment import (
    CAUTION,
    TABLE_FIELDS,
    allocate_sample,
    assessment_rows,
    assessment_table,
    plan_sample_size,
)
from fcnkit.atomic import atomic_output, write_text_atomic
from fcnkit.data.classes import ClassTable
from fcnkit.data.raster import DEFAULT_MAX_PIXELS, TIFF_SUFFIXES, Raster, open_raster
from fcnkit.destinations import check_outputs
from fcnkit.errors import DataError

SAMPLE_FIELDS = ("point_id", "row", "col", "x", "y", "map_id", "map_class", "reference")
CHIP_PREFIX = "point_"  # chips are CHIP_PREFIX + the five-digit point id + .png
VECTOR_SUFFIXES = {".gpkg": "GPKG", ".geojson": "GeoJSON"}
SAMPLE_SUFFIXES = (*VECTOR_SUFFIXES, ".csv")
LAYER = "sample"
BAND_PIXELS = 1 << 22  # pixels per band of rows read at a time
IGNORE = 255  # unlabelled pixels when no class table says otherwise (classes.toml's default)
DEFAULT_MINIMUM = 50  # points per class at least (Olofsson et al. 2014 suggest 50–100 for rare classes)
DEFAULT_TARGET_SE = 0.01
DEFAULT_EXPECTED_ACCURACY = 0.8


# --- the label map ---------------------------------------------------------------------------------------


@dataclass(frozen=True)
class Georef:
    """What rasterio says of a TIFF: CRS (WKT), affine transform (a, b, c, d, e, f with x = a·col + b·row + c,
    y = d·col + e·row + f at pixel corners; None when not georeferenced), pixel area in m² (projected or
    local grid in linear units only) and nodata value."""

    crs: str | None
    transform: tuple[float, float, float, float, float, float] | None
    pixel_area_m2: float | None
    nodata: float | None

    def centres(self, rows: np.ndarray, cols: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Map coordinates of pixel centres; image coordinates (x right, y down) when not georeferenced."""
        a, b, c, d, e, f = self.transform or (1.0, 0.0, 0.0, 0.0, 1.0, 0.0)
        u, v = cols + 0.5, rows + 0.5
        return a * u + b * v + c, d * u + e * v + f


def georeference(path: str | Path) -> Georef:
    """The georeferencing (and nodata value) of a GeoTIFF, read with rasterio; all None for other files."""
    path = Path(path)
    none = Georef(None, None, None, None)
    if path.suffix.lower() not in TIFF_SUFFIXES:
        return none
    import rasterio
    from rasterio.errors import CRSError, NotGeoreferencedWarning, RasterioError

    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", NotGeoreferencedWarning)
            with rasterio.open(path) as src:
                crs, t, nodata = src.crs, src.transform, src.nodata
    except RasterioError:
        return none
    if crs is None and t.is_identity:
        return Georef(None, None, None, nodata)
    area = None
    if crs is not None and not crs.is_geographic:  # projected or local grid in linear units
        try:
            _unit, to_metre = crs.units_factor
            area = abs(t.a * t.e - t.b * t.d) * to_metre ** 2
        except CRSError:
            pass
    return Georef(crs.to_wkt() if crs is not None else None, tuple(t)[:6], area, nodata)


def _open_labels(path: str | Path, max_pixels: int | None) -> Raster:
    """The label map as a region reader of one band of integer class ids."""
    path = Path(path)
    suffix = path.suffix.lower()
    if suffix in (".jpg", ".jpeg"):
        raise DataError(f"{path}: a label map must be lossless (GeoTIFF/TIFF or PNG), not JPEG")
    raster = open_raster(path, max_pixels, indices=True)  # palette maps (as segment writes) keep their ids
    raster.fill = [IGNORE]  # nodata pixels (the file's nodata value or mask) read as unlabelled, never as a class
    kind = np.dtype(raster.dtype).kind
    if raster.shape[2] != 1 or kind not in "ui":
        raster.close()
        raise DataError(f"{path}: a label map needs one band of integer class ids, got {raster.shape[2]} band(s) "
                        f"of {np.dtype(raster.dtype)}")
    return raster


def _bands(height: int, width: int) -> Iterator[tuple[int, int]]:
    step = max(1, BAND_PIXELS // max(1, width))
    for y0 in range(0, height, step):
        yield y0, min(height, y0 + step)


def _band(raster: Raster, y0: int, y1: int) -> np.ndarray:
    band = raster.read(y0, y1, 0, raster.shape[1])[..., 0]
    if band.dtype.kind == "i" and band.size and band.min() < 0:
        raise DataError(f"{raster.path}: pixel value {int(band.min())} (class ids are never negative)")
    return band


def count_classes(labels: str | Path, max_pixels: int | None = DEFAULT_MAX_PIXELS) -> np.ndarray:
    """Pixels of each value 0..max in a label map, counted band by band."""
    raster = _open_labels(labels, max_pixels)
    try:
        return _count(raster)
    finally:
        raster.close()


def _count(raster: Raster, visit: Callable[[int, np.ndarray], None] | None = None) -> np.ndarray:
    """Pixels of each value, band by band; ``visit(first_row, band)`` sees every band on the way."""
    counts = np.zeros(0, np.int64)
    for y0, y1 in _bands(*raster.shape[:2]):
        band = _band(raster, y0, y1)
        if visit is not None:
            visit(y0, band)
        c = np.bincount(band.ravel())
        if c.size > counts.size:
            counts = np.concatenate([counts, np.zeros(c.size - counts.size, np.int64)])
        counts[:c.size] += c
    return counts


@dataclass(frozen=True)
class _Strata:
    """The classes of a label map: ids, names and mapped pixels (ignore/nodata values left out)."""

    ids: list[int]
    names: list[str]
    pixels: np.ndarray

    def name(self, class_id: int) -> str:
        return self.names[self.ids.index(class_id)]


def _strata(path: Path, counts: np.ndarray, classes: ClassTable | None, nodata: float | None) -> _Strata:
    skip = {int(nodata)} if nodata is not None and float(nodata).is_integer() else set()
    skip |= {IGNORE, classes.ignore if classes is not None else IGNORE}
    present = [int(v) for v in np.flatnonzero(counts) if int(v) not in skip]
    if classes is None:
        if not present:
            raise DataError(f"{path}: no mapped pixels (every pixel is nodata)")
        ids = present
        names = [f"class {i}" for i in ids]
    else:
        bad = [v for v in present if v not in classes.ids]
        if bad:
            raise DataError(f"{path}: pixel value {bad[0]} is not a class id of the class table (ids "
                            f"0..{classes.num_classes - 1}, ignore {classes.ignore})")
        ids, names = classes.ids, classes.names
    pixels = np.array([counts[i] if i < counts.size else 0 for i in ids], np.int64)
    if pixels.sum() == 0:
        raise DataError(f"{path}: no mapped pixels of any class")
    return _Strata(ids, names, pixels)


# --- drawing ---------------------------------------------------------------------------------------------


@dataclass
class Sample:
    """A drawn sample: its points (arrays), the strata and how the size was chosen; paths of what was written."""

    rows: np.ndarray
    cols: np.ndarray
    x: np.ndarray
    y: np.ndarray
    map_ids: np.ndarray
    class_ids: list[int]
    class_names: list[str]
    mapped_pixels: np.ndarray
    allocation: np.ndarray
    planned_total: int
    how: str
    crs: str | None
    pixel_area_m2: float | None
    paths: dict[str, Path] = field(default_factory=dict)

    def summary(self) -> str:
        lines = [f"{len(self.rows)} points ({self.how}); per class:"]
        for i, name, n, px in zip(self.class_ids, self.class_names, self.allocation, self.mapped_pixels,
                                  strict=True):
            if px:
                lines.append(f"  {i:>3} {name:<24} {int(n):>6} points of {int(px):,} pixels")
        return "\n".join(lines)


def _pick(raster: Raster, strata: _Strata, ranks: list[np.ndarray]) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Second pass: rows, cols and ids of the pixels whose per-class rank (row-major) is in ``ranks``."""
    seen = np.zeros(len(strata.ids), np.int64)
    rows, cols, ids = [], [], []
    width = raster.shape[1]
    for y0, y1 in _bands(*raster.shape[:2]):
        band = _band(raster, y0, y1)
        here = np.bincount(band.ravel(), minlength=max(strata.ids) + 1)
        for s, class_id in enumerate(strata.ids):
            n = int(here[class_id])
            lo, hi = np.searchsorted(ranks[s], [seen[s], seen[s] + n])
            if hi > lo:
                where = np.flatnonzero(band.ravel() == class_id)[ranks[s][lo:hi] - seen[s]]
                rows.append(y0 + where // width)
                cols.append(where % width)
                ids.append(np.full(where.size, class_id))
            seen[s] += n
    if not rows:
        return np.zeros(0, np.int64), np.zeros(0, np.int64), np.zeros(0, np.int64)
    r, c, i = np.concatenate(rows), np.concatenate(cols), np.concatenate(ids)
    order = np.lexsort((c, r))
    return r[order], c[order], i[order]


def _sample_paths(out: str | Path | Sequence[str | Path]) -> list[Path]:
    """The sample file names of ``out``, each of a supported type."""
    paths = [Path(out)] if isinstance(out, (str, Path)) else [Path(p) for p in out]
    if not paths:
        raise DataError("no output file given for the sample (expected a .gpkg, .geojson or .csv name)")
    for p in paths:
        if p.suffix.lower() not in SAMPLE_SUFFIXES:
            raise DataError(f"{p}: unsupported sample file type {p.suffix or '(none)'}; expected one of: "
                            + ", ".join(SAMPLE_SUFFIXES))
    return paths


def draw_sample(labels: str | Path, out: str | Path | Sequence[str | Path], *, classes: ClassTable | None = None,
                total: int | None = None, target_se: float = DEFAULT_TARGET_SE,
                expected_accuracy: float | Sequence[float] = DEFAULT_EXPECTED_ACCURACY,
                minimum: int = DEFAULT_MINIMUM, seed: int = 0, image: str | Path | None = None,
                chips: str | Path | None = None, chip_size: int = 64,
                max_pixels: int | None = DEFAULT_MAX_PIXELS, overwrite: bool = False) -> Sample:
    """Draw a stratified random sample of points from a label map and write it to ``out`` (.gpkg, .geojson
    or .csv; several names write several files).

    The strata are the classes mapped (pixels equal to ``classes.ignore`` — 255 without ``classes`` — or to
    the GeoTIFF's nodata are left out; without ``classes`` every other value is a class, named by its id).
    The size is ``total`` or, if None, Cochran's size for overall accuracy with standard error ``target_se``
    when the user's accuracies are as ``expected_accuracy`` (one value or one per class); it is allocated in
    proportion to mapped area with at least ``minimum`` points per class
    (:func:`fcnkit.assessment.allocate_sample`). ``chips``: a folder for one PNG per point, ``chip_size``
    pixels of ``image`` (the mapped image, same grid) around it.
    """
    labels = Path(labels)
    paths = _sample_paths(out)
    if chips is not None and image is None:
        raise DataError("image chips need the mapped image (the image the label map was made from)")
    check_outputs(paths, inputs=[labels, image], folders=[(chips, f"{CHIP_PREFIX}*.png")] if chips is not None else [],
                  overwrite=overwrite, error=DataError)
    if total is not None and total < 1:
        raise DataError(f"sample size {total} points (expected at least 1)")
    if minimum < 0:
        raise DataError(f"minimum per class {minimum} points (expected ≥ 0)")
    if chip_size < 3:
        raise DataError(f"chip size {chip_size} px (expected at least 3)")
    geo = georeference(labels)
    raster = _open_labels(labels, max_pixels)
    try:
        if image is not None:
            _check_same_grid(labels, raster.shape, image, max_pixels)
        strata = _strata(labels, _count(raster), classes, geo.nodata)
        if total is None:
            expected = np.asarray(expected_accuracy, dtype=np.float64)
            if expected.ndim and expected.size != len(strata.ids):
                raise DataError(f"{expected.size} anticipated user's accuracies for {len(strata.ids)} classes "
                                f"({', '.join(strata.names)})")
            try:
                planned = plan_sample_size(strata.pixels, expected, target_se)
            except ValueError as e:
                raise DataError(f"sample size: {e}") from None
            shown = f"{float(expected):.2f}" if not expected.ndim else ", ".join(f"{u:.2f}" for u in expected)
            how = (f"{planned} planned for a standard error of {target_se} in overall accuracy with anticipated "
                   f"user's accuracies {shown} (Cochran 1977); at least {minimum} per class")
        else:
            planned = total
            how = f"{total} requested; at least {minimum} per class"
        allocation = allocate_sample(planned, strata.pixels, minimum)
        rng = np.random.default_rng(seed)
        ranks = [np.sort(rng.choice(int(n_pix), int(n), replace=False)) if n else np.zeros(0, np.int64)
                 for n_pix, n in zip(strata.pixels, allocation, strict=True)]
        rows, cols, map_ids = _pick(raster, strata, ranks)
    finally:
        raster.close()
    x, y = geo.centres(rows, cols)
    sample = Sample(rows=rows, cols=cols, x=x, y=y, map_ids=map_ids, class_ids=strata.ids,
                    class_names=strata.names, mapped_pixels=strata.pixels, allocation=allocation,
                    planned_total=planned, how=how, crs=geo.crs, pixel_area_m2=geo.pixel_area_m2)
    for p in paths:
        _write_sample(p, sample)
        sample.paths[p.suffix.lower().lstrip(".")] = p
    if chips is not None:
        sample.paths["chips"] = write_chips(sample, image, chips, chip_size, max_pixels)  # type: ignore[arg-type]
    return sample


def _check_same_grid(labels: Path, shape: tuple[int, ...], image: str | Path, max_pixels: int | None) -> None:
    raster = open_raster(image, max_pixels)
    try:
        if raster.shape[:2] != shape[:2]:
            raise DataError(f"{image}: {raster.shape[1]}x{raster.shape[0]} pixels, but the label map {labels} has "
                            f"{shape[1]}x{shape[0]} (expected the image it was made from)")
    finally:
        raster.close()


def _point_records(sample: Sample) -> list[list[Any]]:
    names = dict(zip(sample.class_ids, sample.class_names, strict=True))
    return [[i + 1, int(r), int(c), float(x), float(y), int(m), names[int(m)], None]
            for i, (r, c, x, y, m) in enumerate(zip(sample.rows, sample.cols, sample.x, sample.y, sample.map_ids,
                                                    strict=True))]


def _write_sample(path: Path, sample: Sample) -> None:
    records = _point_records(sample)
    if path.suffix.lower() == ".csv":
        buf = io.StringIO()
        writer = csv.writer(buf, lineterminator="\n")
        writer.writerow(SAMPLE_FIELDS)
        for rec in records:
            writer.writerow(["" if v is None else (repr(v) if isinstance(v, float) else v) for v in rec])
        write_text_atomic(path, buf.getvalue())
        return
    import pyogrio.raw
    import shapely

    columns = list(zip(*records, strict=True)) if records else [()] * len(SAMPLE_FIELDS)
    kinds = (np.int64, np.int64, np.int64, np.float64, np.float64, np.int64, object, object)
    data = [np.array(col, dtype=kind) for col, kind in zip(columns, kinds, strict=True)]
    geometry = shapely.to_wkb(shapely.points(sample.x, sample.y))
    with atomic_output(path) as tmp, warnings.catch_warnings():
        warnings.filterwarnings("ignore", message=".*extension.*")  # the temporary name has another extension
        warnings.filterwarnings("ignore", message=".*'crs' was not provided.*")  # a map without georeferencing
        pyogrio.raw.write(tmp, np.asarray(geometry, dtype=object), data, list(SAMPLE_FIELDS), layer=LAYER,
                          driver=VECTOR_SUFFIXES[path.suffix.lower()], geometry_type="Point", crs=sample.crs)


def write_chips(sample: Sample, image: str | Path, folder: str | Path, size: int = 64,
                max_pixels: int | None = DEFAULT_MAX_PIXELS) -> Path:
    """One PNG per point, ``size`` pixels of ``image`` around it (enlarged to about 256 px), the point's pixel
    outlined; named ``point_00001.png`` … after the point ids."""
    from PIL import Image

    from fcnkit.outputs import display_rgb

    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    raster = open_raster(image, max_pixels)
    zoom = max(1, 256 // size)
    try:
        h, w = raster.shape[:2]
        for pid, (r, c) in enumerate(zip(sample.rows, sample.cols, strict=True), start=1):
            y0, x0 = int(r) - size // 2, int(c) - size // 2
            ya, yb, xa, xb = max(0, y0), min(h, y0 + size), max(0, x0), min(w, x0 + size)
            chip = np.zeros((size, size, 3), np.uint8)  # black beyond the image's edges
            chip[ya - y0:yb - y0, xa - x0:xb - x0] = display_rgb(raster.read(ya, yb, xa, xb))
            rgb = np.repeat(np.repeat(chip, zoom, axis=0), zoom, axis=1)
            top, left = (size // 2) * zoom - 1, (size // 2) * zoom - 1  # one pixel outside the point's block
            box = (slice(top, top + zoom + 2), slice(left, left + zoom + 2))
            ring = np.ones((zoom + 2, zoom + 2), bool)
            ring[1:-1, 1:-1] = False
            rgb[box][ring] = (255, 255, 0)
            with atomic_output(folder / f"{CHIP_PREFIX}{pid:05d}.png") as tmp:
                Image.fromarray(rgb).save(tmp, format="PNG")
    finally:
        raster.close()
    return folder


# --- assessing -------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class SamplePoint:
    """One filled point of a sample file (values as read; row/col None when the file has no such fields)."""

    point_id: str
    row: int | None
    col: int | None
    map_id: int
    map_class: str
    reference: str


def _read_table(path: Path) -> tuple[list[str], list[list[Any]]]:
    """Field names and rows (lists of values) of a CSV, GeoPackage or GeoJSON file."""
    suffix = path.suffix.lower()
    if not path.is_file():
        raise DataError(f"{path}: no such sample file")
    if suffix == ".csv":
        try:
            with open(path, newline="", encoding="utf-8-sig") as f:
                rows = list(csv.reader(f))
        except (UnicodeDecodeError, csv.Error) as e:
            raise DataError(f"{path}: not a readable CSV file ({e})") from None
        if not rows:
            raise DataError(f"{path}: empty file (expected a header line of field names)")
        return [h.strip() for h in rows[0]], [r for r in rows[1:] if any(v.strip() for v in r)]
    if suffix not in VECTOR_SUFFIXES:
        raise DataError(f"{path}: unsupported sample file type {suffix or '(none)'}; expected one of: "
                        + ", ".join(SAMPLE_SUFFIXES))
    import pyogrio.raw
    from pyogrio.errors import DataSourceError

    try:
        meta, _fids, _geom, data = pyogrio.raw.read(path, read_geometry=False)
    except (DataSourceError, OSError, ValueError) as e:
        why = " ".join(str(e).split()).split(";")[0].replace(f"'{path}' ", "")  # GDAL's first sentence
        raise DataError(f"{path}: not a readable {VECTOR_SUFFIXES[suffix]} file ({why})") from None
    names = [str(n) for n in meta["fields"]]
    return names, [list(r) for r in zip(*data, strict=True)] if data else []


def _text(v: Any) -> str:
    if v is None or (isinstance(v, float) and math.isnan(v)):
        return ""
    if isinstance(v, (float, np.floating)) and float(v).is_integer():
        return str(int(v))
    return str(v).strip()


def _whole(path: Path, pid: str, name: str, v: Any) -> int:
    t = _text(v)
    try:
        return int(t)
    except ValueError:
        raise DataError(f"{path}: point {pid}: {name} = {t!r} (expected a whole number)") from None


def read_sample(path: str | Path, reference_field: str = "reference", *, need_cells: bool = False) -> list[SamplePoint]:
    """The points of a filled sample file; DataError naming the file and value on a missing field, a value
    that is not a whole number or an empty reference class. ``need_cells``: row and col are required."""
    path = Path(path)
    names, rows = _read_table(path)
    need = ["point_id", "map_id", reference_field] + (["row", "col"] if need_cells else [])
    missing = [n for n in need if n not in names]
    if missing:
        raise DataError(f"{path}: no field {missing[0]!r} (fields: {', '.join(names) or 'none'})")
    if not rows:
        raise DataError(f"{path}: no points")
    points, empty = [], []
    for values in rows:
        r = dict(zip(names, values, strict=False))
        pid = _text(r.get("point_id"))
        ref = _text(r.get(reference_field))
        if not ref:
            empty.append(pid)
            continue
        row, col = (_whole(path, pid, k, r[k]) if k in r else None for k in ("row", "col"))
        map_id = _whole(path, pid, "map_id", r["map_id"])
        points.append(SamplePoint(pid, row, col, map_id, _text(r.get("map_class")), ref))
    if empty:
        shown = ", ".join(empty[:5]) + (" …" if len(empty) > 5 else "")
        raise DataError(f"{path}: {len(empty)} of {len(rows)} points have no {reference_field!r} class (point_id "
                        f"{shown}); fill in every point's reference class (name or id)")
    return points


def read_counts(path: str | Path) -> tuple[dict[int, int], float | None]:
    """Mapped pixels per class id, and the pixel area if stated, from a CSV (columns ``id`` and ``pixels``) or
    a JSON file (``classes``: a list of objects with ``id`` and ``pixels``; optional ``pixel_area_m2``), such
    as the area tables ``segment`` writes."""
    path = Path(path)
    if not path.is_file():
        raise DataError(f"{path}: no such counts file")
    area = None
    try:
        if path.suffix.lower() == ".json":
            doc = json.loads(path.read_text(encoding="utf-8"))
            entries = doc.get("classes") if isinstance(doc, dict) else None
            if not isinstance(entries, list):
                raise DataError(f"{path}: expected a JSON object with a 'classes' list of {{id, pixels}}")
            area = doc.get("pixel_area_m2")
            if area is not None and (not isinstance(area, (int, float)) or not area > 0):
                raise DataError(f"{path}: pixel_area_m2 = {area!r} (expected a positive number)")
        else:
            with open(path, newline="", encoding="utf-8-sig") as f:
                entries = list(csv.DictReader(f))
    except (UnicodeDecodeError, json.JSONDecodeError, csv.Error) as e:
        raise DataError(f"{path}: not a readable counts file ({e})") from None
    except RecursionError:
        raise DataError(f"{path}: not a readable counts file (nested too deeply)") from None
    counts: dict[int, int] = {}
    for e in entries:
        if not isinstance(e, dict) or "id" not in e or "pixels" not in e:
            raise DataError(f"{path}: every class needs 'id' and 'pixels' (got {e!r})")
        try:
            cid, px = int(e["id"]), int(e["pixels"])
        except (TypeError, ValueError):
            raise DataError(f"{path}: id {e['id']!r}, pixels {e['pixels']!r} (expected whole numbers)") from None
        if cid < 0 or px < 0 or cid in counts:
            raise DataError(f"{path}: id {cid}, pixels {px} (expected distinct ids ≥ 0 and pixels ≥ 0)")
        counts[cid] = px
    if not counts:
        raise DataError(f"{path}: no classes")
    return counts, (float(area) if area is not None else None)


def _map_checker(raster: Raster, points: list[SamplePoint], sample: Path) -> Callable[[int, np.ndarray], None]:
    """A band visitor checking that each point's map class is the label map's value at its row and column."""
    h, w = raster.shape[:2]
    by_row: dict[int, list[SamplePoint]] = {}
    for p in points:
        if not (0 <= p.row < h and 0 <= p.col < w):  # type: ignore[operator]
            raise DataError(f"{sample}: point {p.point_id}: row {p.row}, col {p.col} is outside the {w}x{h} label "
                            f"map {raster.path}")
        by_row.setdefault(p.row, []).append(p)  # type: ignore[arg-type]

    def visit(y0: int, band: np.ndarray) -> None:
        for y in range(y0, y0 + band.shape[0]):
            for p in by_row.get(y, ()):
                value = int(band[y - y0, p.col])
                if value != p.map_id:
                    raise DataError(f"{sample}: point {p.point_id}: map_id {p.map_id}, but the label map "
                                    f"{raster.path} has {value} at row {p.row}, col {p.col} (is it the same map?)")
    return visit


def assess_sample(sample: str | Path, *, labels: str | Path | None = None, counts: str | Path | None = None,
                  classes: ClassTable | None = None, pixel_area_m2: float | None = None,
                  reference_field: str = "reference", json_path: str | Path | None = None,
                  csv_path: str | Path | None = None, max_pixels: int | None = DEFAULT_MAX_PIXELS,
                  overwrite: bool = False) -> dict[str, Any]:
    """Olofsson et al. 2014 estimates from a filled sample; returns :func:`fcnkit.assessment.assessment_table`'s
    dict (plus the files used) and writes it as JSON and tidy CSV when paths are given.

    The mapped pixels per class come from the label map ``labels`` (read band by band; each point's map class
    is checked against it) or from a ``counts`` file (see :func:`read_counts`). Reference classes are names
    or ids: names from ``classes`` (a class table) or else the sample's own ``map_class`` names. The pixel
    area is ``pixel_area_m2``, else the GeoTIFF's (projected CRS), else the counts file's; without one,
    areas are given in pixels only.
    """
    sample = Path(sample)
    if (labels is None) == (counts is None):
        raise DataError("give either the label map or a file of its pixel counts per class (not both)")
    if pixel_area_m2 is not None and not pixel_area_m2 > 0:
        raise DataError(f"pixel area {pixel_area_m2} m² (expected a positive number)")
    check_outputs([p for p in (json_path, csv_path) if p is not None], inputs=[sample, labels, counts],
                  overwrite=overwrite, error=DataError)
    points = read_sample(sample, reference_field, need_cells=labels is not None)
    area_source = "given" if pixel_area_m2 is not None else None
    if labels is not None:
        labels = Path(labels)
        geo = georeference(labels)
        raster = _open_labels(labels, max_pixels)
        try:
            strata = _strata(labels, _count(raster, _map_checker(raster, points, sample)), classes, geo.nodata)
        finally:
            raster.close()
        if pixel_area_m2 is None and geo.pixel_area_m2 is not None:
            pixel_area_m2, area_source = geo.pixel_area_m2, f"{labels} (GeoTIFF transform)"
    else:
        by_id, file_area = read_counts(counts)  # type: ignore[arg-type]
        full = np.zeros(max(by_id) + 1, np.int64)
        full[list(by_id)] = list(by_id.values())
        strata = _strata(Path(counts), full, classes, None)  # type: ignore[arg-type]
        if pixel_area_m2 is None and file_area is not None:
            pixel_area_m2, area_source = file_area, str(counts)
    if classes is None:  # names as the sample gives them beside the map ids
        found = {p.map_id: p.map_class for p in points if p.map_class}
        named = [found.get(i, n) for i, n in zip(strata.ids, strata.names, strict=True)]
        if len(set(named)) == len(named):
            strata = _Strata(strata.ids, named, strata.pixels)
    matrix = _error_matrix(sample, points, strata)
    table = assessment_table(matrix, strata.pixels, names=strata.names, ids=strata.ids, pixel_area_m2=pixel_area_m2)
    table = {"sample": str(sample), "labels": str(labels) if labels is not None else None,
             "counts": str(counts) if counts is not None else None, "reference_field": reference_field,
             "pixel_area_source": area_source, **table}
    if json_path is not None:
        write_text_atomic(json_path, json.dumps(table, indent=2) + "\n")
    if csv_path is not None:
        write_text_atomic(csv_path, assessment_csv(table))
    return table


def _error_matrix(path: Path, points: list[SamplePoint], strata: _Strata) -> np.ndarray:
    k = len(strata.ids)
    index = {cid: i for i, cid in enumerate(strata.ids)}
    by_name = {name.casefold(): i for i, name in enumerate(strata.names)}
    listing = ", ".join(f"{i} {n}" for i, n in zip(strata.ids, strata.names, strict=True))
    matrix = np.zeros((k, k), np.int64)
    for p in points:
        if p.map_id not in index or strata.pixels[index[p.map_id]] == 0:
            raise DataError(f"{path}: point {p.point_id}: map_id {p.map_id} is not a mapped class (classes: "
                            f"{listing})")
        ref = p.reference
        if ref.isdigit() and int(ref) in index:
            j = index[int(ref)]
        elif ref.casefold() in by_name:
            j = by_name[ref.casefold()]
        else:
            raise DataError(f"{path}: point {p.point_id}: reference class {ref!r} is unknown (expected a name or "
                            f"id of: {listing})")
        matrix[index[p.map_id], j] += 1
    for s, (cid, name, px) in enumerate(zip(strata.ids, strata.names, strata.pixels, strict=True)):
        n = int(matrix[s].sum())
        if px and n < 2:
            raise DataError(f"{path}: class {name!r} (id {cid}) has {px:,} mapped pixels but {n} sample point"
                            f"{'' if n == 1 else 's'} (at least 2 per mapped class are needed for standard errors)")
    return matrix


def assessment_csv(table: dict[str, Any]) -> str:
    """The tidy CSV text of an assessment (one quantity per row, see ``TABLE_FIELDS``)."""
    buf = io.StringIO()
    writer = csv.DictWriter(buf, TABLE_FIELDS, lineterminator="\n")
    writer.writeheader()
    for row in assessment_rows(table):
        writer.writerow({k: "" if v is None else v for k, v in row.items()})
    return buf.getvalue()


def format_assessment(table: dict[str, Any]) -> str:
    """A short plain-text summary: overall accuracy, then per class user's and producer's accuracy and area."""
    def ci(v: dict[str, Any], scale: float = 1.0, fmt: str = "{:.3f}") -> str:
        if v["estimate"] is None:
            return "n/a"
        half = "" if v["se"] is None else " ± " + fmt.format(1.96 * v["se"] * scale)
        return fmt.format(v["estimate"] * scale) + half
    o = table["overall_accuracy"]
    unit = "ha" if table["pixel_area_m2"] is not None else "pixels"
    lines = [f"overall accuracy {ci(o)} (95 %), {table['sample_points']} points",
             f"{'class':<24} {'user acc.':>15} {'producer acc.':>15} {'area, ' + unit + ' (95 %)':>26}"]
    for c in table["classes"]:
        lines.append(f"{c['name'][:24]:<24} {ci(c['users_accuracy']):>15} {ci(c['producers_accuracy']):>15} "
                     f"{ci(c['area'][unit], fmt='{:,.1f}'):>26}")
    lines.append(CAUTION)
    return "\n".join(lines)
