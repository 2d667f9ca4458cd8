"""The trainer end to end on tiny synthetic scenes: run folder contents, metrics, refusals, divergence, CLI."""

import csv
import importlib
import math

import numpy as np
import pytest
import torch
from safetensors import safe_open
from tiny_train import TINY, tiny

from fcnkit import ConfigError, ModelFileError, load_model, train
from fcnkit.cli import main
from fcnkit.config import config_from_dict, replace_section
from fcnkit.data.dataset import find_samples
from fcnkit.data.imageio import read_image, read_mask
from fcnkit.data.scenes import make_scenes
from fcnkit.evaluate import evaluate_images
from fcnkit.metrics import segmentation_scores
from fcnkit.train import split_samples


@pytest.fixture(scope="module")
def scenes(tmp_path_factory):
    return make_scenes(tmp_path_factory.mktemp("data") / "scenes", count=3, size=48, seed=7)


def test_split_is_deterministic_by_whole_image(scenes):
    samples, _ = find_samples(scenes)
    a = split_samples(samples, 0.34, seed=3)
    assert a == split_samples(list(reversed(samples)), 0.34, seed=3)
    assert len(a[1]) == 1 and {s.stem for s in a[0] + a[1]} == {s.stem for s in samples}
    assert split_samples(samples, 0.0, 3) == (sorted(samples, key=lambda s: s.stem), [])
    assert len(split_samples(samples[:1], 0.5, 3)[1]) == 0  # one image: nothing left to validate on


def test_run_folder_model_and_metrics(scenes, tmp_path):
    cfg = config_from_dict(TINY)
    run = tmp_path / "run"
    result = train(cfg, scenes, run, progress=False)
    assert result.epochs == 2 and 1 <= result.best_epoch <= 2
    assert sorted(p.name for p in run.iterdir()) == ["metrics.csv", "model.safetensors", "resume.pt"]
    rows = list(csv.DictReader((run / "metrics.csv").open()))
    assert [int(r["epoch"]) for r in rows] == [1, 2]
    for key in ("seconds", "lr", "train_loss", "val_loss", "val_pixel_acc", "val_miou", "pixels_per_s",
                "iou_water"):
        assert all(math.isfinite(float(r[key])) for r in rows if key != "iou_water") and key in rows[0]
    assert float(rows[1]["seconds"]) > float(rows[0]["seconds"]) > 0
    # 2 epochs × 4 steps, one warm-up epoch then cosine to 0 (fcnkit.schedules): last lr is that of step 7
    assert float(rows[1]["lr"]) == pytest.approx(5e-3 * 0.5 * (1 + math.cos(math.pi * 3 / 4)), rel=1e-5)

    loaded = load_model(run / "model.safetensors")
    assert loaded.meta.classes.names[1] == "water" and len(loaded.meta.mean) == 4
    assert loaded.meta.extra["epoch"] == result.best_epoch
    # the CSV's val mIoU is the metric of the saved best model on the validation image, recomputed here
    # independently (segmentation_scores is itself checked against scikit-learn in test_metrics)
    samples, classes = find_samples(scenes)
    val = split_samples(samples, 0.34, 0)[1]
    images = [read_image(s.image) for s in val]
    masks = [read_mask(s.mask, classes) for s in val]
    cm, _, _ = evaluate_images(loaded.model, images, masks, mean=loaded.meta.mean, std=loaded.meta.std,
                               num_classes=5)
    best_row = rows[result.best_epoch - 1]
    assert segmentation_scores(cm)["mean_iou"] == pytest.approx(float(best_row["val_miou"]), rel=1e-4)
    assert result.best_miou == pytest.approx(max(float(r["val_miou"]) for r in rows), rel=1e-6)

    # a second fresh run into the same folder is refused; so is resuming with another config
    with pytest.raises(ModelFileError, match="already holds a run"):
        train(cfg, scenes, run, progress=False)
    with pytest.raises(ModelFileError, match=r"resume\.pt: resume point belongs to a different config "
                                             r"\(train\.lr was 0\.005, now 0\.001\)"):
        train(replace_section(cfg, "train", lr=1e-3), scenes, run, resume=True, progress=False)
    # resuming a finished run changes nothing (a speed-only setting may differ)
    before = (run / "model.safetensors").read_bytes()
    again = train(replace_section(cfg, "train", threads=2), scenes, run, resume=True, progress=False)
    assert again.epochs == 2 and (run / "model.safetensors").read_bytes() == before


def test_sgd_poly_bf16_nchw_and_no_validation(scenes, tmp_path):
    t = {"optimizer": "sgd", "schedule": "poly", "bf16": True, "channels_last": False, "val_fraction": 0.0,
         "class_weights": "none", "dice": 0.0, "epochs": 1}
    result = train(config_from_dict(tiny(train=t)), scenes, tmp_path / "run", progress=False)
    assert math.isnan(result.best_miou) and result.best_epoch == 1
    assert load_model(tmp_path / "run" / "model.safetensors").meta.extra["epoch"] == 1


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
        train(cfg, scenes, run, progress=False)
    assert "\n" not in str(e.value)
    rows = list(csv.DictReader((run / "metrics.csv").open()))
    assert len(rows) == 1
    with safe_open(str(run / "model.safetensors"), framework="pt") as f:
        assert all(torch.isfinite(f.get_tensor(k)).all() for k in f.keys())  # noqa: SIM118
    state = torch.load(run / "resume.pt", weights_only=True)
    assert state["progress"]["epoch"] == 1 and state["progress"]["batch"] == 0


def test_cli_errors_are_one_line(scenes, tmp_path, capsys):
    cfg = tmp_path / "c.toml"
    cfg.write_text('[model]\nbands = 3\nclasses = 5\nwidths = [8]\n[train]\nepochs = 1\n')
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
    first = train(config_from_dict(tiny(train={"epochs": 1})), scenes, tmp_path / "a", progress=False)
    other = config_from_dict(tiny(model={"widths": [4, 4]}, train={"epochs": 1, "lr": 1e-9, "warmup": 0}))
    second = train(other, scenes, tmp_path / "b", init=first.model_path, progress=False)
    a, b = load_model(first.model_path), load_model(second.model_path)
    assert b.meta.config["model"]["widths"] == [8, 16]  # the init file's net replaced [model]
    assert b.meta.mean == a.meta.mean and b.meta.extra["init"] == str(first.model_path)
    conv = "body.encoder.stages.0.0.0.weight"
    assert np.allclose(a.model.state_dict()[conv], b.model.state_dict()[conv], atol=1e-6)  # lr ≈ 0


def test_early_stopping_keeps_the_best_epoch(scenes, tmp_path, monkeypatch):
    tr = importlib.import_module("fcnkit.train")
    scripted = iter([0.5, 0.6, 0.55, 0.52, 0.7, 0.8])  # validation mIoU per epoch, as if measured
    real = tr.segmentation_scores
    monkeypatch.setattr(tr, "segmentation_scores", lambda cm: {**real(cm), "mean_iou": next(scripted)})
    cfg = config_from_dict(tiny(train={"epochs": 6, "patience": 2}))
    result = train(cfg, scenes, tmp_path / "run", progress=False)
    # epochs 3 and 4 do not beat epoch 2: patience 2 stops the run there
    assert (result.epochs, result.best_epoch, result.best_miou, result.stopped_early) == (4, 2, 0.6, True)
    assert load_model(result.model_path).meta.extra == {"epoch": 2, "val_mean_iou": 0.6}
    again = train(cfg, scenes, tmp_path / "run", resume=True, progress=False)  # a stopped run stays stopped
    assert again.epochs == 4
