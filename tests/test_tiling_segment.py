"""segment_image / `fcnkit segment`: outputs, GeoTIFF tags, areas, bad input, and a run killed mid-image."""

import json
import math
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
import rasterio
import torch
from affine import Affine
from PIL import Image
from safetensors.torch import save_file

from fcnkit import Model, build_model, segment_image, segment_images
from fcnkit.cli import main
from fcnkit.config import config_from_dict, config_to_dict
from fcnkit.data.classes import ClassInfo, ClassTable
from fcnkit.data.imageio import write_tiff
from fcnkit.data.raster import open_raster
from fcnkit.data.scenes import kessmoor_grid
from fcnkit.errors import DataError
from fcnkit.inference.scan import predict_scores
from fcnkit.inference.segment import find_images, shard
from fcnkit.outputs import OutputOptions, to_byte

CLASSES = ClassTable((ClassInfo(0, "open ground", (200, 180, 120)), ClassInfo(1, "water", (40, 100, 200)),
                      ClassInfo(2, "roof", (210, 60, 50))))
MEAN, STD = [500.0, 600.0, 700.0, 800.0], [100.0, 120.0, 140.0, 160.0]


def _model_file(folder: Path, bands: int = 4) -> Path:
    cfg = config_from_dict({"model": {"bands": bands, "num_classes": 3, "widths": [6, 8], "fusion": "sum",
                                      "min_size": 16}})
    torch.manual_seed(0)
    net = build_model(cfg)
    path = folder / "model.safetensors"
    Model(net, classes=CLASSES, mean=MEAN[:bands], std=STD[:bands], config=config_to_dict(cfg)).save(path)
    return path


def _geotiff(path: Path, h: int = 150, w: int = 170, pixel: float = 0.5) -> np.ndarray:
    img = np.random.default_rng(0).normal(650, 150, (h, w, 4)).clip(0, 65535).astype(np.uint16)
    grid = kessmoor_grid(pixel)
    with rasterio.open(path, "w", driver="GTiff", width=w, height=h, count=4, dtype="uint16", crs=grid.crs,
                       transform=grid.transform, tiled=True, blockxsize=32, blockysize=32, compress="zstd",
                       photometric="minisblack") as ds:
        ds.write(np.moveaxis(img, 2, 0))
    return img


def _visible(folder: Path) -> list[str]:
    return sorted(p.name for p in folder.iterdir() if not p.name.startswith("."))


def test_geotiff_outputs_are_cogs_on_the_input_grid_with_class_metadata(tmp_path):
    model = _model_file(tmp_path)
    img = _geotiff(tmp_path / "field.tif")
    res = segment_image(model, tmp_path / "field.tif", tmp_path / "out", tile=64, preview=64, progress=False)
    assert set(res.paths) == {"labels", "confidence", "uncertainty", "overlay", "preview", "areas_csv",
                              "areas_json"}
    assert _visible(tmp_path / "out") == sorted(p.name for p in res.paths.values())
    assert list((tmp_path / "out").iterdir()) == [p for p in (tmp_path / "out").iterdir() if p.name[0] != "."]

    # every raster output is a COG (GDAL's IMAGE_STRUCTURE metadata says LAYOUT=COG) on the input's exact grid,
    # read back with rasterio; the overlay's grid is the input's down-sampled by `step`
    with rasterio.open(tmp_path / "field.tif") as src:
        crs, transform = src.crs, src.transform
    for kind in ("labels", "confidence", "uncertainty"):
        with rasterio.open(res.paths[kind]) as ds:
            assert (ds.crs, ds.transform, ds.shape) == (crs, transform, (150, 170)), kind
            assert ds.tags(ns="IMAGE_STRUCTURE").get("LAYOUT") == "COG", kind
    step = math.ceil(170 / 64)
    with rasterio.open(res.paths["overlay"]) as ds:
        assert ds.crs == crs and ds.transform == transform @ Affine.scale(step) and ds.count == 3
        assert ds.shape == (math.ceil(150 / step - 0.5), math.ceil(170 / step - 0.5))

    # the maps are those of the API's probabilities; GIS metadata: colour table, class names, scale/offset
    probs = predict_scores(Model.load(model), img, tile=64)
    with rasterio.open(res.paths["labels"]) as ds:
        labels = ds.read(1)
        assert [ds.colormap(1)[i][:3] for i in range(3)] == CLASSES.colors
        assert [ds.tags(1)[f"CLASS_{i}"] for i in range(3)] == CLASSES.names and ds.nodata == CLASSES.ignore
    np.testing.assert_array_equal(labels, probs.argmax(0))
    with rasterio.open(res.paths["confidence"]) as ds:
        np.testing.assert_array_equal(ds.read(1), to_byte(probs.max(0)))
        assert ds.scales == (1 / 255,) and ds.offsets == (0.0,) and "confidence" in ds.descriptions[0]
    with rasterio.open(res.paths["uncertainty"]) as ds:
        assert ds.scales == (1 / 255,) and "entropy" in ds.descriptions[0]
    assert not list((tmp_path / "out").glob("*.aux.xml")) and not list((tmp_path / "out").glob("*.msk"))

    # areas = pixel count × pixel area (0.5 m × 0.5 m on the grid)
    counts = np.bincount(labels.ravel(), minlength=3)
    doc = json.loads(res.paths["areas_json"].read_text())
    assert doc["pixel_area_m2"] == 0.25 and doc["nodata_pixels"] == 0
    assert [r["pixels"] for r in doc["classes"]] == counts.tolist()
    assert [r["area_m2"] for r in doc["classes"]] == (counts * 0.25).tolist()
    assert doc["classes"] == res.areas
    assert res.size == (150, 170) and res.notes == []


def test_plain_tiffs_on_request_and_no_georeferencing_for_a_plain_input(tmp_path):
    model = _model_file(tmp_path)
    img = _geotiff(tmp_path / "field.tif", 40, 50)
    write_tiff(tmp_path / "plain.tif", img)
    res = segment_image(model, tmp_path / "plain.tif", tmp_path / "out", progress=False,
                        outputs=OutputOptions(cog=False))
    with rasterio.open(res.paths["labels"]) as ds:
        assert ds.crs is None and ds.transform.is_identity and ds.shape == (40, 50)
        assert ds.tags(ns="IMAGE_STRUCTURE").get("LAYOUT") != "COG"
    doc = json.loads(res.paths["areas_json"].read_text())
    assert doc["classes"][0]["area_m2"] is None and "--pixel-size" in doc["area_note"]
    assert res.notes == [doc["area_note"]]


def test_png_input_gives_palette_png_and_pixel_size_option(tmp_path):
    model = _model_file(tmp_path, bands=3)
    rgb = np.random.default_rng(1).integers(0, 255, (70, 90, 3), dtype=np.uint8)
    Image.fromarray(rgb).save(tmp_path / "plot.png")
    res = segment_image(model, tmp_path / "plot.png", tmp_path / "out", tile=32, pixel_size=0.1, progress=False)
    with Image.open(res.paths["labels"]) as im:  # read back with Pillow
        assert im.mode == "P" and res.paths["labels"].suffix == ".png"
        assert [tuple(im.getpalette()[3 * i:3 * i + 3]) for i in range(3)] == CLASSES.colors
        labels = np.asarray(im)
    assert Image.open(res.paths["uncertainty"]).mode == "L"
    counts = np.bincount(labels.ravel(), minlength=3)
    assert [r["area_m2"] for r in res.areas] == pytest.approx((counts * 0.1 * 0.1).tolist())


def test_cli_segment_prints_one_line_per_image(tmp_path, capsys):
    model = _model_file(tmp_path, bands=3)
    Image.fromarray(np.zeros((40, 40, 3), np.uint8)).save(tmp_path / "a.png")
    assert main(["segment", str(model), str(tmp_path / "a.png"), "--out", str(tmp_path / "o"), "--quiet",
                 "--tile", "32"]) == 0
    printed = capsys.readouterr()
    out, err = printed.out.strip().splitlines(), printed.err.strip().splitlines()
    assert len(out) == 1 and "a.png: 40x40 mapped" in out[0]  # results on stdout, one line per image
    notes = [line for line in err if "georeferencing" in line]  # remarks on stderr, said once, in one line
    assert len(notes) == 1 and notes[0].startswith("fcnkit: note: ") and notes[0].endswith(
        "a.png: no georeferencing: areas left empty; give the pixel side in metres with --pixel-size "
        "(pixel_size=) to get areas")


def _bad(tmp_path: Path, case: str) -> tuple[list[str], str]:
    model = _model_file(tmp_path)
    _geotiff(tmp_path / "good.tif", 60, 60)
    out = str(tmp_path / "out")
    if case == "missing model":
        return ["segment", str(tmp_path / "nope.safetensors"), str(tmp_path / "good.tif"), "--out", out], \
            "nope.safetensors: no such model file"
    if case == "unreadable model":
        (tmp_path / "junk.safetensors").write_bytes(b"\x00\x01 not a model")
        return ["segment", str(tmp_path / "junk.safetensors"), str(tmp_path / "good.tif"), "--out", out], \
            "junk.safetensors: not a safetensors model file"
    if case == "model from elsewhere":
        save_file({"w": torch.zeros(2)}, str(tmp_path / "other.safetensors"))
        return ["segment", str(tmp_path / "other.safetensors"), str(tmp_path / "good.tif"), "--out", out], \
            "other.safetensors: metadata key 'fcnkit.kind' is missing"
    if case == "wrong bands":
        Image.fromarray(np.zeros((40, 40, 3), np.uint8)).save(tmp_path / "rgb.png")
        return ["segment", str(model), str(tmp_path / "rgb.png"), "--out", out], \
            "rgb.png: has 3 bands but the model expects 4"
    if case == "truncated tiff":
        data = (tmp_path / "good.tif").read_bytes()
        (tmp_path / "cut.tif").write_bytes(data[: len(data) // 2])
        return ["segment", str(model), str(tmp_path / "cut.tif"), "--out", out], "cut.tif: "
    if case == "pixel limit":
        return ["segment", str(model), str(tmp_path / "good.tif"), "--out", out, "--max-pixels", "3599"], \
            "good.tif: 60x60 = 3,600 pixels is above the limit of 3,599"
    if case == "out is a file":
        (tmp_path / "out").write_text("keep me")
        return ["segment", str(model), str(tmp_path / "good.tif"), "--out", out], "out: is a file"
    if case == "tile below margin":
        return ["segment", str(model), str(tmp_path / "good.tif"), "--out", out, "--exact", "--tile", "16"], \
            "tile: 16 px is too small for exact tiling"
    raise AssertionError(case)


@pytest.mark.parametrize("case", ["missing model", "unreadable model", "model from elsewhere", "wrong bands",
                                  "truncated tiff", "pixel limit", "out is a file", "tile below margin"])
def test_bad_input_is_one_line_exit_2_and_nothing_written(tmp_path, capsys, case):
    argv, expected = _bad(tmp_path, case)
    assert main(argv) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and err.startswith("fcnkit segment: error: ") and expected in err, err
    out = tmp_path / "out"
    if case == "out is a file":
        assert out.read_text() == "keep me"
    elif out.exists():
        assert list(out.iterdir()) == []  # not even the hidden work folder is left


def test_folder_inputs_shard_over_ranks_and_refuse_clashing_names(tmp_path):
    model = _model_file(tmp_path, bands=3)
    (tmp_path / "imgs").mkdir()
    for name in ("a", "b", "c"):
        Image.fromarray(np.zeros((20, 20, 3), np.uint8)).save(tmp_path / "imgs" / f"{name}.png")
    assert [p.name for p in shard(find_images([tmp_path / "imgs"]), 1, 2)] == ["b.png"]
    res = segment_images(model, [tmp_path / "imgs"], tmp_path / "out", rank=0, world=2, tile=32, progress=False)
    assert [r.paths["labels"].name for r in res] == ["a.labels.png", "c.labels.png"]
    Image.fromarray(np.zeros((20, 20, 3), np.uint8)).save(tmp_path / "a.jpg")
    with pytest.raises(DataError, match="a.jpg: its outputs would overwrite those of"):
        find_images([tmp_path / "imgs", tmp_path / "a.jpg"])


KILL_RUN = """
import sys
from fcnkit.inference.segment import segment_image
segment_image(sys.argv[1], sys.argv[2], sys.argv[3], tile=64, batch=1, progress=False)
"""


def test_killed_run_leaves_no_file_under_a_final_name(tmp_path):
    # SIGKILL (no clean-up possible) while the outputs are being written: nothing may appear under a final name.
    model = _model_file(tmp_path)
    _geotiff(tmp_path / "big.tif", 600, 600)
    out = tmp_path / "out"
    proc = subprocess.Popen([sys.executable, "-c", KILL_RUN, str(model), str(tmp_path / "big.tif"), str(out)],
                            env={**os.environ, "OMP_NUM_THREADS": "1"})
    deadline = time.monotonic() + 300
    try:
        while time.monotonic() < deadline and proc.poll() is None:
            work = list(out.glob(".fcnkit-work-*/done")) if out.exists() else []
            if work and any(work[0].iterdir()):  # the first output is complete in the work folder
                break
            time.sleep(0.005)
        assert proc.poll() is None, "the run finished before it could be killed"
        os.kill(proc.pid, signal.SIGKILL)
        proc.wait()
    finally:
        if proc.poll() is None:
            proc.kill()
    assert _visible(out) == []
    assert open_raster(tmp_path / "big.tif", None).shape == (600, 600, 4)  # the input is untouched
