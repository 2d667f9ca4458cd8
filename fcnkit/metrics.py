"""Segmentation scores from a confusion matrix (pure arithmetic, no I/O).

Definitions follow Long, Shelhamer & Darrell 2015, "Fully Convolutional Networks for Semantic Segmentation",
section 5. With n_ij the number of pixels of class i predicted as class j and t_i = Σ_j n_ij the pixels of
class i in the truth:

* pixel accuracy             Σ_i n_ii / Σ_i t_i
* mean accuracy              (1/n_cl) Σ_i n_ii / t_i
* mean IoU                   (1/n_cl) Σ_i n_ii / (t_i + Σ_j n_ji − n_ii)
* frequency-weighted IoU     (Σ_k t_k)⁻¹ Σ_i t_i n_ii / (t_i + Σ_j n_ji − n_ii)

Per class we also give IoU and Dice (= F1 = 2 n_ii / (t_i + Σ_j n_ji)).

Classes absent from a score's denominator are undefined, not zero: a class absent from both truth and
prediction has IoU and Dice NaN, a class absent from the truth has recall NaN. The means skip NaN entries
(n_cl counts only the classes where the per-class value is defined), so a validation set that happens to lack
a class is not penalised for it, while a class predicted but absent from the truth still scores IoU 0.

``bootstrap_mean_iou`` gives the spread of the mean IoU over a set of images (percentile bootstrap).
"""

from __future__ import annotations

from typing import Any

import numpy as np


def confusion_matrix(truth: Any, pred: Any, num_classes: int, ignore: int | None = 255) -> np.ndarray:
    """K×K int64 counts: row = true class, column = predicted class; truth pixels equal to ``ignore`` are
    skipped. ``truth`` and ``pred`` are integer arrays of the same shape (numpy arrays or CPU tensors)."""
    t = np.asarray(truth).ravel()
    p = np.asarray(pred).ravel()
    if t.shape != p.shape:
        raise ValueError(f"truth has {t.size} pixels but pred has {p.size}")
    if ignore is not None:
        keep = t != ignore
        t, p = t[keep], p[keep]
    t = t.astype(np.int64, copy=False)
    p = p.astype(np.int64, copy=False)
    for name, a in (("truth", t), ("pred", p)):
        if a.size and (a.min() < 0 or a.max() >= num_classes):
            bad = a[(a < 0) | (a >= num_classes)][0]
            raise ValueError(f"{name} holds class id {bad}, outside 0..{num_classes - 1}")
    return np.bincount(t * num_classes + p, minlength=num_classes * num_classes).reshape(num_classes, num_classes)


def _ratio(num: np.ndarray, den: np.ndarray) -> np.ndarray:
    """num / den with NaN where den == 0."""
    out = np.full(num.shape, np.nan)
    np.divide(num, den, out=out, where=den > 0)
    return out


def _nanmean(v: np.ndarray) -> float:
    ok = ~np.isnan(v)
    return float(v[ok].mean()) if ok.any() else float("nan")


def segmentation_scores(cm: np.ndarray) -> dict[str, Any]:
    """Scores of a confusion matrix (see the module docstring).

    Returns ``pixel_accuracy``, ``mean_accuracy``, ``mean_iou``, ``fw_iou`` (floats, NaN when undefined) and
    per-class lists ``recall`` (the class accuracy of Long et al.; producer's accuracy in remote sensing),
    ``precision`` (user's accuracy), ``iou``, ``dice`` (floats, NaN when undefined), ``support`` (true pixels)
    and ``predicted`` (pixels predicted as the class).
    """
    cm = np.asarray(cm, dtype=np.float64)
    if cm.ndim != 2 or cm.shape[0] != cm.shape[1]:
        raise ValueError(f"confusion matrix must be square, got shape {cm.shape}")
    hit = np.diag(cm)
    truth = cm.sum(axis=1)
    pred = cm.sum(axis=0)
    total = truth.sum()
    acc = _ratio(hit, truth)
    precision = _ratio(hit, pred)
    iou = _ratio(hit, truth + pred - hit)
    dice = _ratio(2 * hit, truth + pred)
    fw = float(np.nansum(truth * iou) / total) if total > 0 else float("nan")
    return {
        "pixel_accuracy": float(hit.sum() / total) if total > 0 else float("nan"),
        "mean_accuracy": _nanmean(acc),
        "mean_iou": _nanmean(iou),
        "fw_iou": fw,
        "recall": acc.tolist(),
        "precision": precision.tolist(),
        "iou": iou.tolist(),
        "dice": dice.tolist(),
        "support": [int(v) for v in truth],
        "predicted": [int(v) for v in pred],
    }


def bootstrap_mean_iou(confusions: Any, *, resamples: int = 2000, level: float = 0.95, seed: int = 0,
                       chunk: int = 256) -> dict[str, Any]:
    """Percentile bootstrap interval of a dataset's mean IoU, resampling whole images.

    ``confusions`` holds one K×K confusion matrix per image (N×K×K). Each of ``resamples`` draws N images with
    replacement, sums their matrices and scores the sum as :func:`segmentation_scores` does; the interval is
    the (1 − level)/2 and (1 + level)/2 percentiles of those scores (Efron & Tibshirani 1993, "An
    Introduction to the Bootstrap", percentile interval). Images, not pixels, are the units: pixels of one
    image are not independent. Seeded, so the same input gives the same interval.
    """
    cms = np.asarray(confusions, dtype=np.float64)
    if cms.ndim != 3 or cms.shape[1] != cms.shape[2] or cms.shape[0] == 0:
        raise ValueError(f"expected N×K×K confusion matrices, got shape {cms.shape}")
    if not 0 < level < 1 or resamples < 1:
        raise ValueError(f"level {level} (expected between 0 and 1) and resamples {resamples} (expected ≥ 1)")
    n, k, _ = cms.shape
    flat = cms.reshape(n, k * k)
    rng = np.random.default_rng(seed)
    scores = []
    for start in range(0, resamples, chunk):
        r = min(chunk, resamples - start)
        picks = rng.integers(0, n, size=(r, n))
        times = np.zeros((r, n))
        np.add.at(times, (np.arange(r)[:, None], picks), 1.0)  # how often each image is drawn
        sums = (times @ flat).reshape(r, k, k)
        hit = np.diagonal(sums, axis1=1, axis2=2)
        iou = _ratio(hit, sums.sum(axis=2) + sums.sum(axis=1) - hit)
        ok = ~np.isnan(iou)
        with np.errstate(invalid="ignore"):
            scores.append(np.where(ok.any(axis=1), np.nansum(iou, axis=1) / ok.sum(axis=1), np.nan))
    values = np.concatenate(scores)
    values = values[~np.isnan(values)]
    tail = (1 - level) / 2 * 100
    low, high = (np.percentile(values, [tail, 100 - tail]) if values.size else (np.nan, np.nan))
    return {"mean_iou": segmentation_scores(cms.sum(axis=0))["mean_iou"], "low": float(low), "high": float(high),
            "level": level, "resamples": resamples, "images": n}
