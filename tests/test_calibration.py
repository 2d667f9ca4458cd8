"""Temperature scaling, reliability diagrams and ECE (Guo et al. 2017) against outside references."""

from __future__ import annotations

import math

import numpy as np
import pytest
import torch
from hypothesis import given, settings
from hypothesis import strategies as st

from fcnkit.calibration import (
    BINS,
    ReliabilityAccumulator,
    expected_calibration_error,
    fit_temperature,
    reliability,
    scaled_softmax,
)


def calibrated_logits(rng: np.random.Generator, classes: int, n: int, spread: float) -> tuple[np.ndarray, np.ndarray]:
    """C×n logits and labels drawn from softmax(logits): a perfectly calibrated model by construction."""
    z = rng.normal(0.0, spread, (classes, n))
    p = scaled_softmax(z)
    y = (p.cumsum(axis=0) < rng.random(n)).sum(axis=0)
    return z, np.minimum(y, classes - 1)


def test_scaled_softmax_matches_torch():
    # reference: torch.nn.functional.softmax of logits / T
    z = np.random.default_rng(0).normal(0, 4, (5, 7, 3))
    ref = torch.nn.functional.softmax(torch.from_numpy(z) / 2.5, dim=1).numpy()
    np.testing.assert_allclose(scaled_softmax(z, 2.5, axis=1), ref, rtol=1e-12, atol=1e-15)


def test_curve_matches_scikit_learn():
    # reference: sklearn.calibration.calibration_curve(correct, confidence, n_bins=15, strategy="uniform") gives
    # per non-empty bin the fraction of positives (our accuracy) and the mean predicted value (our confidence)
    from sklearn.calibration import calibration_curve

    rng = np.random.default_rng(3)
    z, y = calibrated_logits(rng, 6, 5000, 2.0)
    probs = scaled_softmax(z * 1.7)  # over-confident
    conf, correct = probs.max(axis=0), probs.argmax(axis=0) == y
    frac, mean_pred = calibration_curve(correct, conf, n_bins=15, strategy="uniform")
    r = reliability(probs, y)
    assert r.counts.size == BINS == 15
    full = r.counts > 0
    np.testing.assert_allclose(r.accuracy[full], frac, rtol=1e-12)
    np.testing.assert_allclose(r.confidence[full], mean_pred, rtol=1e-12)
    assert np.isnan(r.accuracy[~full]).all()


def test_ece_matches_direct_formula():
    # reference: Guo et al. 2017, eq. (3): ECE = Σ_m |B_m|/n |acc(B_m) − conf(B_m)|, B_m = {i : conf_i ∈ ((m−1)/M, m/M]}
    rng = np.random.default_rng(5)
    z, y = calibrated_logits(rng, 4, 3000, 1.5)
    probs = scaled_softmax(z * 2.2)
    conf, pred = probs.max(axis=0), probs.argmax(axis=0)
    m_bins = 15
    total = 0.0
    for m in range(1, m_bins + 1):
        inside = [i for i in range(y.size) if (m - 1) / m_bins < conf[i] <= m / m_bins]
        if inside:
            acc = sum(pred[i] == y[i] for i in inside) / len(inside)
            mean_conf = sum(conf[i] for i in inside) / len(inside)
            total += len(inside) / y.size * abs(acc - mean_conf)
    assert expected_calibration_error(probs, y) == pytest.approx(total, rel=1e-12)


def test_streaming_bands_equal_one_pass():
    rng = np.random.default_rng(7)
    z, y = calibrated_logits(rng, 5, 40 * 30, 2.0)
    probs = scaled_softmax(z * 3.0).reshape(5, 40, 30)
    labels = y.reshape(40, 30).copy()
    labels[::7, ::5] = 255  # ignored pixels
    whole = reliability(probs, labels)
    acc = ReliabilityAccumulator()
    for y0 in range(0, 40, 9):
        acc.add(probs[:, y0:y0 + 9], labels[y0:y0 + 9])
    part = acc.result()
    np.testing.assert_array_equal(part.counts, whole.counts)
    assert part.pixels == (labels != 255).sum()
    np.testing.assert_allclose(part.confidence, whole.confidence, rtol=1e-12)
    assert part.ece == pytest.approx(whole.ece, rel=1e-12)
    d = part.to_dict()
    assert d["ece"] == pytest.approx(part.ece) and len(d["accuracy"]) == 15


def test_nll_objective_matches_torch_cross_entropy():
    # reference: torch.nn.functional.cross_entropy(logits / T, labels) is the mean NLL being minimised
    rng = np.random.default_rng(11)
    z, y = calibrated_logits(rng, 3, 2000, 2.0)
    fit = fit_temperature(z * 2.0, y)
    t = torch.from_numpy(z.T * 2.0)
    labels = torch.from_numpy(y)
    assert fit.nll_before == pytest.approx(torch.nn.functional.cross_entropy(t, labels).item(), rel=1e-10)
    assert fit.nll_after == pytest.approx(
        torch.nn.functional.cross_entropy(t / fit.temperature, labels).item(), rel=1e-10)


def test_fit_matches_scipy_bounded_minimiser():
    # reference: scipy.optimize.minimize_scalar(method="bounded") on the same NLL in log T
    from scipy.optimize import minimize_scalar

    rng = np.random.default_rng(13)
    z, y = calibrated_logits(rng, 4, 5000, 1.0)
    z = z * 0.6  # under-confident: T < 1
    logits = torch.from_numpy(z.T)
    labels = torch.from_numpy(y)

    def nll(log_t: float) -> float:
        return torch.nn.functional.cross_entropy(logits / math.exp(log_t), labels).item()

    ref = minimize_scalar(nll, bounds=(math.log(0.05), math.log(20)), method="bounded", options={"xatol": 1e-8})
    fit = fit_temperature(z, y)
    assert math.log(fit.temperature) == pytest.approx(ref.x, abs=1e-4)
    assert fit.temperature < 1 and not fit.at_bound


@settings(max_examples=12, deadline=None)
@given(classes=st.integers(2, 8), spread=st.floats(1.0, 3.0), scale=st.floats(0.25, 4.0),
       seed=st.integers(0, 2**16))
def test_fit_recovers_known_temperature(classes, spread, scale, seed):
    # property (Guo et al. 2017, section 4.2): the logits of a calibrated model multiplied by s are calibrated
    # again by T = s, so the NLL minimiser recovers s up to sampling error
    rng = np.random.default_rng(seed)
    z, y = calibrated_logits(rng, classes, 20_000, spread)
    fit = fit_temperature(z * scale, y)
    assert abs(math.log(fit.temperature / scale)) < 0.08
    assert fit.nll_after <= fit.nll_before + 1e-12


def test_ece_drops_on_held_out_data():
    # Guo et al. 2017, table 1: temperature fitted on validation data lowers test ECE
    rng = np.random.default_rng(17)
    z_fit, y_fit = calibrated_logits(rng, 6, 20_000, 2.0)
    z_test, y_test = calibrated_logits(rng, 6, 20_000, 2.0)
    fit = fit_temperature(z_fit * 2.5, y_fit)
    before = expected_calibration_error(scaled_softmax(z_test * 2.5), y_test)
    after = expected_calibration_error(scaled_softmax(z_test * 2.5, fit.temperature), y_test)
    assert after <= before
    assert after < 0.02 < before


def test_fit_ignores_unlabelled_pixels_and_subsamples():
    rng = np.random.default_rng(19)
    z, y = calibrated_logits(rng, 3, 30_000, 2.0)
    y = y.copy()
    y[:10_000] = 255
    full = fit_temperature(z * 2.0, y)
    assert full.pixels == 20_000
    sub = fit_temperature(z * 2.0, y, max_pixels=5000, seed=1)
    assert sub.pixels == 5000
    assert sub == fit_temperature(z * 2.0, y, max_pixels=5000, seed=1)  # seeded: same subsample, same T
    assert abs(math.log(sub.temperature / full.temperature)) < 0.1


def test_fit_hits_bound_when_every_pixel_is_right():
    z = np.array([[5.0, -5.0], [-5.0, 5.0]])
    fit = fit_temperature(z, np.array([0, 1]))
    assert fit.at_bound and fit.temperature == pytest.approx(0.05, rel=1e-3)


def test_float32_probabilities_a_hair_above_one_are_accepted():
    acc = ReliabilityAccumulator()
    acc.add_confidences(np.array([1.0000001, 0.5], np.float32), [True, False])
    assert acc.result().counts[-1] == 1
    assert scaled_softmax(np.zeros((3, 2), np.float32)).dtype == np.float32
    with pytest.raises(ValueError, match=r"\[0, 1\]"):
        acc.add_confidences([1.01], [True])


def test_bad_inputs():
    with pytest.raises(ValueError, match="no labelled pixels"):
        fit_temperature(np.zeros((3, 4)), np.full(4, 255))
    with pytest.raises(ValueError, match="label 7"):
        fit_temperature(np.zeros((3, 4)), np.array([0, 1, 7, 2]))
    with pytest.raises(ValueError, match="pixels"):
        reliability(np.zeros((3, 4)), np.zeros(5, int))
