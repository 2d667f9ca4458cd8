"""Pixel areas in any grid (fcnkit.areas), against unit definitions, pyproj's Geod and Snyder's closed form for
the area of a latitude-longitude cell on an ellipsoid."""

import math

import numpy as np
import pyproj
import pytest
from affine import Affine
from hypothesis import given, settings
from hypothesis import strategies as st

from fcnkit.areas import pixel_area

US_FEET = "+proj=tmerc +lat_0=0 +lon_0=0 +k=1 +x_0=0 +y_0=0 +ellps=GRS80 +units=us-ft +no_defs"
METRES = "+proj=tmerc +lat_0=0 +lon_0=0 +k=1 +x_0=0 +y_0=0 +ellps=GRS80 +units=m +no_defs"
US_SURVEY_FOOT_M = 1200 / 3937  # the US survey foot's legal definition (US Metric Law of 1866; NIST)


def _snyder_cell(lat1, lat2, dlon, a=6378137.0, f=1 / 298.257223563):
    """Area of the cell between two parallels and dlon degrees of longitude on an ellipsoid: a²/2 · Δλ ·
    (q(φ2) − q(φ1)), q from Snyder, Map Projections — A Working Manual (USGS 1987), eq. 3-12. WGS 84 axes."""
    e2 = f * (2 - f)
    e = math.sqrt(e2)

    def q(lat):
        s = math.sin(math.radians(lat))
        return (1 - e2) * (s / (1 - e2 * s * s) - math.log((1 - e * s) / (1 + e * s)) / (2 * e))

    return a * a / 2 * math.radians(dlon) * abs(q(lat2) - q(lat1))


def test_projected_metres_are_the_transform_determinant():
    area = pixel_area(METRES, Affine(0.5, 0, 100, 0, -0.25, 200))
    assert area.kind == "constant" and area.constant_m2 == 0.125


def test_us_survey_feet_convert_by_the_unit_definition():
    area = pixel_area(US_FEET, Affine(2.0, 0, 0, 0, -2.0, 0))
    assert area.constant_m2 == pytest.approx(4 * US_SURVEY_FOOT_M ** 2, rel=1e-12)
    assert "US survey foot" in area.source


@given(angle=st.floats(-180, 180), sx=st.floats(0.1, 10), sy=st.floats(0.1, 10), shear=st.floats(-40, 40))
@settings(max_examples=50, deadline=None)
def test_rotated_and_sheared_grids_keep_the_parallelogram_area(angle, sx, sy, shear):
    # A pixel is the parallelogram spanned by the transform's columns; its area is |det| (linear algebra).
    t = Affine.translation(5e5, 4e6) @ Affine.rotation(angle) @ Affine.shear(shear, 0) @ Affine.scale(sx, -sy)
    x0, y0 = t @ (0, 0)
    corners = [(x - x0, y - y0) for x, y in (t @ c for c in ((0, 0), (1, 0), (1, 1), (0, 1)))]  # shoelace formula
    shoelace = 0.5 * abs(sum(xa * yb - xb * ya for (xa, ya), (xb, yb) in zip(corners, corners[1:] + corners[:1],
                                                                               strict=True)))
    assert pixel_area(METRES, t).constant_m2 == pytest.approx(shoelace, rel=1e-6)


def test_geographic_rows_are_geodesic_cell_areas():
    t = Affine(0.001, 0, 10.0, 0, -0.001, 60.0)  # 0.001° pixels from 60° N down
    area = pixel_area("EPSG:4326", t)
    assert area.kind == "rows" and "geodesic" in area.source
    rows = area.rows(0, 30_000, 5)[:, 0]  # 60° N to 30° N
    geod = pyproj.Geod(ellps="WGS84")
    for r in (0, 12_345, 29_999):
        lat0, lat1 = 60.0 - 0.001 * r, 60.0 - 0.001 * (r + 1)
        direct, _ = geod.polygon_area_perimeter([10.0, 10.001, 10.001, 10.0], [lat0, lat0, lat1, lat1])
        assert rows[r] == pytest.approx(abs(direct), rel=1e-9)  # pyproj's Geod directly
        assert rows[r] == pytest.approx(_snyder_cell(lat0, lat1, 0.001), rel=1e-7)  # closed form
    assert rows[-1] > rows[0]  # pixels grow towards the equator


def test_rotated_geographic_grid_is_computed_per_pixel():
    t = Affine(0.001, 0, 10.0, 0, -0.001, 45.0) @ Affine.rotation(20)
    area = pixel_area("EPSG:4326", t)
    got = area.rows(100, 101, 300)[0]
    geod = pyproj.Geod(ellps="WGS84")
    for col in (0, 150, 299):
        corners = [t @ (col + dx, 100 + dy) for dx, dy in ((0, 0), (1, 0), (1, 1), (0, 1))]
        direct, _ = geod.polygon_area_perimeter([x for x, _ in corners], [y for _, y in corners])
        assert got[col] == pytest.approx(abs(direct), rel=1e-5)  # first order in the pixel size


def test_compound_crs_uses_its_horizontal_part():
    compound = pyproj.CRS.from_user_input(US_FEET + " +vunits=m")
    assert pixel_area(compound, Affine(1, 0, 0, 0, -1, 0)).constant_m2 == pytest.approx(US_SURVEY_FOOT_M ** 2)


def test_unknown_areas_say_why_and_how_to_supply_them():
    area = pixel_area(None, None)
    assert not area.known and area.rows(0, 2, 3) is None
    assert "no georeferencing" in area.reason and "--pixel-size" in area.reason and "\n" not in area.reason
    assert "no CRS" in pixel_area(None, Affine(2, 0, 0, 0, -2, 0)).reason
    assert pixel_area(None, None, pixel_size=0.5).constant_m2 == 0.25
    assert pixel_area("EPSG:4326", Affine(1, 0, 0, 0, -1, 0), pixel_size=(2, 3)).constant_m2 == 6  # option wins


def test_the_projections_areal_scale_is_reported():
    # Transverse Mercator with k0 = 1 at its central meridian has areal scale 1 there (Snyder 1987, ch. 8).
    t = Affine(1, 0, -50, 0, -1, 50)
    scale = pixel_area(METRES, t, size=(100, 100)).areal_scale
    assert scale == pytest.approx(1.0, abs=1e-9)
    np.testing.assert_allclose(pixel_area("EPSG:3857", Affine(1, 0, 0, 0, -1, 6e6), size=(2, 2)).areal_scale,
                               1 / math.cos(math.radians(47.4)) ** 2, rtol=0.02)  # Mercator: sec² φ, φ ≈ 47.4°
