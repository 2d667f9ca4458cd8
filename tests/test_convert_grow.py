"""Growing a segmenter from a classifier (FCN-32s/16s/8s, Long et al. 2015) and converted model files.

Outside references: Long, Shelhamer & Darrell 2015 (score layers on the classifier's features, skip scores
from shallower stages fused by addition after 2× up-sampling, up-sampling initialised to bilinear
interpolation, new score layers initialised to zero — the last point from memory of the paper); Zhou et al.
2016 (class-activation maps); torch.nn.functional.interpolate (bilinear, align_corners=False) as the
reference up-sampler.
"""

from __future__ import annotations

import numpy as np
import pytest
import torch
import torchvision
from torch import nn
from torch.nn import functional as F

from fcnkit import Model
from fcnkit.convert import ConvertError, convert_classifier, grow_segmenter, rebuild
from fcnkit.convert.sources import sequential_spec
from fcnkit.errors import ModelFileError
from fcnkit.geometry import downsampling_factor
from fcnkit.inference.scan import predict_scores
from fcnkit.modelfile import write_model_file
from fcnkit.nets import layer_graph
from tests.test_convert import lively, user_cnn

TV_SOURCE = {"source": "torchvision", "arch": "resnet18", "num_classes": 1000}


@pytest.fixture(scope="module")
def resnet() -> nn.Module:
    torch.manual_seed(0)
    return lively(torchvision.models.resnet18(weights=None))


def test_fcn8s_shapes_and_init(resnet: nn.Module) -> None:
    net = grow_segmenter(resnet, 64, classes=3, skips=(16, 8)).net
    body = net.body
    assert len(body.skip_scores) == 2 and [u.factor for u in body.ups] == [2, 2] and body.final_up.factor == 8
    for conv in [body.score, *body.skip_scores]:  # new score layers start at zero (Long et al. 2015)
        assert conv.weight.abs().sum() == 0
    # learnable up-sampling starts as bilinear interpolation: away from the borders it equals F.interpolate
    x = torch.randn(1, 3, 6, 6)
    up = body.final_up
    with torch.no_grad():
        torch.testing.assert_close(up(x)[..., 8:-8, 8:-8], F.interpolate(x, scale_factor=8, mode="bilinear")[
            ..., 8:-8, 8:-8], atol=1e-5, rtol=0)
    assert up.deconv is not None and up.deconv.weight.requires_grad
    net.eval()
    with torch.no_grad():
        for h, w in ((64, 64), (70, 93)):
            assert net(torch.randn(1, 3, h, w)).shape == (1, 3, h, w)
    assert downsampling_factor(layer_graph(net)) == 32  # tiling can read its geometry


def test_kept_classes_reuse_the_classifier_rows(resnet: nn.Module) -> None:
    """With a subset of the classifier's classes and no skips, the coarse scores before up-sampling are the
    dense net's class-activation map rows (Zhou et al. 2016)."""
    keep = (7, 3, 500)
    net = grow_segmenter(resnet, 64, keep=keep).net.eval()
    dense = convert_classifier(resnet, 64).dense
    seen = {}
    net.body.final_up.register_forward_hook(lambda m, i, o: seen.setdefault("coarse", i[0]))
    x = torch.randn(2, 3, 96, 128)
    with torch.no_grad():
        net(x)
        torch.testing.assert_close(seen["coarse"], dense(x)[:, list(keep)], atol=1e-5, rtol=0)


def test_same_padded_head_matches_dense_head_inside() -> None:
    """The grown segmenter pads the k×k head convolution to keep the map's size; away from the borders its
    scores are the dense net's, shifted by (k − 1)/2 cells (a padded 28 px CNN: 7×7 features, k = 7)."""
    module = lively(user_cnn(padded=True))
    dense = convert_classifier(module, 28).dense
    net = grow_segmenter(module, 28, keep=(0, 1, 2, 3)).net.eval()
    seen = {}
    net.body.final_up.register_forward_hook(lambda m, i, o: seen.setdefault("coarse", i[0]))
    x = torch.randn(1, 3, 56, 56)
    with torch.no_grad():
        net(x)
        d = dense(x)
    assert d.shape[-1] == 8 and seen["coarse"].shape[-1] == 14
    torch.testing.assert_close(seen["coarse"][..., 3:11, 3:11], d, atol=1e-5, rtol=0)


def test_extra_bands_widen_the_first_convolution(resnet: nn.Module) -> None:
    w = resnet.conv1.weight.detach().clone()
    net = grow_segmenter(resnet, 64, classes=2, bands=4).net
    first = net.body.trunk.conv1.weight.detach()
    assert first.shape[1] == 4 and net.bands == 4
    torch.testing.assert_close(first[:, :3], w)
    torch.testing.assert_close(first[:, 3], w.mean(dim=1))  # new band: mean of the RGB filters (common practice)
    assert resnet.conv1.weight.shape[1] == 3  # the classifier itself is untouched


def test_misaligned_skips_are_refused() -> None:
    """A padding-free 3×3 convolution after the last pooling moves the stride-4 cells' centres by one input
    pixel per side relative to the stride-2 grid: fusing the two would shift scores, so it is refused."""
    module = lively(nn.Sequential(nn.Conv2d(3, 4, 5), nn.ReLU(), nn.MaxPool2d(2), nn.Conv2d(4, 4, 3), nn.ReLU(),
                                  nn.MaxPool2d(2), nn.Conv2d(4, 4, 3), nn.ReLU(), nn.Flatten(), nn.Linear(36, 2)))
    assert convert_classifier(module, 28).certificate.passed
    grow_segmenter(module, 28, classes=2)  # without skips it grows
    with pytest.raises(ConvertError, match="skips: stride-2 features .* cannot fuse") as e:
        grow_segmenter(module, 28, classes=2, skips=(2,))
    assert "\n" not in str(e.value)


def test_grown_model_file_round_trip(tmp_path, resnet: nn.Module) -> None:
    grown = grow_segmenter(resnet, 64, classes=3, skips=(16,), bands=4)
    with torch.no_grad():
        for conv in [grown.net.body.score, *grown.net.body.skip_scores]:
            conv.weight.normal_()
    model = Model.from_conversion(grown, source=TV_SOURCE).eval()
    assert model.kind == "grown-segmenter" and model.classes.names == ["class 0", "class 1", "class 2"]
    # torchvision's ImageNet statistics in 8-bit units (torchvision docs); the extra band gets their mean
    mean, _ = model.normalisation
    assert mean[:3] == pytest.approx([123.675, 116.28, 103.53]) and len(mean) == 4
    path = model.save(tmp_path / "grown.safetensors")
    loaded = Model.load(path)
    x = 100 + 50 * torch.randn(1, 4, 64, 80)
    with torch.no_grad():
        torch.testing.assert_close(loaded(x), model(x))


def test_dense_model_file_keeps_certificate(tmp_path) -> None:
    module = lively(user_cnn())
    conv = convert_classifier(module, 28, keep=(1, 3))
    path = Model.from_conversion(conv, source={"source": "factory", "factory": "somewhere:make"}).save(
        tmp_path / "dense.safetensors")
    with pytest.raises(ModelFileError, match="user factory 'somewhere:make'"):
        Model.load(path)
    loaded = Model.load(path, classifier=module)  # the user gives the classifier back: nothing imported
    assert loaded.extra["certificate"]["passed"] and loaded.num_classes == 2


def test_sequential_source_rebuilds_without_imports(tmp_path) -> None:
    from fcnkit.convert.sources import sequential_spec

    module = lively(user_cnn())
    conv = convert_classifier(module, 28, keep=(1, 3))
    model = Model.from_conversion(conv, source={"source": "sequential", "layers": sequential_spec(module, "test")})
    assert model.extra["certificate"]["passed"]
    loaded = Model.load(model.save(tmp_path / "dense.safetensors"))
    x = torch.randn(1, 3, 40, 52)
    with torch.no_grad():
        torch.testing.assert_close(loaded(x), conv.net(x))  # no normalisation for a user's classifier


@pytest.mark.parametrize("source", [
    {"source": "torchvision", "arch": "os.system"},
    {"source": "torchvision", "arch": "subprocess:run"},
    {"source": "python", "module": "os"},
    {"source": "sequential", "layers": [{"type": "Module"}]},
])
def test_rebuild_never_imports_named_code(source: dict) -> None:
    extra = {"recipe": {"native_size": 28}, "source": source}
    with pytest.raises(ModelFileError) as e:
        rebuild(extra, "m.safetensors")
    assert "\n" not in str(e.value) and "m.safetensors" in str(e.value)


def test_fine_tune_end_to_end_on_demo_scenes(tmp_path) -> None:
    """The grown segmenter trains with `fcnkit train --init` on a dataset folder of demo scenes."""
    from tiny_train import fit

    from fcnkit.config import config_from_dict
    from fcnkit.data import scenes

    data = tmp_path / "scenes"
    scenes.make_scenes(data, 4, 64, seed=3)  # 4-band (R, G, B, NIR) scenes
    k = scenes.SCENE_CLASSES.num_classes
    grown = grow_segmenter(lively(user_cnn(padded=True)), 28, classes=k, skips=(), bands=4)
    model = Model.from_conversion(grown, source={"source": "sequential", "layers": _spec()},
                                  classes=scenes.SCENE_CLASSES, mean=[100.0] * 4, std=[50.0] * 4)
    path = model.save(tmp_path / "grown.safetensors")
    cfg = config_from_dict({"train": {"epochs": 1, "batch": 2, "patch": 32, "patches_per_epoch": 4,
                                      "val_fraction": 0.25}})
    result = fit(cfg, data, tmp_path / "run", init=path, progress=False)
    out = Model.load(result.model_path)
    assert out.kind == "grown-segmenter" and out.num_classes == k and out.bands == 4
    before = Model.load(path).net.state_dict()
    after = out.net.state_dict()
    assert any(not torch.equal(before[n], after[n]) for n in before)  # training changed the weights


def _spec() -> list:
    from fcnkit.convert.sources import sequential_spec

    return sequential_spec(user_cnn(padded=True), "test")


def _needs_two_cells() -> nn.Sequential:
    """A classifier whose trunk reads more than one cell: a 1×1 stride-2 convolution and 2×2 pooling (stride 4),
    a padding-free 3×3 stride-2 convolution (stride 8) and a padded 2×2 convolution that grows the map again."""
    torch.manual_seed(3)
    return lively(nn.Sequential(nn.Conv2d(1, 2, 1, stride=2), nn.ReLU(), nn.MaxPool2d(2), nn.Conv2d(2, 2, 3, stride=2),
                                nn.ReLU(), nn.Conv2d(2, 2, 2, padding=1), nn.ReLU(), nn.AdaptiveAvgPool2d(1),
                                nn.Flatten(), nn.Linear(2, 3)))


@pytest.mark.parametrize("grow", [False, True])
def test_trunks_needing_more_than_one_cell_take_any_size(tmp_path, grow: bool) -> None:
    """Regression: a class-activation map or grown segmenter whose trunk needs more input than one cell was padded
    to a single 8 px cell, and every image up to 8 px raised a PyTorch size error (by the default scan too). By
    the PyTorch Conv2d size formula the padding-free 3×3 convolution needs 3 rows at stride 4, so 12 input
    pixels: the padded side must be 16 (two cells of 8, offset 0) for any image up to 16 px."""
    module = _needs_two_cells()
    conv = grow_segmenter(module, 24, keep=(0, 2)) if grow else convert_classifier(module, 24)
    assert conv.net.plan.padded(1) == 16 and conv.net.plan.padded(16) == 16
    model = Model.from_conversion(conv, source={"source": "sequential", "layers": sequential_spec(module, "t")},
                                  mean=[0.0], std=[1.0]).eval()
    for h, w in ((1, 1), (5, 8), (8, 3), (13, 17)):
        x = torch.randn(1, 1, h, w)
        with torch.no_grad():
            ref = model(x)
        assert ref.shape[-2:] == (h, w)
        got = predict_scores(model, x[0].permute(1, 2, 0).numpy(), logits=True)  # the default scan
        np.testing.assert_allclose(got, ref[0].numpy(), atol=1e-5)  # reference: the model's own forward (torch)
    # the model file keeps the plan; a file from before the cell count was stored still loads
    path = model.save(tmp_path / "m.safetensors")
    assert Model.load(path).plan == model.plan
    values = {**model.metadata(), "padding": {"factor": 8, "offset": 0}}
    write_model_file(tmp_path / "old.safetensors", model.net.state_dict(), values)
    assert Model.load(tmp_path / "old.safetensors").plan == model.plan
