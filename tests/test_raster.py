"""Region readers behind the one front (fcnkit.data.raster.open_raster), checked against files written by GDAL
(through rasterio) with its usual options and by tifffile, and against Pillow's and rasterio's own whole-image
decoders."""

import warnings

import numpy as np
import pytest
import rasterio
import rasterio.shutil
import tifffile
from affine import Affine
from PIL import Image
from rasterio.errors import NotGeoreferencedWarning

from fcnkit.data.imageio import image_shape, read_image, read_image_valid
from fcnkit.data.raster import RowStore, open_raster
from fcnkit.errors import DataError

REGIONS = [(0, 101, 0, 77), (5, 40, 33, 70), (99, 101, 0, 3), (31, 33, 31, 33), (64, 100, 60, 77)]
GRID = Affine(0.5, 0.0, 1000.0, 0.0, -0.5, 2000.0)
UTM = "EPSG:32633"  # a projected CRS in metres; the pixel values are random, no place is shown


def _image(dtype, bands=4, seed=0):
    rng = np.random.default_rng(seed)
    a = rng.random((101, 77, bands)) * (255 if dtype == np.uint8 else 65535 if dtype == np.uint16 else 1)
    return a.astype(dtype)


def _gdal_write(path, a, **options):
    """Write H×W×B ``a`` with GDAL's GeoTIFF driver and the given creation options (rasterio profile keys)."""
    profile = {"driver": "GTiff", "width": a.shape[1], "height": a.shape[0], "count": a.shape[2],
               "dtype": a.dtype.name, "crs": UTM, "transform": GRID, **options}
    with rasterio.open(path, "w", **profile) as ds:
        ds.write(np.moveaxis(a, 2, 0))
    return path


def _regions_equal(path, ref):
    r = open_raster(path, None)
    try:
        assert r.shape == ref.shape and r.dtype == ref.dtype
        for y0, y1, x0, x1 in REGIONS:
            np.testing.assert_array_equal(r.read(y0, y1, x0, x1), ref[y0:y1, x0:x1])
    finally:
        r.close()


LOSSLESS = [
    {},  # GDAL's default: uncompressed, striped
    {"compress": "deflate", "predictor": 2, "tiled": True, "blockxsize": 32, "blockysize": 32},
    {"compress": "lzw", "interleave": "band"},
    {"compress": "zstd", "tiled": True, "blockxsize": 16, "blockysize": 16},
    {"compress": "lerc"},
    {"compress": "packbits", "BIGTIFF": "YES"},
]


@pytest.mark.parametrize("dtype", [np.uint8, np.uint16, np.float32])
@pytest.mark.parametrize("options", LOSSLESS, ids=lambda o: o.get("compress", "none"))
def test_gdal_lossless_files_read_back_exactly(tmp_path, dtype, options):
    a = _image(dtype, 5)
    _regions_equal(_gdal_write(tmp_path / "a.tif", a, photometric="minisblack", **options), a)


@pytest.mark.parametrize("options", [{"compress": "jpeg", "photometric": "ycbcr", "tiled": True,
                                      "blockxsize": 32, "blockysize": 32},
                                     {"compress": "jpeg"}, {"compress": "webp"}], ids=["jpeg-ycbcr", "jpeg", "webp"])
def test_gdal_lossy_files_read_like_gdal_whole_image(tmp_path, options):
    # Reference: rasterio decoding the whole file at once (lossy data cannot equal the array written).
    path = _gdal_write(tmp_path / "a.tif", _image(np.uint8, 3), **options)
    with rasterio.open(path) as ds:
        ref = np.moveaxis(ds.read(), 0, 2)
    _regions_equal(path, ref)


def test_cog_with_overviews_reads_full_resolution(tmp_path):
    a = _image(np.uint16, 2)
    src = _gdal_write(tmp_path / "src.tif", a, photometric="minisblack")
    rasterio.shutil.copy(src, tmp_path / "cog.tif", driver="COG", BLOCKSIZE=32, OVERVIEW_COUNT=2)
    with rasterio.open(tmp_path / "cog.tif") as ds:
        assert ds.overviews(1)  # the file does have overviews
    _regions_equal(tmp_path / "cog.tif", a)


@pytest.mark.parametrize("dtype", [np.uint8, np.uint16, np.float32])
@pytest.mark.parametrize("layout", [
    {"tile": (32, 32), "compression": "zlib"},
    {"rowsperstrip": 9, "compression": "zlib", "planarconfig": "separate"},
    {"bigtiff": True, "byteorder": ">"},
])
def test_tifffile_files_read_like_tifffile(tmp_path, dtype, layout):
    # Reference: tifffile, an encoder and decoder independent of GDAL.
    a = _image(dtype)
    path = tmp_path / "img.tif"
    data = np.moveaxis(a, 2, 0) if layout.get("planarconfig") == "separate" else a
    tifffile.imwrite(path, data, photometric="minisblack", **{"planarconfig": "contig", **layout})
    ref = tifffile.imread(path)
    _regions_equal(path, np.moveaxis(ref, 0, 2) if layout.get("planarconfig") == "separate" else ref)


def test_other_pixel_types_become_float32(tmp_path):
    a = np.random.default_rng(0).integers(-500, 500, (7, 8, 1)).astype(np.int16)
    path = _gdal_write(tmp_path / "s.tif", a)
    r = open_raster(path, None)
    assert r.dtype == np.float32
    np.testing.assert_array_equal(r.read(0, 7, 0, 8), a.astype(np.float32))
    r.close()
    np.testing.assert_array_equal(read_image(path), a.astype(np.float32))  # the whole-image path agrees


def test_sparse_tiled_file_reads_its_missing_tiles_as_nodata(tmp_path):
    # GDAL leaves tiles it was never given out of a file created with SPARSE_OK (GDAL GTiff driver docs);
    # they read as the nodata value and are invalid.
    path = tmp_path / "sparse.tif"
    with rasterio.open(path, "w", driver="GTiff", width=64, height=64, count=1, dtype="uint16", tiled=True,
                       blockxsize=16, blockysize=16, SPARSE_OK=True, nodata=7, crs=UTM, transform=GRID) as ds:
        ds.write(np.full((1, 16, 16), 500, np.uint16), window=rasterio.windows.Window(16, 16, 16, 16))
    with tifffile.TiffFile(path) as tif:
        assert 0 in tif.pages[0].databytecounts  # tiles really are missing
    image, valid = read_image_valid(path)
    assert image.shape == (64, 64, 1) and valid.sum() == 256 and valid[16:32, 16:32].all()
    r = open_raster(path, None)
    np.testing.assert_array_equal(r.valid(0, 64, 0, 64), valid)
    r.close()


def test_one_band_per_page_is_refused_by_every_path(tmp_path):
    # Several full-resolution images in one file: GDAL reads the first page and lists the others as
    # subdatasets; check, training and mapping all refuse it the same way instead of guessing.
    path = tmp_path / "pages.tif"
    for band in np.moveaxis(_image(np.uint8, 3), 2, 0):
        tifffile.imwrite(path, band, append=True, photometric="minisblack")
    with pytest.raises(DataError, match="pages.tif: holds 3 images"):
        open_raster(path, None)
    with pytest.raises(DataError, match="pages.tif: holds 3 images"):
        read_image(path)


def test_nodata_mask_and_alpha_give_the_validity_gdal_gives(tmp_path):
    # Reference: rasterio's dataset_mask (GDAL RFC 15 masks: nodata values, per-dataset masks, alpha).
    a = _image(np.uint16, 3)
    a[:10] = 0
    a[50, 50] = (0, 3, 0)  # one band at the nodata value: still valid (valid when any band is)
    nodata = _gdal_write(tmp_path / "nodata.tif", a, nodata=0, compress="deflate")
    masked = tmp_path / "masked.tif"
    with rasterio.Env(GDAL_TIFF_INTERNAL_MASK=True), rasterio.open(
            masked, "w", driver="GTiff", width=77, height=101, count=3, dtype="uint16", crs=UTM,
            transform=GRID) as ds:
        ds.write(np.moveaxis(a, 2, 0))
        m = np.full((101, 77), 255, np.uint8)
        m[:, :5] = 0
        ds.write_mask(m)
    rgba = _image(np.uint8, 4)
    rgba[..., 3] = np.where(np.arange(77) < 20, 0, 255)[None, :]
    alpha = _gdal_write(tmp_path / "alpha.tif", rgba, photometric="rgb", alpha="yes")
    for path in (nodata, masked, alpha):
        with rasterio.open(path) as ds:
            ref = ds.dataset_mask() > 0
        r = open_raster(path, None)
        try:
            assert r.masked and r.shape[2] == 3
            for y0, y1, x0, x1 in REGIONS:
                np.testing.assert_array_equal(r.valid(y0, y1, x0, x1), ref[y0:y1, x0:x1], err_msg=path.name)
            r.fill = [11, 12, 13]
            region = r.read(0, 101, 0, 77)
            assert (region[~ref] == [11, 12, 13]).all() and (~ref).any()
        finally:
            r.close()


def test_nan_nodata_is_masked_and_filled_not_refused(tmp_path):
    a = np.ones((20, 30, 2), np.float32)
    a[:, :4] = np.nan
    path = _gdal_write(tmp_path / "f.tif", a, nodata=float("nan"))
    image, valid = read_image_valid(path)
    assert np.isfinite(image).all() and (~valid).sum() == 80 and (image == 1).all()


def test_rgb_photometric_marks_a_fourth_band_as_alpha(tmp_path):
    # The pitfall: GDAL's GeoTIFF driver writes 4 uint8 bands as RGB plus alpha by default, so an R, G, B, NIR
    # image comes back as 3 bands and a mask; written with PHOTOMETRIC=MINISBLACK it keeps its 4 bands.
    a = _image(np.uint8, 4)
    with rasterio.open(_gdal_write(tmp_path / "rgbn.tif", a)) as ds:
        assert ds.colorinterp[3] == rasterio.enums.ColorInterp.alpha  # GDAL's own reading
    assert image_shape(tmp_path / "rgbn.tif") == (101, 77, 3)
    assert image_shape(_gdal_write(tmp_path / "ok.tif", a, photometric="minisblack")) == (101, 77, 4)


def test_pixel_is_point_files_are_placed_by_their_pixel_centres(tmp_path):
    # GeoTIFF 1.0 (2.5.2.2, recalled from memory): with RasterPixelIsPoint the tie point gives the centre of
    # pixel (0, 0), so the corner-based transform starts half a pixel up and left of it. The file is written by
    # tifffile with hand-made tags, so GDAL's reading is checked against the specification, not against itself.
    keys = [1, 1, 0, 3, 1024, 0, 1, 1, 1025, 0, 1, 2, 3072, 0, 1, 32633]  # projected, PixelIsPoint, UTM 33N
    tags = [(33550, 12, 3, (2.0, 2.0, 0.0), True), (33922, 12, 6, (0.0, 0.0, 0.0, 500000.0, 6000000.0, 0.0), True),
            (34735, 3, len(keys), tuple(keys), True)]
    tifffile.imwrite(tmp_path / "p.tif", _image(np.uint8, 1)[..., 0], extratags=tags)
    r = open_raster(tmp_path / "p.tif", None)
    assert r.geo.transform == Affine(2.0, 0.0, 499999.0, 0.0, -2.0, 6000001.0)
    assert r.geo.crs.to_epsg() == 32633
    r.close()


def test_vrt_files_are_read_through_gdal(tmp_path):
    a = _image(np.uint8, 2)
    src = _gdal_write(tmp_path / "a.tif", a, photometric="minisblack")
    rasterio.shutil.copy(src, tmp_path / "a.vrt", driver="VRT")
    _regions_equal(tmp_path / "a.vrt", a)


def test_png_and_jpeg_read_like_pillow(tmp_path):
    a = _image(np.uint8, 3)
    Image.fromarray(a).save(tmp_path / "a.png")
    Image.fromarray(a).save(tmp_path / "a.jpg", quality=90)
    for name in ("a.png", "a.jpg"):
        ref = np.asarray(Image.open(tmp_path / name))  # reference: Pillow's decoder
        r = open_raster(tmp_path / name, 10**6)
        assert r.geo is None and not r.masked
        np.testing.assert_array_equal(r.read(5, 40, 33, 70), ref[5:40, 33:70])


def test_pixel_limit_is_checked_before_decoding(tmp_path):
    tifffile.imwrite(tmp_path / "big.tif", np.zeros((100, 100), np.uint8), tile=(16, 16))
    with pytest.raises(DataError, match=r"big.tif: 100x100 = 10,000 pixels is above the limit of 9,999"):
        open_raster(tmp_path / "big.tif", 9_999)
    Image.fromarray(np.zeros((100, 100), np.uint8)).save(tmp_path / "big.png")
    with pytest.raises(DataError, match=r"big.png: 100x100 = 10,000 pixels is above the limit of 9,999"):
        open_raster(tmp_path / "big.png", 9_999)


def test_truncated_and_foreign_files_are_data_errors(tmp_path, capfd):
    path = tmp_path / "cut.tif"
    tifffile.imwrite(path, _image(np.uint16), tile=(32, 32), compression="zlib")
    data = path.read_bytes()
    path.write_bytes(data[: len(data) * 2 // 3])
    with pytest.raises(DataError, match=r"cut.tif: truncated TIFF \(image data runs to byte"):
        open_raster(path, None)  # found from the tile table, before any pixel is decoded
    (tmp_path / "text.tif").write_text("not an image")
    with pytest.raises(DataError, match=r"text.tif: not a readable TIFF"):
        open_raster(tmp_path / "text.tif", None)
    with pytest.raises(DataError, match=r"nothing.tif: no such image file"):
        open_raster(tmp_path / "nothing.tif", None)
    (tmp_path / "a.bmp").write_bytes(b"BM")
    with pytest.raises(DataError, match=r"a.bmp: unsupported image type .bmp"):
        open_raster(tmp_path / "a.bmp", None)
    assert capfd.readouterr().err == ""  # GDAL's own messages stay off stderr: the DataError says it


def test_georeferencing_is_read_and_plain_images_have_none(tmp_path):
    r = open_raster(_gdal_write(tmp_path / "g.tif", _image(np.uint8, 1)), None)
    assert r.geo.transform == GRID and r.geo.crs.to_epsg() == 32633
    r.close()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", NotGeoreferencedWarning)
        with rasterio.open(tmp_path / "plain.tif", "w", driver="GTiff", width=8, height=8, count=1,
                           dtype="uint8") as ds:
            ds.write(np.zeros((1, 8, 8), np.uint8))
    r = open_raster(tmp_path / "plain.tif", None)
    assert r.geo is None
    r.close()


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


def test_reading_a_large_file_keeps_gdal_block_cache_bounded(tmp_path):
    # Bug fix: GDAL's block cache defaults to 5 % of the machine's memory, and reading a large image band by band
    # filled it (1.2 GB of a 268 MP mosaic's peak). Reference: the kernel's count of anonymous resident memory
    # (RssAnon in /proc/self/status), read in a fresh process after reading every row of a 96 MB (decoded) file
    # with the bound set to 16 MB; GDAL's default on any machine with 2 GB or more would keep all 96 MB.
    import os
    import subprocess
    import sys

    path = tmp_path / "big.tif"
    rng = np.random.default_rng(0)
    with rasterio.open(path, "w", driver="GTiff", width=4096, height=6144, count=4, dtype="uint8", tiled=True,
                       blockxsize=512, blockysize=512, compress="deflate", zlevel=1) as dst:
        for y in range(0, 6144, 512):
            dst.write(rng.integers(0, 256, (4, 512, 4096), dtype=np.uint8), window=((y, y + 512), (0, 4096)))
    code = f"""
import fcnkit.data.gdalraster as g
g.READ_CACHE_BYTES = 16 << 20
from fcnkit.data.raster import open_raster
def anon():
    return next(int(line.split()[1]) for line in open("/proc/self/status") if line.startswith("RssAnon")) << 10
r = open_raster({str(path)!r}, None)
r.read(0, 64, 0, 4096)
before = anon()
for y in range(64, 6144, 64):
    r.read(y, y + 64, 0, 4096)
print(anon() - before)
"""
    env = {k: v for k, v in os.environ.items() if k != "GDAL_CACHEMAX"}
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True, env=env)
    assert int(out.stdout) < 48 << 20  # the 16 MB cache plus allocator slack, not the 96 MB of the file
