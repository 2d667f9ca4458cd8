"""The GeoTIFF writer (fcnkit.data.geotiff): COGs with overviews, masks, GIS metadata, no sidecars, atomic and
streamed — each read back with rasterio (GDAL) and tifffile."""

import tracemalloc

import numpy as np
import pytest
import rasterio
import tifffile
from affine import Affine
from rasterio.crs import CRS

from fcnkit.data.classes import ClassInfo, ClassTable
from fcnkit.data.geotiff import RasterSpec, label_spec, write_geotiff
from fcnkit.data.raster import GeoRef

GEO = GeoRef(CRS.from_epsg(32633), Affine(0.5, 0, 500000, 0, -0.5, 6000000))
CLASSES = ClassTable((ClassInfo(0, "open ground", (200, 180, 120)), ClassInfo(1, "water", (40, 100, 200))))


def test_cog_with_overviews_masks_and_metadata(tmp_path):
    a = np.random.default_rng(0).integers(0, 255, (300, 280), dtype=np.uint8)
    valid = np.ones(a.shape, bool)
    valid[:, :40] = False
    spec = RasterSpec(a.shape, np.dtype(np.uint8), lambda y0, y1: a[y0:y1], lambda y0, y1: valid[y0:y1],
                      scale=1 / 255, offset=0.0, descriptions=("confidence",), tags={"WHAT": "test"},
                      resampling="average")
    write_geotiff(tmp_path / "c.tif", spec, GEO, block=64)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["c.tif"]  # no stage, partial or sidecar file left
    with rasterio.open(tmp_path / "c.tif") as ds:
        # overviews halve the image until one 64-px tile holds it (GDAL COG driver docs): 300 → 150, 75, 37.5
        assert ds.tags(ns="IMAGE_STRUCTURE")["LAYOUT"] == "COG" and ds.overviews(1) == [2, 4, 8]
        assert (ds.crs, ds.transform, ds.block_shapes[0]) == (GEO.crs, GEO.transform, (64, 64))
        np.testing.assert_array_equal(ds.read(1), a)
        np.testing.assert_array_equal(ds.dataset_mask() > 0, valid)
        assert ds.scales == (1 / 255,) and ds.descriptions == ("confidence",) and ds.tags()["WHAT"] == "test"
    with tifffile.TiffFile(tmp_path / "c.tif") as tif:  # an independent reader sees the same pixels
        np.testing.assert_array_equal(tif.pages[0].asarray(), a)


def test_label_maps_carry_colour_table_names_and_nodata(tmp_path):
    ids = np.random.default_rng(1).integers(0, 2, (40, 30)).astype(np.uint8)
    ids[0] = CLASSES.ignore
    write_geotiff(tmp_path / "l.tif", label_spec(CLASSES, ids.shape, lambda y0, y1: ids[y0:y1]), GEO, cog=False)
    with rasterio.open(tmp_path / "l.tif") as ds:
        assert [ds.colormap(1)[i][:3] for i in (0, 1)] == CLASSES.colors
        assert ds.colormap(1)[255][:3] == CLASSES.ignore_color
        assert ds.tags(1) == {"CLASS_0": "open ground", "CLASS_1": "water"} and ds.nodata == 255
        assert ds.colorinterp[0] == rasterio.enums.ColorInterp.palette
        np.testing.assert_array_equal(ds.read(1), ids)
    assert not list(tmp_path.glob("*.aux.xml"))


def test_rgb_and_multiband_layouts(tmp_path):
    rgb = np.random.default_rng(2).integers(0, 255, (20, 30, 3), dtype=np.uint8)
    write_geotiff(tmp_path / "rgb.tif", RasterSpec(rgb.shape, np.dtype(np.uint8), lambda a, b: rgb[a:b], rgb=True),
                  None, cog=False)
    four = np.random.default_rng(3).integers(0, 255, (20, 30, 4), dtype=np.uint8)
    write_geotiff(tmp_path / "four.tif", RasterSpec(four.shape, np.dtype(np.uint8), lambda a, b: four[a:b]),
                  None, cog=False)
    with rasterio.open(tmp_path / "rgb.tif") as ds:
        assert ds.colorinterp[:3] == (rasterio.enums.ColorInterp.red, rasterio.enums.ColorInterp.green,
                                      rasterio.enums.ColorInterp.blue)
        np.testing.assert_array_equal(np.moveaxis(ds.read(), 0, 2), rgb)
    with rasterio.open(tmp_path / "four.tif") as ds:  # four data bands: none of them is alpha
        assert rasterio.enums.ColorInterp.alpha not in ds.colorinterp
        np.testing.assert_array_equal(np.moveaxis(ds.read(), 0, 2), four)


def test_a_failed_write_leaves_nothing_under_the_final_name(tmp_path):
    def rows(y0, y1):
        if y0 >= 256:
            raise RuntimeError("stopped")
        return np.zeros((y1 - y0, 30), np.uint8)

    with pytest.raises(RuntimeError, match="stopped"):
        write_geotiff(tmp_path / "x.tif", RasterSpec((600, 30), np.dtype(np.uint8), rows), GEO)
    assert list(tmp_path.iterdir()) == []


def test_writing_is_streamed(tmp_path):
    # Python-side allocations (numpy reports to tracemalloc) stay at a few bands of rows, not the raster.
    side = 4096

    def rows(y0, y1):
        return np.full((y1 - y0, side), y0 % 251, np.uint8)

    tracemalloc.start()
    try:
        write_geotiff(tmp_path / "big.tif", RasterSpec((side, side), np.dtype(np.uint8), rows), GEO)
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert peak < side * side / 4, peak
    with rasterio.open(tmp_path / "big.tif") as ds:
        assert ds.read(1, window=((300, 301), (0, 5))).tolist() == [[256 % 251] * 5]
