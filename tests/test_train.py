"""The trainer end to end on tiny synthetic scenes: run folder contents, metrics, refusals, divergence, CLI."""

import csv
import importlib
import math

import numpy as np
import pytest
import torch
from safetensors import safe_open
from tiny_train import TINY, fit, tiny

from fcnkit import ConfigError, Model, ModelFileError
from fcnkit.cli import main
from fcnkit.config import config_from_dict, replace_section
from fcnkit.data.dataset import find_samples
from fcnkit.data.imageio import read_image, read_mask
from fcnkit.data.scenes import make_scenes
from fcnkit.metrics import segmentation_scores
from fcnkit.train import split_indices, validate


@pytest.fixture(scope="module")
def scenes(tmp_path_factory):
    return make_scenes(tmp_path_factory.mktemp("data") / "scenes", count=3, size=48, seed=7)


def _validation_samples(scenes, fraction, seed):
    """The validation images of a run, as training splits them (images sorted by stem)."""
    samples, _ = find_samples(scenes)
    ordered = sorted(samples, key=lambda s: s.stem)
    return [ordered[i] for i in split_indices(len(ordered), fraction, seed)[1]]


def test_split_is_deterministic_by_whole_image():
    a = split_indices(3, 0.34, seed=3)
    assert a == split_indices(3, 0.34, seed=3)
    assert len(a[1]) == 1 and sorted(a[0] + a[1]) == [0, 1, 2]
    assert split_indices(3, 0.0, 3) == ([0, 1, 2], [])
    assert len(split_indices(1, 0.5, 3)[1]) == 0  # one image: nothing left to validate on


def test_run_folder_model_and_metrics(scenes, tmp_path):
    cfg = config_from_dict(TINY)
    run = tmp_path / "run"
    result = fit(cfg, scenes, run, progress=False)
    assert result.epochs == 2 and 1 <= result.best_epoch <= 2
    assert sorted(p.name for p in run.iterdir()) == ["metrics.csv", "model.safetensors", "resume.pt"]
    rows = list(csv.DictReader((run / "metrics.csv").open()))
    assert [int(r["epoch"]) for r in rows] == [1, 2]
    for key in ("seconds", "lr", "train_loss", "val_loss", "val_pixel_accuracy", "val_mean_iou", "pixels_per_second",
                "iou_water"):
        assert all(math.isfinite(float(r[key])) for r in rows if key != "iou_water") and key in rows[0]
    assert float(rows[1]["seconds"]) > float(rows[0]["seconds"]) > 0
    # 2 epochs × 4 steps, one warm-up epoch then cosine to 0 (fcnkit.schedules): last lr is that of step 7
    assert float(rows[1]["lr"]) == pytest.approx(5e-3 * 0.5 * (1 + math.cos(math.pi * 3 / 4)), rel=1e-5)

    loaded = Model.load(run / "model.safetensors")
    assert loaded.classes.names[1] == "water" and loaded.bands == 4
    assert loaded.extra["epoch"] == result.best_epoch
    # the CSV's val mIoU is the metric of the saved best model on the validation image, recomputed here
    # independently (segmentation_scores is itself checked against scikit-learn in test_metrics)
    _, classes = find_samples(scenes)
    val = _validation_samples(scenes, 0.34, 0)
    images = [read_image(s.image) for s in val]
    masks = [read_mask(s.mask, classes) for s in val]
    cm, _, _ = validate(loaded, images, masks)
    best_row = rows[result.best_epoch - 1]
    assert segmentation_scores(cm)["mean_iou"] == pytest.approx(float(best_row["val_mean_iou"]), rel=1e-4)
    assert result.best_mean_iou == pytest.approx(max(float(r["val_mean_iou"]) for r in rows), rel=1e-6)

    # a second fresh run into the same folder is refused; so is resuming with another config
    with pytest.raises(ModelFileError, match="already holds a run"):
        fit(cfg, scenes, run, progress=False)
    with pytest.raises(ModelFileError, match=r"resume\.pt: resume point belongs to a different config "
                                             r"\(train\.lr was 0\.005, now 0\.001\)"):
        fit(replace_section(cfg, "train", lr=1e-3), scenes, run, resume=True, progress=False)
    # resuming a finished run changes nothing (a speed-only setting may differ)
    before = (run / "model.safetensors").read_bytes()
    again = fit(replace_section(cfg, "train", threads=2), scenes, run, resume=True, progress=False)
    assert again.epochs == 2 and (run / "model.safetensors").read_bytes() == before


def test_sgd_poly_bf16_nchw_and_no_validation(scenes, tmp_path):
    t = {"optimizer": "sgd", "schedule": "poly", "bf16": True, "channels_last": False, "val_fraction": 0.0,
         "class_weights": "none", "dice": 0.0, "epochs": 1}
    result = fit(config_from_dict(tiny(train=t)), scenes, tmp_path / "run", progress=False)
    assert math.isnan(result.best_mean_iou) and result.best_epoch == 1
    assert Model.load(tmp_path / "run" / "model.safetensors").extra["epoch"] == 1


def test_nan_loss_stops_and_keeps_last_good_files(scenes, tmp_path, monkeypatch):
    tr = importlib.import_module("fcnkit.train")  # the module (fcnkit.train is also the function's name)
    cfg = config_from_dict(TINY)
    real, calls = tr.segmentation_loss, []

    def fails_in_epoch_two(*a, **k):
        calls.append(1)
        loss = real(*a, **k)
        return loss * math.nan if len(calls) == 6 else loss  # 4 batches per epoch: 2nd batch of epoch 2

    monkeypatch.setattr(tr, "segmentation_loss", fails_in_epoch_two)
    run = tmp_path / "run"
    with pytest.raises(ConfigError, match=r"train\.lr: the loss became nan at epoch 2, batch 2") as e:
        fit(cfg, scenes, run, progress=False)
    assert "\n" not in str(e.value)
    rows = list(csv.DictReader((run / "metrics.csv").open()))
    assert len(rows) == 1
    with safe_open(str(run / "model.safetensors"), framework="pt") as f:
        assert all(torch.isfinite(f.get_tensor(k)).all() for k in f.keys())  # noqa: SIM118
    state = torch.load(run / "resume.pt", weights_only=True)
    assert state["progress"]["epoch"] == 1 and state["progress"]["batch"] == 0


def test_cli_errors_are_one_line(scenes, tmp_path, capsys):
    cfg = tmp_path / "c.toml"
    cfg.write_text('[model]\nbands = 3\nnum_classes = 5\nwidths = [8]\n[train]\nepochs = 1\n')
    assert main(["train", str(cfg), "--data", str(tmp_path / "nowhere"), "--out", str(tmp_path / "r")]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "nowhere" in err
    assert main(["train", str(cfg), "--data", str(scenes), "--out", str(tmp_path / "r"), "--quiet"]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "model.bands" in err and "has 4" in err
    assert not (tmp_path / "r").exists()  # nothing written for a refused run
    assert main(["train", str(cfg), "--data", str(scenes), "--out", str(tmp_path / "r"), "--epochs", "0"]) == 2
    assert "train.epochs" in capsys.readouterr().err


def test_init_fine_tunes_a_model_file(scenes, tmp_path):
    first = fit(config_from_dict(tiny(train={"epochs": 1})), scenes, tmp_path / "a", progress=False)
    other = config_from_dict(tiny(model={"widths": [4, 4]}, train={"epochs": 1, "lr": 1e-9, "warmup": 0}))
    second = fit(other, scenes, tmp_path / "b", init=first.model_path, progress=False)
    a, b = Model.load(first.model_path), Model.load(second.model_path)
    assert b.config["model"]["widths"] == [8, 16]  # the init file's net, not the config's [model]
    assert b.config["train"]["lr"] == 1e-9  # but the config's [train] settings
    assert b.normalisation == a.normalisation and b.extra["init"] == str(first.model_path)
    conv = "body.encoder.stages.0.0.0.weight"
    assert np.allclose(a.net.state_dict()[conv], b.net.state_dict()[conv], atol=1e-6)  # lr ≈ 0


def test_early_stopping_keeps_the_best_epoch(scenes, tmp_path, monkeypatch):
    tr = importlib.import_module("fcnkit.train")
    scripted = iter([0.5, 0.6, 0.55, 0.52, 0.7, 0.8])  # validation mIoU per epoch, as if measured
    real = tr.segmentation_scores
    monkeypatch.setattr(tr, "segmentation_scores", lambda cm: {**real(cm), "mean_iou": next(scripted)})
    cfg = config_from_dict(tiny(train={"epochs": 6, "patience": 2}))
    result = fit(cfg, scenes, tmp_path / "run", progress=False)
    # epochs 3 and 4 do not beat epoch 2: patience 2 stops the run there
    assert (result.epochs, result.best_epoch, result.best_mean_iou, result.stopped_early) == (4, 2, 0.6, True)
    extra = Model.load(result.model_path).extra
    assert (extra["epoch"], extra["val_mean_iou"]) == (2, 0.6)
    again = fit(cfg, scenes, tmp_path / "run", resume=True, progress=False)  # a stopped run stays stopped
    assert again.epochs == 4


def test_arrays_in_classes_and_bands_from_the_data(tmp_path):
    """A notebook's path: a config without bands or classes, image and mask arrays, no run folder."""
    rng = np.random.default_rng(0)
    images = [rng.integers(0, 255, (40, 48, 2)).astype(np.uint8) for _ in range(3)]
    masks = [(im[..., 0] > 128).astype(np.uint8) for im in images]
    masks[0][:5] = 255  # unlabelled rows
    table = {k: v for k, v in TINY["model"].items() if k not in ("bands", "classes")}
    model = Model.build({"model": table, "train": {**TINY["train"], "epochs": 1}})
    assert not model.built
    model.fit(images, masks, progress=False)
    assert model.built and model.bands == 2 and model.classes.names == ["class 0", "class 1"]
    labels = model.predict(images[1])
    assert labels.shape == (40, 48) and labels.dtype == np.uint8 and set(np.unique(labels)) <= {0, 1}
    path = model.save(tmp_path / "m.safetensors")
    again = Model.load(path)
    np.testing.assert_array_equal(again.predict(images[1]), labels)
    assert again.config["model"]["bands"] == 2 and again.config["train"]["epochs"] == 1


def test_resume_with_other_data_is_refused(scenes, tmp_path):
    cfg = config_from_dict(tiny(train={"epochs": 1}))
    fit(cfg, scenes, tmp_path / "run", progress=False)
    other = make_scenes(tmp_path / "other", count=3, size=48, seed=8)
    with pytest.raises(ModelFileError, match="resume point belongs to other training data"):
        fit(cfg, other, tmp_path / "run", resume=True, progress=False)
