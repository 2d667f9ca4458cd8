"""Numbers that are checked: NaN and inf never become plausible maps on any scan, images are compared with the
range the model was trained on, a diverging run says what is not finite, and metrics.csv keeps its columns
whatever the class names."""

from __future__ import annotations

import csv
import math
import warnings

import numpy as np
import pytest
import torch
from bad_inputs import run_cli, scene, write_dataset, write_model, write_tiff
from hypothesis import assume, given, settings
from hypothesis import strategies as st
from model_strategies import as_model, randomise_statistics

from fcnkit import Model, build_model
from fcnkit.config import config_from_dict
from fcnkit.data.classes import ClassTable
from fcnkit.data.raster import ArrayRaster
from fcnkit.errors import DataError, ModelFileError
from fcnkit.inference.scan import predict_scores
from fcnkit.inputrange import NOTE_SPANS, REFUSE_SPANS, RangeCheck, RangeWarning, training_stats
from fcnkit.runstate import write_metrics

pytestmark = pytest.mark.usefixtures("torch_one_thread")

NET = {"model": {"bands": 3, "num_classes": 3, "widths": [4, 8], "blocks": [1, 1], "head": [8],
                 "fusion": "sum", "min_size": 8}}


def _net() -> Model:
    return as_model(randomise_statistics(build_model(config_from_dict(NET)), 3, deconv=True))


# --- NaN and inf: one answer on every scan ----------------------------------------------------------------------

@pytest.mark.parametrize("value", [math.nan, math.inf])
def test_row_streaming_keeps_nan_where_the_whole_image_pass_has_it(value):
    # Reference: the model's whole-image forward pass (torch: F.conv2d then F.relu, which propagate NaN and turn
    # inf into NaN where +inf and -inf products meet). Row streaming fuses each ReLU into its oneDNN convolution,
    # whose ReLU alone would give 0 there: from the band holding the bad pixel on, it must not.
    from fcnkit.inference.rowstream import RowStreamer

    model = _net()
    img = np.random.default_rng(0).random((40, 36, 3)).astype(np.float32)
    img[17, 9, 1] = value
    with torch.no_grad():
        ref = model(torch.from_numpy(img).permute(2, 0, 1)[None])[0]
    got = torch.cat([b for _, b in RowStreamer(model).stream(ArrayRaster(img), logits=True, rows=8)], dim=1)
    assert not ref.isfinite().all()
    assert torch.equal(got.isfinite(), ref.isfinite())
    torch.testing.assert_close(got, ref, equal_nan=True, rtol=0, atol=1e-4)


@pytest.mark.parametrize("scan", ["rows", "whole", "tiles"])
def test_every_scan_refuses_a_nan_activation_alike(scan):
    # The readers refuse NaN pixels; an array given straight to the API is the way a NaN activation can still
    # arise. Reference: the model's own forward pass on the whole image (torch) has NaN scores there.
    model = _net()
    img = np.random.default_rng(0).random((40, 36, 3)).astype(np.float32)
    img[17, 9, 1] = np.nan
    with torch.no_grad():
        ref = model(torch.from_numpy(img).permute(2, 0, 1)[None])
    assert ref.isnan().any()
    with pytest.raises(DataError, match=r"image: the model's class scores are NaN or infinite at row \d+"):
        predict_scores(model, ArrayRaster(img), scan=scan, **({"tile": 16} if scan == "tiles" else {}))


@pytest.mark.parametrize("scan", ["rows", "whole", "tiles"])
def test_an_infinite_weight_never_gives_a_certain_map(tmp_path, scan):
    # An inf weight made confidence 1 and uncertainty 0 everywhere. A file holding one is refused when it loads;
    # a model changed in memory is refused by every scan, as its scores are not finite (torch: inf · x − inf …).
    path = write_model(tmp_path / "m.safetensors")
    model = Model.load(path)
    with torch.no_grad():
        next(model.net.parameters()).view(-1)[0] = math.inf
    with pytest.raises(DataError, match="NaN or infinite"):
        predict_scores(model, scene(0, 32)[0], scan=scan, **({"tile": 16} if scan == "tiles" else {}))
    model.save(tmp_path / "inf.safetensors")
    with pytest.raises(ModelFileError, match=r"inf\.safetensors: tensor .* holds 1 NaN or infinite values"):
        Model.load(tmp_path / "inf.safetensors")


# --- the input range -------------------------------------------------------------------------------------------

def test_training_records_the_input_range_of_its_data(tmp_path):
    # Reference: numpy's min, max and percentile over every pixel of the training images.
    rng = np.random.default_rng(1)
    images = [rng.integers(10, 240, (24, 24, 3)).astype(np.uint8) for _ in range(3)]
    masks = [rng.integers(0, 3, (24, 24)).astype(np.uint8) for _ in range(3)]
    model = Model.build(dict(NET, train={"epochs": 1, "patch": 16, "batch": 2, "patches_per_epoch": 2,
                                         "threads": 1}))
    model.fit(images, masks, out_dir=tmp_path / "run", progress=False)
    allpix = np.concatenate([x.reshape(-1, 3) for x in images]).astype(np.float64)
    saved = Model.load(tmp_path / "run" / "model.safetensors").input_stats
    for stats in (model.input_stats, saved):
        assert stats["dtype"] == "uint8" and stats["pixels"] == 3 * 24 * 24
        np.testing.assert_array_equal(stats["min"], allpix.min(0))
        np.testing.assert_array_equal(stats["max"], allpix.max(0))
        np.testing.assert_allclose(stats["p01"], np.percentile(allpix, 1, axis=0))
        np.testing.assert_allclose(stats["p99"], np.percentile(allpix, 99, axis=0))


@settings(max_examples=80, deadline=None)
@given(lo=st.floats(-1e4, 1e4), span=st.floats(0.01, 1e4), values=st.lists(st.floats(-1e12, 1e12), min_size=1,
       max_size=20))
def test_range_check_notes_and_refuses_by_its_stated_thresholds(lo, span, values):
    # The module's contract, computed here from its definition: refused when a value lies more than
    # REFUSE_SPANS training spans outside [min, max]; one note when more than NOTE_SPANS; silent otherwise.
    hi = lo + span
    img = np.array(values, np.float64).reshape(1, -1, 1)
    outside = float(np.maximum(lo - img, img - hi).max()) / span
    assume(all(abs(outside - t) > 1e-6 * t for t in (NOTE_SPANS, REFUSE_SPANS)))  # no rounding ties
    notes: list[str] = []
    check = RangeCheck(ArrayRaster(img), {"dtype": "float64", "min": [lo], "max": [hi]}, where="x.tif", model="m",
                       note=notes.append)
    if outside > REFUSE_SPANS:
        with pytest.raises(DataError, match=r"x\.tif: band 1 holds .* far outside"):
            check.read(0, 1, 0, img.shape[1])
    else:
        check.read(0, 1, 0, img.shape[1])
        check.read(0, 1, 0, img.shape[1])
        assert len(notes) == (1 if outside > NOTE_SPANS else 0)


def _uint8_model(tmp_path):
    """A model whose recorded training range is that of 8-bit pixels."""
    path = write_model(tmp_path / "m.safetensors")
    model = Model.load(path)
    model.input_stats = training_stats([scene(i)[0] for i in range(3)])
    model.save(path)
    return path


def test_sixteen_bit_pixels_into_an_eight_bit_model_are_noted_once(tmp_path):
    # uint16 reflectances 0..10000 into a model trained on uint8 pixels: mapped, with one note naming the image.
    model = _uint8_model(tmp_path)
    img = (scene(0, 32)[0].astype(np.uint16) * 39)
    write_tiff(tmp_path / "refl.tif", img)
    code, out, err = run_cli(["segment", model, tmp_path / "refl.tif", "--out", tmp_path / "maps", "--quiet"])
    assert code == 0, err
    notes = [line for line in err.splitlines() if line.startswith("fcnkit: note:") and "outside the range" in line]
    assert len(notes) == 1 and "refl.tif: band" in notes[0], err
    assert "(uint16)" in notes[0] and "(uint8)" in notes[0]
    assert (tmp_path / "maps" / "refl.labels.tif").exists() or (tmp_path / "maps" / "refl.labels.png").exists()
    write_dataset(tmp_path / "data")
    for p in (tmp_path / "data" / "images").iterdir():
        write_tiff(p.with_suffix(".tif"), scene(int(p.stem[1:]))[0].astype(np.uint16) * 39)
        p.unlink()
    code, out, err = run_cli(["evaluate", model, "--data", tmp_path / "data", "--out", tmp_path / "e.json",
                              "--quiet"])
    assert code == 0, err
    assert sum(line.startswith("fcnkit: note:") and "outside the range" in line for line in err.splitlines()) == 3
    with warnings.catch_warnings(record=True) as seen:  # the API without a note callback: a warning
        warnings.simplefilter("always")
        Model.load(model).predict(img)
    assert [w for w in seen if issubclass(w.category, RangeWarning)]


def test_pixels_of_1e30_are_refused_and_eight_bit_images_pass_silently(tmp_path):
    model = _uint8_model(tmp_path)
    far = scene(1, 32)[0].astype(np.float32)
    far[5, 7, 0] = 1e30
    write_tiff(tmp_path / "far.tif", far)
    code, _, err = run_cli(["segment", model, tmp_path / "far.tif", "--out", tmp_path / "maps", "--quiet"])
    assert code == 2 and "far.tif: band 1 holds 1e+30, far outside the range" in err, err
    assert not (tmp_path / "maps").exists() or not list((tmp_path / "maps").iterdir())
    with warnings.catch_warnings():
        warnings.simplefilter("error", RangeWarning)
        Model.load(model).predict(scene(2, 32)[0])  # 8-bit pixels: inside, nothing said


# --- a diverging run says what is not finite ------------------------------------------------------------------

def test_nan_in_training_arrays_is_named_before_training(tmp_path):
    images = [scene(i)[0].astype(np.float32) for i in range(3)]
    images[1][2, 3, 0] = np.nan
    masks = [scene(i)[1] for i in range(3)]
    with pytest.raises(DataError, match=r"images\[1\]: 1 NaN or infinite pixel values"):
        Model.build(NET).fit(images, masks, out_dir=tmp_path / "run", progress=False)
    assert not (tmp_path / "run").exists()


# --- metrics.csv whatever the class names --------------------------------------------------------------------

def test_class_names_with_commas_quotes_and_line_breaks_keep_their_columns(tmp_path):
    # Reference: Python's csv module reading the file back (RFC 4180 quoting).
    names = ["wet, grass", 'the "old" road', "two\nlines"]
    images, masks = [scene(i)[0] for i in range(3)], [scene(i)[1] for i in range(3)]
    model = Model.build(dict(NET, train={"epochs": 2, "patch": 16, "batch": 2, "patches_per_epoch": 2,
                                         "threads": 1, "val_fraction": 0.34}), classes=ClassTable.generic(names))
    model.fit(images, masks, out_dir=tmp_path / "run", progress=False)
    with open(tmp_path / "run" / "metrics.csv", newline="") as f:
        rows = list(csv.reader(f))
    header = rows[0]
    assert all(len(r) == len(header) for r in rows) and len(rows) == 3
    for name in names:
        assert f"iou_{name.replace(' ', '_')}" in header
    epoch = [dict(zip(header, r, strict=True)) for r in rows[1:]]
    assert [r["epoch"] for r in epoch] == ["1", "2"]
    assert all(0 <= float(r["val_mean_iou"]) <= 1 for r in epoch)


@settings(max_examples=50, deadline=None)
@given(keys=st.lists(st.text(min_size=1, max_size=12), min_size=1, max_size=5, unique=True),
       values=st.lists(st.one_of(st.integers(-5, 5), st.floats(allow_nan=False, allow_infinity=False),
                                 st.text(max_size=8)), min_size=5, max_size=5))
def test_metrics_csv_round_trips_through_the_csv_module(tmp_path_factory, keys, values):
    # Reference: csv.reader (Python's csv module) parses back exactly the header and the cells written.
    path = tmp_path_factory.mktemp("m") / "metrics.csv"
    row = dict(zip(keys, values, strict=False))
    write_metrics(path, [row, row])
    with open(path, newline="", encoding="utf-8") as f:
        back = list(csv.reader(f))
    assert back[0] == keys
    assert back[1] == back[2] and len(back[1]) == len(keys)


@settings(max_examples=60, deadline=None)
@given(n=st.integers(1, 300), bands=st.integers(1, 6), seed=st.integers(0, 1000))
def test_band_extremes_equal_numpy_min_and_max(n, bands, seed):
    # Reference: numpy's min and max along axis 0.
    from fcnkit.inputrange import band_extremes

    flat = np.random.default_rng(seed).normal(size=(n, bands)).astype(np.float32)
    lo, hi = band_extremes(flat, lanes=16)
    np.testing.assert_array_equal(lo, flat.min(0))
    np.testing.assert_array_equal(hi, flat.max(0))
