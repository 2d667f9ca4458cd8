"""Hypothesis strategies for small but varied ModelConfigs, and helpers for nets under test (shared by the
geometry, net, tiling and row-streaming tests)."""

from __future__ import annotations

import math

import numpy as np
import torch
from hypothesis import assume
from hypothesis import strategies as st
from torch import nn

from fcnkit.config import ModelConfig, config_from_dict
from fcnkit.model import Model


@st.composite
def model_configs(draw: st.DrawFn, *, norms: tuple[str, ...] = ("batch", "none", "group"),
                  max_factor: int = 12, max_stages: int = 3, fusion: str | None = None,
                  upsample: str | None = None, down: str | None = None) -> ModelConfig:
    """Valid tiny nets (1–4 channels) covering every option: stages, blocks, strides (incl. 3), dilations,
    kernel, down-sampling, norm, head, dropout, up-sampling, fusion and skip choice. ``fusion``,
    ``upsample`` and ``down`` fix those choices."""
    n = draw(st.integers(1, max_stages))
    strides = draw(st.lists(st.sampled_from([1, 2, 2, 3]), min_size=n, max_size=n))
    factor = math.prod(strides)
    assume(factor <= max_factor)
    outs = [math.prod(strides[: i + 1]) for i in range(n)]
    shallower = sorted({s for s in outs if s < outs[-1]})
    if fusion is None:
        fusion = draw(st.sampled_from(["none", "sum", "concat"])) if shallower else "none"
    assume(shallower or fusion == "none")
    skips = None
    if fusion != "none" and draw(st.booleans()):
        skips = draw(st.lists(st.sampled_from(shallower), min_size=1, max_size=len(shallower), unique=True))
    norm = draw(st.sampled_from(norms))
    # Group norm gets two channels per group: with one, an input that shrinks to 1×1 leaves a single value
    # per group, which torch refuses to normalise (a limit of group norm itself).
    widths = [4] * n if norm == "group" else draw(st.lists(st.sampled_from([1, 2, 4]), min_size=n, max_size=n))
    table = dict(
        bands=draw(st.integers(1, 3)),
        classes=draw(st.integers(2, 3)),
        widths=widths,
        blocks=draw(st.lists(st.integers(1, 2), min_size=n, max_size=n)),
        strides=strides,
        dilations=draw(st.lists(st.sampled_from([1, 1, 2]), min_size=n, max_size=n)),
        kernel=draw(st.sampled_from([1, 3, 3, 5])),
        down=down or draw(st.sampled_from(["maxpool", "conv"])),
        norm=norm,
        groups=2,
        head=draw(st.sampled_from([[], [3]])),
        dropout=draw(st.sampled_from([0.0, 0.3])),
        upsample=upsample or draw(st.sampled_from(["transposed", "bilinear"])),
        fusion=fusion,
        skips=skips,
        min_size=factor,
    )
    if skips is None:
        del table["skips"]
    return config_from_dict({"model": table}).model  # validated like a config file


def randomise_statistics(net: nn.Module, seed: int, deconv: bool = False) -> nn.Module:
    """Non-trivial batch-norm statistics (so folding them into convolutions is exercised) and, with ``deconv``,
    transposed-convolution kernels moved off bilinear, as after training; returns the net in eval mode."""
    g = torch.Generator().manual_seed(seed)
    for m in net.modules():
        if isinstance(m, nn.BatchNorm2d):
            m.running_mean.copy_(torch.rand(m.num_features, generator=g) - 0.5)
            m.running_var.copy_(torch.rand(m.num_features, generator=g) + 0.5)
        if deconv and isinstance(m, nn.ConvTranspose2d):
            m.weight.data.add_(0.1 * torch.randn(m.weight.shape, generator=g))
    return net.eval()


def as_model(net: nn.Module, mean: list[float] | None = None, std: list[float] | None = None) -> Model:
    """A net (with its padding plan) as a model: no normalisation unless given, generic classes."""
    return Model(net, classes=None, mean=mean or [0.0] * net.bands, std=std or [1.0] * net.bands).eval()


def whole_image(model: nn.Module, img: np.ndarray) -> np.ndarray:
    """The reference for tiled and streamed inference: the model (or net) run on the whole H×W×B image at once
    by its own forward pass (torch)."""
    with torch.no_grad():
        return model(torch.from_numpy(img).permute(2, 0, 1)[None].float())[0].numpy()
