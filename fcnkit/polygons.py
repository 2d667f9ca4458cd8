"""Class polygons from a label map of any size: one polygon per 4-connected region of one class, with its class
id and name, area in m², pixel count and mean confidence, written as a GeoPackage or GeoJSON layer (pyogrio).

Memory stays bounded on gigapixel maps: the label map is read a band of rows at a time. In each band the
regions of each class are labelled (scipy.ndimage, 4-connectivity) and traced into polygons on the pixel grid
(rasterio.features.shapes over the region ids, so region and polygon are the same pixels). A region touching
the band's last row is kept open; the regions of the next band whose first-row pixels sit under its last-row
pixels, in the same class, join it (union-find). A region is written as soon as nothing can join it any
more: its pieces are united exactly (shapely, on integer pixel corners), simplified when asked, and moved onto
the map's grid by its affine transform. Only the regions crossing the current band boundary stay in memory.

Areas and mean confidences are sums over the region's pixels, so polygon areas equal the raster area table
(exactly, before simplification); a region whose area is below ``min_area_m2`` is left out. GeoJSON can only
name a CRS by EPSG code: for a CRS without one (a local grid) use the GeoPackage, which keeps any CRS.
"""

from __future__ import annotations

import json
import os
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import shapely
from affine import Affine
from scipy import ndimage

from fcnkit.areas import PixelArea
from fcnkit.atomic import atomic_output
from fcnkit.data.classes import ClassTable
from fcnkit.data.raster import GeoRef, RowStore
from fcnkit.errors import ConfigError

BAND_ROWS = 1024
WRITE_BATCH = 5000
DRIVERS = {"gpkg": "GPKG", "geojson": "GeoJSON"}
FIELDS = ("class_id", "class_name", "area_m2", "pixels", "mean_confidence")


@dataclass
class Region:
    """One class region, possibly spread over several bands of rows: its polygons on the pixel grid and the sums
    over its pixels."""

    class_id: int
    parts: list = field(default_factory=list)
    pixels: int = 0
    area_m2: float = 0.0
    confidence: float = 0.0  # sum of confidence bytes

    def polygon(self) -> shapely.Polygon:
        """The region as one polygon in pixel coordinates (its pieces joined; see :func:`_union`)."""
        return _union(self.parts)

    def absorb(self, other: Region) -> None:
        self.parts += other.parts
        self.pixels += other.pixels
        self.area_m2 += other.area_m2
        self.confidence += other.confidence


def class_regions(labels: RowStore, confidence: RowStore | None, valid: RowStore | None, classes: ClassTable,
                  area: PixelArea, band_rows: int = BAND_ROWS, min_area_m2: float = 0.0) -> Iterator[Region]:
    """Every 4-connected region of one class in the label map (pixels with ids outside the classes, or invalid,
    belong to none), each as soon as it is complete, with its polygons in pixel coordinates. Regions lying in
    one band with less than ``min_area_m2`` are dropped before they are traced (the others are filtered by the
    caller, once complete)."""
    from rasterio.features import shapes

    height, width = labels.shape
    k = classes.num_classes
    open_regions: dict[int, Region] = {}  # region id in the previous band's last row → region
    last_ids = np.zeros(width, np.int64)
    for y0 in range(0, height, band_rows):
        y1 = min(y0 + band_rows, height)
        lab = np.array(labels.rows(y0, y1, write=False))
        ok = lab < k
        if valid is not None:
            ok &= np.array(valid.rows(y0, y1, write=False)) > 0
        ids = np.zeros(lab.shape, np.int32)
        n = 0
        for c in np.unique(lab[ok]):
            comp, count = ndimage.label(ok & (lab == c))  # 4-connectivity: scipy's default cross structure
            ids[comp > 0] = comp[comp > 0] + n
            n += count
        if n == 0:
            yield from open_regions.values()
            open_regions, last_ids = {}, np.zeros(width, np.int64)
            continue
        flat = ids.ravel()
        pixels = np.bincount(flat, minlength=n + 1)
        first = np.zeros(n + 1, np.int64)
        first[flat[::-1]] = np.arange(flat.size)[::-1]  # some pixel of each region (for its class)
        cls = lab.ravel()[first]
        conf = (np.bincount(flat, weights=np.array(confidence.rows(y0, y1, write=False), np.float64).ravel(),
                            minlength=n + 1) if confidence is not None else np.zeros(n + 1))
        rows_area = area.rows(y0, y1, width)
        sums = (np.bincount(flat, weights=np.broadcast_to(rows_area, lab.shape).ravel(), minlength=n + 1)
                if rows_area is not None else np.zeros(n + 1))
        if min_area_m2 > 0 and rows_area is not None:  # small regions inside the band: not worth tracing
            edge = np.zeros(n + 1, bool)
            edge[ids[0]] = y0 > 0
            edge[ids[-1]] |= y1 < height
            small = (sums < min_area_m2) & ~edge
            small[0] = False
            ids[small[ids]] = 0
        new = {i: Region(int(cls[i]), [], int(pixels[i]), float(sums[i]), float(conf[i]))
               for i in np.unique(ids[ids > 0]).tolist()}
        traced = list(shapes(ids, mask=ids > 0, connectivity=4, transform=Affine.translation(0, y0)))
        for (_, value), polygon in zip(traced, shapely.from_geojson([json.dumps(g) for g, _ in traced]),
                                       strict=True):
            new[int(value)].parts.append(polygon)

        # join the regions left open above with those they touch across the boundary (same class: a pixel of
        # each, one above the other)
        parent = {i: i for i in new}
        joined: dict[int, int] = {}  # open region above → a region root below it joins
        if open_regions:
            top = ids[0].astype(np.int64)
            touch = (last_ids > 0) & (top > 0)
            pairs = np.unique(np.stack([last_ids[touch], top[touch]], axis=1), axis=0) if touch.any() else []
            for old, cur in pairs:
                if open_regions[int(old)].class_id != new[int(cur)].class_id:
                    continue
                root = _find(parent, int(cur))
                owner = joined.get(int(old))
                if owner is None:
                    joined[int(old)] = root
                else:
                    other = _find(parent, owner)
                    if other != root:
                        parent[other] = root
        for old, region in open_regions.items():
            if old not in joined:
                yield region  # nothing below continues it
        groups: dict[int, Region] = {}
        for i, region in new.items():
            root = _find(parent, i)
            if root in groups:
                groups[root].absorb(region)
            else:
                groups[root] = region
        merged_old: dict[int, list[int]] = {}
        for old, root in joined.items():
            merged_old.setdefault(_find(parent, root), []).append(old)
        for root, olds in merged_old.items():
            for old in olds:
                groups[root].absorb(open_regions[old])
        # regions reaching this band's last row stay open, the rest are complete
        bottom = ids[-1].astype(np.int64)
        last_roots = np.array([_find(parent, int(i)) if i else 0 for i in bottom], np.int64)
        still_open = set(last_roots[last_roots > 0].tolist()) if y1 < height else set()
        for root, region in groups.items():
            if root not in still_open:
                yield region
        open_regions = {root: groups[root] for root in still_open}
        last_ids = last_roots
    yield from open_regions.values()


def _union(parts: list) -> shapely.Polygon:
    """One polygon from a region's pieces, which share whole pixel edges across band boundaries and never
    overlap. A piece's holes lie strictly inside its band (a hole reaching the band's edge would be open to the
    outside), so joining pieces never changes them: only the hole-free outlines are united (GEOS overlay is slow
    on polygons with thousands of holes), and the pieces' holes are then put back as holes of the result, beside
    the new holes the outlines enclose."""
    if len(parts) == 1:
        return parts[0]
    outline = shapely.union_all([shapely.Polygon(p.exterior) for p in parts])
    holes = [ring for p in parts for ring in p.interiors]
    if outline.geom_type != "Polygon":  # pieces joined only through shared edges: always one polygon
        outline = max(outline.geoms, key=lambda g: g.area)
    return shapely.Polygon(outline.exterior, [*outline.interiors, *holes])


def _find(parent: dict[int, int], i: int) -> int:
    while parent[i] != i:
        parent[i] = parent[parent[i]]
        i = parent[i]
    return i


def write_class_polygons(path: str | Path, labels: RowStore, confidence: RowStore | None, valid: RowStore | None,
                         classes: ClassTable, geo: GeoRef | None, area: PixelArea, *, fmt: str = "gpkg",
                         min_area_m2: float = 0.0, simplify: float = 0.0, band_rows: int = BAND_ROWS) -> int:
    """Write the class polygons of a label map (see the module notes) to ``path``, atomically; return how many.

    ``simplify`` is a tolerance in pixels (Douglas–Peucker, topology of each polygon preserved); ``min_area_m2``
    drops smaller regions (it needs known pixel areas). Coordinates are those of ``geo`` (none: pixel corners,
    x = column, y = row, GDAL's convention for a raster without georeferencing).
    """
    import pyogrio.raw

    if fmt not in DRIVERS:
        raise ConfigError(f"polygons: {fmt!r} is not one of: {', '.join(DRIVERS)}")
    if min_area_m2 > 0 and not area.known:
        raise ConfigError(f"min_area: needs pixel areas, but {area.reason}")
    transform = geo.transform if geo is not None else Affine.identity()
    matrix = [transform.a, transform.b, transform.d, transform.e, transform.c, transform.f]
    crs = geo.crs.to_wkt() if geo is not None and geo.crs is not None else None
    path = Path(path)
    written = 0
    with atomic_output(path) as tmp:
        target = tmp.with_name(tmp.name + path.suffix)  # drivers choose by suffix and write side files beside it
        batch: list[tuple] = []

        def flush(final: bool = False) -> None:
            nonlocal written
            if not batch and not (final and written == 0):
                return
            geoms = np.array([b[0] for b in batch], dtype=object)
            columns = [np.array([b[i] for b in batch], dtype=dtype) for i, dtype in
                       ((1, np.int32), (2, object), (3, np.float64), (4, np.int64), (5, np.float64))]
            pyogrio.raw.write(target, shapely.to_wkb(geoms) if len(geoms) else geoms, field_data=columns,
                              fields=list(FIELDS), geometry_type="MultiPolygon", crs=crs, driver=DRIVERS[fmt],
                              layer="classes", append=written > 0)
            written += len(batch)
            batch.clear()

        for region in class_regions(labels, confidence, valid, classes, area, band_rows, min_area_m2):
            if area.known and region.area_m2 < min_area_m2:
                continue
            shape = region.polygon()
            if simplify > 0:
                shape = shape.simplify(simplify, preserve_topology=True)
            shape = shapely.affinity.affine_transform(shape, matrix)
            if shape.geom_type == "Polygon":
                shape = shapely.MultiPolygon([shape])
            batch.append((shape, region.class_id, classes.classes[region.class_id].name,
                          region.area_m2 if area.known else np.nan, region.pixels,
                          region.confidence / region.pixels / 255.0))
            if len(batch) >= WRITE_BATCH:
                flush()
        flush(final=True)
        os.replace(target, tmp)
    return written
