"""Tiled inference: tile plans, exact mode against whole-image inference, blending seams, TTA, bad options."""

import math

import numpy as np
import pytest
import torch
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st
from model_strategies import as_model, randomise_statistics, whole_image
from torch import nn

from fcnkit import build_model
from fcnkit.config import config_from_dict
from fcnkit.errors import ConfigError
from fcnkit.geometry import PadPlan
from fcnkit.inference.scan import predict_scores
from fcnkit.inference.tiles import plan_axis, plan_tiles
from fcnkit.nets import PaddedNet


@settings(max_examples=80, deadline=None)
@given(length=st.integers(1, 3000), factor=st.sampled_from([1, 2, 4, 8, 32]), tile_f=st.integers(1, 40),
       step_f=st.integers(1, 40))
def test_axis_plan_covers_the_image_on_the_factor_grid(length, factor, tile_f, step_f):
    tile, step = tile_f * factor, min(step_f, tile_f) * factor
    spans = plan_axis(length, tile, step, factor)
    assert spans[0].start == 0 and spans[-1].stop == length
    for a, b in zip(spans, spans[1:], strict=False):
        assert b.start % factor == 0 and a.start < b.start
        assert a.stop - b.start == a.fall == b.rise >= tile - step  # overlap never below what was asked
        assert b.start - a.start <= step
    for s in spans:
        assert s.stop - s.start <= max(tile + factor - 1, 0) or len(spans) == 1 and s.stop == length
    if len(spans) > 1:  # tiles shrunk evenly so no thin extra tile is computed: all equal but the last
        sizes = {s.stop - s.start for s in spans[:-1]}
        assert len(sizes) == 1 and 0 <= spans[-1].stop - spans[-1].start - sizes.pop() < factor
        assert len(spans) <= math.ceil((length - (tile - step)) / step) + 1


@st.composite
def small_nets(draw):
    n = draw(st.integers(1, 3))
    model = {
        "bands": draw(st.integers(1, 3)), "classes": draw(st.integers(2, 4)),
        "widths": draw(st.lists(st.integers(2, 6), min_size=n, max_size=n)),
        "blocks": draw(st.lists(st.integers(1, 2), min_size=n, max_size=n)),
        "strides": [draw(st.sampled_from([1, 2]))] + draw(st.lists(st.sampled_from([1, 2, 3]), min_size=n - 1,
                                                                    max_size=n - 1)),
        "dilations": draw(st.lists(st.sampled_from([1, 2]), min_size=n, max_size=n)),
        "kernel": draw(st.sampled_from([1, 3, 5])), "down": draw(st.sampled_from(["maxpool", "conv"])),
        "norm": draw(st.sampled_from(["batch", "none"])), "head": draw(st.sampled_from([[], [4]])),
        "upsample": draw(st.sampled_from(["transposed", "bilinear"])),
        "fusion": draw(st.sampled_from(["none", "sum", "concat"])), "min_size": 64,
    }
    try:
        return config_from_dict({"model": model})
    except ConfigError:
        assume(False)


@settings(max_examples=20, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(cfg=small_nets(), seed=st.integers(0, 1000), extra=st.integers(1, 3), hw=st.tuples(st.floats(0.3, 2.6),
                                                                                           st.floats(0.3, 2.6)))
def test_exact_mode_equals_whole_image_inference(cfg, seed, extra, hw):
    # Reference: the same net run on the whole image at once (torch). Exact tiling must give the same logits
    # up to float rounding (<= 1e-4) and the same labels, for odd sizes and any local net.
    torch.manual_seed(seed)
    net = as_model(randomise_statistics(build_model(cfg), seed))
    geom = net.geometry
    tile = (math.ceil(2 * geom.margin / geom.factor) + extra) * geom.factor
    h, w = (max(1, int(tile * r)) | 1 for r in hw)  # odd sizes
    img = np.random.default_rng(seed).normal(size=(h, w, cfg.model.bands)).astype(np.float32)
    ref = whole_image(net, img)
    out = predict_scores(net, img, tile=tile, exact=True, logits=True, batch=2)
    assert out.shape == ref.shape
    np.testing.assert_allclose(out, ref, atol=1e-4, rtol=0)
    assert np.array_equal(out.argmax(0), ref.argmax(0))


def test_exact_mode_uses_several_tiles_on_the_demo_net():
    cfg = config_from_dict({"model": {"bands": 4, "num_classes": 5, "widths": [8, 16, 16, 24], "blocks": [1, 2, 2, 2],
                                      "head": [24], "fusion": "sum", "skips": [4, 2], "min_size": 64}})
    net = as_model(randomise_statistics(build_model(cfg), 3))
    geom = net.geometry
    tile = 2 * geom.margin + 3 * geom.factor
    plan = plan_tiles(geom, 301, 333, tile=tile, exact=True)
    assert len(plan.rows) >= 3 and len(plan.cols) >= 3
    img = np.random.default_rng(1).random((301, 333, 4)).astype(np.float32)
    out = predict_scores(net, img, tile=tile, exact=True, logits=True)
    np.testing.assert_allclose(out, whole_image(net, img), atol=1e-4, rtol=0)


def test_any_local_module_works_and_probabilities_sum_to_one():
    body = nn.Sequential(nn.Conv2d(2, 6, 3, padding=1), nn.ReLU(), nn.MaxPool2d(2), nn.Conv2d(6, 3, 3, padding=1),
                         nn.Upsample(scale_factor=2, mode="bilinear"))
    net = as_model(PaddedNet(body, PadPlan(2), 2, 3))
    img = np.random.default_rng(0).random((64, 96, 2)).astype(np.float32)
    geom = net.geometry
    assert geom.factor == 2 and geom.margin is not None
    out = predict_scores(net, img, tile=32, exact=True, logits=True)
    np.testing.assert_allclose(out, whole_image(net, img), atol=1e-4, rtol=0)
    probs = predict_scores(net, img, tile=32, window="hann")
    np.testing.assert_allclose(probs.sum(0), 1.0, atol=1e-5)


def _seam_error(out: np.ndarray, ref: np.ndarray, borders: list[int]) -> float:
    """Mean absolute difference from the whole-image output on the columns next to tile borders."""
    cols = sorted({c for b in borders for c in range(b - 2, b + 2)})
    return float(np.abs(out[:, :, cols] - ref[:, :, cols]).mean())


@pytest.mark.parametrize("window", ["hann", "linear"])
def test_blending_beats_non_overlapping_tiles_at_the_seams(window):
    cfg = config_from_dict({"model": {"bands": 3, "num_classes": 4, "widths": [8, 16, 16], "blocks": [1, 1, 1],
                                      "fusion": "sum", "min_size": 16}})
    net = as_model(randomise_statistics(build_model(cfg), 5))
    img = np.random.default_rng(2).random((64, 256, 3)).astype(np.float32)
    ref = torch.softmax(torch.from_numpy(whole_image(net, img)), 0).numpy()
    tile = 64
    geom = net.geometry
    borders = [s.start for s in plan_tiles(geom, 64, 256, tile=tile, overlap=0, window="none").cols[1:]]
    assert borders  # several tiles across
    plain = predict_scores(net, img, tile=tile, overlap=0, window="none")
    blended = predict_scores(net, img, tile=tile, overlap=24, window=window)
    e_plain, e_blend = _seam_error(plain, ref, borders), _seam_error(blended, ref, borders)
    assert e_blend < e_plain, (e_blend, e_plain)


def test_flip_tta_on_one_tile_matches_averaged_flips():
    # Reference: the four flips of the image run through the net whole, un-flipped and their softmax averaged.
    net = as_model(randomise_statistics(build_model(config_from_dict({"model": {
        "bands": 3, "num_classes": 3, "widths": [4, 8], "fusion": "sum", "min_size": 16}})), 1))
    img = np.random.default_rng(3).random((40, 56, 3)).astype(np.float32)
    x = torch.from_numpy(img).permute(2, 0, 1)[None]
    with torch.no_grad():
        ref = sum(torch.softmax(net(x.flip(d)), 1).flip(d) for d in [(), (-1,), (-2,), (-2, -1)]) / 4
    out = predict_scores(net, img, tile=64, tta=True)
    np.testing.assert_allclose(out, ref[0].numpy(), atol=1e-5)


def test_mean_std_normalise_the_bands():
    net = randomise_statistics(build_model(config_from_dict({"model": {"bands": 2, "num_classes": 2, "widths": [4],
                                                                "min_size": 16}})), 2)
    raw = np.random.default_rng(4).integers(0, 4000, size=(30, 30, 2)).astype(np.uint16)
    mean, std = [1000.0, 2000.0], [300.0, 700.0]
    norm = ((raw - np.array(mean)) / np.array(std)).astype(np.float32)
    for scan in ("rows", "tiles"):  # the model normalises raw pixels by its own statistics, whatever the scan
        out = predict_scores(as_model(net, mean, std), raw, scan=scan, logits=True)
        np.testing.assert_allclose(out, whole_image(net, norm), atol=1e-4)


def test_scores_on_disk_equal_scores_in_memory(tmp_path):
    net = as_model(randomise_statistics(build_model(config_from_dict({"model": {
        "bands": 1, "num_classes": 3, "widths": [4, 4], "min_size": 16}})), 4))
    img = np.random.default_rng(5).random((70, 90, 1)).astype(np.float32)
    mem = predict_scores(net, img, tile=32, overlap=8)
    disk = predict_scores(net, img, tile=32, overlap=8, workdir=tmp_path)
    assert isinstance(disk.base, np.memmap) or isinstance(disk, np.memmap)
    np.testing.assert_array_equal(mem, disk)


def test_global_layers_refuse_exact_mode_but_blend():
    cfg = config_from_dict({"model": {"bands": 3, "num_classes": 2, "widths": [8, 8], "norm": "group", "groups": 2,
                                      "min_size": 16}})
    net = as_model(build_model(cfg))
    img = np.zeros((40, 40, 3), np.float32)
    with pytest.raises(ConfigError, match=r"exact tiling is impossible: layers .*GroupNorm"):
        predict_scores(net, img, tile=32, exact=True)
    assert predict_scores(net, img, tile=32).shape == (2, 40, 40)


@pytest.mark.parametrize("kwargs, match", [
    ({"tile": 20, "exact": True}, r"tile: 20 px is too small for exact tiling: .*margin of {m} px.*tile >= {t}"),
    ({"tile": 2}, r"tile: 2 is smaller than the net's down-sampling factor 4"),
    ({"tile": 32, "overlap": 40}, r"overlap: 40 leaves no room"),
    ({"tile": 64, "exact": True, "overlap": 10}, r"overlap: 10 is below the {o} px"),
    ({"tile": 32, "window": "box"}, r"window: 'box' is not one of: hann, linear, none"),
    ({"tile": 64, "exact": True, "tta": True}, r"exact: flip TTA .* never equal whole-image inference"),
    ({"tile": 64, "batch": 0}, r"batch: 0 must be >= 1"),
])
def test_bad_options_name_the_option(kwargs, match):
    net = as_model(build_model(config_from_dict({"model": {"bands": 1, "num_classes": 2, "widths": [4, 4, 4],
                                                           "min_size": 16}})))
    geom = net.geometry
    assert geom.factor == 4  # strides 1, 2, 2 (config default)
    m = geom.margin
    match = match.format(m=m, o=2 * m, t=math.ceil((2 * m + 4) / 4) * 4)
    with pytest.raises(ConfigError, match=match):
        predict_scores(net, np.zeros((50, 50, 1), np.float32), **kwargs)


def test_bf16_engine_keeps_transposed_convolutions_in_float32():
    from fcnkit.inference.engines import Float32, TorchEngine

    net = as_model(randomise_statistics(build_model(config_from_dict({"model": {
        "bands": 3, "num_classes": 3, "widths": [8, 8], "fusion": "sum", "min_size": 16}})), 6))
    engine = TorchEngine(net, bf16=True)
    wrapped = [m for m in engine.model.modules() if isinstance(m, Float32)]
    assert wrapped and all(isinstance(m.module, nn.ConvTranspose2d) for m in wrapped)
    x = torch.randn(2, 3, 32, 32)
    out, ref = engine(x), TorchEngine(net)(x)
    assert out.dtype == torch.float32
    # bfloat16 keeps 8 significand bits: relative error of order 2^-8 per operation (IEEE-style rounding)
    assert torch.allclose(out, ref, atol=0.1, rtol=0.05)
