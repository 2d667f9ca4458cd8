"""Real geodata in and out: files written by GDAL (rasterio) with its usual options are mapped
(``segment_image`` with a tiny random-weight net) and the outputs read back with rasterio — georeferencing
identical, nodata kept out of every output and of the areas, areas = pixel counts × true pixel area."""

from __future__ import annotations

import csv
import json
import math

import numpy as np
import pyproj
import pytest
import rasterio
import tifffile
import torch
from affine import Affine

from fcnkit.config import config_from_dict
from fcnkit.data.imageio import read_image
from fcnkit.errors import DataError
from fcnkit.inference.scan import predict_scores
from fcnkit.inference.segment import segment_image
from fcnkit.model import Model
from fcnkit.nets import build_model
from fcnkit.outputs import OutputOptions

pytestmark = pytest.mark.usefixtures("torch_one_thread")

UTM = "EPSG:32633"  # projected, metres (the pixel values are random: no place is shown)
US_FEET = "+proj=tmerc +lat_0=0 +lon_0=0 +k=1 +x_0=0 +y_0=0 +ellps=GRS80 +units=us-ft +no_defs"
US_SURVEY_FOOT_M = 1200 / 3937  # its legal definition (US Metric Law of 1866; NIST)
GRID = Affine(2.0, 0.0, 500000.0, 0.0, -2.0, 6000000.0)


def _net(bands: int, mean: list[float] | None = None, std: list[float] | None = None) -> Model:
    """A tiny random-weight model (no normalisation unless given)."""
    torch.manual_seed(0)
    net = build_model(config_from_dict({"model": {"bands": bands, "num_classes": 3, "widths": [4, 6], "fusion": "sum",
                                                  "min_size": 8}}))
    return Model(net, classes=None, mean=mean or [0.0] * bands, std=std or [1.0] * bands).eval()


def _write(path, a, crs=UTM, transform=GRID, **options):
    """Write H×W×B ``a`` with GDAL's GeoTIFF driver (rasterio profile keys as creation options)."""
    profile = {"driver": "GTiff", "width": a.shape[1], "height": a.shape[0], "count": a.shape[2],
               "dtype": a.dtype.name, "crs": crs, "transform": transform, "photometric": "minisblack", **options}
    with rasterio.open(path, "w", **profile) as ds:
        ds.write(np.moveaxis(a, 2, 0))
    return path


def _image(shape=(40, 50, 3), dtype=np.uint16, seed=0):
    rng = np.random.default_rng(seed)
    top = 255 if dtype == np.uint8 else 4000
    return rng.integers(1, top, shape).astype(dtype)


KINDS = {
    "striped": {},
    "deflate+predictor, tiled": {"compress": "deflate", "predictor": 2, "tiled": True, "blockxsize": 16,
                                 "blockysize": 16},
    "lzw": {"compress": "lzw"},
    "zstd": {"compress": "zstd"},
    "lerc": {"compress": "lerc"},
    "bigtiff": {"BIGTIFF": "YES", "tiled": True, "blockxsize": 16, "blockysize": 16},
    "float32": {"dtype": "float32"},
    "jpeg ycbcr (uint8 rgb)": {"compress": "jpeg", "photometric": "ycbcr", "dtype": "uint8"},
    "webp (uint8 rgb)": {"compress": "webp", "dtype": "uint8", "photometric": "rgb"},
}


@pytest.mark.parametrize("kind", list(KINDS))
def test_every_kind_of_gdal_file_maps_onto_its_own_grid(tmp_path, kind):
    options = dict(KINDS[kind])
    dtype = np.dtype(options.pop("dtype", "uint16"))
    a = _image(dtype=np.uint8 if dtype == np.uint8 else np.uint16).astype(dtype)
    path = _write(tmp_path / "in.tif", a, **options)
    net = _net(3)
    res = segment_image(net, path, tmp_path / "out", progress=False, outputs=OutputOptions(cog=False))
    probs = predict_scores(net, read_image(path))  # the whole image as the reader gives it
    with rasterio.open(res.paths["labels"]) as ds:
        assert (ds.crs.to_epsg(), ds.transform, ds.shape) == (32633, GRID, (40, 50))
        np.testing.assert_array_equal(ds.read(1), probs.argmax(0))
    assert sum(r["area_m2"] for r in res.areas) == 40 * 50 * 4.0


def test_nodata_is_nodata_in_every_output_and_out_of_the_areas(tmp_path):
    a = _image()
    a[:, :12] = 0  # a collar of nodata, as delivered scenes have
    a[30:, 40:] = 0
    path = _write(tmp_path / "in.tif", a, nodata=0, compress="deflate")
    invalid = (a == 0).all(axis=2)
    res = segment_image(_net(3), path, tmp_path / "out", progress=False, preview=25)
    labels_path = res.paths["labels"]
    with rasterio.open(labels_path) as ds:
        labels = ds.read(1)
        assert ds.nodata == 255 and ds.mask_flag_enums[0] == [rasterio.enums.MaskFlags.per_dataset]
        np.testing.assert_array_equal(ds.dataset_mask() == 0, invalid)  # GDAL's own reading of the mask
    np.testing.assert_array_equal(labels == 255, invalid)
    for kind in ("confidence", "uncertainty"):
        with rasterio.open(res.paths[kind]) as ds:
            np.testing.assert_array_equal(ds.dataset_mask() == 0, invalid, err_msg=kind)
            assert (ds.read(1)[invalid] == 0).all()
    with rasterio.open(res.paths["overlay"]) as ds:
        step = math.ceil(50 / 25)
        sampled = invalid[step // 2::step, step // 2::step]
        np.testing.assert_array_equal(ds.dataset_mask() == 0, sampled)
        assert (ds.read()[:, sampled] == 0).all()
    counts = np.bincount(labels[~invalid], minlength=3)
    assert [r["pixels"] for r in res.areas] == counts.tolist()
    assert [r["area_m2"] for r in res.areas] == (counts * 4.0).tolist()  # 2 m × 2 m pixels
    doc = json.loads(res.paths["areas_json"].read_text())
    assert doc["nodata_pixels"] == invalid.sum() and doc["valid_pixels"] == (~invalid).sum()
    rows = list(csv.DictReader(res.paths["areas_csv"].open()))
    assert rows[-1]["name"] == "nodata" and int(rows[-1]["pixels"]) == invalid.sum()
    assert res.nodata_pixels == invalid.sum() and len(res.notes) == 1 and "nodata pixels" in res.notes[0]


def test_nodata_pixels_reach_the_net_as_the_model_mean_not_as_their_value(tmp_path):
    # A nodata value far from the data (-9999) must not leak into the valid pixels next to it: the map equals
    # that of the same image whose nodata pixels hold the model's mean.
    a = _image(dtype=np.float32).astype(np.float32)
    mean = [float(v) for v in a.reshape(-1, 3).mean(0)]
    loaded = _net(3, mean, [500.0] * 3)
    b = a.copy()
    b[:, :12] = -9999.0
    a[:, :12] = mean
    ra = segment_image(loaded, _write(tmp_path / "a.tif", a), tmp_path / "oa", progress=False)
    rb = segment_image(loaded, _write(tmp_path / "b.tif", b, nodata=-9999.0), tmp_path / "ob", progress=False)
    with rasterio.open(ra.paths["confidence"]) as x, rasterio.open(rb.paths["confidence"]) as y:
        np.testing.assert_array_equal(x.read(1)[:, 12:], y.read(1)[:, 12:])
        assert (y.read(1)[:, :12] == 0).all()


def test_alpha_and_internal_masks_are_honoured(tmp_path):
    rgba = _image((40, 50, 4), np.uint8)
    rgba[..., 3] = 255
    rgba[:5] = 0  # transparent rows
    path = _write(tmp_path / "rgba.tif", rgba, photometric="rgb", alpha="yes")
    res = segment_image(_net(3), path, tmp_path / "out", progress=False)
    assert res.nodata_pixels == 5 * 50
    with rasterio.open(res.paths["labels"]) as ds:
        assert (ds.read(1)[:5] == 255).all() and (ds.read(1)[5:] < 3).all()


def test_us_feet_rotated_and_geographic_grids_have_true_areas(tmp_path):
    a = _image()
    net = _net(3)
    cases = {
        "feet": (US_FEET, Affine(3.0, 0, 1000.0, 0, -3.0, 2000.0)),
        "rotated": (UTM, Affine.translation(500000, 6000000) @ Affine.rotation(30) @ Affine.scale(2.0, -1.5)),
        "geographic": ("EPSG:4326", Affine(0.0005, 0, 10.0, 0, -0.0005, 60.0)),
    }
    for name, (crs, transform) in cases.items():
        path = _write(tmp_path / f"{name}.tif", a, crs=crs, transform=transform)
        res = segment_image(net, path, tmp_path / name, progress=False)
        with rasterio.open(res.paths["labels"]) as ds:
            labels = ds.read(1)
            assert ds.transform.almost_equals(transform) and ds.shape == (40, 50)
        if name == "feet":
            want = np.bincount(labels.ravel(), minlength=3) * 9.0 * US_SURVEY_FOOT_M ** 2
        elif name == "rotated":
            want = np.bincount(labels.ravel(), minlength=3) * 3.0  # |det| = 2 × 1.5 m²
        else:  # each row's pixel area from pyproj's Geod directly, times that row's class counts
            geod = pyproj.Geod(ellps="WGS84")
            want = np.zeros(3)
            for r in range(40):
                lat0, lat1 = 60.0 - 0.0005 * r, 60.0 - 0.0005 * (r + 1)
                cell, _ = geod.polygon_area_perimeter([10, 10.0005, 10.0005, 10], [lat0, lat0, lat1, lat1])
                want += np.bincount(labels[r], minlength=3) * abs(cell)
        np.testing.assert_allclose([r["area_m2"] for r in res.areas], want, rtol=1e-9, err_msg=name)


def test_overlay_of_a_pixel_is_point_raster_is_not_shifted(tmp_path):
    # GeoTIFF 1.0 (2.5.2.2, recalled from memory): with RasterPixelIsPoint the tie point is the centre of pixel
    # (0, 0), so pixel (r, c) is centred at (X0 + c·sx, Y0 − r·sy). The overlay samples every step-th pixel from
    # step // 2; each overlay pixel's centre must be its sample's centre (it once sat 1.5 pixels off). The input
    # is written by tifffile with hand-made tags, independently of GDAL.
    keys = [1, 1, 0, 3, 1024, 0, 1, 1, 1025, 0, 1, 2, 3072, 0, 1, 32633]  # projected, PixelIsPoint, UTM 33N
    x0, y0, sx = 500000.0, 6000000.0, 2.0
    tags = [(33550, 12, 3, (sx, sx, 0.0), True), (33922, 12, 6, (0.0, 0.0, 0.0, x0, y0, 0.0), True),
            (34735, 3, len(keys), tuple(keys), True)]
    tifffile.imwrite(tmp_path / "p.tif", _image((45, 60, 3)), extratags=tags, photometric="minisblack",
                     planarconfig="contig")
    res = segment_image(_net(3), tmp_path / "p.tif", tmp_path / "out", progress=False, preview=20)
    step = 3  # ceil(60 / 20), odd: the sample sits exactly mid-cell
    with rasterio.open(res.paths["overlay"]) as ds:
        for i, j in ((0, 0), (4, 7), (14, 19)):
            cx, cy = ds.transform @ (j + 0.5, i + 0.5)
            r, c = step // 2 + step * i, step // 2 + step * j
            assert (cx, cy) == pytest.approx((x0 + c * sx, y0 - r * sx), abs=1e-6)


def test_multi_image_files_are_refused_by_segment_and_check_alike(tmp_path):
    path = tmp_path / "pages.tif"
    for _ in range(2):
        tifffile.imwrite(path, _image((20, 20, 1))[..., 0], append=True)
    with pytest.raises(DataError, match="holds 2 images"):
        segment_image(_net(3), path, tmp_path / "out", progress=False)
