"""Hypothesis strategies for small but varied ModelConfigs, random classifiers and models of every kind fcnkit
writes, and helpers for nets under test (shared by the geometry, net, tiling, row-streaming and model-kind
tests)."""

from __future__ import annotations

import math

import numpy as np
import torch
from hypothesis import assume
from hypothesis import strategies as st
from torch import nn

from fcnkit.config import ModelConfig, config_from_dict
from fcnkit.convert import ConvertError, convert_classifier, grow_segmenter
from fcnkit.convert.sources import sequential_spec
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
        num_classes=draw(st.integers(2, 3)),
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


# --- random models of every kind fcnkit writes ------------------------------------------------------------

MODEL_KINDS = ("config", "dense", "grown", "grown-skips")
MAX_STRIDE = 8  # trunk strides of the random classifiers (kept small so the models stay tiny)
# Pooling after a stage: none, 2×2 blocks, or 3×3 windows at stride 2 with zero / excluded padding.
_POOLS = {
    "none": lambda: None, "max2": lambda: nn.MaxPool2d(2), "max3": lambda: nn.MaxPool2d(3, 2, 1),
    "avg2": lambda: nn.AvgPool2d(2), "avg3": lambda: nn.AvgPool2d(3, 2, 1),
    "avg3-exclude": lambda: nn.AvgPool2d(3, 2, 1, count_include_pad=False),
}


def lively(module: nn.Module, seed: int = 0) -> nn.Module:
    """Random weights whose logits are of order one (torchvision's init with fresh batch-norm statistics
    gives near-zero logits for some families, which would make an equivalence check vacuous)."""
    g = torch.Generator().manual_seed(seed)
    with torch.no_grad():
        for m in module.modules():
            if isinstance(m, (nn.BatchNorm2d, nn.BatchNorm1d)):
                m.running_mean.copy_(0.1 * torch.randn(m.num_features, generator=g))
                m.running_var.copy_(0.5 + torch.rand(m.num_features, generator=g))
                m.weight.copy_(0.8 + 0.4 * torch.rand(m.num_features, generator=g))
                m.bias.copy_(0.1 * torch.randn(m.num_features, generator=g))
            elif isinstance(m, nn.Linear):
                m.weight.copy_(torch.randn(m.weight.shape, generator=g) / m.in_features ** 0.5)
                m.bias.copy_(0.1 * torch.randn(m.out_features, generator=g))
    return module.eval()


def _lively(module: nn.Module, seed: int) -> nn.Module:
    """Weights whose activations and logits stay of order one: He-normal convolutions (He et al. 2015, the
    usual ReLU initialisation), batch norms with non-trivial statistics, dense layers scaled by 1/sqrt(inputs)
    (see :func:`lively`); returns the module in eval mode."""
    g = torch.Generator().manual_seed(seed)
    with torch.no_grad():
        for m in module.modules():
            if isinstance(m, nn.Conv2d):
                nn.init.kaiming_normal_(m.weight, nonlinearity="relu", generator=g)
                if m.bias is not None:
                    m.bias.copy_(0.1 * torch.randn(m.bias.shape, generator=g))
    return lively(module, seed)


def _trunk_side(trunk: nn.Sequential, bands: int, n: int) -> int:
    """Side of the trunk's output for an n×n input (0 when the input is too small for it), run by torch."""
    try:
        with torch.no_grad():
            return int(trunk.eval()(torch.zeros(1, bands, n, n)).shape[-1])
    except RuntimeError:
        return 0


@st.composite
def classifiers(draw: st.DrawFn, *, aligned: bool = False, average: bool = True
                ) -> tuple[nn.Sequential, int, list[int]]:
    """A tiny random image classifier of standard layers (an ``nn.Sequential``), a native size it converts at,
    and the strides of its trunk's layer outputs. The trunk has 1–3 stages of Conv2d (1–4 channels, kernel 1–5,
    with or without padding, stride 1 or 2), optional batch norm, ReLU and optional max / average pooling (incl.
    padded pooling); the head is a flatten (k×k form), an adaptive pool to 1 (class-activation form when only
    affine layers follow, else a sliding window) or to 2 (a dilated k×k kernel), then 1–2 Linear layers.
    ``aligned``: odd "same"-padded kernels only, so every stage's cells line up (skips can be fused);
    ``average=False``: no average pooling in the trunk or the converted head (what row streaming cannot run)."""
    bands = draw(st.integers(1, 3))
    layers: list[nn.Module] = []
    strides: list[int] = []
    cin, stride = bands, 1
    for _ in range(draw(st.integers(1, 3))):
        k = draw(st.sampled_from([1, 3, 3, 5] if aligned else [1, 2, 3, 3, 5]))
        s = draw(st.sampled_from([1, 1, 2])) if stride * 2 <= MAX_STRIDE else 1
        pad = k // 2 if aligned or draw(st.booleans()) else 0
        cout = draw(st.integers(1, 4))
        layers.append(nn.Conv2d(cin, cout, k, stride=s, padding=pad, bias=draw(st.booleans())))
        stride *= s
        strides.append(stride)
        if draw(st.booleans()):
            layers.append(nn.BatchNorm2d(cout))
            strides.append(stride)
        layers.append(nn.ReLU())
        strides.append(stride)
        pools = sorted(p for p in _POOLS if average or not p.startswith("avg"))
        pool = _POOLS[draw(st.sampled_from(pools))]() if stride * 2 <= MAX_STRIDE else None
        if pool is not None:
            layers.append(pool)
            stride *= 2
            strides.append(stride)
        cin = cout
    trunk = nn.Sequential(*layers)
    head = draw(st.sampled_from(["flatten", "avg1", "max1", "avg2"] if average else ["flatten", "avg1", "max1"]))
    grid = {"flatten": 0, "avg1": 1, "max1": 1, "avg2": 2}[head]
    # native sizes on the trunk's stride grid whose features fit the head (a few small ones to choose from)
    fits = []
    for n in range(stride, 48 + 1, stride):
        side = _trunk_side(trunk, bands, n)
        if side >= max(grid, 1) and _trunk_side(trunk, bands, 2 * n) > side and (grid < 2 or side % grid == 0) \
                and (grid or side <= 4):
            fits.append(n)
    assume(fits)
    native = draw(st.sampled_from(fits[:4]))
    side = grid or _trunk_side(trunk, bands, native)
    if head != "flatten":
        layers.append(nn.AdaptiveMaxPool2d(1) if head == "max1" else nn.AdaptiveAvgPool2d(grid))
    layers.append(nn.Flatten())
    features, classes = cin * side * side, draw(st.integers(2, 4))
    if draw(st.booleans()):  # a hidden dense layer; with a ReLU after it a global average no longer commutes
        hidden = draw(st.integers(2, 6))
        # (a ReLU after a global average would make it a sliding average pool)
        between = draw(st.sampled_from(["relu", "dropout", "none"] if average or head != "avg1" else ["none"]))
        layers += [nn.Linear(features, hidden), *({"relu": [nn.ReLU()], "dropout": [nn.Dropout(0.3)],
                                                   "none": []}[between]), nn.Linear(hidden, classes)]
    else:
        layers.append(nn.Linear(features, classes))
    seed = draw(st.integers(0, 2**16))
    with torch.random.fork_rng():
        torch.manual_seed(seed)
        module = nn.Sequential(*layers)
    return _lively(module, seed), native, strides


def _normalisation(draw: st.DrawFn, bands: int) -> tuple[list[float], list[float]]:
    """Random per-band mean and std in raw pixel units, far from 0 and 1 so a path skipping them would show."""
    mean = draw(st.lists(st.floats(-50, 200), min_size=bands, max_size=bands))
    std = draw(st.lists(st.floats(0.5, 60), min_size=bands, max_size=bands))
    return mean, std


def _keep(draw: st.DrawFn, outputs: int) -> tuple[int, ...]:
    """Distinct classifier outputs in a random order, at least two."""
    return tuple(draw(st.lists(st.integers(0, outputs - 1), min_size=2, max_size=outputs, unique=True)))


@st.composite
def models(draw: st.DrawFn, kinds: tuple[str, ...] = MODEL_KINDS, *, average: bool = True) -> Model:
    """Random tiny models of every kind fcnkit writes, in eval mode with a random normalisation: config-built
    nets (:func:`model_configs`), converted dense classifiers (all three forms: k×k, sliding window,
    class-activation map), segmenters grown without and with skips, all from random classifiers of standard
    layers (:func:`classifiers`) with random bands, classes and kept outputs. Converted models name their
    classifier as a plain layer list, so their model files rebuild. Weights are lively (logits of order one).
    ``average=False`` leaves out average pooling and group norm (layers row streaming cannot run)."""
    kind = draw(st.sampled_from(kinds))
    seed = draw(st.integers(0, 2**16))
    if kind == "config":
        model = Model.build(draw(model_configs(norms=("batch", "none", "group") if average else ("batch", "none"))))
        randomise_statistics(model.net, seed, deconv=True)
        model.set_normalisation(*_normalisation(draw, model.bands))
        return model.eval()
    module, native, strides = draw(classifiers(aligned=kind == "grown-skips", average=average))
    source = {"source": "sequential", "layers": sequential_spec(module, "test")}
    outputs = module[-1].out_features
    if kind == "dense":
        keep = _keep(draw, outputs) if draw(st.booleans()) else None
        conversion = convert_classifier(module, native, keep=keep)
    else:
        skips: tuple[int, ...] = ()
        if kind == "grown-skips":
            finer = sorted({t for t in strides if t < strides[-1]})
            assume(finer)
            skips = tuple(draw(st.lists(st.sampled_from(finer), min_size=1, max_size=len(finer), unique=True)))
        new = draw(st.booleans())
        bands = module[0].in_channels + draw(st.integers(0, 1))
        try:
            conversion = grow_segmenter(module, native, classes=draw(st.integers(2, 3)) if new else None,
                                        keep=None if new else _keep(draw, outputs), skips=skips, bands=bands)
        except ConvertError:  # e.g. a skip stride whose only feature map is the input itself
            assume(False)
        body = conversion.net.body
        g = torch.Generator().manual_seed(seed)
        with torch.no_grad():  # new score layers start at zero (Long et al. 2015): give them trained-like weights
            for conv in [body.score, *body.skip_scores]:
                conv.weight.copy_(torch.randn(conv.weight.shape, generator=g) / conv.in_channels ** 0.5)
                conv.bias.copy_(0.1 * torch.randn(conv.bias.shape, generator=g))
        randomise_statistics(conversion.net, seed, deconv=True)
    mean, std = _normalisation(draw, conversion.net.bands)
    return Model.from_conversion(conversion, source=source, mean=mean, std=std).eval()


def raw_image(model: Model, h: int, w: int, seed: int) -> np.ndarray:
    """An H×W×B float32 image of raw pixels around the model's mean, spread by its std (so normalised inputs
    are of order one)."""
    mean, std = model.normalisation
    return (np.asarray(mean) + np.asarray(std) * np.random.default_rng(seed).normal(size=(h, w, model.bands))
            ).astype(np.float32)
