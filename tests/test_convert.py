"""Classifier → fully convolutional net: equivalence, output sizes, sliding windows, bad input.

Outside references:
- Long, Shelhamer & Darrell 2015, "Fully Convolutional Networks for Semantic Segmentation", §3.1: dense
  layers are convolutions whose kernels cover their whole input region; the converted VGG gives a 1×1 map at
  224 px and a coarse map elsewhere, with output stride 32 (the 384 px → 6×6 example is stated in the issue
  that quotes the paper);
- Sermanet et al. 2014, "OverFeat", §3.3/3.5: a convolutional net applied to a larger image equals the
  classifier applied to every window of the native size at the net's stride, when no padding is involved;
- Zhou et al. 2016, "Learning Deep Features for Discriminative Localization": with global average pooling
  and a linear classifier, the class score is the spatial mean of the class-activation map;
- PyTorch's Conv2d documentation for output sizes: floor((n + 2p − d(k − 1) − 1)/s) + 1;
- torchvision's model builders (the classifiers under test), run with random weights in eval mode.
"""

from __future__ import annotations

import numpy as np
import pytest
import torch
import torchvision
from hypothesis import given, settings
from hypothesis import strategies as st
from model_strategies import lively
from torch import nn

from fcnkit.convert import ConvertError, convert_classifier
from fcnkit.geometry import conv_output_size


def user_cnn(classes: int = 4, padded: bool = False) -> nn.Sequential:
    """A small user classifier for 28×28 inputs: two conv/pool stages ("same"-padded or padding-free),
    flatten, two dense layers."""
    torch.manual_seed(1)
    return nn.Sequential(
        nn.Conv2d(3, 8, 5, padding=2 if padded else 0), nn.ReLU(), nn.MaxPool2d(2),
        nn.Conv2d(8, 16, 3, padding=1 if padded else 0), nn.BatchNorm2d(16), nn.ReLU(), nn.MaxPool2d(2),
        nn.Flatten(), nn.Linear(16 * (7 if padded else 5) ** 2, 32), nn.ReLU(), nn.Dropout(0.3),
        nn.Linear(32, classes),
    )


def _tv(arch: str) -> nn.Module:
    torch.manual_seed(0)
    return lively(torchvision.models.get_model(arch, weights=None))


# Each case: source, native size, extra input side, expected output side there by conv arithmetic.
# For the k×k / sliding-window forms one output per native window at stride 32: (n - native)/32 + 1;
# for the class-activation form the output is the feature map itself: n/32 for these padded nets.
TORCHVISION_CASES = [
    ("alexnet", 224, 320, (320 - 224) // 32 + 1),
    ("vgg11", 224, 384, 6),  # Long et al. 2015: VGG at 384 px gives a 6x6 map, stride 32
    ("resnet18", 224, 288, 288 // 32),
    ("mobilenet_v3_small", 224, 288, (288 - 224) // 32 + 1),
]


@pytest.mark.parametrize(("arch", "native", "larger", "expected"), TORCHVISION_CASES)
def test_torchvision_equivalence_and_output_size(arch: str, native: int, larger: int, expected: int) -> None:
    module = _tv(arch)
    conv = convert_classifier(module, native, sizes=(larger,))
    cert = conv.certificate
    assert cert.passed and cert.max_abs_diff <= 1e-4
    assert cert.max_abs_logit > 0.05  # the comparison is not between two near-zero vectors
    assert cert.stride == 32  # the family's documented output stride (torchvision, Long et al. 2015)
    # independent check at the native size on a fresh input
    x = torch.randn(1, 3, native, native, generator=torch.Generator().manual_seed(5))
    with torch.no_grad():
        ref, out = module(x), conv.dense(x)
    got = out.mean(dim=(2, 3)) if cert.form == "cam" else out[..., 0, 0]
    torch.testing.assert_close(got, ref, atol=1e-4, rtol=0)
    with torch.no_grad():
        big = conv.dense(torch.randn(1, 3, larger, larger))
    assert big.shape[-2:] == (expected, expected) == (cert.output_sides[larger],) * 2
    # Long et al. 2015: a 1×1 map at the native size (the class-activation form keeps the feature map)
    assert cert.output_sides[native] == (native // 32 if cert.form == "cam" else 1)
    # squeeze-excitation pools whole feature maps: no bounded receptive field; the others have one
    assert (cert.receptive_field is None) == (arch == "mobilenet_v3_small")
    assert cert.form == {"alexnet": "kxk", "vgg11": "kxk", "resnet18": "cam", "mobilenet_v3_small": "window"}[arch]


@pytest.mark.parametrize("arch", ["resnet18", "mobilenet_v2"])
def test_global_average_mean_equals_logits_at_any_size(arch: str) -> None:
    """Zhou et al. 2016 (class-activation maps): the mean of the dense score map is the classifier's output
    on the same input, whatever its size (ResNet and MobileNetV2 pool globally, then apply affine layers)."""
    module = _tv(arch)
    conv = convert_classifier(module, 64)
    assert conv.certificate.form == "cam"
    for side in (96, 160):
        x = torch.randn(2, 3, side, side, generator=torch.Generator().manual_seed(side))
        with torch.no_grad():
            torch.testing.assert_close(conv.dense(x).mean(dim=(2, 3)), module(x), atol=1e-4, rtol=0)


def test_window_pool_for_global_average_on_request() -> None:
    """A global average followed by affine layers may also become a sliding pool: then the map at the
    native size is 1×1 and equals the logits."""
    module = _tv("resnet18")
    cert = convert_classifier(module, 64, global_pool="window").certificate
    assert cert.form == "window" and cert.output_sides[64] == 1 and cert.passed


def test_user_cnn_certificate() -> None:
    module = lively(user_cnn())
    cert = convert_classifier(module, 28, sizes=(44,)).certificate
    assert cert.passed and cert.max_abs_logit > 0.05
    assert cert.stride == 4
    # receptive field of conv5 → pool2 → conv3 → pool2, then the 5x5 kernel at jump 4: the whole 28 px window
    # (r' = r + (k − 1)·j, Long et al. 2015 / common practice)
    assert cert.receptive_field == 28
    assert cert.output_sides[44] == (44 - 28) // 4 + 1


@settings(max_examples=6, deadline=None)
@given(st.integers(0, 4), st.integers(0, 4))
def test_sliding_window_equivalence(extra_h: int, extra_w: int) -> None:
    """OverFeat (Sermanet et al. 2014): for a padding-free net the score at output (i, j) is the classifier
    applied to the native-size window at (i·stride, j·stride)."""
    module = lively(user_cnn())
    conv = convert_classifier(module, 28)
    s = conv.certificate.stride
    x = torch.randn(1, 3, 28 + s * extra_h, 28 + s * extra_w, generator=torch.Generator().manual_seed(extra_h))
    with torch.no_grad():
        dense = conv.dense(x)
        assert dense.shape[-2:] == (extra_h + 1, extra_w + 1)
        for i in range(extra_h + 1):
            for j in range(extra_w + 1):
                window = x[..., i * s:i * s + 28, j * s:j * s + 28]
                torch.testing.assert_close(dense[..., i, j], module(window), atol=1e-5, rtol=0)


def test_size_formula_matches_conv_arithmetic() -> None:
    """PyTorch Conv2d docs: each layer's output side by the floor formula; the dense net of the user CNN
    at side n gives the formula's composition."""
    conv = convert_classifier(lively(user_cnn()), 28, sizes=(40, 52, 61))
    for n, got in conv.certificate.output_sides.items():
        side = conv_output_size(n, 5)
        side = conv_output_size(side, 2, 2)
        side = conv_output_size(side, 3)
        side = conv_output_size(side, 2, 2)
        assert got == conv_output_size(side, 5)  # the 5x5 convolution made of the first dense layer
        with torch.no_grad():
            assert conv.dense(torch.zeros(1, 3, n, n)).shape[-1] == got


def test_score_map_places_scores_at_window_centres() -> None:
    """The full-resolution map is the coarse map linearly interpolated between window centres
    (i·stride + (native − 1)/2), computed here independently with numpy.interp."""
    module = lively(user_cnn())
    conv = convert_classifier(module, 28)
    s, h, w = 4, 28 + 4 * 5, 28 + 4 * 3
    x = torch.randn(1, 3, h, w, generator=torch.Generator().manual_seed(3))
    with torch.no_grad():
        coarse = conv.dense(x)[0].numpy()
        full = conv.net(x)[0].numpy()
    assert full.shape == (4, h, w)
    centres_y = np.arange(coarse.shape[1]) * s + (28 - 1) / 2
    centres_x = np.arange(coarse.shape[2]) * s + (28 - 1) / 2
    ys = np.arange(int(np.ceil(centres_y[0])), int(centres_y[-1]) + 1)
    xs = np.arange(int(np.ceil(centres_x[0])), int(centres_x[-1]) + 1)
    for c in range(coarse.shape[0]):
        rows = np.stack([np.interp(xs, centres_x, coarse[c, i]) for i in range(coarse.shape[1])])
        expected = np.stack([np.interp(ys, centres_y, rows[:, k]) for k in range(len(xs))], axis=1)
        np.testing.assert_allclose(full[c][np.ix_(ys, xs)], expected, atol=1e-5)


def test_score_map_any_size_and_keep() -> None:
    conv = convert_classifier(lively(user_cnn()), 28, keep=(2, 0))
    with torch.no_grad():
        for h, w in ((5, 9), (28, 28), (61, 33)):
            assert conv.net(torch.randn(1, 3, h, w)).shape == (1, 2, h, w)
    assert conv.net.classes == 2


def test_padded_user_cnn_and_adaptive_grid_pool() -> None:
    """A padded CNN with an adaptive pool to 7x7 (the VGG head shape) at a native size giving 14x14
    features: the pool becomes a sliding 2x2 average and the 7x7 kernel is dilated by 2."""
    torch.manual_seed(2)
    module = lively(nn.Sequential(
        nn.Conv2d(3, 8, 3, padding=1), nn.ReLU(), nn.MaxPool2d(2), nn.AdaptiveAvgPool2d(7), nn.Flatten(),
        nn.Linear(8 * 49, 5)))
    conv = convert_classifier(module, 28, sizes=(36,))
    assert conv.certificate.passed and conv.certificate.stride == 2
    assert conv.certificate.output_sides[36] == (36 - 28) // 2 + 1


# --- bad input: one line naming the problem ------------------------------------------------------------


@pytest.mark.parametrize("tail", [nn.Softmax(dim=-1), nn.LayerNorm(4)])
def test_unsupported_head_names_the_layer(tail: nn.Module) -> None:
    module = nn.Sequential(*user_cnn(), tail)
    with pytest.raises(ConvertError, match=r"unsupported layer 12 \((Softmax|LayerNorm)\)") as e:
        convert_classifier(module, 28)
    assert "\n" not in str(e.value)


def test_wrong_native_size() -> None:
    with pytest.raises(ConvertError, match="native size 32 gives 16x6x6 = 576 features but 8 expects 400") as e:
        convert_classifier(user_cnn(), 32)
    assert "\n" not in str(e.value)


def test_no_dense_layer_or_no_flatten() -> None:
    with pytest.raises(ConvertError, match="unsupported layer"):
        convert_classifier(nn.Sequential(nn.Conv2d(3, 4, 3), nn.ReLU()), 28)


@pytest.mark.parametrize("padded", [False, True])
def test_tiled_inference_equals_whole_image_map(padded: bool) -> None:
    """The converted net runs through tiled inference; in exact mode the tiles reproduce the map of the whole
    image (reference: the same net on the whole image, softmax from torch.nn.functional)."""
    from fcnkit import Model
    from fcnkit.inference.scan import predict_scores

    conv = convert_classifier(lively(user_cnn(padded=padded)), 28, keep=(0, 1, 2))
    image = np.random.default_rng(0).integers(0, 255, (150, 170, 3)).astype(np.uint8)
    model = Model.from_conversion(conv, mean=[100.0] * 3, std=[50.0] * 3)
    scores = predict_scores(model, image, tile=96, exact=True)
    x = torch.from_numpy(((image.astype(np.float32) - 100) / 50).transpose(2, 0, 1))[None]
    with torch.no_grad():
        whole = torch.softmax(conv.net(x), dim=1)[0].numpy()
    assert scores.shape == (3, 150, 170)
    np.testing.assert_allclose(scores, whole, atol=1e-5)


class _FunctionalNet(nn.Module):
    """A user classifier written with functional calls and a chosen way of flattening."""

    def __init__(self, flatten: str, ceil_mode: bool = False) -> None:
        super().__init__()
        self.conv = nn.Conv2d(3, 8, 3, padding=1)
        self.fc1, self.fc2 = nn.Linear(8 * 8 * 8, 16), nn.Linear(16, 3)
        self.flatten, self.ceil_mode = flatten, ceil_mode

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        if self.flatten == "view":
            x = torch.nn.functional.max_pool2d(torch.relu(self.conv(x)), 2, ceil_mode=self.ceil_mode)
        else:
            x = torch.nn.functional.avg_pool2d(torch.relu(self.conv(x)), kernel_size=2)
        if self.flatten == "view":
            x = x.view(x.size(0), -1)
        elif self.flatten == "method":
            x = x.flatten(start_dim=1)
        else:
            x = torch.flatten(x, 1)
        x = torch.nn.functional.dropout(torch.nn.functional.relu(self.fc1(x)), 0.2, self.training)
        return self.fc2(x)


@pytest.mark.parametrize("flatten", ["view", "method", "function"])
def test_functional_flatten_pooling_and_activations(flatten: str) -> None:
    """Functional max/avg pooling, three ways of flattening, functional ReLU and dropout; the output side at
    40 px follows the PyTorch Conv2d/MaxPool2d size formula: pool 2 → 20, then the 8×8 kernel → 13."""
    conv = convert_classifier(lively(_FunctionalNet(flatten)), 16, sizes=(40,))
    cert = conv.certificate
    assert cert.passed and cert.max_abs_logit > 0.05 and cert.stride == 2 and cert.receptive_field == 16 + 2
    with torch.no_grad():
        assert conv.dense(torch.zeros(1, 3, 40, 40)).shape[-1] == cert.output_sides[40] == 13


def test_layer_the_geometry_reader_cannot_model_is_refused() -> None:
    with pytest.raises(ConvertError, match="ceil_mode") as e:
        convert_classifier(lively(_FunctionalNet("view", ceil_mode=True)), 16)
    assert "\n" not in str(e.value)


@pytest.mark.parametrize("pool", [nn.AdaptiveAvgPool2d(1), nn.AdaptiveMaxPool2d(1)])
def test_global_pool_with_nonlinear_head_slides(pool: nn.Module) -> None:
    """A global pool followed by a non-affine head (or a global max) cannot be commuted: it becomes a sliding
    pool of the native feature size, and each output is the classifier on one native window (OverFeat)."""
    torch.manual_seed(4)
    module = lively(nn.Sequential(nn.Conv2d(3, 6, 3), nn.ReLU(), nn.MaxPool2d(2), pool, nn.Flatten(),
                                  nn.Linear(6, 8), nn.Hardswish(), nn.Linear(8, 3)))
    with pytest.raises(ConvertError, match="needs global_pool='window'"):
        convert_classifier(module, 18, global_pool="cam")
    conv = convert_classifier(module, 18)
    assert conv.certificate.form == "window" and conv.certificate.passed
    x = torch.randn(1, 3, 26, 30)
    with torch.no_grad():
        dense = conv.dense(x)
        assert dense.shape[-2:] == (5, 7)  # (26 - 18)/2 + 1, (30 - 18)/2 + 1
        for i, j in ((0, 0), (4, 6), (2, 3)):
            torch.testing.assert_close(dense[..., i, j], module(x[..., 2 * i:2 * i + 18, 2 * j:2 * j + 18]),
                                       atol=1e-5, rtol=0)
