"""oneDNN's fused convolution kernels, as row streaming calls them: a convolution with its ReLU in one pass, a
convolution added in place into a map, and a convolution of a channel concatenation without the concatenation.
(The kernels torch's own compiler uses on CPUs.)"""

from __future__ import annotations

from collections.abc import Sequence

import torch

ONEDNN = hasattr(torch.ops.mkldnn, "_convolution_pointwise") and torch.backends.mkldnn.is_available()


def onednn_conv(x: torch.Tensor, weight: torch.Tensor, bias: torch.Tensor | None, stride: tuple[int, int],
                padding: tuple[int, int], dilation: tuple[int, int], groups: int, relu: bool) -> torch.Tensor:
    """Convolution, and the ReLU after it when ``relu``, in one oneDNN pass (the fused kernel torch's own
    compiler uses on CPUs); equal to conv2d (then relu). Used for every convolution: for the 1×1 score layers of a
    few classes torch's own dispatch picks an im2col kernel about 2× slower (measured on 5 classes)."""
    return torch.ops.mkldnn._convolution_pointwise(x, weight, bias, list(padding), list(stride), list(dilation),
                                                   groups, "relu" if relu else "none", [None] if relu else [], "")


def onednn_conv_add(out: torch.Tensor, x: torch.Tensor, weight: torch.Tensor, stride: tuple[int, int],
                    padding: tuple[int, int], dilation: tuple[int, int], relu: bool) -> torch.Tensor:
    """``out`` += conv2d(x, weight) (no bias), then ReLU when ``relu``, in place in one oneDNN pass."""
    return torch.ops.mkldnn._convolution_pointwise_.binary(out, x, weight, None, list(padding), list(stride),
                                                           list(dilation), 1, "add", 1.0,
                                                           "relu" if relu else None, [], "")


def concat_conv(xs: Sequence[torch.Tensor], weights: Sequence[torch.Tensor], bias: torch.Tensor | None,
                stride: tuple[int, int], padding: tuple[int, int], dilation: tuple[int, int],
                relu: bool) -> torch.Tensor:
    """conv2d(cat(xs, channels), weight) (then ReLU) without the concatenation: one convolution per part with its
    slice of the weights (``weights``), each added into the output in place. Saves writing and reading the
    concatenated map: a U-Net decoder's widest maps."""
    n = len(xs)
    y = onednn_conv(xs[0], weights[0], bias, stride, padding, dilation, 1, relu and n == 1)
    for i in range(1, n):
        y = onednn_conv_add(y, xs[i], weights[i], stride, padding, dilation, relu and i == n - 1)
    return y

