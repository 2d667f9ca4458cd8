"""Segmentation metrics checked against scikit-learn and the definitions of Long et al. 2015, section 5."""

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from sklearn import metrics as skm

from fcnkit.metrics import confusion_matrix, segmentation_scores

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
