"""Building blocks: conv–norm–activation, 1×1-convolution heads and bilinear up-sampling."""

from __future__ import annotations

import torch
from torch import nn
from torch.nn import functional as F


def make_norm(kind: str, channels: int, groups: int) -> nn.Module:
    """Batch norm, group norm (largest group count ≤ ``groups`` dividing ``channels``) or nothing."""
    if kind == "batch":
        return nn.BatchNorm2d(channels)
    if kind == "group":
        g = min(groups, channels)
        while channels % g:
            g -= 1
        return nn.GroupNorm(g, channels)
    return nn.Identity()


class ConvBlock(nn.Sequential):
    """k×k convolution ("same" padding, optional stride and dilation) → norm → ReLU."""

    def __init__(self, cin: int, cout: int, kernel: int = 3, stride: int = 1, dilation: int = 1,
                 norm: str = "batch", groups: int = 8) -> None:
        pad = dilation * (kernel - 1) // 2
        super().__init__(
            nn.Conv2d(cin, cout, kernel, stride=stride, padding=pad, dilation=dilation, bias=norm == "none"),
            make_norm(norm, cout, groups),
            nn.ReLU(inplace=True),
        )


class ScoreHead(nn.Sequential):
    """Classification head made only of 1×1 convolutions: the dense layers of a classifier, applied at
    every position. Hidden widths each get ReLU and dropout; the last layer gives class scores."""

    def __init__(self, cin: int, classes: int, hidden: list[int], dropout: float = 0.0) -> None:
        layers: list[nn.Module] = []
        for width in hidden:
            layers += [nn.Conv2d(cin, width, 1), nn.ReLU(inplace=True)]
            if dropout > 0:
                layers.append(nn.Dropout2d(dropout))
            cin = width
        layers.append(nn.Conv2d(cin, classes, 1))
        super().__init__(*layers)


def bilinear_kernel(factor: int) -> torch.Tensor:
    """The 2-D kernel with which a stride-``factor`` transposed convolution performs bilinear
    interpolation (size 2f − f mod 2; weights 1 − |offset|/f)."""
    size = 2 * factor - factor % 2
    centre = (size - 1) / 2
    t = 1 - (torch.arange(size, dtype=torch.float64) - centre).abs() / factor
    return torch.outer(t, t).float()


class BilinearUp(nn.Module):
    """Up-sampling by an integer factor: a transposed convolution initialised to bilinear interpolation
    and learnt with the rest of the net, or fixed bilinear interpolation (align_corners=False).

    ``mix`` lets the learnable version combine channels (class-score maps); otherwise it works on each
    channel alone, which is what wide feature maps want."""

    def __init__(self, channels: int, factor: int, learnable: bool = True, mix: bool = True) -> None:
        super().__init__()
        self.factor = factor
        self.deconv: nn.ConvTranspose2d | None = None
        if learnable and factor > 1:
            k = 2 * factor - factor % 2
            groups = 1 if mix else channels
            self.deconv = nn.ConvTranspose2d(channels, channels, k, stride=factor, padding=(k - factor) // 2,
                                             groups=groups, bias=False)
            with torch.no_grad():
                self.deconv.weight.zero_()
                kern = bilinear_kernel(factor)
                for c in range(channels):
                    self.deconv.weight[c, 0 if groups > 1 else c] = kern

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        if self.factor == 1:
            return x
        if self.deconv is not None:
            return self.deconv(x)
        return F.interpolate(x, scale_factor=self.factor, mode="bilinear", align_corners=False)
