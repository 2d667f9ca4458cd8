"""The HTML report in a real browser: headless Chromium lays out a report with every section at a 1280 px wide
window; nothing may stick out of the page or out of its section's card, and the screenshot must show a page
(not a blank) whose margins right of the cards hold nothing but the background.

The measuring script is added only to the test's copy of the report (the report itself carries no script that
runs): on the load event it writes the widths it measured as JSON into ``document.title``, which Chromium's
``--dump-dom`` prints. Skipped when Chromium is not installed (Debian package ``chromium``)."""

from __future__ import annotations

import csv
import html
import json
import re
import shutil
import subprocess
import tempfile
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from PIL import Image
from test_report import CLASSES, _examples, _predictions

from fcnkit.data.classes import ClassInfo, ClassTable
from fcnkit.metrics import confusion_matrix, segmentation_scores
from fcnkit.report import render_report

CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")
pytestmark = pytest.mark.skipif(CHROMIUM is None, reason="headless Chromium is not installed (Debian package "
                                "`chromium`), so the report's layout cannot be checked in a browser")
WIDTH = 1280

# Measures, on load: the page's widths, and per card (header and each section) every element whose box reaches
# past the card's edges, unless a scrolling box between them clips it; and the boxes that scroll at all.
MEASURE = """<script>
addEventListener("load", () => {
  const root = document.documentElement;
  const name = e => e.tagName.toLowerCase() + (e.id ? "#" + e.id : "") + (e.className ? "." + e.className : "")
    + (e.alt ? "[" + e.alt + "]" : "");
  const clipped = (e, card) => {
    for (let p = e.parentElement; p && p !== card; p = p.parentElement)
      if (getComputedStyle(p).overflowX !== "visible") return true;
    return false;
  };
  const cards = [...document.querySelectorAll("header, section")].map(card => {
    const box = card.getBoundingClientRect();
    const over = [...card.querySelectorAll("*")].filter(e => {
      const r = e.getBoundingClientRect();
      return r.width > 0 && (r.right > box.right + 0.5 || r.left < box.left - 0.5) && !clipped(e, card);
    }).map(e => [name(e), Math.round(e.getBoundingClientRect().right)]);
    return {title: (card.querySelector("h1, h2") || {}).textContent, left: box.left, right: box.right,
            top: box.top + scrollY, bottom: box.bottom + scrollY, scrollWidth: card.scrollWidth,
            clientWidth: card.clientWidth, over: over};
  });
  const scrolling = [...document.querySelectorAll("*")].filter(
    e => getComputedStyle(e).overflowX !== "visible" && e.scrollWidth > e.clientWidth + 1).map(name);
  const widest = [...document.querySelectorAll("body *")].reduce(
    (w, e) => { const r = e.getBoundingClientRect().right; return r > w[1] ? [name(e), r] : w; }, ["", 0]);
  const broken = [...document.images].filter(i => !i.complete || i.naturalWidth === 0).map(name);
  document.title = JSON.stringify({innerWidth: innerWidth, clientWidth: root.clientWidth,
    scrollWidth: root.scrollWidth, height: root.scrollHeight, widest: widest, cards: cards,
    scrolling: scrolling, broken: broken});
});
</script>"""


def _chromium(*args: str) -> str:
    profile = tempfile.mkdtemp(prefix="fcnkit-chromium-")  # a fresh profile: no state from earlier runs
    try:
        done = subprocess.run(
            [CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
             "--disable-background-networking", "--disable-component-update", "--disable-sync",
             "--hide-scrollbars", "--force-device-scale-factor=1", f"--user-data-dir={profile}", *args],
            capture_output=True, text=True, timeout=120, check=False)
    finally:
        shutil.rmtree(profile, ignore_errors=True)
    assert done.returncode == 0, done.stderr[-2000:]
    return done.stdout


def measure(report: str, folder: Path) -> dict[str, Any]:
    """Lay out ``report`` at 1280 px in headless Chromium; what the injected script measured."""
    page = folder / "measured.html"
    page.write_text(report.replace("</body>", MEASURE + "</body>"), encoding="utf-8")
    dom = _chromium(f"--window-size={WIDTH},900", "--virtual-time-budget=10000", "--dump-dom", page.as_uri())
    found = re.search(r"<title>(.*?)</title>", dom, re.S)
    assert found and found.group(1).startswith("{"), "the measuring script did not run"
    return json.loads(html.unescape(found.group(1)))


def screenshot(report: str, path: Path, height: int) -> Image.Image:
    """The whole page, ``height`` px tall, at 1280 px wide, as a PNG at ``path``."""
    page = path.with_suffix(".html")
    page.write_text(report, encoding="utf-8")
    _chromium(f"--window-size={WIDTH},{height}", "--virtual-time-budget=10000", f"--screenshot={path}",
              page.as_uri())
    return Image.open(path).convert("RGB")


def full_report(folder: Path, classes: ClassTable = CLASSES, seed: int = 0,
                assessment: dict[str, Any] | None = None) -> str:
    """A report with every section: header facts, scores, per class, per image with an interval, calibration,
    errors, training curves with the kept epoch, examples, an area assessment and the net."""
    from fcnkit import build_model, describe
    from fcnkit.assessment import assessment_table
    from fcnkit.calibration import reliability
    from fcnkit.config import config_from_dict
    from fcnkit.metrics import bootstrap_mean_iou

    k = classes.num_classes
    truth, pred = _predictions(seed, k)
    cm = confusion_matrix(truth, pred, k)
    rng = np.random.default_rng(seed)
    probs = rng.dirichlet(np.ones(k), size=truth.shape).transpose(2, 0, 1)
    cal = {"temperature": 1.7, "ece": 0.02, "ece_uncalibrated": 0.09,
           "reliability": reliability(probs, truth).to_dict(),
           "reliability_uncalibrated": reliability(probs ** 2 / (probs ** 2).sum(0), truth).to_dict(),
           "fitted_in_training": {"fitted": True, "pixels": 12345, "ece_before": 0.1, "ece_after": 0.03}}
    per_image = np.stack([confusion_matrix(truth[i::3], pred[i::3], k) for i in range(3)])
    images = [{"stem": f"kessmoor_{i:03d}", "labelled_pixels": int(c.sum()), "pixel_accuracy": 0.5,
               "mean_iou": 0.4} for i, c in enumerate(per_image)]
    # the worked example of Olofsson et al. 2014 with 30 m pixels, as in test_report.py
    table = assessment or assessment_table([[66, 0, 5, 4], [0, 55, 8, 12], [1, 0, 153, 11], [2, 1, 9, 313]],
                             [200_000, 150_000, 3_200_000, 6_450_000],
                             names=["deforestation", "forest gain", "stable forest", "stable non-forest"],
                             pixel_area_m2=900.0)
    names = [n.replace(" ", "_") for n in classes.names]
    curves = folder / "metrics.csv"
    with open(curves, "w", newline="") as f:  # the columns fcnkit.train writes
        w = csv.writer(f)
        w.writerow(["epoch", "seconds", "lr", "train_loss", "val_loss", "val_pixel_accuracy", "val_mean_accuracy",
                    "val_mean_iou", "val_fw_iou", "pixels_per_second", *(f"iou_{n}" for n in names)])
        for e in range(1, 13):
            w.writerow([e, 10 * e, 1e-3 / e, 1 / e, 1.1 / e, 1 - 0.3 / e, 1 - 0.35 / e, 1 - 0.4 / e, 1 - 0.38 / e,
                        9000, *(1 - (0.3 + 0.5 * i / k) / e for i in range(k))])
    net = build_model(config_from_dict({"model": {"bands": 3, "num_classes": k, "widths": [8, 16], "min_size": 8}}))
    facts = {"model": "/srv/kessmoor/runs/2031-04-02-heath-and-ponds-with-a-long-folder-name/model.safetensors",
             "data": "/srv/kessmoor/scenes/test", "images": "3", "scan": "rows (exact)",
             "trained on": "/srv/kessmoor/scenes/train (24 images, 20 % for validation)",
             "net": f"encoder-decoder, widths 8-16, fusion sum, 3 bands, {k} classes",
             "kept epoch": "9 (validation mean IoU 0.7712)", "temperature": "1.7", "fcnkit": "0.1.0"}
    return render_report(segmentation_scores(cm), cm, classes, title="Evaluation on test", facts=facts,
                         curves=curves, examples=_examples(), description=describe(net), images=images,
                         interval=bootstrap_mean_iou(per_image, resamples=200), calibration=cal, kept_epoch=9,
                         assessment=table)


def _overflow(m: dict[str, Any]) -> list[str]:
    """Every way the measured page sticks out at 1280 px."""
    bad = []
    if m["scrollWidth"] > m["clientWidth"]:
        bad.append(f"page {m['scrollWidth']} px wide in {m['clientWidth']} (widest: {m['widest']})")
    for card in m["cards"]:
        if card["scrollWidth"] > card["clientWidth"]:
            bad.append(f"{card['title']}: {card['scrollWidth']} px of content in {card['clientWidth']}")
        bad += [f"{card['title']}: {e} reaches x = {right} past the card's {card['right']:.0f}"
                for e, right in card["over"]]
    return bad


def test_full_report_fits_1280_px_in_a_browser(tmp_path):
    report = full_report(tmp_path)
    assert re.findall(r"<script(?![^>]*application/json)", report) == []  # data only: the report runs no script
    m = measure(report, tmp_path)
    assert m["innerWidth"] == WIDTH and m["broken"] == []  # every embedded PNG decoded by the browser
    titles = [c["title"] for c in m["cards"]]
    for title in ("Evaluation on test", "Scores", "Per class", "Per image", "Calibration of the confidences",
                  "Where the errors are", "Training", "Worst-scoring examples",
                  "Accuracy and area estimates from a reference sample", "The net", "Cautions"):
        assert title in titles, title
    assert _overflow(m) == []
    assert m["scrolling"] == []  # at 1280 px even the tables fit: nothing needs its own scroll bar

    shot = screenshot(report, tmp_path / "report.png", m["height"])
    assert shot.size == (WIDTH, m["height"])
    pixels = np.asarray(shot)
    packed = pixels.astype(np.int32) @ np.array([1 << 16, 1 << 8, 1], np.int32)  # one int per colour
    assert len(np.unique(packed)) > 1000  # charts and panels drawn, not a blank page
    # Right of the cards (and of their 2 px shadow) the page shows only its background below the header.
    header = next(c for c in m["cards"] if c["title"] == "Evaluation on test")
    right = max(c["right"] for c in m["cards"] if c is not header)
    margin = pixels[int(header["bottom"]) + 4:, int(right) + 4:]
    background = pixels[-1, -1]
    assert margin.size and (margin == background).all(), "something drawn right of the cards"


def test_many_long_class_names_scroll_inside_their_tables(tmp_path):
    """A table too wide for 1280 px (an error matrix headed by 14 long class names) scrolls inside its own box;
    the page and the cards still do not overflow."""
    from fcnkit.assessment import assessment_table

    rng = np.random.default_rng(5)
    k = 14
    names = [f"kessmoor land cover class number {i} with a long name" for i in range(k)]
    many = ClassTable(tuple(ClassInfo(i, n, tuple(int(v) for v in rng.integers(0, 256, 3)))
                            for i, n in enumerate(names)))
    counts = rng.integers(0, 5, (k, k)) + np.diag(rng.integers(20, 60, k))
    table = assessment_table(counts, rng.integers(10_000, 1_000_000, k), names=names, pixel_area_m2=100.0)
    m = measure(full_report(tmp_path, many, seed=1, assessment=table), tmp_path)
    assert _overflow(m) == []
    assert any("scroll" in s for s in m["scrolling"]), m["scrolling"]  # the wide table scrolls in its box
