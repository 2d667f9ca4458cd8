"""Segmentation metrics checked against scikit-learn and the definitions of Long et al. 2015, section 5."""

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from sklearn import metrics as skm

from fcnkit.metrics import bootstrap_mean_iou, confusion_matrix, segmentation_scores

IGNORE = 255


@st.composite
def label_maps(draw):
    """A random truth/prediction pair with some ignore pixels; a few classes may be missing entirely."""
    k = draw(st.integers(2, 6))
    h, w = draw(st.integers(1, 12)), draw(st.integers(1, 12))
    seed = draw(st.integers(0, 2**32 - 1))
    rng = np.random.default_rng(seed)
    used = rng.choice(k, size=rng.integers(1, k + 1), replace=False)  # leave some classes out
    truth = rng.choice(used, size=(h, w)).astype(np.uint8)
    pred = rng.choice(used if rng.random() < 0.5 else k, size=(h, w)).astype(np.uint8)
    truth[rng.random((h, w)) < draw(st.floats(0, 0.6))] = IGNORE
    return truth, pred, k


@settings(max_examples=60, deadline=None)
@given(label_maps())
def test_against_scikit_learn(case):
    truth, pred, k = case
    cm = confusion_matrix(truth, pred, k, ignore=IGNORE)
    keep = truth != IGNORE
    t, p = truth[keep], pred[keep]
    s = segmentation_scores(cm)
    if t.size == 0:  # nothing labelled: no counts, every score undefined
        assert cm.sum() == 0 and math.isnan(s["pixel_accuracy"]) and math.isnan(s["mean_iou"])
        return
    # scikit-learn's confusion_matrix: rows are true labels, columns predicted (sklearn.metrics docs)
    np.testing.assert_array_equal(cm, skm.confusion_matrix(t, p, labels=list(range(k))).astype(np.int64))
    # pixel accuracy = scikit-learn accuracy_score on the labelled pixels
    assert s["pixel_accuracy"] == pytest.approx(skm.accuracy_score(t, p))
    # IoU per class = jaccard_score(average=None); classes absent from truth and prediction are NaN here,
    # so compare on the classes that occur and take the macro mean over the same classes
    present = sorted(set(t.tolist()) | set(p.tolist()))
    jac = skm.jaccard_score(t, p, labels=present, average=None)
    np.testing.assert_allclose([s["iou"][c] for c in present], jac)
    assert s["mean_iou"] == pytest.approx(skm.jaccard_score(t, p, labels=present, average="macro"))
    absent = [c for c in range(k) if c not in present]
    assert all(math.isnan(s["iou"][c]) and math.isnan(s["dice"][c]) for c in absent)
    # Dice = F1 per class (f1_score, average=None)
    np.testing.assert_allclose([s["dice"][c] for c in present], skm.f1_score(t, p, labels=present, average=None))
    # mean accuracy = macro recall over classes in the truth (Long et al. 2015: (1/n_cl) Σ n_ii / t_i)
    in_truth = sorted(set(t.tolist()))
    assert s["mean_accuracy"] == pytest.approx(skm.recall_score(t, p, labels=in_truth, average="macro"))
    # frequency-weighted IoU = IoU averaged with the truth's class frequencies as weights (Long et al. 2015)
    freq = np.bincount(t, minlength=k) / t.size
    assert s["fw_iou"] == pytest.approx(float(np.sum(freq[present] * jac)))
    assert s["support"] == np.bincount(t, minlength=k).tolist()
    # precision per class (user's accuracy) = precision_score(average=None) on the classes predicted
    predicted = sorted(set(p.tolist()))
    np.testing.assert_allclose([s["precision"][c] for c in predicted],
                               skm.precision_score(t, p, labels=predicted, average=None, zero_division=0))
    assert all(math.isnan(s["precision"][c]) for c in range(k) if c not in predicted)
    assert s["predicted"] == np.bincount(p, minlength=k).tolist()


def test_hand_worked_example():
    # 2 classes; n = [[3, 1], [2, 4]] → pixel acc 7/10, accuracies 3/4 and 4/6, IoU 3/6 and 4/7
    truth = np.array([0, 0, 0, 0, 1, 1, 1, 1, 1, 1, IGNORE])
    pred = np.array([0, 0, 0, 1, 0, 0, 1, 1, 1, 1, 0])
    s = segmentation_scores(confusion_matrix(truth, pred, 2))
    assert s["pixel_accuracy"] == pytest.approx(0.7)
    assert s["mean_accuracy"] == pytest.approx((3 / 4 + 4 / 6) / 2)
    assert s["mean_iou"] == pytest.approx((3 / 6 + 4 / 7) / 2)
    assert s["fw_iou"] == pytest.approx((4 * 3 / 6 + 6 * 4 / 7) / 10)


def test_rejects_ids_out_of_range():
    with pytest.raises(ValueError, match="pred holds class id 7"):
        confusion_matrix(np.zeros(3, np.uint8), np.array([0, 7, 1]), 3)
    with pytest.raises(ValueError, match="pixels"):
        confusion_matrix(np.zeros(3), np.zeros(4), 3)


def _image_confusions(seed: int, images: int = 25, k: int = 4) -> np.ndarray:
    """Per-image confusion matrices of a model whose accuracy varies from image to image."""
    rng = np.random.default_rng(seed)
    cms = []
    for _ in range(images):
        truth = rng.integers(0, k, 500)
        wrong = rng.random(500) < rng.uniform(0.05, 0.5)
        pred = np.where(wrong, rng.integers(0, k, 500), truth)
        cms.append(confusion_matrix(truth, pred, k))
    return np.stack(cms)


def test_bootstrap_mean_iou_matches_scipy_percentile_bootstrap():
    # reference: scipy.stats.bootstrap(method="percentile") resampling image indices, statistic = mean IoU of the
    # summed confusion matrix; the two use different random draws, so the ends agree up to Monte Carlo error
    from scipy.stats import bootstrap

    cms = _image_confusions(1)
    ours = bootstrap_mean_iou(cms, resamples=4000, seed=3)
    ref = bootstrap(
        (np.arange(len(cms)),), lambda idx: segmentation_scores(cms[idx].sum(axis=0))["mean_iou"],
        vectorized=False, n_resamples=4000, method="percentile", confidence_level=0.95,
        random_state=np.random.default_rng(4)).confidence_interval
    width = ref.high - ref.low
    assert width > 0.01
    assert abs(ours["low"] - ref.low) < 0.1 * width and abs(ours["high"] - ref.high) < 0.1 * width
    assert ours["mean_iou"] == segmentation_scores(cms.sum(axis=0))["mean_iou"]
    assert ours["low"] < ours["mean_iou"] < ours["high"]
    assert ours == bootstrap_mean_iou(cms, resamples=4000, seed=3)  # seeded


def test_bootstrap_mean_iou_of_identical_images_is_a_point():
    cms = np.repeat(_image_confusions(2, images=1), 6, axis=0)
    r = bootstrap_mean_iou(cms, resamples=200)
    assert r["low"] == pytest.approx(r["mean_iou"]) and r["high"] == pytest.approx(r["mean_iou"])
    with pytest.raises(ValueError, match="N×K×K"):
        bootstrap_mean_iou(np.zeros((3, 3)))
