"""Net building blocks and the config-built segmenter, against torch.nn.functional and scipy.ndimage."""

from __future__ import annotations

import numpy as np
import pytest
import torch
from hypothesis import given, settings
from hypothesis import strategies as st
from model_strategies import model_configs
from scipy import ndimage
from torch import nn
from torch.nn import functional as F

from fcnkit.config import ModelConfig
from fcnkit.nets import PaddedNet, build_model
from fcnkit.nets.blocks import BilinearUp, ConvBlock, ScoreHead

pytestmark = pytest.mark.usefixtures("torch_one_thread")

FACTORS = [2, 3, 4, 8]


def _zoom(x: np.ndarray, factor: int, mode: str) -> np.ndarray:
    """scipy.ndimage.zoom(order=1) of each channel of N×C×H×W. grid_mode=True zooms the full pixel extent,
    i.e. pixel centres at half-integers, which is torch's align_corners=False (scipy docs of ``zoom``)."""
    return np.stack([np.stack([ndimage.zoom(c, factor, order=1, grid_mode=True, mode=mode) for c in img])
                     for img in x])


@pytest.mark.parametrize("mix", [True, False])
@pytest.mark.parametrize("factor", FACTORS)
def test_bilinear_transposed_conv_is_bilinear_interpolation(factor: int, mix: bool) -> None:
    torch.manual_seed(factor)
    up = BilinearUp(3, factor, learnable=True, mix=mix)
    assert isinstance(up.deconv, nn.ConvTranspose2d) and up.deconv.weight.requires_grad  # learnable (Long et al.)
    x = torch.rand(2, 3, 9, 11)
    with torch.no_grad():
        y = up(x)
    assert y.shape == (2, 3, 9 * factor, 11 * factor)
    inner = (..., slice(factor, -factor), slice(factor, -factor))  # away from the borders
    # reference 1: torch.nn.functional.interpolate(mode='bilinear', align_corners=False)
    ref = F.interpolate(x, scale_factor=factor, mode="bilinear", align_corners=False)
    torch.testing.assert_close(y[inner], ref[inner], rtol=0, atol=1e-5)
    # reference 2: scipy.ndimage.zoom(order=1, grid_mode=True); in the interior the boundary mode is irrelevant
    ref2 = _zoom(x.double().numpy(), factor, "nearest")
    np.testing.assert_allclose(y[inner].numpy(), ref2[inner], rtol=0, atol=1e-5)
    # over the whole image, the transposed convolution (zero outside the input) is scipy's linear
    # interpolation of the zero-extended image: mode='grid-constant' with cval=0 (scipy docs of ``zoom``)
    np.testing.assert_allclose(y.numpy(), _zoom(x.double().numpy(), factor, "grid-constant"), rtol=0, atol=1e-5)


@pytest.mark.parametrize("factor", FACTORS)
def test_fixed_bilinear_matches_scipy_everywhere(factor: int) -> None:
    up = BilinearUp(2, factor, learnable=False)
    assert up.deconv is None and not list(up.parameters())
    x = torch.rand(1, 2, 6, 5, dtype=torch.float64)
    # torch clamps source coordinates at the edges, which is scipy's 'nearest' (edge-replicating) mode
    np.testing.assert_allclose(up(x).numpy(), _zoom(x.numpy(), factor, "nearest"), rtol=0, atol=1e-12)


def test_blocks_keep_size_and_head_is_1x1_only() -> None:
    x = torch.rand(1, 2, 13, 10)
    for kernel in (1, 3, 5, 7):
        for dilation in (1, 2, 3):
            assert ConvBlock(2, 4, kernel, 1, dilation, "batch").eval()(x).shape == (1, 4, 13, 10)
    head = ScoreHead(4, 3, [8, 6], dropout=0.2)
    convs = [m for m in head.modules() if isinstance(m, nn.Conv2d)]
    assert [(c.in_channels, c.out_channels) for c in convs] == [(4, 8), (8, 6), (6, 3)]
    assert all(c.kernel_size == (1, 1) for c in convs)
    assert not any(isinstance(m, nn.Linear) for m in head.modules())


COMBOS = [(f, u, d) for f in ("none", "sum", "concat") for u in ("transposed", "bilinear") for d in ("maxpool", "conv")]


@pytest.mark.parametrize(("fusion", "upsample", "down"), COMBOS)
@settings(max_examples=8, deadline=None)
@given(data=st.data(), h=st.integers(1, 40), w=st.integers(1, 40), n=st.integers(1, 2))
def test_net_output_is_input_sized(fusion: str, upsample: str, down: str, data: st.DataObject,
                                      h: int, w: int, n: int) -> None:
    cfg = data.draw(model_configs(fusion=fusion, upsample=upsample, down=down), label="cfg")
    net = build_model(cfg).eval()
    assert isinstance(net, PaddedNet) and net.factor == cfg.stage_output_strides()[-1]
    x = torch.rand(n, cfg.bands, h, w)
    with torch.no_grad():
        y = net(x)
    assert y.shape == (n, cfg.num_classes, h, w) and torch.isfinite(y).all()
    # sides already multiples of the factor are not padded: the net is then exactly its body
    hh, ww = net.factor * -(-h // net.factor), net.factor * -(-w // net.factor)
    xp = torch.rand(n, cfg.bands, hh, ww)
    with torch.no_grad():
        torch.testing.assert_close(net(xp), net.body(xp))


def test_net_trains_on_tiny_inputs() -> None:
    cfg = ModelConfig(bands=2, num_classes=3, widths=[4, 4, 4], fusion="sum")
    net = build_model(cfg).train()
    y = net(torch.rand(2, 2, 5, 3))
    assert y.shape == (2, 3, 5, 3)
    y.sum().backward()
    assert all(p.grad is not None for p in net.parameters())
