"""Vector labels: polygons, lines and points drawn in a GIS (GeoPackage, GeoJSON, Shapefile) with a class
attribute, rasterised onto each image's grid as a mask, so training, ``check`` and evaluation read them like
mask files.

A dataset folder declares them in ``classes.toml``::

    [vector_labels]
    file = "labels.gpkg"     # relative to the dataset folder (default: its one labels.gpkg/.geojson/.shp)
    layer = "strokes"        # default: the file's first layer
    attribute = "class"      # class id (integer) or class name (text) of each feature; default "class"
    width = 3                # pixels: lines and points are buffered to this width, like scribbles; default 3

or, without the table, by a ``labels.gpkg`` (or ``.geojson``, ``.shp``) in place of the ``masks/`` folder.

Each image gets the features that fall on it, reprojected to its CRS when the two differ (pyproj): polygons
label the pixels whose centres they contain (GDAL's rasterisation rule), lines and points label the pixels
whose centres lie within half the width of them. Every other pixel is unlabelled (the ignore value), and so is
a pixel two features of different classes claim. Images must be georeferenced.
"""

from __future__ import annotations

import functools
import tomllib
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import shapely

from fcnkit.data.classes import ClassTable
from fcnkit.data.raster import GeoRef
from fcnkit.errors import DataError
from fcnkit.inputfiles import special_kind

VECTOR_SUFFIXES = (".gpkg", ".geojson", ".shp")
DEFAULT_STEM = "labels"
_KEYS = {"file", "layer", "attribute", "width"}
_AREAL = (3, 6)  # shapely geometry type ids: Polygon, MultiPolygon
_THIN = (0, 1, 2, 4, 5)  # Point, LineString, LinearRing, MultiPoint, MultiLineString


@dataclass(frozen=True)
class VectorSettings:
    """Where a dataset's vector labels are and how to read them."""

    file: Path
    layer: str | None = None
    attribute: str = "class"
    width: float = 3.0


@dataclass(frozen=True)
class VectorLabels:
    """The features of a vector label file: geometries, their class ids and the file's CRS (WKT or None)."""

    settings: VectorSettings
    geometries: np.ndarray  # shapely geometries
    class_ids: np.ndarray  # uint8
    crs: str | None

    @property
    def counts(self) -> dict[str, int]:
        """How many polygons, lines and points the file holds."""
        kinds = shapely.get_type_id(self.geometries)
        return {"polygons": int(np.isin(kinds, _AREAL).sum()), "lines": int(np.isin(kinds, (1, 2, 5)).sum()),
                "points": int(np.isin(kinds, (0, 4)).sum())}

    def describe(self) -> str:
        c = self.counts
        layer = f", layer {self.settings.layer!r}" if self.settings.layer else ""
        return (f"{self.settings.file.name}{layer}, attribute {self.settings.attribute!r}: {c['polygons']} polygons, "
                f"{c['lines']} lines, {c['points']} points (lines and points {self.settings.width:g} px wide)")


def vector_settings(data_dir: Path) -> tuple[VectorSettings | None, list[str]]:
    """The dataset's vector label settings (None: it uses masks/) and every problem found declaring them."""
    table: object = None
    toml = data_dir / "classes.toml"
    try:  # classes.toml's own problems (a FIFO there too) are reported by the class-table reader
        if special_kind(toml) is None:
            table = tomllib.loads(toml.read_text(encoding="utf-8")).get("vector_labels")
    except (OSError, UnicodeDecodeError, tomllib.TOMLDecodeError, RecursionError):
        pass
    if table is None:
        found = [p for p in (data_dir / f"{DEFAULT_STEM}{s}" for s in VECTOR_SUFFIXES) if p.is_file()]
        if not found or (data_dir / "masks").exists():
            return None, []
        if len(found) > 1:
            return None, [f"{data_dir}: {', '.join(p.name for p in found)} (expected one vector label file)"]
        return VectorSettings(found[0]), []
    where = f"{toml} [vector_labels]"
    if not isinstance(table, dict):
        return None, [f"{where}: expected a table with file, layer, attribute, width"]
    problems = [f"{where}: unknown key {k!r} (expected {', '.join(sorted(_KEYS))})" for k in sorted(set(table) - _KEYS)]
    name = table.get("file")
    if name is None:
        found = [s for s in VECTOR_SUFFIXES if (data_dir / f"{DEFAULT_STEM}{s}").is_file()]
        name = f"{DEFAULT_STEM}{found[0]}" if len(found) == 1 else None
    if not isinstance(name, str) or Path(name).suffix.lower() not in VECTOR_SUFFIXES:
        problems.append(f"{where}: file = {name!r} (expected a {', '.join(VECTOR_SUFFIXES)} file in {data_dir})")
    elif not (data_dir / name).is_file():
        problems.append(f"{data_dir / name}: missing (the vector label file classes.toml names)")
    layer, attribute, width = table.get("layer"), table.get("attribute", "class"), table.get("width", 3)
    if layer is not None and not isinstance(layer, str):
        problems.append(f"{where}: layer = {layer!r} (expected a layer name)")
    if not isinstance(attribute, str) or not attribute:
        problems.append(f"{where}: attribute = {attribute!r} (expected the name of the class field)")
    if isinstance(width, bool) or not isinstance(width, (int, float)) or not 0 < width <= 1000:
        problems.append(f"{where}: width = {width!r} (expected a number of pixels above 0)")
    if (data_dir / "masks").exists():
        problems.append(f"{data_dir / 'masks'}: a dataset has masks/ or vector labels, not both (remove one)")
    if problems:
        return None, problems
    return VectorSettings(data_dir / name, layer, attribute, float(width)), []


def load_vector_labels(settings: VectorSettings, classes: ClassTable) -> VectorLabels:
    """Read the file's features and class values (read once per file version and kept); DataError naming the
    file, feature and value on the first problem."""
    stat = settings.file.stat() if settings.file.is_file() else None
    if stat is None:
        raise DataError(f"{settings.file}: no such vector label file")
    return _load(settings, classes, stat.st_mtime_ns, stat.st_size)


@functools.lru_cache(maxsize=4)
def _load(settings: VectorSettings, classes: ClassTable, _mtime: int, _size: int) -> VectorLabels:
    import pyogrio.raw

    path = settings.file
    try:
        info = pyogrio.read_info(path, layer=settings.layer)
        fields = [str(f) for f in info["fields"]]
        if settings.attribute not in fields:
            raise DataError(f"{path}: no field {settings.attribute!r} (fields: {', '.join(fields) or 'none'}; set "
                            "[vector_labels] attribute in classes.toml)")
        meta, fids, wkb, values = pyogrio.raw.read(path, layer=settings.layer, columns=[settings.attribute],
                                                   return_fids=True)
    except DataError:
        raise
    except Exception as e:  # GDAL and pyogrio raise several types for unreadable files and layers
        raise DataError(f"{path}: not a readable vector file ({' '.join(str(e).split())})") from None
    geoms = shapely.from_wkb(wkb)
    keep = ~(shapely.is_missing(geoms) | shapely.is_empty(geoms))
    ids = _class_ids(path, values[0], fids, classes)
    kinds = shapely.get_type_id(geoms)
    odd = keep & ~np.isin(kinds, _AREAL + _THIN)
    if odd.any():
        i = int(np.flatnonzero(odd)[0])
        raise DataError(f"{path}: feature {fids[i]} is a geometry collection (expected polygons, lines or points)")
    return VectorLabels(settings, geoms[keep], ids[keep], meta.get("crs"))


def _class_ids(path: Path, values: np.ndarray, fids: np.ndarray, classes: ClassTable) -> np.ndarray:
    by_name = {c.name: c.id for c in classes.classes}
    out = np.empty(len(values), np.uint8)
    for i, v in enumerate(values):
        v = v.item() if isinstance(v, np.generic) else v
        cid = None
        if isinstance(v, int) and not isinstance(v, bool):
            cid = int(v)
        elif isinstance(v, float) and v.is_integer():
            cid = int(v)
        elif isinstance(v, str):
            cid = by_name.get(v, int(v) if v.strip().isdigit() else None)
        if cid is None or not 0 <= cid < classes.num_classes:
            raise DataError(f"{path}: feature {fids[i]} (FID) has class {v!r} (expected an id "
                            f"0..{classes.num_classes - 1} or a class name of classes.toml)")
        out[i] = cid
    return out


def rasterise(labels: VectorLabels, geo: GeoRef | None, shape: tuple[int, int], classes: ClassTable,
              image: Path | str = "image") -> np.ndarray:
    """The H×W uint8 mask the features give an image on grid ``geo``: class ids where exactly one class claims
    a pixel, the ignore value elsewhere."""
    from rasterio.features import rasterize

    if geo is None:
        raise DataError(f"{image}: not georeferenced, so vector labels cannot be placed on it (expected a GeoTIFF "
                        "with a CRS and transform)")
    h, w = shape
    geoms = _to_pixels(_in_crs(labels, geo, image), geo)
    half = labels.settings.width / 2
    near = shapely.intersects(geoms, shapely.box(-half - 1, -half - 1, w + half + 1, h + half + 1))
    geoms, ids = geoms[near], labels.class_ids[near]
    thin = np.isin(shapely.get_type_id(geoms), _THIN)
    geoms = geoms.copy()
    geoms[thin] = shapely.buffer(geoms[thin], half, quad_segs=8)
    claims = np.zeros((h, w), np.uint8)
    owner = np.full((h, w), classes.ignore, np.uint8)
    for c in np.unique(ids):
        hit = rasterize(list(geoms[ids == c]), out_shape=(h, w), fill=0, default_value=1, dtype="uint8").astype(bool)
        claims += hit
        owner[hit] = c
    owner[claims > 1] = classes.ignore
    return owner


def _in_crs(labels: VectorLabels, geo: GeoRef, image: Path | str) -> np.ndarray:
    """The geometries in the image's CRS (unchanged when either has none or they are the same)."""
    if labels.crs is None or geo.crs is None:
        return labels.geometries
    import pyproj

    source, target = pyproj.CRS.from_user_input(labels.crs), pyproj.CRS.from_user_input(geo.crs.to_wkt())
    if source == target or _same_local_grid(source, target):
        return labels.geometries
    return _reprojected(labels, source.to_wkt(), target.to_wkt(), str(image))


def _same_local_grid(a: object, b: object) -> bool:
    """Two local engineering CRSs of one name and unit: the same grid (GeoTIFF cannot store a local datum's
    name, so one read back from a GeoTIFF differs from the GeoPackage's in that name only; and no
    transformation between local grids exists)."""
    return (a.is_engineering and b.is_engineering and a.name == b.name
            and [x.unit_name for x in a.axis_info] == [x.unit_name for x in b.axis_info])


def _reprojected(labels: VectorLabels, source: str, target: str, image: str) -> np.ndarray:
    import pyproj

    try:
        transformer = pyproj.Transformer.from_crs(source, target, always_xy=True)
        out = shapely.transform(labels.geometries, lambda xy: np.column_stack(transformer.transform(xy[:, 0],
                                                                                                     xy[:, 1])))
    except (pyproj.exceptions.ProjError, pyproj.exceptions.CRSError) as e:
        raise DataError(f"{labels.settings.file}: cannot reproject its features onto {image} "
                        f"({' '.join(str(e).split())})") from None
    if not np.isfinite(shapely.get_coordinates(out)).all():
        raise DataError(f"{labels.settings.file}: some features fall outside the CRS of {image} "
                        "(infinite coordinates after reprojection)")
    return out


def _to_pixels(geoms: np.ndarray, geo: GeoRef) -> np.ndarray:
    """Geometries moved from CRS coordinates to pixel coordinates (x = column, y = row, pixel corners)."""
    inv = ~geo.transform
    matrix = np.array([[inv.a, inv.b], [inv.d, inv.e]])
    offset = np.array([inv.c, inv.f])
    return shapely.transform(geoms, lambda xy: xy @ matrix.T + offset)
