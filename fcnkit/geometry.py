"""Convolution arithmetic for whole nets: sizes, strides, receptive fields, tile margins, parameters, MACs.

Pure arithmetic on a small graph description of a net (a list of :class:`Layer`), with no torch and no
I/O. ``fcnkit.nets.graph.layer_graph`` reads that description off a real module; everything here is
computed from kernel sizes, strides, paddings and channel counts alone. Kernels are square, so every
spatial quantity is computed along one axis and holds for both.

Receptive fields are exact: the set of input pixels an output pixel depends on is propagated through
every path of the graph (skip branches, additions, concatenations, transposed convolutions and bilinear
up-sampling included), not estimated from a single chain.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from fractions import Fraction
from typing import Any

import numpy as np

# ops whose output pixel depends on a bounded neighbourhood of input pixels
LOCAL_OPS = ("conv", "deconv", "pool", "interp", "add", "concat", "norm", "identity")
# ops whose output depends on the whole input (global pooling, group/instance norm, attention, flatten)
GLOBAL_OP = "global"


@dataclass(frozen=True)
class Layer:
    """One node of a net's graph.

    ``op`` is one of: ``conv``, ``deconv`` (transposed conv), ``pool`` (max or average, windowed),
    ``interp`` (bilinear up-sampling by an integer ``factor``, align_corners=False), ``add``, ``concat``,
    ``norm`` (per-channel affine, e.g. batch norm in eval mode), ``identity`` and ``global`` (anything whose
    output depends on the whole input; ``note`` says what).
    """

    name: str
    op: str
    inputs: tuple[str, ...]
    kernel: int = 1
    stride: int = 1
    padding: int = 0
    dilation: int = 1
    output_padding: int = 0
    cin: int = 0
    cout: int = 0
    groups: int = 1
    bias: bool = False
    factor: int = 1
    note: str = ""


INPUT = "input"


# --- single-layer arithmetic (PyTorch Conv2d / ConvTranspose2d docs; Dumoulin & Visin 2016) -----------


def conv_output_size(n: int, kernel: int, stride: int = 1, padding: int = 0, dilation: int = 1) -> int:
    """Output length of a convolution or pooling window (floor mode)."""
    return (n + 2 * padding - dilation * (kernel - 1) - 1) // stride + 1


def deconv_output_size(
    n: int, kernel: int, stride: int = 1, padding: int = 0, output_padding: int = 0, dilation: int = 1
) -> int:
    """Output length of a transposed convolution."""
    return (n - 1) * stride - 2 * padding + dilation * (kernel - 1) + output_padding + 1


def layer_output_size(layer: Layer, n: int) -> int:
    """Output length of one layer for input length ``n``."""
    if layer.op in ("conv", "pool"):
        return conv_output_size(n, layer.kernel, layer.stride, layer.padding, layer.dilation)
    if layer.op == "deconv":
        return deconv_output_size(n, layer.kernel, layer.stride, layer.padding, layer.output_padding, layer.dilation)
    if layer.op == "interp":
        return n * layer.factor
    return n


# --- whole-graph quantities ----------------------------------------------------------------------------


def _by_name(graph: Sequence[Layer]) -> dict[str, Layer]:
    return {layer.name: layer for layer in graph}


def jumps(graph: Sequence[Layer]) -> dict[str, Fraction]:
    """Distance in input pixels between neighbouring pixels of each layer's output."""
    j: dict[str, Fraction] = {INPUT: Fraction(1)}
    for layer in graph:
        jin = j[layer.inputs[0]]
        if layer.op in ("add", "concat"):
            seen = {j[i] for i in layer.inputs}
            if len(seen) != 1:
                raise ValueError(f"{layer.name}: inputs at different strides {sorted(seen)}")
        if layer.op in ("conv", "pool"):
            j[layer.name] = jin * layer.stride
        elif layer.op == "deconv":
            j[layer.name] = jin / layer.stride
        elif layer.op == "interp":
            j[layer.name] = jin / layer.factor
        else:
            j[layer.name] = jin
    return j


def downsampling_factor(graph: Sequence[Layer]) -> int:
    """The net's total down-sampling factor: the coarsest stride any layer works at.

    Inputs whose sides are multiples of it pass through every pooling grid without remainder, and tile
    origins on multiples of it see the same grids as the whole image.
    """
    return math.lcm(*(int(math.ceil(v)) for v in jumps(graph).values()))


def output_jump(graph: Sequence[Layer]) -> Fraction:
    """Stride of the final output relative to the input (1 for a segmenter that predicts every pixel)."""
    return jumps(graph)[graph[-1].name]


def is_local(graph: Sequence[Layer]) -> bool:
    """True when every layer acts on a bounded neighbourhood, which exact tiling needs."""
    return all(layer.op != GLOBAL_OP for layer in graph)


def global_layers(graph: Sequence[Layer]) -> list[Layer]:
    """The layers that make an output pixel depend on the whole input."""
    return [layer for layer in graph if layer.op == GLOBAL_OP]


def _chain_bound(graph: Sequence[Layer]) -> int:
    """A generous upper bound on the receptive field, used to size the 1-D probe signal."""
    j = jumps(graph)
    total = 1
    for layer in graph:
        jin = j[layer.inputs[0]]
        if layer.op in ("conv", "pool"):
            total += math.ceil((layer.kernel - 1) * layer.dilation * jin)
        elif layer.op == "deconv":
            total += math.ceil((layer.kernel * layer.dilation + layer.stride) * j[layer.name]) + 2
        elif layer.op == "interp":
            total += math.ceil(2 * jin) + 2
    return total


def dependency_intervals(graph: Sequence[Layer], length: int, upto: str | None = None) -> tuple[np.ndarray, ...]:
    """For a 1-D input of ``length`` pixels, the hull [lo, hi] of input pixels each output pixel of layer
    ``upto`` (default: the last layer) depends on, through every path. Returns (lo, hi) integer arrays."""
    if not is_local(graph):
        raise ValueError("graph has global layers: " + ", ".join(g.name for g in global_layers(graph)))
    big = np.iinfo(np.int64).max
    pos = np.arange(length, dtype=np.int64)
    iv: dict[str, tuple[np.ndarray, np.ndarray]] = {INPUT: (pos, pos.copy())}
    target = upto or graph[-1].name
    for layer in graph:
        lo_in, hi_in = iv[layer.inputs[0]]
        n = len(lo_in)
        m = layer_output_size(layer, n)
        out = np.arange(m, dtype=np.int64)
        lo = np.full(m, big, dtype=np.int64)
        hi = np.full(m, -1, dtype=np.int64)

        def take(idx: np.ndarray, ok: np.ndarray, lo=lo, hi=hi, lo_in=lo_in, hi_in=hi_in, n=n) -> None:
            safe = np.clip(idx, 0, n - 1)
            np.minimum(lo, np.where(ok, lo_in[safe], big), out=lo)
            np.maximum(hi, np.where(ok, hi_in[safe], -1), out=hi)

        if layer.op in ("conv", "pool"):
            for t in range(layer.kernel):
                idx = out * layer.stride - layer.padding + t * layer.dilation
                take(idx, (idx >= 0) & (idx < n))
        elif layer.op == "deconv":
            for t in range(layer.kernel):
                num = out + layer.padding - t * layer.dilation
                idx = np.floor_divide(num, layer.stride)
                take(idx, (num % layer.stride == 0) & (idx >= 0) & (idx < n))
        elif layer.op == "interp":
            # torch.nn.functional.interpolate(mode='bilinear', align_corners=False) source coordinates
            f = layer.factor
            src = np.maximum((out + 0.5) / f - 0.5, 0.0)
            i0 = np.floor(src).astype(np.int64)
            i1 = np.minimum(i0 + 1, n - 1)
            take(i0, np.ones(m, bool))
            take(i1, (src - i0) > 0)
        elif layer.op in ("add", "concat"):
            for name in layer.inputs:
                a, b = iv[name]
                if len(a) != m:
                    raise ValueError(f"{layer.name}: inputs of different sizes")
                np.minimum(lo, a, out=lo)
                np.maximum(hi, b, out=hi)
        else:
            lo[:], hi[:] = lo_in, hi_in
        iv[layer.name] = (lo, hi)
        if layer.name == target:
            return lo, hi
    raise ValueError(f"no layer named {target!r}")


@dataclass(frozen=True)
class Field:
    """Receptive field of one layer's output pixels, in input pixels (worst case over pixel phases).

    ``size`` is the largest hull of input pixels any output pixel depends on; ``left``/``right`` are the
    largest reach of that hull before/after the input pixel under the output pixel's centre.
    """

    size: int
    left: int
    right: int

    @property
    def radius(self) -> int:
        return max(self.left, self.right)


def receptive_field(graph: Sequence[Layer], upto: str | None = None) -> Field:
    """Exact receptive field of the output (or of layer ``upto``) through every path of the graph."""
    j = jumps(graph)
    factor = downsampling_factor(graph)
    bound = _chain_bound(graph)
    length = factor * math.ceil((6 * bound + 8 * factor) / factor)
    lo, hi = dependency_intervals(graph, length, upto)
    jump = j[upto or graph[-1].name]
    # Interior output pixels only: their fields touch neither end of the probe signal.
    ok = (lo > 0) & (hi < length - 1) & (hi >= lo)
    idx = np.nonzero(ok)[0]
    if len(idx) == 0:
        raise ValueError("probe signal too short for this graph")
    # Centre of output pixel i in input coordinates: (i + 0.5) * jump - 0.5.
    centre = (idx + 0.5) * float(jump) - 0.5
    size = int((hi[idx] - lo[idx] + 1).max())
    left = int(np.ceil(centre - lo[idx]).max())
    right = int(np.ceil(hi[idx] - centre).max())
    return Field(size=size, left=max(left, 0), right=max(right, 0))


def tile_margin(graph: Sequence[Layer]) -> int:
    """Context (pixels) a tile needs beyond the part it keeps so that kept pixels equal whole-image ones."""
    return receptive_field(graph).radius


def layer_params(layer: Layer) -> int:
    """Learnable parameters of one layer, from its shape alone."""
    if layer.op == "conv":
        return layer.cout * (layer.cin // layer.groups) * layer.kernel**2 + (layer.cout if layer.bias else 0)
    if layer.op == "deconv":
        return layer.cin * (layer.cout // layer.groups) * layer.kernel**2 + (layer.cout if layer.bias else 0)
    if layer.op in ("norm", GLOBAL_OP):  # per-channel scale and shift (batch, group, instance norm)
        return 2 * layer.cout if layer.bias else 0
    return 0


def param_count(graph: Sequence[Layer]) -> int:
    return sum(layer_params(layer) for layer in graph)


def layer_macs_per_pixel(layer: Layer, jump: dict[str, Fraction]) -> Fraction:
    """Multiply–accumulates of one layer per input pixel of the net (exact for sides divisible by the
    down-sampling factor). A convolution does cin/groups·k² MACs per output value; a transposed
    convolution scatters each input value into cout/groups·k² outputs."""
    k2 = layer.kernel**2
    if layer.op == "conv":
        return Fraction(layer.cout * (layer.cin // layer.groups) * k2) / jump[layer.name] ** 2
    if layer.op == "deconv":
        return Fraction(layer.cin * (layer.cout // layer.groups) * k2) / jump[layer.inputs[0]] ** 2
    return Fraction(0)


def macs_per_megapixel(graph: Sequence[Layer]) -> int:
    """Multiply–accumulates for one million input pixels."""
    j = jumps(graph)
    return round(sum(layer_macs_per_pixel(layer, j) for layer in graph) * 1_000_000)


def macs(graph: Sequence[Layer], height: int, width: int) -> int:
    """Multiply–accumulates for one input of the given size, from each layer's actual output size."""
    h: dict[str, int] = {INPUT: height}
    w: dict[str, int] = {INPUT: width}
    total = 0
    for layer in graph:
        hi, wi = h[layer.inputs[0]], w[layer.inputs[0]]
        h[layer.name], w[layer.name] = layer_output_size(layer, hi), layer_output_size(layer, wi)
        k2 = layer.kernel**2
        if layer.op == "conv":
            total += h[layer.name] * w[layer.name] * layer.cout * (layer.cin // layer.groups) * k2
        elif layer.op == "deconv":
            total += hi * wi * layer.cin * (layer.cout // layer.groups) * k2
    return total


# --- feeding a net images of any size -------------------------------------------------------------------


def _at_least_zero(v: Any) -> Any:
    return max(v, 0)


@dataclass(frozen=True)
class PadPlan:
    """How an image of any size is fed to a net whose pooling grid needs aligned input: the one padding rule
    every inference path, training and export follow.

    The net's coarse outputs sit on a grid of ``factor`` pixels, ``offset`` pixels off the input's origin (0 for
    config-built nets; a converted classifier's window of w pixels at stride s has offset w − s). The input is
    padded (edge pixels repeated) by ``before`` pixels at the top and left, so each coarse output lands on the
    centre of what it saw, and at the bottom and right to a whole number of cells (at least ``cells``: one,
    unless a layer without padding reads more input than one cell gives); the output is then cropped back to
    the input's size from ``crop`` on. A padded side is always ``offset`` more than a multiple of ``factor``, so
    tiles or bands starting on multiples of ``factor`` see the same grid as the whole image.
    """

    factor: int = 1
    offset: int = 0
    cells: int = 1

    @property
    def before(self) -> int:
        return max(0, self.offset // 2)

    @property
    def crop(self) -> int:
        return self.before - self.offset // 2

    def after(self, n: Any, at_least_zero: Callable[[Any], Any] = _at_least_zero) -> Any:
        """Padding after ``n`` input pixels. Plain arithmetic on ``n``, so a tracer given a symbolic size (and
        a matching ``at_least_zero``) records it for every size."""
        d, s = self.offset, self.factor
        need = self.before + n  # the input itself,
        need = need + at_least_zero(self.crop + n + d - need)  # an output covering the crop,
        need = need + at_least_zero(d + self.cells * s - need)  # at least the fewest whole cells the net takes,
        return need + (d - need) % s - n - self.before  # rounded up to the offset plus whole cells

    def padded(self, n: int) -> int:
        """Side of the padded input for ``n`` input pixels."""
        return self.before + n + self.after(n)

    def to_dict(self) -> dict[str, int]:
        """What a model file stores (``cells`` only when more than one)."""
        return {"factor": self.factor, "offset": self.offset, **({"cells": self.cells} if self.cells > 1 else {})}
