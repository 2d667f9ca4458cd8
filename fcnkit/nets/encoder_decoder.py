"""The encoder–decoder family of fully convolutional segmenters, built from a config: encoder stages, 1×1
head, up-sampling, skip fusion.

Three decoders, chosen by ``model.fusion``:

* ``none``  — one up-sampling from the deepest stride (FCN-32s style);
* ``sum``   — class-score maps from shallower strides added in, coarse to fine (FCN-16s/8s, Long et al. 2015);
* ``concat``— features up-sampled and concatenated with the encoder's at each skip stride, then convolved
  (U-Net, Ronneberger et al. 2015).
"""

from __future__ import annotations

import torch
from torch import nn

from fcnkit.config import Config, ModelConfig
from fcnkit.errors import ConfigError
from fcnkit.geometry import PadPlan
from fcnkit.nets.blocks import BilinearUp, ConvBlock, ScoreHead
from fcnkit.nets.padded import PaddedNet


class Stage(nn.Sequential):
    """Optional down-sampling (max pool or strided conv), then conv–norm–ReLU blocks."""

    def __init__(self, cin: int, width: int, blocks: int, stride: int, dilation: int, m: ModelConfig) -> None:
        layers: list[nn.Module] = []
        if stride > 1 and m.down == "maxpool":
            layers.append(nn.MaxPool2d(stride, stride))
        for b in range(blocks):
            s = stride if (b == 0 and m.down == "conv") else 1
            layers.append(ConvBlock(cin, width, m.kernel, s, dilation, m.norm, m.groups))
            cin = width
        super().__init__(*layers)


class Encoder(nn.Module):
    """Stages of conv blocks; returns every stage's output (finest first)."""

    def __init__(self, m: ModelConfig) -> None:
        super().__init__()
        cin, stages = m.bands, []
        for width, blocks, stride, dil in zip(m.widths, m.stage_blocks(), m.stage_strides(), m.stage_dilations(),
                                              strict=True):
            stages.append(Stage(cin, width, blocks, stride, dil, m))
            cin = width
        self.stages = nn.ModuleList(stages)

    def forward(self, x: torch.Tensor) -> list[torch.Tensor]:
        feats = []
        for stage in self.stages:
            x = stage(x)
            feats.append(x)
        return feats


def _feature_at(m: ModelConfig, stride: int) -> tuple[int, int]:
    """Index and width of the deepest encoder stage whose output has the given stride."""
    i = max(k for k, s in enumerate(m.stage_output_strides()) if s == stride)
    return i, m.widths[i]


class ScoreSumDecoder(nn.Module):
    """Score the deepest features with the head, then repeatedly up-sample and add the 1×1 scores of
    shallower stages; a final up-sampling brings the map to full resolution. With no skips this is a
    single up-sampling by the whole stride (FCN-32s)."""

    def __init__(self, m: ModelConfig) -> None:
        super().__init__()
        learn = m.upsample == "transposed"
        self.head = ScoreHead(m.widths[-1], m.num_classes, m.head, m.dropout)
        stride = m.stage_output_strides()[-1]
        self.taps, scores, ups = [], [], []
        for s in m.skip_strides():
            i, width = _feature_at(m, s)
            self.taps.append(i)
            ups.append(BilinearUp(m.num_classes, stride // s, learn))
            scores.append(nn.Conv2d(width, m.num_classes, 1))
            stride = s
        self.ups = nn.ModuleList(ups)
        self.scores = nn.ModuleList(scores)
        self.final_up = BilinearUp(m.num_classes, stride, learn)

    def forward(self, feats: list[torch.Tensor]) -> torch.Tensor:
        y = self.head(feats[-1])
        for tap, up, score in zip(self.taps, self.ups, self.scores, strict=True):
            y = up(y) + score(feats[tap])
        return self.final_up(y)


class ConcatDecoder(nn.Module):
    """U-Net decoder: up-sample features, concatenate the encoder's at that stride, convolve; the 1×1
    head scores the finest decoder features, up-sampled to full resolution if still coarse."""

    def __init__(self, m: ModelConfig) -> None:
        super().__init__()
        learn = m.upsample == "transposed"
        stride, cin = m.stage_output_strides()[-1], m.widths[-1]
        self.taps, ups, convs = [], [], []
        for s in m.skip_strides():
            i, width = _feature_at(m, s)
            self.taps.append(i)
            ups.append(BilinearUp(cin, stride // s, learn, mix=False))
            blocks = [ConvBlock(cin + width, width, m.kernel, 1, 1, m.norm, m.groups)]
            blocks += [ConvBlock(width, width, m.kernel, 1, 1, m.norm, m.groups)
                       for _ in range(m.stage_blocks()[i] - 1)]
            convs.append(nn.Sequential(*blocks))
            stride, cin = s, width
        self.ups = nn.ModuleList(ups)
        self.convs = nn.ModuleList(convs)
        self.head = ScoreHead(cin, m.num_classes, m.head, m.dropout)
        self.final_up = BilinearUp(m.num_classes, stride, learn)

    def forward(self, feats: list[torch.Tensor]) -> torch.Tensor:
        y = feats[-1]
        for tap, up, conv in zip(self.taps, self.ups, self.convs, strict=True):
            y = conv(torch.cat([up(y), feats[tap]], dim=1))
        return self.final_up(self.head(y))


class EncoderDecoder(nn.Module):
    """Encoder and decoder; expects sides that fit the pooling grid (see :class:`~fcnkit.nets.padded.PaddedNet`)."""

    def __init__(self, m: ModelConfig) -> None:
        super().__init__()
        self.encoder = Encoder(m)
        self.decoder = ConcatDecoder(m) if m.fusion == "concat" else ScoreSumDecoder(m)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return self.decoder(self.encoder(x))


def build_model(cfg: Config | ModelConfig) -> PaddedNet:
    """Build the encoder–decoder a config describes (weights random-initialised, bilinear up-sampling kernels),
    wrapped to take images of any size."""
    m = cfg.model if isinstance(cfg, Config) else cfg
    if m.bands is None or m.num_classes is None:
        raise ConfigError("model.bands and model.num_classes: not known yet (they come from the data when training; "
                          "give them to build a net without data)")
    return PaddedNet(EncoderDecoder(m), PadPlan(m.stage_output_strides()[-1]), m.bands, m.num_classes)
