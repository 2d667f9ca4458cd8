"""Loss pieces and learning-rate schedules against published definitions and torch's own implementations."""

import numpy as np
import pytest
import torch
from torch.nn import functional as F

from fcnkit.losses import median_frequency_weights, pixel_cross_entropy, segmentation_loss, soft_dice_loss
from fcnkit.schedules import lr_factor

IGNORE = 255


def test_median_frequency_weights_hand_worked():
    # Eigen & Fergus 2015, sec. 4.1: weight_c = median_freq / freq(c), freq(c) = pixels of class c / total
    # pixels of the images where c is present. Worked by hand for three 4-pixel images (+ one ignore pixel):
    #   A = 0 0 0 1, B = 1 1 2 2 (+ignore), C = 0 0 0 0; class 3 never occurs
    #   freq(0) = 7/8, freq(1) = 3/8, freq(2) = 2/4, median = 1/2
    #   weights = (1/2)/(7/8) = 4/7, (1/2)/(3/8) = 4/3, (1/2)/(1/2) = 1, and 0 for the absent class 3
    masks = [np.array([[0, 0], [0, 1]]), np.array([1, 1, 2, 2, IGNORE]), np.array([0, 0, 0, 0])]
    w = median_frequency_weights(masks, 4, IGNORE)
    np.testing.assert_allclose(w, [4 / 7, 4 / 3, 1.0, 0.0])


def test_cross_entropy_matches_torch_weighted_mean():
    # torch.nn.functional.cross_entropy(reduction="mean") divides by the summed weights of labelled targets
    g = torch.Generator().manual_seed(0)
    logits = torch.randn(2, 3, 5, 6, generator=g)
    target = torch.randint(0, 3, (2, 5, 6), generator=g)
    target[0, :2] = IGNORE
    weight = torch.tensor([0.5, 2.0, 1.0])
    ref = F.cross_entropy(logits, target, weight=weight, ignore_index=IGNORE)
    total, norm = pixel_cross_entropy(logits, target, weight, IGNORE)
    assert (total / norm).item() == pytest.approx(ref.item(), rel=1e-6)
    assert segmentation_loss(logits, target, weight, IGNORE, 0.0).item() == pytest.approx(ref.item(), rel=1e-6)


def test_all_ignore_batch_gives_zero_loss_not_nan():
    # sparse labels: a patch can hold no labelled pixel; torch's mean reduction would give NaN there
    logits = torch.randn(1, 3, 4, 4, requires_grad=True)
    target = torch.full((1, 4, 4), IGNORE)
    loss = segmentation_loss(logits, target, None, IGNORE, dice=0.5)
    loss.backward()
    assert torch.isfinite(loss) and loss.item() == pytest.approx(0.5 * soft_dice_loss(logits, target, IGNORE).item())
    assert torch.isfinite(logits.grad).all()


def test_soft_dice_is_zero_for_a_perfect_confident_prediction():
    # Dice coefficient 2|X∩Y|/(|X|+|Y|) = 1 for identical sets (Dice 1945; Milletari et al. 2016)
    target = torch.tensor([[[0, 1], [2, IGNORE]]])
    logits = F.one_hot(target.clamp(max=2), 3).permute(0, 3, 1, 2).float() * 50
    assert soft_dice_loss(logits, target, IGNORE).item() == pytest.approx(0.0, abs=1e-6)
    wrong = logits.roll(1, dims=1)
    assert soft_dice_loss(wrong, target, IGNORE).item() > 0.6


def _torch_factors(make, steps):
    p = torch.nn.Parameter(torch.zeros(1))
    opt = torch.optim.SGD([p], lr=1.0)
    sched = make(opt)
    out = []
    for _ in range(steps):
        out.append(opt.param_groups[0]["lr"])
        opt.step()
        sched.step()
    return out


@pytest.mark.parametrize("schedule,make", [
    ("poly", lambda o: torch.optim.lr_scheduler.PolynomialLR(o, total_iters=20, power=0.9)),
    ("cosine", lambda o: torch.optim.lr_scheduler.CosineAnnealingLR(o, T_max=20)),
    ("constant", lambda o: torch.optim.lr_scheduler.ConstantLR(o, factor=1.0)),
])
def test_schedules_match_torch_schedulers(schedule, make):
    # reference: torch.optim.lr_scheduler's closed forms (PolynomialLR, CosineAnnealingLR)
    ref = _torch_factors(make, 20)
    np.testing.assert_allclose([lr_factor(s, 20, 0, schedule) for s in range(20)], ref, atol=1e-9)


def test_warmup_matches_torch_linear_lr():
    # reference: torch.optim.lr_scheduler.LinearLR from 1/w to 1 over w − 1 steps
    ref = _torch_factors(lambda o: torch.optim.lr_scheduler.LinearLR(o, 1 / 5, 1.0, total_iters=4), 5)
    np.testing.assert_allclose([lr_factor(s, 30, 5, "cosine") for s in range(5)], ref, atol=1e-9)
    assert lr_factor(5, 30, 5, "cosine") == 1.0 and lr_factor(29, 30, 5, "poly") > 0
