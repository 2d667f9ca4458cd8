"""Grow a segmenter out of a classifier (the FCN recipe of Long et al. 2015) and rebuild converted nets
from what a model file says of them.

The classifier's trunk and converted hidden dense layers are kept; its last dense layer is replaced by a
1×1 score layer for the new classes (zero-initialised, as in the paper) or by a subset of its own rows;
class scores are brought to full resolution by learnable transposed convolutions initialised to bilinear
interpolation, optionally fusing 1×1 scores of shallower trunk stages on the way (FCN-16s, FCN-8s).

A model file names how to rebuild such a net (a :class:`Recipe` and the classifier's source). Only torchvision
architecture names and plain ``nn.Sequential`` layer lists are rebuilt; nothing named in a file is imported.
"""

from __future__ import annotations

import copy
from pathlib import Path
from typing import Any

import torch
from torch import fx, nn

from fcnkit.convert.dense import (
    ConvertError,
    Plan,
    Recipe,
    build_dense,
    conv_head,
    cut_graph,
    first_conv,
    keep_rows,
    offset,
    padding_plan,
    plan,
    score_map,
    sliding_pool,
    trunk_stride,
)
from fcnkit.convert.sources import build_torchvision, sequential_from_spec
from fcnkit.errors import FcnkitError, ModelFileError
from fcnkit.nets.blocks import BilinearUp
from fcnkit.nets.padded import PaddedNet

DENSE_KIND = "dense-classifier"  # model-file kind: a converted classifier's score maps
GROWN_KIND = "grown-segmenter"  # model-file kind: a segmenter grown from a classifier


def _zero_score(cin: int, classes: int, like: nn.Conv2d | None = None) -> nn.Conv2d:
    """A new score layer (1×1, or shaped like ``like``), zero-initialised as Long et al. 2015 initialise
    their new score layers."""
    shape = {"kernel_size": like.kernel_size, "padding": like.padding, "dilation": like.dilation} if like else {}
    new = nn.Conv2d(cin, classes, **{"kernel_size": 1, **shape})
    nn.init.zeros_(new.weight)
    nn.init.zeros_(new.bias)
    return new


def _split_final(layers: list[nn.Module]) -> tuple[list[nn.Module], nn.Conv2d]:
    """The converted head without its last dense layer (and what followed it), and that layer."""
    last = max(i for i, m in enumerate(layers) if isinstance(m, nn.Conv2d))
    return layers[:last], layers[last]


def _widen(gm: fx.GraphModule, bands: int) -> None:
    """Give the first convolution ``bands`` inputs; new bands start with the mean of the existing filters
    (common practice when adding bands to a pretrained net)."""
    name, conv = first_conv(gm)
    if bands < conv.in_channels:
        raise ConvertError(f"bands: {bands} is fewer than the classifier's {conv.in_channels} input bands")
    if bands == conv.in_channels:
        return
    if conv.groups != 1:
        raise ConvertError(f"bands: cannot widen the grouped first convolution {name}")
    w = conv.weight.detach()
    extra = w.mean(dim=1, keepdim=True).expand(-1, bands - conv.in_channels, -1, -1)
    conv.in_channels = bands
    conv.weight = nn.Parameter(torch.cat([w, extra], dim=1))


def _taps(p: Plan, strides: tuple[int, ...], stride: int, delta: int) -> list[fx.Node]:
    """For each skip stride, the deepest trunk node at that stride; its grid must line up with the
    deepest features' (same offset), or the fused scores would be shifted."""
    small, large = p.small, p.large
    order = list(p.gm.graph.nodes)
    before = order[:order.index(p.head.trunk)]
    taps = []
    for t in strides:
        if not (0 < t < stride and stride % t == 0):
            raise ConvertError(f"skips: {t} is not a stride finer than and dividing the trunk's {stride}")
        found = [n for n in before if len(small.get(n.name, ())) == 4 and len(large.get(n.name, ())) == 4
                 and large[n.name][-1] - small[n.name][-1] == p.native_size // t and p.native_size % t == 0]
        if not found:
            raise ConvertError(f"skips: the trunk has no feature map at stride {t}")
        node = found[-1]
        window = p.native_size - (small[node.name][-1] - 1) * t
        if window - t != delta:
            raise ConvertError(f"skips: stride-{t} features at {node.name} sit {window - t} px off their grid but "
                               f"the deepest ones {delta} px; this classifier cannot fuse them (grow without skips)")
        taps.append(node)
    return taps


class GrownBody(nn.Module):
    """Trunk → [sliding pool] → converted hidden layers → 1×1 scores → (up-sample, add skip scores)* →
    up-sample to full resolution. The trunk returns its deepest features, then one map per skip (a tuple when
    there are skips)."""

    def __init__(self, trunk: nn.Module, pool: nn.Module, hidden: nn.Sequential, score: nn.Conv2d,
                 skip_scores: list[nn.Conv2d], ups: list[BilinearUp], final_up: BilinearUp) -> None:
        super().__init__()
        self.trunk, self.pool, self.hidden, self.score = trunk, pool, hidden, score
        self.skip_scores, self.ups, self.final_up = nn.ModuleList(skip_scores), nn.ModuleList(ups), final_up

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        if not self.ups:  # known when built, so torch.fx can trace either form
            return self.final_up(self.score(self.hidden(self.pool(self.trunk(x)))))
        deepest, *taps = self.trunk(x)
        y = self.score(self.hidden(self.pool(deepest)))
        for tap, up, score in zip(taps, self.ups, self.skip_scores, strict=True):
            y = up(y) + score(tap)
        return self.final_up(y)


def make_net(module: nn.Module, r: Recipe) -> PaddedNet:
    """The net a recipe describes, made from ``module`` (a converted classifier or a grown segmenter)."""
    module.eval()
    p = plan(module, r.native_size, global_pool=r.global_pool)
    s = trunk_stride(p)
    if not r.grow:
        if r.skips or r.classes is not None or (r.bands is not None and r.bands != p.bands):
            raise ConvertError("new classes, skips and extra bands need a grown segmenter")
        return score_map(p, build_dense(p), s, r)
    if (r.keep is None) == (r.classes is None):
        raise ConvertError("a grown segmenter needs either new classes or a subset (keep) of the classifier's")
    delta = offset(p, s, same=True)
    skips = tuple(sorted(set(r.skips), reverse=True))
    taps = _taps(p, skips, s, delta)
    trunk = copy.deepcopy(cut_graph(p.gm, [p.head.trunk, *taps]))  # training it must not change the classifier
    if r.bands is not None:
        _widen(trunk, r.bands)
    hidden, final = _split_final(conv_head(p, same=True))
    score = keep_rows(final, r.keep) if r.keep is not None else _zero_score(final.in_channels, r.classes, final)
    k = score.out_channels
    skip_scores = [_zero_score(p.small[t.name][1], k) for t in taps]
    ups, prev = [], s
    for t in skips:
        ups.append(BilinearUp(k, prev // t))
        prev = t
    body = GrownBody(trunk, sliding_pool(p, same=True), nn.Sequential(*hidden), score, skip_scores, ups,
                     BilinearUp(k, prev))
    bands = r.bands or p.bands
    return PaddedNet(body, padding_plan(body, bands, s, delta, r.native_size), bands, k)


def classifier_from_source(source: dict[str, Any], where: str) -> nn.Module:
    """The classifier architecture a model file's source names (random weights): a torchvision
    architecture or a plain layer list. Nothing else is rebuilt, so no code named in a file is imported."""
    kind = source.get("source")
    if kind == "torchvision":
        try:
            return build_torchvision(str(source["arch"]), int(source.get("num_classes", 1000)))
        except FcnkitError as e:
            raise ModelFileError(f"{where}: {e}") from None
    if kind == "sequential":
        return sequential_from_spec(source.get("layers", []), where).eval()
    if kind == "factory":
        raise ModelFileError(f"{where}: grown from the user factory {source.get('factory')!r}; rebuild it with "
                             f"fcnkit.convert.rebuild(meta, classifier=...) giving that classifier")
    raise ModelFileError(f"{where}: unknown classifier source {kind!r}")


def rebuild(extra: dict[str, Any], where: str | Path = "model file", classifier: nn.Module | None = None) -> PaddedNet:
    """An untrained net of the architecture a converted model file describes (``extra`` holds its recipe and
    the classifier's source)."""
    try:
        recipe = Recipe.from_dict(extra["recipe"])
        module = classifier if classifier is not None else classifier_from_source(extra["source"], str(where))
    except (KeyError, TypeError, ValueError) as e:
        raise ModelFileError(f"{where}: metadata 'extra' does not describe a converted net ({e})") from None
    try:
        with torch.random.fork_rng():
            return make_net(module, recipe)
    except ConvertError as e:
        raise ModelFileError(f"{where}: {e}") from None
