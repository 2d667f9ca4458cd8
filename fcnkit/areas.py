"""Ground area of the pixels of a raster grid, from its CRS and affine transform (pure: no file I/O).

* Projected (or local engineering) CRS: every pixel has the same map-plane area, |det A| × f², where A is the
  transform's 2×2 linear part (so rotated and sheared grids are right) and f the metres per linear unit that
  pyproj reports for the CRS's axes (1 for metres, 0.3048006096… for US survey feet). The projection's own
  scale error stays in these areas (about 0.04 % in UTM; large in Web-Mercator-like projections): the areal
  scale at the image centre is reported beside them.
* Geographic CRS: a pixel's area depends on its latitude, so areas are computed per row, as the geodesic area
  (pyproj.Geod, on the CRS's own ellipsoid) of one pixel cell of that row; rotated or sheared geographic grids
  are computed per pixel from the cell's latitude.
* No CRS: a pixel size given by the user, or no area, with a one-line reason saying how to supply one.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pyproj
from affine import Affine

PIXEL_SIZE_HINT = "give the pixel side in metres with --pixel-size (pixel_size=) to get areas"


@dataclass(frozen=True)
class PixelArea:
    """The ground area of each pixel of one grid, in m², or the reason it is unknown.

    ``kind`` is "constant" (every pixel the same: ``constant_m2``), "rows" (north-up geographic grid: one area
    per row), "pixels" (rotated geographic grid) or "unknown" (``reason`` says why and how to supply it).
    ``source`` says where the areas come from, in words.
    """

    kind: str
    source: str
    constant_m2: float | None = None
    reason: str | None = None
    areal_scale: float | None = None  # the projection's areal scale factor at the image centre, when known
    _geod: pyproj.Geod | None = field(default=None, repr=False, compare=False)
    _transform: Affine | None = field(default=None, repr=False, compare=False)
    _degrees_per_unit: float = field(default=1.0, repr=False, compare=False)

    @property
    def known(self) -> bool:
        return self.kind != "unknown"

    def rows(self, y0: int, y1: int, width: int) -> np.ndarray | None:
        """Areas in m² of the pixels of rows y0..y1 (of an image ``width`` pixels wide), as an array that
        broadcasts to (y1 − y0, width): (h, 1) when each row's pixels share one area. None when unknown."""
        if self.kind == "unknown":
            return None
        if self.kind == "constant":
            return np.full((y1 - y0, 1), self.constant_m2, np.float64)
        if self.kind == "rows":
            return np.array([self._cell_area(0, y) for y in range(y0, y1)], np.float64)[:, None]
        return self._rotated_rows(y0, y1, width)

    def _cell_area(self, col: float, row: float) -> float:
        """Geodesic area (m²) of the cell of pixel (col, row): its four corners joined by geodesics."""
        t, k = self._transform, self._degrees_per_unit
        corners = [t @ (col + dx, row + dy) for dx, dy in ((0, 0), (1, 0), (1, 1), (0, 1))]
        lons = [x * k for x, _ in corners]
        lats = [y * k for _, y in corners]
        area, _ = self._geod.polygon_area_perimeter(lons, lats)  # signed by orientation
        return abs(area)

    def _rotated_rows(self, y0: int, y1: int, width: int) -> np.ndarray:
        """Rotated geographic grid: each pixel's area is its cell's area in square degrees times the area of a
        square degree at the pixel's latitude, which is (pi/180)^2 M N cos(lat) on an ellipsoid with meridional
        radius M and prime-vertical radius N (first-order in the pixel size; common practice)."""
        t, k = self._transform, self._degrees_per_unit
        cols = np.arange(width) + 0.5
        rows = np.arange(y0, y1)[:, None] + 0.5
        lat = np.radians((t.d * cols + t.e * rows + t.f) * k)
        a, e2 = self._geod.a, self._geod.es
        s2 = np.sin(lat) ** 2
        n = a / np.sqrt(1 - e2 * s2)
        m = a * (1 - e2) / (1 - e2 * s2) ** 1.5
        det_deg2 = abs(t.a * t.e - t.b * t.d) * k * k
        return det_deg2 * (math.pi / 180) ** 2 * m * n * np.cos(lat)


def pixel_area(crs: Any, transform: Affine | None, *, pixel_size: float | tuple[float, float] | None = None,
               size: tuple[int, int] | None = None) -> PixelArea:
    """The pixel areas of a grid with CRS ``crs`` (anything pyproj accepts: a pyproj or rasterio CRS, WKT,
    "EPSG:…"; or None) and pixel-to-CRS ``transform`` (GDAL order: x, y = transform * (col, row)).

    ``pixel_size`` (metres: one side, or width and height) overrides the grid. ``size`` (height, width) places
    the image centre for the areal scale of projected CRSs.
    """
    if pixel_size is not None:
        sx, sy = (pixel_size, pixel_size) if isinstance(pixel_size, (int, float)) else pixel_size
        return PixelArea("constant", "pixel-size option", float(sx) * float(sy))
    if crs is None or transform is None:
        what = "no CRS" if transform is not None and not transform.is_identity else "no georeferencing"
        return PixelArea("unknown", "none", reason=f"{what}: areas left empty; {PIXEL_SIZE_HINT}")
    det = abs(transform.a * transform.e - transform.b * transform.d)
    if not math.isfinite(det) or det == 0:
        return PixelArea("unknown", "none", reason=f"the transform's pixels have no area (determinant {det}); "
                         f"areas left empty; {PIXEL_SIZE_HINT}")
    try:
        c = horizontal_crs(pyproj.CRS.from_user_input(crs))
    except pyproj.exceptions.CRSError as e:
        return PixelArea("unknown", "none", reason=f"CRS not understood ({' '.join(str(e).split())}); areas left "
                         f"empty; {PIXEL_SIZE_HINT}")
    if c.is_geographic:
        return _geographic(c, transform)
    metres = linear_unit_metres(c)
    if metres is None:
        return PixelArea("unknown", "none", reason=f"the CRS {c.name!r} has no linear unit pyproj can convert to "
                         f"metres; areas left empty; {PIXEL_SIZE_HINT}")
    unit = c.axis_info[0].unit_name
    scale = _areal_scale(c, transform, size) if c.is_projected else None
    return PixelArea("constant", f"CRS {c.name} ({unit}), |det| of the transform", det * metres * metres,
                     areal_scale=scale)


def horizontal_crs(c: pyproj.CRS) -> pyproj.CRS:
    """The horizontal part of a compound or bound CRS (areas need nothing else)."""
    if c.is_bound and c.source_crs is not None:
        c = c.source_crs
    if c.is_compound:
        c = next((s for s in c.sub_crs_list if not s.is_vertical), c.sub_crs_list[0])
    return c


def linear_unit_metres(c: pyproj.CRS) -> float | None:
    """Metres per unit of the CRS's first axis (pyproj's unit conversion factor); None when it is no length."""
    if not c.axis_info:
        return None
    axis = c.axis_info[0]
    if axis.unit_name in ("degree", "radian", "grad", "arc-second", "arc-minute") or not axis.unit_conversion_factor:
        return None
    return float(axis.unit_conversion_factor)


def _geographic(c: pyproj.CRS, transform: Affine) -> PixelArea:
    geod = c.get_geod()
    if geod is None:
        return PixelArea("unknown", "none", reason=f"the CRS {c.name!r} has no ellipsoid; areas left empty; "
                         f"{PIXEL_SIZE_HINT}")
    factor = c.axis_info[0].unit_conversion_factor if c.axis_info else math.pi / 180  # radians per unit
    degrees = math.degrees(factor)
    ellipsoid = c.ellipsoid.name if c.ellipsoid is not None else "its ellipsoid"
    rotated = transform.b != 0 or transform.d != 0
    kind, how = ("pixels", "per pixel (rotated grid)") if rotated else ("rows", "per row")
    return PixelArea(kind, f"geodesic pixel areas {how} on {ellipsoid} (pyproj.Geod)", _geod=geod,
                     _transform=transform, _degrees_per_unit=degrees)


def _areal_scale(c: pyproj.CRS, transform: Affine, size: tuple[int, int] | None) -> float | None:
    """The projection's areal scale factor at the image centre (pyproj Proj.get_factors), or None."""
    if size is None:
        return None
    try:
        x, y = transform @ (size[1] / 2, size[0] / 2)
        lon, lat = pyproj.Transformer.from_crs(c, c.geodetic_crs, always_xy=True).transform(x, y)
        scale = pyproj.Proj(c).get_factors(lon, lat).areal_scale
    except (pyproj.exceptions.ProjError, pyproj.exceptions.CRSError, TypeError, ValueError):
        return None
    return float(scale) if math.isfinite(scale) else None
