"""The HTML report: parses, embeds every image it shows, names every class, and states the same scores as
scikit-learn on the same predictions."""

from __future__ import annotations

import base64
import csv
import io
import json
from html.parser import HTMLParser

import numpy as np
import pytest
from PIL import Image
from sklearn.metrics import (
    accuracy_score,
    balanced_accuracy_score,
    f1_score,
    jaccard_score,
    precision_score,
    recall_score,
)

from fcnkit.data.classes import ClassInfo, ClassTable
from fcnkit.metrics import confusion_matrix, segmentation_scores
from fcnkit.outputs import display_rgb
from fcnkit.report import CAUTION, Example, render_report, write_report

CLASSES = ClassTable((ClassInfo(0, "dry heath", (181, 156, 112)), ClassInfo(1, "pond <deep>", (38, 84, 170)),
                      ClassInfo(2, "scrub & hedge", (52, 140, 64)), ClassInfo(3, "slate roof", (170, 60, 52))))


class _Page(HTMLParser):
    """Collects what the tests look at: images, keyed cells, class rows, the JSON block, all text."""

    def __init__(self) -> None:
        super().__init__()
        self.imgs: list[dict[str, str]] = []
        self.links: list[str] = []
        self.keyed: list[tuple[str, str]] = []
        self.class_rows: list[str] = []
        self.text: list[str] = []
        self.json = ""
        self._key: str | None = None
        self._in_json = False

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if tag == "img":
            self.imgs.append(a)
        if "href" in a or ("src" in a and tag != "img"):
            self.links.append(a.get("href") or a.get("src"))
        if "data-key" in a:
            self._key = a["data-key"]
        if tag == "tr" and "data-class" in a:
            self.class_rows.append(a["data-class"])
        self._in_json = tag == "script" and a.get("id") == "fcnkit-metrics"

    def handle_endtag(self, tag):
        self._in_json = False

    def handle_data(self, data):
        if self._in_json:
            self.json += data
            return
        self.text.append(data)
        if self._key and data.strip():
            self.keyed.append((self._key, data.strip()))
            self._key = None


def _parse(text: str) -> _Page:
    page = _Page()
    page.feed(text)
    page.close()
    return page


def _predictions(seed: int = 0, k: int = 4) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    truth = rng.integers(0, k, size=(60, 70))
    pred = np.where(rng.random(truth.shape) < 0.7, truth, rng.integers(0, k, truth.shape))
    truth[rng.random(truth.shape) < 0.1] = 255  # unlabelled pixels
    return truth, pred


def test_report_scores_equal_scikit_learn():
    truth, pred = _predictions()
    cm = confusion_matrix(truth, pred, 4)
    page = _parse(render_report(segmentation_scores(cm), cm, CLASSES))
    keep = truth != 255
    t, p = truth[keep], pred[keep]
    labels = [0, 1, 2, 3]
    # Reference: scikit-learn's metrics on the labelled pixels. Long et al. 2015's mean accuracy is the macro
    # recall (sklearn's balanced accuracy); frequency-weighted IoU is the support-weighted Jaccard score.
    ref = {
        "pixel_accuracy": accuracy_score(t, p),
        "mean_accuracy": balanced_accuracy_score(t, p),
        "mean_iou": jaccard_score(t, p, labels=labels, average="macro"),
        "fw_iou": jaccard_score(t, p, labels=labels, average="weighted"),
    }
    per_class = {
        "accuracy": recall_score(t, p, labels=labels, average=None),
        "precision": precision_score(t, p, labels=labels, average=None, zero_division=0),
        "iou": jaccard_score(t, p, labels=labels, average=None),
        "dice": f1_score(t, p, labels=labels, average=None),
    }
    shown: dict[str, list[float]] = {}
    for key, text in page.keyed:  # bias is a signed percentage
        shown.setdefault(key, []).append(float(text.rstrip("%")) / 100 if key == "bias" else float(text))
    # bias = predicted / true pixels − 1 (counted here with numpy)
    bias = np.bincount(p, minlength=4) / np.bincount(t, minlength=4) - 1
    assert shown.pop("bias") == pytest.approx(list(bias), abs=5e-4)
    for key, value in ref.items():  # the table shows four decimals
        assert shown[key] == [pytest.approx(value, abs=5e-5)]
    for key, values in per_class.items():
        assert shown[key] == pytest.approx(list(values), abs=5e-5)
    embedded = json.loads(page.json)["scores"]  # the machine-readable copy keeps full precision
    for key, value in ref.items():
        assert embedded[key] == pytest.approx(value, abs=1e-12)
    for key, values in per_class.items():
        assert embedded[key] == pytest.approx(list(values), abs=1e-12)


def _metrics_csv(path) -> None:
    with open(path, "w", newline="") as f:
        w = csv.writer(f)
        w.writerow(["epoch", "train_loss", "val_loss", "val_miou", "lr", "note"])
        for e in range(1, 6):
            w.writerow([e, 1 / e, 1.1 / e, 1 - 0.4 / e, 1e-3 / e, "ok"])


def _examples() -> list[Example]:
    rng = np.random.default_rng(3)
    out = []
    for i in range(2):
        truth, pred = _predictions(10 + i)
        image = display_rgb(rng.integers(0, 4096, size=truth.shape + (4,)).astype(np.uint16))
        out.append(Example(f"tile_{i}", 0.5, image, truth, pred, rng.random(truth.shape)))
    return out


def test_html_parses_embeds_every_image_and_names_every_class(tmp_path):
    from fcnkit import build_model, describe
    from fcnkit.config import config_from_dict

    truth, pred = _predictions()
    cm = confusion_matrix(truth, pred, 4)
    _metrics_csv(tmp_path / "metrics.csv")
    net = build_model(config_from_dict({"model": {"bands": 3, "classes": 4, "widths": [8, 16], "min_size": 8}}))
    path = write_report(tmp_path / "report.html", segmentation_scores(cm), cm, CLASSES,
                        facts={"model": "model.safetensors"}, curves=tmp_path / "metrics.csv",
                        examples=_examples(), description=describe(net))
    assert sorted(p.name for p in tmp_path.iterdir()) == ["metrics.csv", "report.html"]  # no temp file left
    page = _parse(path.read_text(encoding="utf-8"))
    # confusion matrix, IoU bars, training curves, and five panels per example
    assert len(page.imgs) == 3 + 5 * 2
    for img in page.imgs:
        assert img["src"].startswith("data:image/png;base64,")
        png = Image.open(io.BytesIO(base64.b64decode(img["src"].split(",", 1)[1], validate=True)))
        png.verify()  # Pillow's own PNG check
        assert img.get("alt")
    assert page.links == []  # nothing fetched from elsewhere: the file stands alone
    text = " ".join(page.text)
    assert page.class_rows == CLASSES.names  # every class named, in id order (escaping undone by the parser)
    for name in CLASSES.names:
        assert name in text
    assert json.loads(page.json)["classes"] == CLASSES.names
    assert CAUTION in " ".join(text.split())
    for phrase in ("Training", "Worst-scoring examples", "The net", "receptive field"):
        assert phrase in text


def test_undefined_scores_show_as_not_available_and_null():
    truth, pred = _predictions(k=3)  # class 3 absent from truth and prediction: its IoU is undefined
    cm = confusion_matrix(truth, pred, 4)
    page = _parse(render_report(segmentation_scores(cm), cm, CLASSES))
    iou = [v for k, v in page.keyed if k == "iou"]
    assert iou[3] == "n/a" and iou[0] != "n/a"
    assert json.loads(page.json)["scores"]["iou"][3] is None  # strict JSON has no NaN


def test_calibration_intervals_and_assessment_sections():
    """The report carries the reliability diagram and ECE, the per-image bootstrap interval, the kept epoch
    and an area assessment; the numbers shown are those given, in the units a reader reports."""
    from fcnkit.assessment import assessment_table
    from fcnkit.calibration import reliability
    from fcnkit.metrics import bootstrap_mean_iou

    truth, pred = _predictions()
    cm = confusion_matrix(truth, pred, 4)
    rng = np.random.default_rng(0)
    probs = rng.dirichlet(np.ones(4), size=truth.shape).transpose(2, 0, 1)
    cal = {"temperature": 1.7, "ece": 0.02, "ece_uncalibrated": 0.09,
           "reliability": reliability(probs, truth).to_dict(),
           "reliability_uncalibrated": reliability(probs ** 2 / (probs ** 2).sum(0), truth).to_dict(),
           "fitted_in_training": {"fitted": True, "pixels": 12345, "ece_before": 0.1, "ece_after": 0.03}}
    per_image = np.stack([confusion_matrix(truth[i::3], pred[i::3], 4) for i in range(3)])
    interval = bootstrap_mean_iou(per_image, resamples=200)
    images = [{"stem": f"img{i}", "labelled_pixels": int(c.sum()), "pixel_accuracy": 0.5, "mean_iou": 0.4}
              for i, c in enumerate(per_image)]
    # the worked example of Olofsson et al. 2014 (values given in issue 11): 30 m pixels
    table = assessment_table([[66, 0, 5, 4], [0, 55, 8, 12], [1, 0, 153, 11], [2, 1, 9, 313]],
                             [200_000, 150_000, 3_200_000, 6_450_000],
                             names=["deforestation", "forest gain", "stable forest", "stable non-forest"],
                             pixel_area_m2=900.0)
    page = _parse(render_report(segmentation_scores(cm), cm, CLASSES, calibration=cal, images=images,
                                interval=interval, assessment=table))
    text = " ".join(" ".join(page.text).split())
    for phrase in ("Calibration of the confidences", "T = 1.7", "12,345 labelled pixels", "Per image",
                   "bootstrap", "Accuracy and area estimates", "deforestation", "producer's accuracy"):
        assert phrase in text, phrase
    assert "21,158" in text and "6,158" in text  # the paper's deforestation area, ha ± 95 % half-width
    assert len(page.imgs) == 3  # confusion matrix, IoU bars, reliability diagram
    payload = json.loads(page.json)
    assert payload["assessment"]["overall_accuracy"]["estimate"] == pytest.approx(table["overall_accuracy"]
                                                                                  ["estimate"])
    assert payload["calibration"]["temperature"] == 1.7
