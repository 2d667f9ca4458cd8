"""The HTML report: parses, embeds every image it shows, names every class, and states the same scores as
scikit-learn on the same predictions."""

from __future__ import annotations

import base64
import csv
import io
import json
import math
from html.parser import HTMLParser

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
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
        "recall": recall_score(t, p, labels=labels, average=None),
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
    net = build_model(config_from_dict({"model": {"bands": 3, "num_classes": 4, "widths": [8, 16], "min_size": 8}}))
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


def test_score_names_are_those_of_the_printed_table():
    """One vocabulary: the report's cards and curve legends name each score as evaluate's printed table does."""
    from fcnkit.evaluate import SCORE_LABELS
    from fcnkit.report import SCORE_NAMES, curve_name

    assert SCORE_NAMES == dict(SCORE_LABELS)
    # the spellings a metrics CSV has used for validation mean IoU all read the same
    assert {curve_name(c) for c in ("val_miou", "val_mean_iou", "VAL_MIOU")} == {"validation mean IoU"}


@pytest.mark.usefixtures("torch_one_thread")
def test_training_curves_name_every_column_of_a_real_run_in_words(tmp_path):
    """The legends of the training figure, for the metrics.csv a real (one-epoch) training run writes: every
    plotted column named in words, no raw column name, and at most two panels per row so it fits its card."""
    from tiny_train import tiny

    from fcnkit import Model
    from fcnkit.config import config_from_dict
    from fcnkit.report import CURVE_NAMES, SCORE_NAMES, curves_figure, read_curves

    rng = np.random.default_rng(0)
    images = [rng.random((40, 40, 4), dtype=np.float32) for _ in range(3)]
    masks = [rng.integers(0, 5, (40, 40)).astype(np.uint8) for _ in range(3)]
    cfg = config_from_dict(tiny(train={"epochs": 1, "calibrate": False}))
    run = Model.build(cfg).fit(images, masks, out_dir=tmp_path / "run", progress=False).last_run
    cols = read_curves(run.run_dir / "metrics.csv")
    classes = ClassTable.generic(5)
    fig = curves_figure(cols, classes, kept=1)
    legends = {ax.get_title(loc="left"): [t.get_text() for t in ax.get_legend().get_texts()] if ax.get_legend() else []
               for ax in fig.axes}
    assert legends["loss"] == ["training loss", "validation loss", "kept: epoch 1"]
    assert legends["validation scores"] == list(SCORE_NAMES.values())  # as the printed table names them
    assert legends["validation IoU per class"] == list(classes.names)
    assert "learning rate" in legends
    shown = [label for labels in legends.values() for label in labels]
    assert not any("_" in label for label in shown)  # no raw column name left
    plotted = {c for c in cols if any(k in c.lower() for k in ("loss", "val_", "iou_")) or c in ("lr",)}
    assert plotted <= set(CURVE_NAMES) | {c for c in cols if c.startswith("iou_")}  # every column has a name
    columns = {round(ax.get_position().x0, 2) for ax in fig.axes}
    assert len(columns) <= 2


@settings(max_examples=8, deadline=None)
@given(st.lists(st.tuples(st.one_of(st.floats(0, 1), st.just(math.nan)), st.integers(0, 12)), min_size=1,
                max_size=6))
def test_iou_values_stand_clear_of_bars_and_dice_marks(rows):
    """Every IoU and Dice value label lies right of the plotting area (where the bars, the Dice marks and the
    mean line are clipped), and no two labels overlap, whatever the values and the lengths of the names."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    from fcnkit.report import iou_figure

    k = len(rows)
    iou = [v for v, _ in rows]
    classes = ClassTable(tuple(ClassInfo(i, f"class {i}" + " long" * n, (90, 120, 10 * i))
                               for i, (_, n) in enumerate(rows)))
    iou_a = np.array(iou)
    dice = 2 * iou_a / (1 + iou_a)  # Dice = 2 IoU / (1 + IoU) for the same sets (common practice)
    scores = {"iou": [None if math.isnan(v) else v for v in iou_a],
              "dice": [None if math.isnan(v) else v for v in dice],
              "mean_iou": float(np.nanmean(iou_a)) if not np.isnan(iou_a).all() else 0.0}
    fig = iou_figure(scores, classes)
    renderer = FigureCanvasAgg(fig).get_renderer()
    fig.draw(renderer)
    ax = fig.axes[0]
    area = ax.get_window_extent(renderer)
    labels = [t for t in ax.texts if t.get_text() not in ("IoU", "Dice")]
    assert len(labels) == 2 * k
    boxes = [t.get_window_extent(renderer) for t in labels]
    assert all(b.x0 >= area.x1 for b in boxes)
    assert not any(a.overlaps(b) for i, a in enumerate(boxes) for b in boxes[i + 1:])


def test_example_panels_carry_keys_to_their_colours():
    """Under the error panel, a swatch for each colour it uses; under the uncertainty panel, a colour bar whose
    ends are the colour map's (matplotlib's magma) at 0 and 1, the colours the panel gives certain and
    equally-likely pixels."""
    import re

    from matplotlib import colormaps

    truth, pred = _predictions(7)
    u = np.linspace(0, 1, truth.size).reshape(truth.shape)
    ex = Example("kessmoor_007", 0.5, np.zeros(truth.shape + (3,), np.uint8), truth, pred, u)
    cm = confusion_matrix(truth, pred, 4)
    text = render_report(segmentation_scores(cm), cm, CLASSES, examples=[ex])
    page = _parse(text)
    panels = {img["alt"].split(": ", 1)[1]: np.asarray(Image.open(io.BytesIO(base64.b64decode(
        img["src"].split(",", 1)[1])))) for img in page.imgs if img["alt"].startswith("kessmoor_007")}
    errors = panels["errors"].reshape(-1, 3)
    keyed = {tuple(map(int, m)) for m in re.findall(r'class="sw" style="background:rgb\((\d+), (\d+), (\d+)\)"'
                                                     r"></span>(?:correct|wrong|unlabelled)", text)}
    assert {tuple(c) for c in np.unique(errors, axis=0)} == keyed and len(keyed) == 3
    stops = re.findall(r"rgb\((\d+),(\d+),(\d+)\)", re.search(r'class="ramp" style="([^"]+)"', text).group(1))
    magma = (colormaps["magma"]([0.0, 1.0])[:, :3] * 255).round()
    assert np.abs(np.array([stops[0], stops[-1]], float) - magma).max() <= 1  # matplotlib's own colour map
    unc = panels["uncertainty (normalised entropy)"]
    assert np.abs(unc[0, 0].astype(float) - magma[0]).max() <= 1 and np.abs(unc[-1, -1] - magma[1]).max() <= 1
    assert "0: certain; 1: all classes equally likely" in text


def test_header_lists_every_fact_and_the_version():
    from fcnkit import __version__

    truth, pred = _predictions()
    cm = confusion_matrix(truth, pred, 4)
    facts = {"model": "run/model.safetensors", "trained on": "scenes/train", "net": "encoder-decoder, widths 8-16"}
    page = _parse(render_report(segmentation_scores(cm), cm, CLASSES, facts=facts, kept_epoch=7))
    text = [t.strip() for t in page.text if t.strip()]
    for key, value in [*facts.items(), ("kept epoch", "7")]:  # a definition list: each name, then its value
        assert text[text.index(key) + 1] == value
    assert any(t.startswith("written ") and t.endswith(f"by fcnkit {__version__}") for t in text)
