"""Region readers and streamed writers, checked against tifffile's and Pillow's own whole-image decoders."""

import numpy as np
import pytest
import tifffile
from PIL import Image

from fcnkit.data.raster import (
    PIXEL_SCALE,
    GeoTags,
    RasterSpec,
    RowStore,
    TiffRaster,
    open_raster,
    read_geotags,
    write_tiff_streamed,
)
from fcnkit.data.scenes import geotiff_tags
from fcnkit.errors import DataError

REGIONS = [(0, 101, 0, 77), (5, 40, 33, 70), (99, 101, 0, 3), (31, 33, 31, 33), (64, 100, 60, 77)]


def _image(dtype, bands=4, seed=0):
    rng = np.random.default_rng(seed)
    a = rng.random((101, 77, bands)) * (255 if dtype == np.uint8 else 65535 if dtype == np.uint16 else 1)
    return a.astype(dtype)


@pytest.mark.parametrize("dtype", [np.uint8, np.uint16, np.float32])
@pytest.mark.parametrize("layout", [
    {"tile": (32, 32), "compression": "zlib"},
    {"rowsperstrip": 7, "compression": "zlib"},
    {"rowsperstrip": 9, "compression": "zlib", "planarconfig": "separate"},
    {},  # uncompressed, contiguous: read through a memory map of the needed rows
    {"bigtiff": True, "byteorder": ">"},
    {"tile": (16, 16), "bigtiff": True},
])
def test_tiff_regions_equal_tifffile_whole_image(tmp_path, dtype, layout):
    # Reference: tifffile.imread decoding the whole file.
    a = _image(dtype)
    path = tmp_path / "img.tif"
    data = np.moveaxis(a, 2, 0) if layout.get("planarconfig") == "separate" else a
    tifffile.imwrite(path, data, photometric="minisblack", **{"planarconfig": "contig", **layout})
    ref = tifffile.imread(path)
    ref = np.moveaxis(ref, 0, 2) if layout.get("planarconfig") == "separate" else ref
    r = open_raster(path, None)
    try:
        assert r.shape == (101, 77, 4) and r.dtype == np.dtype(dtype)
        for y0, y1, x0, x1 in REGIONS:
            np.testing.assert_array_equal(r.read(y0, y1, x0, x1), ref[y0:y1, x0:x1])
    finally:
        r.close()


def test_single_band_tiff_is_three_dimensional(tmp_path):
    a = _image(np.uint8, 1)[..., 0]
    tifffile.imwrite(tmp_path / "g.tif", a, tile=(16, 16))
    r = TiffRaster(tmp_path / "g.tif", None)
    assert r.shape == (101, 77, 1)
    np.testing.assert_array_equal(r.read(3, 50, 2, 60)[..., 0], a[3:50, 2:60])
    r.close()


def test_png_and_jpeg_read_like_pillow(tmp_path):
    a = _image(np.uint8, 3)
    Image.fromarray(a).save(tmp_path / "a.png")
    Image.fromarray(a).save(tmp_path / "a.jpg", quality=90)
    for name in ("a.png", "a.jpg"):
        ref = np.asarray(Image.open(tmp_path / name))  # reference: Pillow's decoder
        r = open_raster(tmp_path / name, 10**6)
        np.testing.assert_array_equal(r.read(5, 40, 33, 70), ref[5:40, 33:70])


def test_pixel_limit_is_checked_before_decoding(tmp_path):
    tifffile.imwrite(tmp_path / "big.tif", np.zeros((100, 100), np.uint8), tile=(16, 16))
    with pytest.raises(DataError, match=r"big.tif: 100x100 = 10,000 pixels is above the limit of 9,999"):
        open_raster(tmp_path / "big.tif", 9_999)
    Image.fromarray(np.zeros((100, 100), np.uint8)).save(tmp_path / "big.png")
    with pytest.raises(DataError, match="big.png"):
        open_raster(tmp_path / "big.png", 9_999)


def test_truncated_and_foreign_files_are_data_errors(tmp_path):
    path = tmp_path / "cut.tif"
    tifffile.imwrite(path, _image(np.uint16), tile=(32, 32), compression="zlib")
    data = path.read_bytes()
    path.write_bytes(data[: len(data) * 2 // 3])
    with pytest.raises(DataError, match=r"cut.tif: (truncated TIFF|not a readable TIFF)"):
        open_raster(path, None)
    (tmp_path / "text.tif").write_text("not an image")
    with pytest.raises(DataError, match=r"text.tif: not a readable TIFF"):
        open_raster(tmp_path / "text.tif", None)
    with pytest.raises(DataError, match=r"nothing.tif: no such image file"):
        open_raster(tmp_path / "nothing.tif", None)
    (tmp_path / "a.bmp").write_bytes(b"BM")
    with pytest.raises(DataError, match=r"a.bmp: unsupported image type .bmp"):
        open_raster(tmp_path / "a.bmp", None)


def test_streamed_tiff_round_trips_with_geotags_and_palette(tmp_path):
    a = _image(np.uint8, 1)[..., 0] % 5
    tags = geotiff_tags(0.5)
    cmap = np.zeros((3, 256), np.uint16)
    cmap[:, 1] = (65535, 0, 0)
    spec = RasterSpec(a.shape, np.dtype(np.uint8), lambda y0, y1: a[y0:y1], colormap=cmap, extratags=tags)
    write_tiff_streamed(tmp_path / "out.tif", spec, tile=32)
    with tifffile.TiffFile(tmp_path / "out.tif") as tif:
        page = tif.pages.first
        np.testing.assert_array_equal(page.asarray(), a)
        assert page.is_tiled and page.photometric == tifffile.PHOTOMETRIC.PALETTE
        np.testing.assert_array_equal(page.colormap, cmap)
        geo = read_geotags(page)
    want = {code: value for code, _, _, value, _ in tags}
    assert {c: v for c, _, _, v in geo.tags} == want
    assert [p.name for p in tmp_path.iterdir()] == ["out.tif"]  # no temporary file left


def test_geotags_pixel_size_and_downsampled_scale():
    # GeoTIFF 1.0: ModelPixelScale gives the pixel size in model units; key 1024 = 2 means a geographic
    # (degree) model, whose pixel scale is not metres.
    tags = GeoTags(tuple((c, d, n, v) for c, d, n, v, _ in geotiff_tags(0.25)))
    assert tags.pixel_size_m() == (0.25, 0.25)
    scaled = dict((c, v) for c, _, _, v, _ in tags.extratags(4))
    assert scaled[PIXEL_SCALE][:2] == (1.0, 1.0)
    directory = list(tags.value(34735))
    assert directory[4] == 1024  # the first key entry: GTModelTypeGeoKey, inline value
    directory[4:8] = [1024, 0, 1, 2]
    geographic = GeoTags(tuple((c, d, n, tuple(directory) if c == 34735 else v) for c, d, n, v in tags.tags))
    assert geographic.pixel_size_m() is None


def test_row_store_on_disk_equals_in_memory(tmp_path):
    rng = np.random.default_rng(0)
    mem, disk = RowStore((50, 20, 3), np.float32), RowStore((50, 20, 3), np.float32, tmp_path, "s")
    for store in (mem, disk):
        for y0, y1 in store.bands(16):
            rows = store.rows(y0, y1)
            rows += rng.random(rows.shape, dtype=np.float32) if store is mem else mem.rows(y0, y1)
            del rows
    np.testing.assert_array_equal(mem.whole(), disk.whole())
    assert disk.path.stat().st_size == 50 * 20 * 3 * 4


def test_tiff_with_fewer_segments_than_its_layout_needs_is_a_data_error(tmp_path):
    # Regression (found by the fuzz test): a damaged RowsPerStrip tag made the region reader index past the strip
    # table with an IndexError instead of naming the damage.
    path = tmp_path / "strips.tif"
    tifffile.imwrite(path, _image(np.uint16, 1)[..., 0], rowsperstrip=32)
    with tifffile.TiffFile(path, mode="r+b") as tif:
        tif.pages.first.tags["RowsPerStrip"].overwrite(8)
    with pytest.raises(DataError, match=r"strips.tif: corrupt TIFF \(4 data segments, expected 13"):
        open_raster(path, None)
