"""Image and mask readers against files written by Pillow and tifffile (the reference encoders)."""

from __future__ import annotations

import binascii
import struct
import zlib

import numpy as np
import pytest
import tifffile
from PIL import Image, ImageOps

from fcnkit.data.classes import ClassInfo, ClassTable
from fcnkit.data.imageio import image_shape, read_image, read_image_valid, read_mask, write_label_png, write_tiff
from fcnkit.errors import DataError

CLASSES = ClassTable((ClassInfo(0, "a", (200, 10, 10)), ClassInfo(1, "b", (10, 200, 10)),
                      ClassInfo(2, "c", (10, 10, 200))))
RNG = np.random.default_rng(0)


def _random(shape, dtype):
    if np.dtype(dtype).kind == "f":
        return RNG.normal(0, 1000, shape).astype(dtype)
    return RNG.integers(0, np.iinfo(dtype).max, shape, endpoint=True).astype(dtype)


# --- images ---------------------------------------------------------------------------------------------------

@pytest.mark.parametrize("mode,dtype,bands", [("L", np.uint8, 1), ("RGB", np.uint8, 3), ("I;16", np.uint16, 1)])
def test_png_round_trip_through_pillow(tmp_path, mode, dtype, bands):
    a = _random((13, 17, bands), dtype)
    path = tmp_path / "x.png"
    Image.fromarray(a[..., 0] if bands == 1 else a).save(path)
    assert Image.open(path).mode == mode  # the reference encoder wrote what we meant to test
    b = read_image(path)
    assert b.dtype == dtype and b.shape == (13, 17, bands)
    np.testing.assert_array_equal(b, a)
    assert image_shape(path) == (13, 17, bands)


def test_alpha_is_validity_not_a_band(tmp_path):
    # An alpha channel says which pixels hold data (PNG specification, 4.2: alpha 0 is fully transparent).
    a = _random((13, 17, 4), np.uint8)
    a[..., 3] = 255
    a[2:5, 3:9, 3] = 0
    Image.fromarray(a).save(tmp_path / "x.png")
    image, valid = read_image_valid(tmp_path / "x.png")
    assert image.shape == (13, 17, 3) and image_shape(tmp_path / "x.png") == (13, 17, 3)
    np.testing.assert_array_equal(valid, a[..., 3] > 0)
    np.testing.assert_array_equal(image[valid], a[..., :3][valid])
    # transparent pixels hold their band's mean over the valid ones (neutral to a net and to band statistics)
    np.testing.assert_array_equal(image[~valid][0], np.rint(a[..., :3][valid].mean(0)).astype(np.uint8))


def test_palette_png_image_is_decoded_to_colours(tmp_path):
    ids = RNG.integers(0, 3, (9, 11)).astype(np.uint8)
    path = tmp_path / "p.png"
    write_label_png(path, ids, CLASSES)
    expected = np.array(CLASSES.colors, np.uint8)[ids]
    np.testing.assert_array_equal(read_image(path), expected)
    assert image_shape(path) == (9, 11, 3)


def test_jpeg_is_read_with_pillows_decoder(tmp_path):
    a = _random((16, 24, 3), np.uint8)
    path = tmp_path / "x.jpg"
    Image.fromarray(a).save(path, quality=90)
    np.testing.assert_array_equal(read_image(path), np.asarray(Image.open(path)))  # Pillow as the reference


@pytest.mark.parametrize("dtype", [np.uint8, np.uint16, np.float32])
@pytest.mark.parametrize("bands", [1, 2, 3, 5])
@pytest.mark.parametrize("layout", ["contig", "separate", "tiled"])
def test_tiff_round_trip_through_tifffile(tmp_path, dtype, bands, layout):
    side = 272 if layout == "tiled" else 19
    a = _random((side, side + 3, bands), dtype)
    path = tmp_path / "x.tif"
    if bands == 1:
        tifffile.imwrite(path, a[..., 0], photometric="minisblack", tile=(16, 16) if layout == "tiled" else None)
    elif layout == "separate":
        tifffile.imwrite(path, np.moveaxis(a, 2, 0), photometric="minisblack", planarconfig="separate")
    else:
        tifffile.imwrite(path, a, photometric="minisblack", planarconfig="contig",
                         tile=(16, 16) if layout == "tiled" else None)
    b = read_image(path)
    assert b.dtype == dtype
    np.testing.assert_array_equal(b, a)
    assert image_shape(path) == a.shape


def test_write_tiff_round_trip_through_tifffile(tmp_path):
    a = _random((300, 260, 4), np.uint8)
    write_tiff(tmp_path / "t.tif", a, compression="deflate")
    with tifffile.TiffFile(tmp_path / "t.tif") as tif:  # tifffile reads what GDAL wrote
        page = tif.pages[0]
        assert page.is_tiled and page.compression == 8  # 8 = Deflate (TIFF 6.0 / Adobe tech note)
        np.testing.assert_array_equal(page.asarray(), a)
        assert page.photometric == tifffile.PHOTOMETRIC.MINISBLACK  # four data bands, no alpha
    np.testing.assert_array_equal(read_image(tmp_path / "t.tif"), a)
    assert not list(tmp_path.glob(".*partial*"))


def _png_rgb16(path, a):
    """A 16-bit RGB PNG written by hand from the PNG specification (W3C PNG, 2nd ed.: IHDR, IDAT, IEND chunks)."""
    def chunk(kind, data):
        return struct.pack(">I", len(data)) + kind + data + struct.pack(">I", binascii.crc32(kind + data))
    h, w, _ = a.shape
    raw = b"".join(b"\x00" + a[y].astype(">u2").tobytes() for y in range(h))  # filter type 0 per row
    ihdr = struct.pack(">IIBBBBB", w, h, 16, 2, 0, 0, 0)  # bit depth 16, colour type 2 (RGB)
    path.write_bytes(b"\x89PNG\r\n\x1a\n" + chunk(b"IHDR", ihdr) + chunk(b"IDAT", zlib.compress(raw))
                     + chunk(b"IEND", b""))


def test_16bit_colour_png_is_refused_not_truncated(tmp_path):
    path = tmp_path / "rgb16.png"
    _png_rgb16(path, _random((4, 5, 3), np.uint16))
    with pytest.raises(DataError, match="16-bit colour PNG"):
        read_image(path)


# --- broken files ---------------------------------------------------------------------------------------------

def _truncate(path, keep=0.5):
    data = path.read_bytes()
    path.write_bytes(data[:int(len(data) * keep)])


def _broken(tmp_path, kind):
    a = _random((64, 64, 3), np.uint8)
    if kind == "zero-byte":
        (path := tmp_path / "z.png").write_bytes(b"")
    elif kind == "garbage":
        (path := tmp_path / "g.png").write_bytes(b"this is not an image" * 20)
    elif kind == "garbage tiff":
        (path := tmp_path / "g.tif").write_bytes(b"II*\x00" + b"\xff" * 50)
    elif kind == "truncated png":
        Image.fromarray(a).save(path := tmp_path / "t.png")
        _truncate(path)
    elif kind == "truncated jpeg":
        Image.fromarray(a).save(path := tmp_path / "t.jpg")
        _truncate(path)
    elif kind == "truncated striped tiff":
        tifffile.imwrite(path := tmp_path / "s.tif", a)
        _truncate(path, 0.9)
    elif kind == "truncated tiled tiff":
        tifffile.imwrite(path := tmp_path / "t.tif", a, tile=(16, 16))
        _truncate(path, 0.6)
    else:
        path = tmp_path / "missing.png"
    return path


KINDS = ["zero-byte", "garbage", "garbage tiff", "truncated png", "truncated jpeg", "truncated striped tiff",
         "truncated tiled tiff", "missing"]


@pytest.mark.parametrize("kind", KINDS)
def test_broken_files_raise_one_line_naming_the_file(tmp_path, kind):
    path = _broken(tmp_path, kind)
    with pytest.raises(DataError) as e:
        read_image(path)
    assert str(e.value).startswith(str(path)) and "\n" not in str(e.value)


def test_pixel_limit_names_file_and_limit(tmp_path):
    a = _random((40, 50, 3), np.uint8)
    Image.fromarray(a).save(tmp_path / "a.png")
    tifffile.imwrite(tmp_path / "a.tif", a)
    for path in (tmp_path / "a.png", tmp_path / "a.tif"):
        with pytest.raises(DataError, match=rf"{path.name}: 50x40 = 2,000 pixels is above the limit of 1,999"):
            read_image(path, max_pixels=1999)
        assert read_image(path, max_pixels=2000).shape == (40, 50, 3)


def test_raising_the_limit_keeps_pillows_guard_on(tmp_path, monkeypatch):
    # Pillow refuses images above 2 × Image.MAX_IMAGE_PIXELS (its decompression-bomb guard, Pillow docs).
    Image.fromarray(_random((40, 50), np.uint8)).save(tmp_path / "a.png")
    monkeypatch.setattr(Image, "MAX_IMAGE_PIXELS", 500)
    with pytest.raises(DataError, match="a.png: .*limit"):
        read_image(tmp_path / "a.png", max_pixels=None)  # no fcnkit limit: Pillow's guard still refuses
    assert read_image(tmp_path / "a.png", max_pixels=2000).shape == (40, 50, 1)  # explicitly raised
    assert Image.MAX_IMAGE_PIXELS == 500  # and the guard is back where it was


# --- masks ----------------------------------------------------------------------------------------------------

def _ids(shape=(12, 15)):
    ids = RNG.integers(0, 3, shape).astype(np.uint8)
    ids[0, :4] = CLASSES.ignore
    return ids


def test_mask_formats_agree(tmp_path):
    ids = _ids()
    Image.fromarray(ids).save(tmp_path / "l.png")
    write_label_png(tmp_path / "p.png", ids, CLASSES)
    rgb = np.array(CLASSES.palette(), np.uint8).reshape(256, 3)[ids]
    Image.fromarray(rgb).save(tmp_path / "rgb.png")
    tifffile.imwrite(tmp_path / "ids.tif", ids)
    tifffile.imwrite(tmp_path / "rgb.tif", rgb)
    assert Image.open(tmp_path / "p.png").mode == "P"
    for name in ("l.png", "p.png", "rgb.png", "ids.tif", "rgb.tif"):
        got = read_mask(tmp_path / name, CLASSES)
        assert got.dtype == np.uint8
        np.testing.assert_array_equal(got, ids, err_msg=name)


def test_transparent_rgba_pixels_are_unlabelled(tmp_path):
    ids = _ids()
    rgba = np.zeros(ids.shape + (4,), np.uint8)
    rgba[..., :3] = np.array(CLASSES.palette(), np.uint8).reshape(256, 3)[ids]
    rgba[..., 3] = 255
    rgba[5, 5] = (1, 2, 3, 0)  # a colour not in the table, but fully transparent
    Image.fromarray(rgba).save(tmp_path / "m.png")
    expected = ids.copy()
    expected[5, 5] = CLASSES.ignore
    np.testing.assert_array_equal(read_mask(tmp_path / "m.png", CLASSES), expected)


def test_custom_ignore_colour(tmp_path):
    table = ClassTable(CLASSES.classes, ignore=200, ignore_color=(255, 255, 255))
    ids = _ids()
    ids[ids == 255] = 200
    rgb = np.array(table.palette(), np.uint8).reshape(256, 3)[ids]
    assert (rgb[0, 0] == 255).all()
    Image.fromarray(rgb).save(tmp_path / "m.png")
    np.testing.assert_array_equal(read_mask(tmp_path / "m.png", table), ids)


@pytest.mark.parametrize("case,expected", [
    ("unknown id", "ids not in classes.toml (7;"),
    ("unknown colour", "colours not in classes.toml (#010203)"),
    ("16-bit", "mask is uint16"),
    ("jpeg", "masks must be lossless"),
    ("two bands", "mask has 2 bands"),
])
def test_bad_masks(tmp_path, case, expected):
    ids = _ids()
    if case == "unknown id":
        ids[3, 3] = 7
        Image.fromarray(ids).save(path := tmp_path / "m.png")
    elif case == "unknown colour":
        rgb = np.array(CLASSES.palette(), np.uint8).reshape(256, 3)[ids]
        rgb[2, 2] = (1, 2, 3)
        Image.fromarray(rgb).save(path := tmp_path / "m.png")
    elif case == "16-bit":
        Image.fromarray(ids.astype(np.uint16)).save(path := tmp_path / "m.png")
    elif case == "jpeg":
        Image.fromarray(ids).save(path := tmp_path / "m.jpg")
    else:
        tifffile.imwrite(path := tmp_path / "m.tif", np.stack([ids, ids], -1), planarconfig="contig",
                         photometric="minisblack")
    with pytest.raises(DataError) as e:
        read_mask(path, CLASSES)
    assert str(e.value).startswith(str(path)) and expected in str(e.value)


def test_write_label_png_is_a_palette_png_pillow_can_show(tmp_path):
    ids = _ids()
    write_label_png(tmp_path / "m.png", ids, CLASSES)
    im = Image.open(tmp_path / "m.png")
    assert im.mode == "P"
    np.testing.assert_array_equal(np.asarray(im), ids)
    shown = np.asarray(im.convert("RGB"))  # Pillow applies the palette: each id in its class colour
    np.testing.assert_array_equal(shown[ids == 1], np.tile(CLASSES.colors[1], ((ids == 1).sum(), 1)))
    assert not list(tmp_path.glob(".*partial*"))


def test_palette_mask_listing_the_classes_in_another_order_gives_their_ids(tmp_path):
    # A palette PNG whose palette orders the class colours differently from classes.toml: what the person who
    # drew it saw are the colours, so the ids come from the colours, not from the palette positions.
    ids = _ids()
    order = [2, 0, 1]  # palette entry i shows the colour of class order[i]
    inverse = np.argsort(order).astype(np.uint8)
    indices = np.where(ids == CLASSES.ignore, 255, inverse[np.minimum(ids, 2)]).astype(np.uint8)
    im = Image.fromarray(indices, mode="L").convert("P")
    palette = CLASSES.palette()
    for i, c in enumerate(order):
        palette[3 * i:3 * i + 3] = CLASSES.colors[c]
    im.putpalette(palette)
    im.save(tmp_path / "m.png")
    np.testing.assert_array_equal(read_mask(tmp_path / "m.png", CLASSES), ids)


def test_palette_mask_with_a_generic_palette_keeps_its_indices_as_ids(tmp_path):
    ids = _ids()
    im = Image.fromarray(ids, mode="L").convert("P")
    im.putpalette([v for i in range(256) for v in (i, i, i)])  # a grey ramp: not the class colours
    im.save(tmp_path / "m.png")
    np.testing.assert_array_equal(read_mask(tmp_path / "m.png", CLASSES), ids)


def test_exif_orientation_is_applied_to_images_and_masks(tmp_path):
    # EXIF 2.3, tag 0x0112 = 6: the stored picture must be turned 90° clockwise to be shown upright; Pillow's
    # ImageOps.exif_transpose is the reference.
    a = _random((10, 16, 3), np.uint8)
    exif = Image.Exif()
    exif[0x0112] = 6
    Image.fromarray(a).save(tmp_path / "x.jpg", exif=exif, quality=95)
    ids = _ids((10, 16))
    Image.fromarray(ids).save(tmp_path / "m.png", exif=exif)
    want = np.asarray(ImageOps.exif_transpose(Image.open(tmp_path / "x.jpg")))
    assert want.shape == (16, 10, 3)
    np.testing.assert_array_equal(read_image(tmp_path / "x.jpg"), want)
    assert image_shape(tmp_path / "x.jpg") == (16, 10, 3)
    np.testing.assert_array_equal(read_mask(tmp_path / "m.png", CLASSES), np.rot90(ids, -1))


def test_cmyk_jpeg_is_refused_not_read_as_four_bands(tmp_path):
    Image.fromarray(_random((8, 8, 3), np.uint8)).convert("CMYK").save(tmp_path / "c.jpg")
    assert Image.open(tmp_path / "c.jpg").mode == "CMYK"
    with pytest.raises(DataError, match="c.jpg: CMYK JPEG"):
        read_image(tmp_path / "c.jpg")


def test_palette_image_with_transparency_masks_its_transparent_entry(tmp_path):
    ids = _ids()
    ids[ids == CLASSES.ignore] = 0
    im = Image.fromarray(ids, mode="L").convert("P")
    im.putpalette(CLASSES.palette())
    im.save(tmp_path / "p.png", transparency=1)  # palette entry 1 fully transparent (PNG tRNS chunk)
    image, valid = read_image_valid(tmp_path / "p.png")
    assert image.shape == (*ids.shape, 3)
    np.testing.assert_array_equal(valid, ids != 1)
    np.testing.assert_array_equal(image[valid], np.array(CLASSES.colors, np.uint8)[ids][valid])
