"""`evaluate`: scores of a model file on a labelled folder, through the tiled path, as JSON and HTML."""

from __future__ import annotations

import json
from html.parser import HTMLParser

import numpy as np
import pytest
import torch
from PIL import Image
from sklearn.metrics import (
    accuracy_score,
    balanced_accuracy_score,
    f1_score,
    jaccard_score,
    precision_score,
    recall_score,
)

from fcnkit import Model, build_model
from fcnkit.cli import main
from fcnkit.config import config_from_dict, config_to_dict
from fcnkit.data.classes import ClassInfo, ClassTable, write_classes
from fcnkit.data.imageio import write_label_png
from fcnkit.errors import DataError
from fcnkit.evaluate import evaluate
from fcnkit.inference.scan import predict_scores

CLASSES = ClassTable((ClassInfo(0, "sand", (200, 180, 120)), ClassInfo(1, "pool", (40, 90, 200)),
                      ClassInfo(2, "moss", (40, 160, 60))))
MEAN, STD = [120.0, 110.0, 100.0], [50.0, 45.0, 40.0]
SIZES = [(70, 90), (83, 61), (40, 100)]


def _dataset(root, classes=CLASSES):
    (root / "images").mkdir(parents=True)
    (root / "masks").mkdir()
    write_classes(root / "classes.toml", classes)
    rng = np.random.default_rng(0)
    for i, (h, w) in enumerate(SIZES):
        mask = rng.integers(0, 3, (h, w)).astype(np.uint8)
        mask[: 4 + i] = 255  # unlabelled rows
        colours = np.array(CLASSES.colors)[np.minimum(mask, 2)]
        image = (colours + rng.normal(0, 25, (h, w, 3))).clip(0, 255).astype(np.uint8)
        Image.fromarray(image).save(root / "images" / f"plot_{i}.png")
        write_label_png(root / "masks" / f"plot_{i}.png", mask, CLASSES)
    return root


@pytest.fixture
def model_file(tmp_path):
    cfg = config_from_dict({"model": {"bands": 3, "num_classes": 3, "widths": [8, 16], "blocks": [1, 1],
                                      "fusion": "sum", "min_size": 16}})
    torch.manual_seed(0)
    net = build_model(cfg)
    path = tmp_path / "model.safetensors"
    Model(net, classes=CLASSES, mean=MEAN, std=STD, config=config_to_dict(cfg)).save(path)
    return path


def _predictions(model_path, data_dir, with_confidence=False):
    """Labels (and top-class probabilities) from the tiled path itself, so the check is on the arithmetic of
    the scores."""
    from fcnkit.data.imageio import read_image, read_mask

    loaded = Model.load(model_path)
    truth, pred, conf = [], [], []
    for i in range(len(SIZES)):
        image = read_image(data_dir / "images" / f"plot_{i}.png")
        probs = predict_scores(loaded, image, tile=64)
        truth.append(read_mask(data_dir / "masks" / f"plot_{i}.png", CLASSES).ravel())
        pred.append(probs.argmax(0).ravel())
        conf.append(probs.max(0).ravel())
    t, p, c = np.concatenate(truth), np.concatenate(pred), np.concatenate(conf)
    keep = t != 255
    return (t[keep], p[keep], c[keep]) if with_confidence else (t[keep], p[keep])


def test_json_scores_equal_scikit_learn(tmp_path, model_file):
    data = _dataset(tmp_path / "data")
    result = evaluate(model_file, data, json_path=tmp_path / "scores.json", tile=64, progress=False)
    saved = json.loads((tmp_path / "scores.json").read_text())
    t, p = _predictions(model_file, data)
    labels = [0, 1, 2]
    # Reference: scikit-learn on the same labelled pixels (Long et al. 2015's mean accuracy = macro recall =
    # balanced accuracy; frequency-weighted IoU = support-weighted Jaccard).
    assert saved["scores"]["pixel_accuracy"] == pytest.approx(accuracy_score(t, p), abs=1e-12)
    assert saved["scores"]["mean_accuracy"] == pytest.approx(balanced_accuracy_score(t, p), abs=1e-12)
    assert saved["scores"]["mean_iou"] == pytest.approx(jaccard_score(t, p, labels=labels, average="macro"),
                                                        abs=1e-12)
    assert saved["scores"]["fw_iou"] == pytest.approx(jaccard_score(t, p, labels=labels, average="weighted"),
                                                      abs=1e-12)
    assert saved["scores"]["iou"] == pytest.approx(list(jaccard_score(t, p, labels=labels, average=None)))
    assert saved["scores"]["dice"] == pytest.approx(list(f1_score(t, p, labels=labels, average=None)))
    assert saved["scores"]["recall"] == pytest.approx(list(recall_score(t, p, labels=labels, average=None)))
    assert saved["scores"]["precision"] == pytest.approx(list(precision_score(t, p, labels=labels, average=None)))
    assert saved["scores"]["predicted"] == np.bincount(p, minlength=3).tolist()
    assert np.array_equal(saved["confusion_matrix"], result.confusion)
    # calibration here: ECE over 15 equal-width confidence bins, written out from Guo et al. 2017, eq. (3)
    _, _, c = _predictions(model_file, data, with_confidence=True)
    bins = np.clip(np.ceil(c * 15).astype(int) - 1, 0, 14)
    ece = sum(abs((t[bins == m] == p[bins == m]).mean() - c[bins == m].mean()) * (bins == m).mean()
              for m in range(15) if (bins == m).any())
    assert saved["calibration"]["ece"] == pytest.approx(ece, abs=1e-4)  # float32 softmax in both
    iv = saved["mean_iou_interval"]
    assert iv["images"] == 3 and iv["low"] <= saved["scores"]["mean_iou"] <= iv["high"]
    assert sum(im["labelled_pixels"] for im in saved["images"]) == t.size == result.confusion.sum()


class _Images(HTMLParser):
    def __init__(self):
        super().__init__()
        self.srcs, self.json, self._in = [], "", False

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if tag == "img":
            self.srcs.append(a["src"])
        self._in = tag == "script" and a.get("id") == "fcnkit-metrics"

    def handle_data(self, data):
        if self._in:
            self.json += data


def test_report_and_cli(tmp_path, model_file, capsys):
    data = _dataset(tmp_path / "data")
    (tmp_path / "metrics.csv").write_text("epoch,train_loss,val_miou,lr\n1,1.0,0.4,0.001\n2,0.7,0.6,0.0005\n")
    code = main(["evaluate", str(model_file), "--data", str(data), "--out", str(tmp_path / "e.json"),
                 "--report", str(tmp_path / "r.html"), "--tile", "64", "--examples", "2", "--quiet"])
    assert code == 0
    printed = capsys.readouterr().out
    for phrase in ("pixel accuracy", "mean IoU", "frequency-weighted IoU", "sand", "pool", "moss", "Dice"):
        assert phrase in printed
    page = _Images()
    page.feed((tmp_path / "r.html").read_text())
    # confusion matrix + IoU bars + reliability diagram + training curves (metrics.csv beside the model)
    # + 2 examples x 5 panels
    assert len(page.srcs) == 4 + 2 * 5 and all(s.startswith("data:image/png;base64,") for s in page.srcs)
    assert json.loads(page.json)["scores"] == json.loads((tmp_path / "e.json").read_text())["scores"]


def test_onnxruntime_engine_agrees_with_torch(tmp_path, model_file):
    data = _dataset(tmp_path / "data")
    a = evaluate(model_file, data, tile=64, progress=False)
    b = evaluate(model_file, data, tile=64, engine="onnxruntime", progress=False)
    # the same net through another runtime: at most a handful of near-tie pixels may flip
    assert np.abs(a.confusion - b.confusion).sum() <= 4


def _one_line_exit_2(capsys, argv):
    assert main(argv) == 2
    err = capsys.readouterr().err.strip()
    assert err.count("\n") == 0 and "Traceback" not in err
    return err


def test_classes_differing_from_the_model_are_refused(tmp_path, model_file, capsys):
    other = ClassTable((ClassInfo(0, "sand", (200, 180, 120)), ClassInfo(1, "lake", (40, 90, 200)),
                        ClassInfo(2, "moss", (40, 160, 60))))
    data = _dataset(tmp_path / "data", other)
    err = _one_line_exit_2(capsys, ["evaluate", str(model_file), "--data", str(data),
                                    "--out", str(tmp_path / "e.json"), "--report", str(tmp_path / "r.html")])
    assert "classes.toml" in err and "lake" in err and "pool" in err
    assert not (tmp_path / "e.json").exists() and not (tmp_path / "r.html").exists()


def test_empty_folder_is_refused(tmp_path, model_file, capsys):
    (tmp_path / "data" / "images").mkdir(parents=True)
    (tmp_path / "data" / "masks").mkdir()
    write_classes(tmp_path / "data" / "classes.toml", CLASSES)
    err = _one_line_exit_2(capsys, ["evaluate", str(model_file), "--data", str(tmp_path / "data"),
                                    "--out", str(tmp_path / "e.json")])
    assert "no images" in err
    assert not (tmp_path / "e.json").exists()


def test_unwritable_report_is_refused_before_work(tmp_path, model_file):
    data = _dataset(tmp_path / "data")
    with pytest.raises(DataError, match="does not exist"):
        evaluate(model_file, data, report=tmp_path / "missing" / "r.html", progress=False)
