"""Calibration after training: a temperature fitted on the validation split, stored in the model file and
applied by every inference path (Guo et al. 2017, "On calibration of modern neural networks")."""

import numpy as np
import pytest
import torch
from tiny_train import tiny

from fcnkit import Model
from fcnkit.data.dataset import find_samples
from fcnkit.data.imageio import read_image, read_mask
from fcnkit.data.scenes import make_scenes

pytestmark = pytest.mark.usefixtures("torch_one_thread")


def _ece(probs: np.ndarray, truth: np.ndarray, bins: int = 15) -> float:
    """Expected calibration error of the top-class confidence over equal-width bins, written out from Guo et
    al. 2017, eq. (3): Σ_m |B_m|/n · |acc(B_m) − conf(B_m)|, bin m holding confidences in ((m−1)/M, m/M]."""
    conf, pred = probs.max(0).ravel(), probs.argmax(0).ravel()
    t = truth.ravel()
    keep = t != 255
    conf, hit = conf[keep], (pred == t)[keep]
    which = np.clip(np.ceil(conf * bins).astype(int) - 1, 0, bins - 1)
    return float(sum(abs(hit[which == m].mean() - conf[which == m].mean()) * (which == m).mean()
                     for m in range(bins) if (which == m).any()))


def _softmax(z: np.ndarray, temperature: float) -> np.ndarray:
    e = np.exp((z - z.max(0)) / temperature)
    return e / e.sum(0)


@pytest.fixture(scope="module")
def trained(tmp_path_factory):
    root = tmp_path_factory.mktemp("cal")
    data = make_scenes(root / "train", count=6, size=64, seed=21)
    test = make_scenes(root / "test", count=4, size=64, seed=22)
    cfg = tiny(train={"epochs": 3, "val_fraction": 0.34, "patches_per_epoch": 24})
    model = Model.build(cfg).fit(data, out_dir=root / "run", progress=False)
    return model, test, root / "run" / "model.safetensors"


def test_the_temperature_lowers_calibration_error_on_held_out_scenes(trained):
    model, test, path = trained
    fit = model.extra["calibration"]
    assert fit["fitted"] and fit["pixels"] > 1000 and fit["temperature"] == model.temperature != 1.0
    assert fit["nll_after"] <= fit["nll_before"]  # what the fit minimises
    assert Model.load(path).temperature == model.temperature  # stored in the model file
    samples, classes = find_samples(test)
    logits = [model.predict_proba(read_image(s.image), logits=True) for s in samples]
    truth = np.stack([read_mask(s.mask, classes) for s in samples])
    before = _ece(np.stack([_softmax(z, 1.0) for z in logits], axis=1), truth)
    after = _ece(np.stack([_softmax(z, model.temperature) for z in logits], axis=1), truth)
    assert after <= before, (after, before)


@pytest.mark.parametrize("scan", ["rows", "whole", "tiles"])
def test_every_scan_gives_the_calibrated_probabilities(trained, scan):
    """Probabilities from any scan are softmax(logits / T) of the model's own forward pass."""
    model, test, _ = trained
    image = read_image(sorted((test / "images").iterdir())[0])
    with torch.no_grad():
        logits = model(torch.from_numpy(image).permute(2, 0, 1)[None].float())[0].numpy()
    options = {"tile": 32, "exact": True} if scan == "tiles" else {}
    probs = model.predict_proba(image, scan=scan, **options)
    np.testing.assert_allclose(probs, _softmax(logits, model.temperature), atol=1e-5)
