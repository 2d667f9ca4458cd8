"""Training losses: per-pixel cross-entropy with an ignore value, median-frequency class weights, soft Dice."""

from __future__ import annotations

from collections.abc import Iterable

import numpy as np
import torch
from torch.nn import functional as F


def median_frequency_weights(masks: Iterable[np.ndarray], num_classes: int, ignore: int = 255) -> np.ndarray:
    """Class weights by median-frequency balancing (Eigen & Fergus 2015, section 4.1):
    weight_c = median_freq / freq_c, where freq_c is the number of pixels of class c divided by the total
    number of pixels in the images where c is present, and median_freq is the median of those frequencies.

    Only labelled pixels count (ignore pixels are neither class pixels nor image pixels), so sparse labels
    are balanced by what was labelled. A class present in no mask gets weight 0 (it has no pixels to weigh).
    """
    pixels = np.zeros(num_classes, np.int64)
    image_pixels = np.zeros(num_classes, np.int64)
    for mask in masks:
        m = np.asarray(mask).ravel()
        counts = np.bincount(m[m != ignore].astype(np.int64), minlength=num_classes)[:num_classes]
        pixels += counts
        image_pixels[counts > 0] += counts.sum()
    present = pixels > 0
    weights = np.zeros(num_classes)
    if present.any():
        freq = pixels[present] / image_pixels[present]
        weights[present] = np.median(freq) / freq
    return weights


def pixel_cross_entropy(logits: torch.Tensor, target: torch.Tensor, weight: torch.Tensor | None,
                        ignore: int) -> tuple[torch.Tensor, torch.Tensor]:
    """Summed per-pixel cross-entropy over labelled pixels and the sum of their weights (the count when
    unweighted); their ratio is the usual weighted mean. Returning both keeps batches with no labelled
    pixel (sparse labels) finite and lets validation average over whole images."""
    total = F.cross_entropy(logits.float(), target, weight=weight, ignore_index=ignore, reduction="sum")
    labelled = target != ignore
    if weight is None:
        norm = labelled.sum().to(total.dtype)
    else:
        norm = weight[target.clamp(0, len(weight) - 1)][labelled].sum()
    return total, norm


def soft_dice_loss(logits: torch.Tensor, target: torch.Tensor, ignore: int, eps: float = 1.0) -> torch.Tensor:
    """1 − mean over classes of the soft Dice coefficient 2Σpt / (Σp + Σt) on labelled pixels
    (Milletari et al. 2016, V-Net, with additive smoothing ``eps``, common practice)."""
    labelled = (target != ignore).unsqueeze(1)
    probs = logits.float().softmax(dim=1) * labelled
    onehot = F.one_hot(target.where(target != ignore, 0), logits.shape[1]).permute(0, 3, 1, 2) * labelled
    dims = (0, 2, 3)
    inter = (probs * onehot).sum(dims)
    dice = (2 * inter + eps) / (probs.sum(dims) + onehot.sum(dims) + eps)
    return 1 - dice.mean()


def segmentation_loss(logits: torch.Tensor, target: torch.Tensor, weight: torch.Tensor | None, ignore: int,
                      dice: float) -> torch.Tensor:
    """The training criterion: weighted mean cross-entropy over labelled pixels (0 when none are labelled),
    plus ``dice`` × soft Dice loss."""
    total, norm = pixel_cross_entropy(logits, target, weight, ignore)
    loss = total / norm.clamp_min(1e-12)
    if dice > 0:
        loss = loss + dice * soft_dice_loss(logits, target, ignore)
    return loss
