"""Inputs that look odd but are valid read alike everywhere (issue 15, "readers that disagree" and "wrong
results"): palette masks whose palette lists the classes in another order, JPEGs with an EXIF orientation,
sparse tiled TIFFs, and 1-pixel-wide strips. Each goes through `check`, training's reader and `segment`, and is
compared with an outside reference (Pillow, rasterio, the model's own forward pass). The refusals of the same
issue (CMYK JPEG, one band per TIFF page, a FIFO, 8- and 16-bit images mixed) are cases of the battery
(tests/bad_inputs.py)."""

from __future__ import annotations

import numpy as np
import pytest
import rasterio
import tifffile
import torch
from bad_inputs import COLORS, TINY_CONFIG, run_cli, scene, write_dataset, write_model, write_png
from PIL import Image, ImageOps

from fcnkit import Model
from fcnkit.data.dataset import check_dataset, find_samples, read_sample
from fcnkit.data.raster import open_raster
from fcnkit.outputs import output_names

pytestmark = [pytest.mark.usefixtures("torch_one_thread"),
              pytest.mark.filterwarnings("ignore::rasterio.errors.NotGeoreferencedWarning")]


def _ids_by_colour(rgb: np.ndarray) -> np.ndarray:
    """Class ids of an RGB rendering of a mask: the class whose colour each pixel has (255: none)."""
    ids = np.full(rgb.shape[:2], 255, np.uint8)
    for i, c in enumerate(COLORS):
        ids[(rgb == c).all(-1)] = i
    return ids


def test_palette_masks_in_another_palette_order_keep_their_classes(tmp_path):
    # The mask's palette lists the class colours in the order roof, ground, water; its indices follow that
    # order. Reference: Pillow's own palette lookup (P → RGB), read back to ids by the colours of classes.toml.
    data = write_dataset(tmp_path / "data")
    order = [2, 0, 1]  # palette entry i holds the colour of class order[i]
    palette = [v for i in range(256) for v in (COLORS[order[i]] if i < 3 else (0, 0, 0))]
    for p in sorted((data / "masks").iterdir()):
        ids = np.asarray(Image.open(p))
        index = np.argsort(order)[np.where(ids == 255, 0, ids)].astype(np.uint8)  # unlabelled drawn as ground
        im = Image.fromarray(index, "L").convert("P")
        im.putpalette(palette)
        im.save(p)
    code, out, err = run_cli(["check", data])
    assert code == 0, out + err
    samples, classes = find_samples(data)
    want = [_ids_by_colour(np.asarray(Image.open(s.mask).convert("RGB"))) for s in samples]
    assert (want[0] == 2).any() and (want[0] == 0).any()  # the permutation matters on this mask
    for s, w in zip(samples, want, strict=True):
        np.testing.assert_array_equal(read_sample(s, classes).mask, w)  # what training and evaluation read
    counts = np.bincount(np.concatenate([w.ravel() for w in want]), minlength=256)
    assert check_dataset(data).class_pixels == counts[:3].tolist()


@pytest.mark.parametrize("size", [(16, 24), (24, 24)])
def test_exif_orientation_is_applied_by_check_training_and_mapping(tmp_path, size):
    # EXIF 2.3, tag 0x0112 = 6: the stored picture is shown turned 90° clockwise. The masks are drawn on the
    # upright picture. Reference: Pillow's ImageOps.exif_transpose. (A square picture passed `check` rotated
    # against its mask; now every path reads the upright picture.)
    data = write_dataset(tmp_path / "data")
    model = write_model(tmp_path / "m.safetensors")
    h, w = size
    upright, mask = scene(7, 32)[0][:w, :h], scene(7, 32)[1][:w, :h]  # shown w rows × h columns
    exif = Image.Exif()
    exif[0x0112] = 6
    (data / "images" / "s0.png").unlink()
    Image.fromarray(np.rot90(upright, 1).copy()).save(data / "images" / "s0.jpg", exif=exif, quality=95)
    write_png(data / "masks" / "s0.png", mask)
    want = np.asarray(ImageOps.exif_transpose(Image.open(data / "images" / "s0.jpg")))
    assert want.shape == (w, h, 3)
    code, out, err = run_cli(["check", data])
    assert code == 0, out + err
    samples, classes = find_samples(data)
    np.testing.assert_array_equal(read_sample(samples[0], classes).image, want)
    write_png(tmp_path / "ref" / "s0.png", want)
    for src, out_dir in ((data / "images" / "s0.jpg", tmp_path / "maps"), (tmp_path / "ref" / "s0.png",
                                                                           tmp_path / "ref_maps")):
        code, _, err = run_cli(["segment", model, src, "--out", out_dir, "--quiet"])
        assert code == 0, err
    got = np.asarray(Image.open(tmp_path / "maps" / "s0.labels.png"))
    np.testing.assert_array_equal(got, np.asarray(Image.open(tmp_path / "ref_maps" / "s0.labels.png")))


def test_a_sparse_tiled_tiff_reads_alike_in_check_training_and_mapping(tmp_path):
    # GDAL leaves tiles it was never given out of a file created with SPARSE_OK (GDAL GTiff driver docs); they
    # `check`ed fine but `segment` called the file truncated. Reference: rasterio's read of the same file.
    data = write_dataset(tmp_path / "data", size=32)
    (data / "images" / "s0.png").unlink()
    path = data / "images" / "s0.tif"
    with rasterio.open(path, "w", driver="GTiff", width=32, height=32, count=3, dtype="uint8", tiled=True,
                       blockxsize=16, blockysize=16, SPARSE_OK=True) as ds:
        ds.write(np.moveaxis(scene(0, 32)[0][:16, 16:], 2, 0), window=rasterio.windows.Window(16, 0, 16, 16))
    with rasterio.open(path) as ds:
        want = np.moveaxis(ds.read(), 0, 2)
    with tifffile.TiffFile(path) as tif:
        assert 0 in tif.pages[0].databytecounts  # tiles really are missing
    assert (want[:16, 16:] != 0).any() and not want[16:].any()
    code, out, err = run_cli(["check", data])
    assert code == 0, out + err
    samples, classes = find_samples(data)
    np.testing.assert_array_equal(read_sample(samples[0], classes).image, want)  # training's reader
    raster = open_raster(path, None)
    try:
        np.testing.assert_array_equal(raster.read(0, 32, 0, 32), want)  # mapping's region reads
    finally:
        raster.close()
    model = write_model(tmp_path / "m.safetensors")
    code, _, err = run_cli(["segment", model, path, "--out", tmp_path / "maps", "--quiet"])
    assert code == 0, err
    (tmp_path / "tiny.toml").write_text(TINY_CONFIG)
    code, _, err = run_cli(["train", tmp_path / "tiny.toml", "--data", data, "--out", tmp_path / "run", "--quiet"])
    assert code == 0, err


@pytest.mark.parametrize("shape", [(1, 100_000), (100_000, 1)])
def test_a_one_pixel_strip_is_mapped_with_every_output(tmp_path, shape):
    # A 1×100000 image failed while writing its overview ("cannot write empty image"): the overview sampled
    # mid-cell rows the strip does not have. Reference: the model's own forward pass over the whole strip.
    model = write_model(tmp_path / "m.safetensors")
    image = np.random.default_rng(3).integers(0, 256, (*shape, 3), dtype=np.uint8)
    write_png(tmp_path / "strip.png", image)
    code, _, err = run_cli(["segment", model, tmp_path / "strip.png", "--out", tmp_path / "maps", "--quiet"])
    assert code == 0, err
    names = output_names("strip", False)
    assert sorted(p.name for p in (tmp_path / "maps").iterdir()) == sorted(names.values())
    with torch.no_grad():
        ref = Model.load(model)(torch.from_numpy(image).permute(2, 0, 1)[None].float())[0].argmax(0).numpy()
    np.testing.assert_array_equal(np.asarray(Image.open(tmp_path / "maps" / names["labels"])), ref)
    overlay = Image.open(tmp_path / "maps" / names["overlay"])
    assert min(overlay.size) == 1 and max(overlay.size) > 1


def test_training_and_check_read_a_dataset_of_one_pixel_type_but_refuse_two(tmp_path):
    # Companion of the battery case: 16-bit images alone are fine; the refusal is about mixing scales.
    data = write_dataset(tmp_path / "data")
    for p in sorted((data / "images").iterdir()):
        p.unlink()  # Pillow writes 16-bit grey only; GDAL (rasterio) writes the 3-band 16-bit TIFFs
        with rasterio.open(p.with_suffix(".tif"), "w", driver="GTiff", width=24, height=24, count=3,
                           dtype="uint16") as ds:
            ds.write(np.moveaxis(scene(int(p.stem[1:]))[0].astype(np.uint16) * 39, 2, 0))
    assert check_dataset(data).ok
    write_png(data / "images" / "s0.png", scene(0)[0])
    (data / "images" / "s0.tif").unlink()
    problems = check_dataset(data).problems
    assert len(problems) == 1 and "s0.png: pixel type uint8 but most images are uint16" in problems[0]
