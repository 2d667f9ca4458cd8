"""Class polygons (fcnkit.polygons): band-wise polygons merged across band boundaries equal the whole map's
regions (scipy.ndimage.label and rasterio.features.shapes over the whole map as the reference), and the
written layers' areas equal the raster area table."""

from __future__ import annotations

import json

import numpy as np
import pyogrio.raw
import pyproj
import pytest
import rasterio
import shapely
import torch
from affine import Affine
from hypothesis import given, settings
from hypothesis import strategies as st
from rasterio.features import shapes
from scipy import ndimage

from fcnkit.areas import pixel_area
from fcnkit.cli import main
from fcnkit.config import config_from_dict, config_to_dict
from fcnkit.data.classes import ClassInfo, ClassTable
from fcnkit.data.raster import RowStore
from fcnkit.errors import ConfigError
from fcnkit.inference.segment import segment_image
from fcnkit.nets import build_model
from fcnkit.outputs import OutputOptions
from fcnkit.polygons import class_regions

pytestmark = pytest.mark.usefixtures("torch_one_thread")

CLASSES = ClassTable((ClassInfo(0, "open ground", (200, 180, 120)), ClassInfo(1, "water", (40, 100, 200)),
                      ClassInfo(2, "roof", (210, 60, 50))))
UTM = "EPSG:32633"


def _store(a: np.ndarray) -> RowStore:
    s = RowStore(a.shape, a.dtype)
    s.rows(0, a.shape[0])[:] = a
    return s


def _reference(labels: np.ndarray, valid: np.ndarray | None) -> list[tuple]:
    """(class, pixel count, polygon) of every 4-connected region of the whole map, traced at once."""
    out = []
    for c in range(3):
        comp, n = ndimage.label((labels == c) & (True if valid is None else valid))
        for geom, value in shapes(comp.astype(np.int32), mask=comp > 0, connectivity=4):
            out.append((c, int((comp == value).sum()), shapely.geometry.shape(geom)))
    return out


@given(seed=st.integers(0, 10_000), band=st.integers(1, 9), blobs=st.booleans())
@settings(max_examples=40, deadline=None)
def test_regions_merged_across_bands_equal_the_whole_maps(seed, band, blobs):
    rng = np.random.default_rng(seed)
    shape = (int(rng.integers(1, 30)), int(rng.integers(1, 30)))
    labels = rng.integers(0, 3, shape).astype(np.uint8)
    if blobs:  # large regions that snake across many bands
        labels = ndimage.zoom(rng.integers(0, 3, (4, 4)).astype(np.uint8), (8, 8), order=0)[:shape[0], :shape[1]]
    valid = rng.random(shape) > 0.1
    labels_with_nodata = np.where(valid, labels, CLASSES.ignore).astype(np.uint8)
    area = pixel_area(None, None, pixel_size=1.0)
    ours = [(r.class_id, r.pixels, r.polygon()) for r in
            class_regions(_store(labels_with_nodata), None, _store(valid.astype(np.uint8)), CLASSES, area, band)]
    ref = _reference(labels, valid)
    assert len(ours) == len(ref)

    def key(t):
        return t[0], t[1], t[2].bounds, round(t[2].area, 6)

    for (c, n, geom), (rc, rn, rgeom) in zip(sorted(ours, key=key), sorted(ref, key=key), strict=True):
        assert (c, n) == (rc, rn) and geom.area == n  # pixel corners on the grid: area = pixel count
        assert geom.geom_type == "Polygon" and geom.is_valid and geom.symmetric_difference(rgeom).area == 0
        assert len(geom.interiors) == len(rgeom.interiors)


def _model_file(folder):
    from fcnkit import Model

    cfg = config_from_dict({"model": {"bands": 3, "num_classes": 3, "widths": [4, 6], "fusion": "sum", "min_size": 8}})
    torch.manual_seed(1)
    model = Model(build_model(cfg), classes=CLASSES, mean=[2000.0] * 3, std=[900.0] * 3, config=config_to_dict(cfg))
    return model.save(folder / "model.safetensors")


def _input(path, crs, transform, shape=(60, 70)):
    a = np.random.default_rng(3).integers(1, 4000, (3, *shape)).astype(np.uint16)
    a = ndimage.uniform_filter(a, (0, 5, 5))  # smooth, so the map has regions larger than a pixel
    a[:, :, :8] = 0
    with rasterio.open(path, "w", driver="GTiff", width=shape[1], height=shape[0], count=3, dtype="uint16",
                       crs=crs, transform=transform, nodata=0, photometric="minisblack") as ds:
        ds.write(a)
    return path


@pytest.mark.parametrize("grid", ["projected", "geographic"])
def test_polygon_layer_areas_equal_the_raster_area_table(tmp_path, grid):
    crs, transform = {"projected": (UTM, Affine(2.0, 0, 500000, 0, -2.0, 6000000)),
                      "geographic": ("EPSG:4326", Affine(0.0002, 0, 10, 0, -0.0002, 58))}[grid]
    path = _input(tmp_path / "in.tif", crs, transform)
    res = segment_image(_model_file(tmp_path), path, tmp_path / "out", progress=False,
                        outputs=OutputOptions(polygons="gpkg"))
    meta, _, geoms, fields = pyogrio.raw.read(res.paths["polygons"])  # read back with pyogrio (GDAL)
    names = list(meta["fields"])
    got = dict(zip(names, fields, strict=True))
    shapes_ = shapely.from_wkb(geoms)
    assert pyproj.CRS(meta["crs"]) == pyproj.CRS(crs)
    assert set(got) == {"class_id", "class_name", "area_m2", "pixels", "mean_confidence"}
    assert ((got["mean_confidence"] >= 1 / 3 - 1e-6) & (got["mean_confidence"] <= 1)).all()
    assert [CLASSES.names[i] for i in got["class_id"]] == list(got["class_name"])
    # the geometries' own areas (planar for metres; pyproj's Geod for degrees) against the raster area table
    if grid == "projected":
        geometry_areas = shapely.area(shapes_)
    else:
        geod = pyproj.Geod(ellps="WGS84")
        geometry_areas = np.array([abs(geod.geometry_area_perimeter(g)[0]) for g in shapes_])
    for row in res.areas:
        mine = got["class_id"] == row["id"]
        assert geometry_areas[mine].sum() == pytest.approx(row["area_m2"], rel=0.005)
        assert got["area_m2"][mine].sum() == pytest.approx(row["area_m2"], rel=1e-9)
        assert got["pixels"][mine].sum() == row["pixels"]
    nodata_strip = shapely.Polygon([transform @ c for c in ((0, 0), (8, 0), (8, 60), (0, 60))])
    assert shapely.union_all(shapes_).intersection(nodata_strip).area == pytest.approx(0, abs=1e-12)  # no nodata


def test_minimum_area_simplification_and_geojson(tmp_path):
    path = _input(tmp_path / "in.tif", UTM, Affine(2.0, 0, 500000, 0, -2.0, 6000000))
    model = _model_file(tmp_path)
    full = segment_image(model, path, tmp_path / "a", progress=False, outputs=OutputOptions(polygons="gpkg"))
    small = segment_image(model, path, tmp_path / "b", progress=False,
                          outputs=OutputOptions(polygons="geojson", min_area_m2=40, simplify=1.0))
    _, _, g_full, f_full = pyogrio.raw.read(full.paths["polygons"])
    _, _, g_small, f_small = pyogrio.raw.read(small.paths["polygons"])
    assert (f_full[2] < 40).any() and (f_small[2] >= 40).all()  # area_m2 is the third field
    assert len(g_small) == (f_full[2] >= 40).sum()
    doc = json.loads(small.paths["polygons"].read_text())
    assert doc["type"] == "FeatureCollection" and small.paths["polygons"].suffix == ".geojson"
    vertices = sum(shapely.get_num_coordinates(shapely.from_wkb(g_small)))
    kept = shapely.from_wkb(g_full)[f_full[2] >= 40]
    assert vertices < sum(shapely.get_num_coordinates(kept))  # simplified within 1 px (2 m)
    assert sum(shapely.area(shapely.from_wkb(g_small))) == pytest.approx(sum(shapely.area(kept)), rel=0.02)


def test_minimum_area_without_known_areas_is_refused(tmp_path):
    from PIL import Image

    Image.fromarray(np.zeros((20, 20, 3), np.uint8)).save(tmp_path / "a.png")
    with pytest.raises(ConfigError, match="min_area: needs pixel areas, but no georeferencing"):
        segment_image(_model_file(tmp_path), tmp_path / "a.png", tmp_path / "out", progress=False,
                      outputs=OutputOptions(polygons="gpkg", min_area_m2=5))
    assert not [p for p in (tmp_path / "out").iterdir() if not p.name.startswith(".")]


def test_cli_segment_writes_polygons(tmp_path, capsys):
    path = _input(tmp_path / "in.tif", UTM, Affine(2.0, 0, 500000, 0, -2.0, 6000000))
    assert main(["segment", str(_model_file(tmp_path)), str(path), "--out", str(tmp_path / "o"), "--quiet",
                 "--polygons", "--min-area", "8", "--simplify", "0.5"]) == 0
    assert (tmp_path / "o" / "in.polygons.gpkg").is_file()
    assert main(["segment", str(_model_file(tmp_path)), str(path), "--out", str(tmp_path / "j"), "--quiet",
                 "--polygons", "geojson", "--no-cog"]) == 0
    assert (tmp_path / "j" / "in.polygons.geojson").is_file()
    with rasterio.open(tmp_path / "j" / "in.labels.tif") as ds:
        assert ds.tags(ns="IMAGE_STRUCTURE").get("LAYOUT") != "COG"
    assert main(["segment", str(_model_file(tmp_path)), str(path), "--out", str(tmp_path / "k"), "--quiet",
                 "--min-area", "-1"]) == 2
    assert "min_area_m2: -1.0 is not a number >= 0" in capsys.readouterr().err
