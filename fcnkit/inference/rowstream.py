"""Exact inference in bands of rows with no recomputation: each layer keeps the rows its kernel still needs.

Overlapping tiles compute the pixels of every overlap more than once (for a net with a large receptive field,
half of all the work). Here the net's graph (read with torch.fx) runs one full-width band of input rows at a
time instead, and every layer carries over from one band to the next the few input rows its kernel will need
again: a convolution or pooling of kernel k, stride s, dilation d keeps d(k−1)+1−s rows, a transposed
convolution about k/s. Each output row is computed exactly once, from the same inputs as in a whole-image
forward pass, so the result equals whole-image inference (to float rounding) without seams, while memory grows
with the image's width, never its height. Bands of a few hundred thousand pixels keep the activations in the
CPU's caches, which whole-image inference cannot.

Supported layers: convolutions (zero padding), max pooling, transposed convolutions, bilinear interpolation by
an integer factor, additions and concatenations, and point-wise layers. A concatenation read only by a
convolution is never written (each part is convolved with its slice of the weights), nor is a bilinear
up-sampling read only by such a concatenation (that part of the convolution runs on the map before
up-sampling, by phases: :mod:`fcnkit.inference.phases`). Nets with anything else (e.g. group
norm, global pooling) raise :class:`NotStreamable`; tiled inference handles those.
"""

from __future__ import annotations

import contextlib
import math
import operator
import time
from collections.abc import Callable, Iterator, Sequence
from typing import TYPE_CHECKING, Any

import numpy as np
import torch
from torch import fx, nn
from torch.nn import functional as F

from fcnkit.allocator import MMAP_BYTES
from fcnkit.data.raster import Raster
from fcnkit.errors import ConfigError
from fcnkit.inference.bandflow import can_pin_threads, one_thread_per_worker, run_bands
from fcnkit.inference.onednn import ONEDNN, concat_conv, onednn_conv, onednn_conv_add
from fcnkit.inference.phases import bilinear_conv_by_phases, bilinear_conv_weight, phase_weight, transposed_by_phases
from fcnkit.units import pixel_rate

if TYPE_CHECKING:
    from fcnkit.model import Model

# Bytes of a band's largest feature map. glibc's malloc serves blocks up to 32 MiB (once one has been freed) from
# its heap and reuses them; larger blocks are fresh pages from the kernel each time, and their page faults cost
# about 25 ms per 32 MiB on the 2-core development CPU: three quarters of the time of a demo net's first
# convolution over 2048×256 pixels. Smaller bands also stay in the caches but cost more calls per image.
BAND_BYTES = 16 << 20
# Yet at least this many input pixels per band, while its largest map stays under BAND_BYTES_MAX: every layer
# costs a oneDNN call or two per band, 100-200 us each whatever its size (measured), and nets with many layers
# and wide maps (the U-Net config: 128 bytes a pixel) ran 8 % faster with bands of 2048x128 than 2048x64.
BAND_PIXELS = 256 << 10
# An eighth below the size malloc maps afresh: a band's maps also hold the rows carried over and, after an
# up-sampling, those rows up-sampled (the U-Net config's last up-sampling: 139 rows for a band of 128, 35 MiB at
# 2048 wide, so every band's map was fresh pages). Bands of 2048x112 rather than 2048x128 made the U-Net config
# 2-5 % faster on one and two threads (measured on a 2-core Xeon with AVX-512).
BAND_BYTES_MAX = MMAP_BYTES * 7 // 8
# Bands whose output has not been handed on yet that may be read or computed at once (by several workers).
BANDS_IN_FLIGHT = 3
# Input bytes below which a layer's new rows are not convolved straight from their piece but together with the
# rows carried over, from one copy, in one call: a oneDNN call costs 100-200 us whatever its size (measured on the
# development CPU), more than copying a megabyte. Saved about 4 % on the demo and FCN nets.
DIRECT_BYTES = 1 << 20


class NotStreamable(ConfigError):
    """The net has a layer that row streaming cannot run exactly."""


def _pair(v: int | tuple[int, ...]) -> tuple[int, int]:
    return (v, v) if isinstance(v, int) else (int(v[0]), int(v[1]))


Rows = list[torch.Tensor]  # consecutive pieces of a feature map (N×C×h×W each), top to bottom


class _Buffer:
    """An input's pending rows: pieces kept as they came (no copying), from image row ``start`` on."""

    def __init__(self) -> None:
        self.pieces: Rows = []
        self.start = 0

    @property
    def end(self) -> int:
        return self.start + sum(p.shape[2] for p in self.pieces)

    def spans(self) -> list[tuple[int, int, torch.Tensor]]:
        out, a = [], self.start
        for p in self.pieces:
            out.append((a, a + p.shape[2], p))
            a += p.shape[2]
        return out

    def rows(self, lo: int, hi: int) -> torch.Tensor:
        """Rows lo..hi as one tensor: a view when they lie in one piece, else a copy."""
        parts = [p[:, :, max(lo, a) - a:min(hi, b) - a] for a, b, p in self.spans() if a < hi and b > lo]
        return parts[0] if len(parts) == 1 else torch.cat(parts, dim=2)

    def drop_before(self, row: int) -> None:
        while self.pieces and self.start + self.pieces[0].shape[2] <= row:
            self.start += self.pieces.pop(0).shape[2]
        if self.pieces and row > self.start:
            self.pieces[0] = self.pieces[0][:, :, row - self.start:]
            self.start = row


class _Op:
    """One graph node: receives each input's new rows (in order, top to bottom) and returns the output rows that
    are now complete, as pieces. Row indices are those of the whole (padded) image."""

    def __init__(self, inputs: int) -> None:
        self.inputs = [_Buffer() for _ in range(inputs)]
        self.done = 0  # output rows emitted so far

    def step(self, new: Sequence[Rows], last: bool) -> Rows:
        raise NotImplementedError


class _Pointwise(_Op):
    """Activations, dropout, batch norm…: rows map to rows."""

    def __init__(self, fn: Callable[[torch.Tensor], torch.Tensor], copy: bool) -> None:
        super().__init__(1)
        self.fn, self.copy = fn, copy  # copy: the input is also read elsewhere and fn may work in place

    def step(self, new, last):
        return [self.fn(p.clone() if self.copy else p) for p in new[0]]


class _Local(_Op):
    """A layer whose output rows each depend on a short run of input rows (of every input, row for row). Each
    step computes the output rows now complete: those whose inputs lie inside one piece of each input straight
    from those pieces (no copy), the few whose inputs straddle pieces from a copy of just those rows.
    Subclasses give the row arithmetic."""

    MIN_ROWS = 4  # output rows worth computing from one piece on their own

    def __init__(self, inputs: int = 1) -> None:
        super().__init__(inputs)

    def stop(self, end: int, last: bool) -> int:
        """Output rows complete once input rows 0..end have arrived (all of them when ``last``)."""
        raise NotImplementedError

    def need(self, o0: int, o1: int, end: int) -> tuple[int, int]:
        """Input rows that output rows o0..o1 read."""
        raise NotImplementedError

    def inside(self, a: int, b: int, end: int, last: bool) -> tuple[int, int]:
        """Output rows computable exactly from input rows a..b alone."""
        raise NotImplementedError

    def compute(self, xs: list[torch.Tensor], a: int, o0: int, o1: int) -> torch.Tensor:
        """Output rows o0..o1 from ``xs``, every input's rows from ``a`` on."""
        raise NotImplementedError

    def receive(self, new: Sequence[Rows], last: bool) -> None:
        for buf, rows in zip(self.inputs, new, strict=True):
            buf.pieces += [p for p in rows if p.shape[2]]

    def _spans(self, end: int) -> list[tuple[int, int, list[tuple[int, torch.Tensor]]]]:
        """Runs of rows a..b (up to ``end``) lying inside one piece of every input, with those pieces and their
        first rows."""
        spans = [buf.spans() for buf in self.inputs]
        if len(spans) == 1:
            return [(a, b, [(a, p)]) for a, b, p in spans[0] if a < end]
        cuts = sorted({r for sp in spans for a, b, _ in sp for r in (a, b) if r <= end})
        out = []
        for u, v in zip(cuts, cuts[1:], strict=False):
            pieces = [next((a, p) for a, b, p in sp if a <= u and v <= b) for sp in spans]
            out.append((u, v, pieces))
        return out

    def step(self, new, last):
        self.receive(new, last)
        end = min(buf.end for buf in self.inputs)
        stop = self.stop(end, last)
        if stop <= self.done:
            return []
        out: Rows = []
        o = self.done
        for a, b, pieces in self._spans(end):
            m0, m1 = self.inside(a, b, end, last)
            m0, m1 = max(m0, o), min(m1, stop)
            if m1 - m0 < self.MIN_ROWS or (m1 - m0) * sum(p[0, :, 0].numel() * p.element_size()
                                                         for _, p in pieces) < DIRECT_BYTES:
                continue
            if m0 > o:
                out.append(self._from_buffer(o, m0, end))
            i0, i1 = self.need(m0, m1, end)
            out.append(self.compute([p[:, :, i0 - pa:i1 - pa] for pa, p in pieces], i0, m0, m1))
            o = m1
        if stop > o:
            out.append(self._from_buffer(o, stop, end))
        self.done = stop
        first = self.need(self.done, self.done + 1, end)[0]
        for buf in self.inputs:
            buf.drop_before(first)
        return out

    def _from_buffer(self, o0: int, o1: int, end: int) -> torch.Tensor:
        i0, i1 = self.need(o0, o1, end)
        return self.compute([buf.rows(i0, i1) for buf in self.inputs], i0, o0, o1)


class _Window(_Local):
    """Convolution or pooling with kernel k, stride s, dilation d and padding p along rows; ``fn`` is the layer
    with its row padding removed, applied to the list of its inputs' rows (one input, or the parts of a channel
    concatenation). The padding rows (``fill``) are added as pieces of their own at the top and bottom, so rows
    here are counted from the top of the padded input."""

    def __init__(self, fn: Callable[[list[torch.Tensor]], torch.Tensor], k: int, s: int, d: int, p: int,
                 fill: float, inputs: int = 1) -> None:
        super().__init__(inputs)
        self.fn, self.s, self.span, self.p, self.fill = fn, s, d * (k - 1), p, fill
        self.pads: list[torch.Tensor | None] = [None] * inputs  # p rows of fill, made from each first piece

    def receive(self, new, last):
        for i, (buf, rows) in enumerate(zip(self.inputs, new, strict=True)):
            if self.p and rows and self.pads[i] is None:
                n, c, _, w = rows[0].shape
                self.pads[i] = torch.full((n, c, self.p, w), self.fill, dtype=rows[0].dtype).contiguous(
                    memory_format=torch.channels_last)
                buf.pieces.append(self.pads[i])
        super().receive(new, last)
        if last:
            for buf, pad in zip(self.inputs, self.pads, strict=True):
                if pad is not None:
                    buf.pieces.append(pad)

    def stop(self, end, last):
        return max(0, (end - 1 - self.span) // self.s + 1)

    def need(self, o0, o1, end):
        return o0 * self.s, (o1 - 1) * self.s + self.span + 1

    def inside(self, a, b, end, last):
        return -(-a // self.s), max(0, (b - 1 - self.span) // self.s + 1)

    def compute(self, xs, a, o0, o1):
        return self.fn(xs)


class _Transposed(_Local):
    """Transposed convolution (kernel k ≥ stride s, padding p along rows), computed in float32 by phases
    (:func:`transposed_by_phases`): output row o receives input rows ⌈(o + p − k + 1)/s⌉ … ⌊(o + p)/s⌋. Its
    output is NCHW when it is the net's last layer (``nchw``: what the class scores leave in), else
    channels-last."""

    MIN_ROWS = 1 << 62  # one call per band: up-sampling inputs are narrow score maps, cheap to copy

    def __init__(self, m: nn.ConvTranspose2d, nchw: bool = False) -> None:
        super().__init__()
        (self.k, kw), (self.s, sw), (self.p, pw) = _pair(m.kernel_size), _pair(m.stride), _pair(m.padding)
        (self.extra, opw), (d, dw) = _pair(m.output_padding), _pair(m.dilation)
        if d != 1 or dw != 1 or self.k < self.s or self.extra > self.p:
            raise NotStreamable("a transposed convolution with dilation, kernel < stride or output padding > "
                                "padding cannot be streamed")
        if m.groups == 1 and opw <= pw and ONEDNN:
            weight = phase_weight(m.weight.detach().float(), (self.s, sw), channels_last=not nchw)
            bias = None if m.bias is None else m.bias.detach().float()

            def fn(x: torch.Tensor, r0: int, r1: int) -> torch.Tensor:
                cols = (pw, (x.shape[3] - 1) * sw - pw + kw + opw)
                return transposed_by_phases(x, weight, bias, (self.s, sw), (self.k, kw), (r0, r1), cols, not nchw)
        else:
            def fn(x: torch.Tensor, r0: int, r1: int) -> torch.Tensor:
                y = F.conv_transpose2d(x, m.weight, m.bias, (self.s, sw), (0, pw), (0, opw), m.groups)[:, :, r0:r1]
                return y.contiguous() if nchw else y
        self.fn = fn

    def stop(self, end, last):
        return (end - 1) * self.s - 2 * self.p + self.k + self.extra if last else end * self.s - self.p

    def need(self, o0, o1, end):
        return max(0, -(-(o0 + self.p - self.k + 1) // self.s)), min(end, (o1 - 1 + self.p) // self.s + 1)

    def inside(self, a, b, end, last):
        o0 = 0 if a == 0 else max(0, (a - 1) * self.s - self.p + self.k)
        return o0, self.stop(b, last and b == end)

    def compute(self, xs, a, o0, o1):
        base = a * self.s - self.p  # output row of the first row of the unpadded transposed convolution
        with torch.autocast("cpu", enabled=False):  # bf16 transposed convolutions are slow on CPUs
            return self.fn(xs[0].float(), o0 - base, o1 - base)


class _Interpolate(_Local):
    """Bilinear up-sampling by an integer factor f (align_corners=False): output row o reads input rows
    ⌊(o + ½)/f − ½⌋ (at least 0) and the next one (at most the last)."""

    MIN_ROWS = 1 << 62  # one call per band, as for transposed convolutions

    def __init__(self, f: int) -> None:
        super().__init__()
        self.f = f

    def _first(self, o: int) -> int:
        return max(0, (2 * o + 1 - self.f) // (2 * self.f))

    def stop(self, end, last):
        return end * self.f if last else (2 * end - 1) * self.f // 2

    def need(self, o0, o1, end):
        return self._first(o0), min(end, self._first(o1 - 1) + 2)

    def inside(self, a, b, end, last):
        return (0 if a == 0 else (2 * a + 1) * self.f // 2), self.stop(b, last and b == end)

    def compute(self, xs, a, o0, o1):
        y = F.interpolate(xs[0], scale_factor=self.f, mode="bilinear", align_corners=False)
        return y[:, :, o0 - a * self.f:o1 - a * self.f]


class _BilinearConv(_Local):
    """The part of a convolution (odd kernel k, "same" padding, stride 1) that reads a map up-sampled bilinearly
    by an integer factor f, with the convolution's bias, computed from the map before up-sampling
    (:func:`~fcnkit.inference.phases.bilinear_conv_by_phases`): the up-sampled map, the widest of a U-Net decoder,
    is never written. Output row o reads input rows ⌊o/f⌋ − r − 1 … ⌊o/f⌋ + r + 1, r the phases' reach. Its output
    is the accumulator the rest of the convolution adds into (:meth:`RowStreamer._concat_conv`)."""

    MIN_ROWS = 1 << 62  # one call per band, as for transposed convolutions: its input is at the lower resolution

    def __init__(self, weight: torch.Tensor, bias: torch.Tensor | None, f: int) -> None:
        super().__init__()
        self.weight, self.bias, self.f = weight, bias, f
        self.phased, self.r = bilinear_conv_weight(weight, f)
        self.phased_bias = None if bias is None else bias.repeat(f * f)
        self.height: int | None = None  # the input's height, once its last rows have come

    def receive(self, new, last):
        super().receive(new, last)
        if last:
            self.height = self.inputs[0].end

    def stop(self, end, last):
        return self.f * end if last else max(0, self.f * (end - self.r - 1))

    def need(self, o0, o1, end):
        return max(0, o0 // self.f - self.r - 1), min(end, -(-o1 // self.f) + self.r + 1)

    def inside(self, a, b, end, last):
        return (0 if a == 0 else self.f * (a + self.r + 1)), self.stop(b, last and b == end)

    def compute(self, xs, a, o0, o1):
        return bilinear_conv_by_phases(xs[0], a, self.height, (o0, o1), self.weight, self.bias, self.phased,
                                       self.phased_bias, self.f, self.r)


class _Merge(_Op):
    """Addition or channel concatenation of several inputs: emits the rows every input has reached, in pieces
    cut where any input's pieces are cut (views, no copies)."""

    def __init__(self, inputs: int, fn: Callable[[list[torch.Tensor]], torch.Tensor]) -> None:
        super().__init__(inputs)
        self.fn = fn

    def step(self, new, last):
        for buf, rows in zip(self.inputs, new, strict=True):
            buf.pieces += [p for p in rows if p.shape[2]]
        stop = min(buf.end for buf in self.inputs)
        cuts = sorted({self.done, stop} | {b for buf in self.inputs for _, b, _ in buf.spans()
                                            if self.done < b < stop})
        out = [self.fn([buf.rows(u, v) for buf in self.inputs]) for u, v in zip(cuts, cuts[1:], strict=False)
               if v > u]
        self.done = max(self.done, stop)
        for buf in self.inputs:
            buf.drop_before(self.done)
        return out


_POINTWISE = (nn.ReLU, nn.ReLU6, nn.LeakyReLU, nn.GELU, nn.SiLU, nn.Sigmoid, nn.Tanh, nn.ELU, nn.Hardswish,
              nn.Dropout, nn.Dropout2d, nn.Identity, nn.BatchNorm2d)


def _pointwise(m: nn.Module) -> Callable[[torch.Tensor], torch.Tensor]:
    """A point-wise module's function in inference, reading nothing from the module when it runs: worker
    threads must not call modules, since torch.fx, tracing any net in another thread meanwhile, patches every
    module call and attribute lookup of the process."""
    if isinstance(m, nn.BatchNorm2d):
        mean, var, weight, bias, eps = m.running_mean, m.running_var, m.weight, m.bias, m.eps
        return lambda x: F.batch_norm(x, mean, var, weight, bias, False, 0.0, eps)
    if isinstance(m, (nn.Dropout, nn.Dropout2d, nn.Identity)):
        return lambda x: x
    return type(m).forward.__get__(m)  # activations: their settings are plain attributes, found without lookups


def block_max(x: torch.Tensor, k: int) -> torch.Tensor:
    """Max pooling over non-overlapping k×k blocks as element-wise maxima of strided views: equal to
    ``F.max_pool2d(x, k)`` and 1.4–2.6× faster on channels-last maps (measured on 8–64 channels)."""
    x = x[:, :, :x.shape[2] // k * k, :x.shape[3] // k * k]
    rows = x[:, :, 0::k]
    for i in range(1, k):
        rows = torch.maximum(rows, x[:, :, i::k])
    out = rows[..., 0::k]
    for i in range(1, k):
        out = torch.maximum(out, rows[..., i::k])
    return out


class _Fusion:
    """Whether convolutions may apply the ReLU after them in the same oneDNN pass. That fused ReLU turns NaN into
    0 where F.relu keeps it, and rows must give whatever whole-image inference gives, NaN included (every scan
    then refuses the scores). NaN arises only from input or weights that are not finite (a NaN born inside a
    convolution from finite values needs float32 sums overflowing both ways): so fusion is off for weights that
    are not finite, and a stream turns it off from the first band whose input is not (checked once per band
    rather than once per convolution: later bands' steps run after that band's input is loaded)."""

    def __init__(self, ok: bool) -> None:
        self.ok = ok


def _conv(weight: torch.Tensor, bias: torch.Tensor | None, stride: tuple[int, int], padding: tuple[int, int],
          dilation: tuple[int, int], groups: int, relu: bool, fusion: _Fusion) -> Callable[[list[torch.Tensor]],
                                                                                              torch.Tensor]:
    """A convolution (then ReLU) by oneDNN, the ReLU fused while ``fusion`` allows."""
    def fn(xs: list[torch.Tensor]) -> torch.Tensor:
        if relu and not fusion.ok:
            return F.relu(onednn_conv(xs[0], weight, bias, stride, padding, dilation, groups, False))
        return onednn_conv(xs[0], weight, bias, stride, padding, dilation, groups, relu)
    return fn


def _module_op(m: nn.Module, name: str, copy: bool, relu: bool = False, onednn: bool = False,
               last: bool = False, fusion: _Fusion | None = None) -> _Op:
    """The op of one module; ``relu``: a Conv2d also applies the ReLU that follows it (by oneDNN, fused as
    ``fusion`` allows); ``onednn``: convolutions run by oneDNN (:func:`onednn_conv`); ``last``: its output is the
    net's."""
    if isinstance(m, nn.Conv2d):
        if m.padding_mode != "zeros" or isinstance(m.padding, str):
            raise NotStreamable(f"{name}: convolution padding {m.padding!r} ({m.padding_mode}) cannot be streamed")
        (k, _), (s, sw), (d, dw), (p, pw) = (_pair(m.kernel_size), _pair(m.stride), _pair(m.dilation),
                                             _pair(m.padding))
        weight, bias, groups = m.weight.detach(), None if m.bias is None else m.bias.detach(), m.groups
        if onednn:
            return _Window(_conv(weight, bias, (s, sw), (0, pw), (d, dw), groups, relu, fusion or _Fusion(True)),
                           k, s, d, p, 0.0)
        return _Window(lambda xs: F.conv2d(xs[0], weight, bias, (s, sw), (0, pw), (d, dw), groups), k, s, d, p, 0.0)
    if isinstance(m, nn.MaxPool2d) and not m.ceil_mode and not m.return_indices:
        (k, kw), (s, sw), (d, dw), (p, pw) = (_pair(m.kernel_size), _pair(m.stride or m.kernel_size),
                                              _pair(m.dilation), _pair(m.padding))
        if k == kw == s == sw and d == dw == 1 and p == pw == 0:
            return _Window(lambda xs: block_max(xs[0], k), k, s, d, p, -math.inf)
        return _Window(lambda xs: F.max_pool2d(xs[0], (k, kw), (s, sw), (0, pw), (d, dw)), k, s, d, p, -math.inf)
    if isinstance(m, nn.ConvTranspose2d):
        return _Transposed(m, nchw=last)
    if isinstance(m, nn.Upsample) and (f := _bilinear(m.mode, m.align_corners, m.scale_factor)):
        return _Interpolate(f)
    if isinstance(m, nn.BatchNorm2d) and m.running_mean is None:
        raise NotStreamable(f"{name}: batch norm without running statistics normalises by the whole image")
    if isinstance(m, _POINTWISE):
        return _Pointwise(_pointwise(m), copy)
    raise NotStreamable(f"{name}: layer type {type(m).__name__} cannot be streamed in rows")


def _bilinear(mode: str | None, align_corners: bool | None, f: object) -> int | None:
    """The factor of a bilinear up-sampling (align_corners=False) by an integer factor; None for any other."""
    ok = mode == "bilinear" and not align_corners and isinstance(f, (int, float)) and float(f).is_integer()
    return int(f) if ok else None


def _bilinear_factor(node: fx.Node, modules: dict[str, nn.Module]) -> int | None:
    """The factor of a node that up-samples its one input bilinearly by an integer factor; None for any other."""
    if node.op == "call_function" and node.target is F.interpolate and len(node.args) == 1:
        kw = node.kwargs
        return _bilinear(kw.get("mode"), kw.get("align_corners"), kw.get("scale_factor"))
    m = modules.get(str(node.target)) if node.op == "call_module" else None
    return _bilinear(m.mode, m.align_corners, m.scale_factor) if isinstance(m, nn.Upsample) else None


def _function_op(node: fx.Node, inputs: int, copy: bool) -> _Op:
    t = node.target
    if t in (operator.add, torch.add) and inputs == 2:
        return _Merge(2, lambda xs: xs[0] + xs[1])
    if t is torch.cat and node.kwargs.get("dim", node.args[1] if len(node.args) > 1 else 0) in (1, -3):
        return _Merge(inputs, lambda xs: torch.cat(xs, dim=1))
    if f := _bilinear_factor(node, {}):
        return _Interpolate(f)
    if t in (F.relu, torch.relu) and inputs == 1:
        return _Pointwise(F.relu, copy)
    raise NotStreamable(f"{node.name}: operation {getattr(t, '__name__', t)} cannot be streamed in rows")


class _Shapes(fx.Interpreter):
    """Runs a graph once, noting each node's output shape (torch.fx's ShapeProp does the same but imports the
    symbolic-shape machinery and sympy on first use: a second of start-up)."""

    def run_node(self, n: fx.Node) -> object:
        out = super().run_node(n)
        if isinstance(out, torch.Tensor):
            n.meta["shape"] = tuple(out.shape)
        return out


class RowStreamer:
    """Runs a model's net over an image in full-width bands of rows (see module notes), fed by the model's own
    normalisation and padding plan.

    The net is copied with batch norms folded into their convolutions and run channels-last; ``bf16`` runs it
    under bfloat16 autocast (transposed convolutions stay float32). Raises :class:`NotStreamable` for a net
    it cannot run exactly."""

    def __init__(self, model: Model, bf16: bool = False) -> None:
        from fcnkit.inference.engines import fuse_conv_bn

        self.model, self.plan, self.bf16 = model, model.plan, bf16
        self.factor = self.plan.factor
        body = fuse_conv_bn(model.net.body).to(memory_format=torch.channels_last)
        try:
            gm = fx.symbolic_trace(body)
        except Exception as e:  # tracing errors come in many types
            raise NotStreamable(f"model: cannot read its graph ({' '.join(str(e).split())})") from None
        self._graph = gm
        self._onednn = ONEDNN and not bf16  # oneDNN's fused kernels do not follow bf16 autocast
        side = self.plan.padded(2 * self.factor)
        example = torch.zeros(1, model.bands, side, side).contiguous(memory_format=torch.channels_last)
        try:
            with torch.inference_mode():
                _Shapes(gm).run(example)  # every node's output shape, in node.meta["shape"]
        except Exception as e:  # a layer the tracer accepted but that fails on a small input
            raise NotStreamable(f"model: cannot run its graph on a {side}x{side} input ({' '.join(str(e).split())})"
                                ) from None
        self._modules = dict(gm.named_modules())
        self._fused = self._fusable_relus(self._modules)  # convolution → the ReLU it applies
        self._concats = self._fusable_concats(self._modules)
        self._folds = self._foldable_upsamplings(self._modules)  # up-sampling → the concatenation reading it
        self._build(_Fusion(True))  # fail now, not on the first image, if a layer cannot be streamed
        self._finite_weights = all(bool(torch.isfinite(t).all()) for t in gm.state_dict().values()
                                   if t.is_floating_point())
        self._bytes_per_pixel = 4 * max(
            math.prod(node.meta["shape"][1:]) / (side * side) for node in self._graph.graph.nodes
            if node.op in ("call_module", "call_function") and node not in self._concats and node not in self._folds
            and "shape" in node.meta)  # maps never written: concatenations, up-samplings folded into convolutions

    def _build(self, fusion: _Fusion) -> list[tuple[fx.Node, _Op, list[fx.Node]]]:
        """Fresh ops (empty row buffers) for every node of the graph, in execution order; their ReLUs fused into
        convolutions as ``fusion`` allows."""
        modules, fused, relus = self._modules, self._fused, set(self._fused.values())
        nodes = []
        for node in self._graph.graph.nodes:
            ins = list(node.all_input_nodes)
            if node.op == "placeholder":
                self._input = node
            elif node.op == "output":
                self._output = ins[0]
            elif node in self._concats:
                continue  # done by the convolution after it
            else:
                copy = len(ins) == 1 and len(ins[0].users) > 1
                if node in relus:
                    op = _Pointwise(lambda x: x, False)  # done by the convolution before it
                elif node in self._folds:
                    op = self._bilinear_conv(node)
                elif node.op == "call_module" and ins and ins[0] in self._concats:
                    op, ins = self._concat_conv(modules[str(node.target)], list(ins[0].args[0]), relu=node in fused,
                                                fusion=fusion)
                elif node.op == "call_module":
                    op = _module_op(modules[str(node.target)], str(node.target), copy, relu=node in fused,
                                    onednn=self._onednn, last=all(u.op == "output" for u in node.users),
                                    fusion=fusion)
                elif node.op == "call_function":
                    op = _function_op(node, len(ins), copy)
                else:
                    raise NotStreamable(f"{node.name}: {node.op} {node.target} cannot be streamed in rows")
                nodes.append((node, op, ins))
        return nodes

    def _fusable_relus(self, modules: dict[str, nn.Module]) -> dict[fx.Node, fx.Node]:
        """Convolutions whose output goes only (through identities) to a ReLU, mapped to that ReLU (when oneDNN
        runs the convolutions)."""
        if not self._onednn:
            return {}
        found = {}
        for node in self._graph.graph.nodes:
            if node.op != "call_module" or not isinstance(modules[str(node.target)], nn.ReLU):
                continue
            src = node.all_input_nodes[0]
            while src.op == "call_module" and isinstance(modules[str(src.target)], nn.Identity) and \
                    len(src.users) == 1:
                src = src.all_input_nodes[0]
            if src.op == "call_module" and isinstance(modules[str(src.target)], nn.Conv2d) and len(src.users) == 1 \
                    and modules[str(src.target)].padding_mode == "zeros":
                found[src] = node
        return found

    def _fusable_concats(self, modules: dict[str, nn.Module]) -> set[fx.Node]:
        """Channel concatenations read only by one ungrouped convolution (when oneDNN runs the convolutions)."""
        if not self._onednn:
            return set()
        found = set()
        for node in self._graph.graph.nodes:
            if node.op != "call_function" or node.target is not torch.cat or len(node.users) != 1 or \
                    not all(isinstance(part, fx.Node) for part in node.args[0]):
                continue
            dim = node.kwargs.get("dim", node.args[1] if len(node.args) > 1 else 0)
            user = next(iter(node.users))
            conv = modules.get(str(user.target)) if user.op == "call_module" else None
            if dim in (1, -3) and isinstance(conv, nn.Conv2d) and conv.groups == 1 and \
                    conv.padding_mode == "zeros" and not isinstance(conv.padding, str):
                found.add(node)
        return found

    def _foldable_upsamplings(self, modules: dict[str, nn.Module]) -> dict[fx.Node, fx.Node]:
        """Bilinear up-samplings by an integer factor read only by a fusable concatenation (with other parts) that
        a convolution of odd kernel, "same" padding, stride 1 and no dilation reads, mapped to that
        concatenation: that convolution's part for them runs on the map before up-sampling (:class:`_BilinearConv`).
        One per concatenation."""
        found = {}
        for cat in self._concats:
            conv = modules[str(next(iter(cat.users)).target)]
            (k, kw), parts = _pair(conv.kernel_size), list(cat.args[0])
            if k != kw or k % 2 == 0 or _pair(conv.padding) != (k // 2, k // 2) or _pair(conv.stride) != (1, 1) \
                    or _pair(conv.dilation) != (1, 1) or len(parts) < 2:
                continue
            up = next((part for part in parts if (_bilinear_factor(part, modules) or 1) > 1 and len(part.users) == 1
                       and parts.count(part) == 1), None)
            if up is not None:
                found[up] = cat
        return found

    @staticmethod
    def _part_weights(m: nn.Conv2d, parts: list[fx.Node]) -> list[torch.Tensor]:
        """A convolution's weights split by the parts of the channel concatenation it reads."""
        widths = [int(part.meta["shape"][1]) for part in parts]
        return [w.contiguous() for w in torch.split(m.weight.detach(), widths, dim=1)]

    def _bilinear_conv(self, up: fx.Node) -> _BilinearConv:
        """The op of a folded up-sampling (:meth:`_foldable_upsamplings`): its convolution's part for it."""
        cat = self._folds[up]
        conv, parts = self._modules[str(next(iter(cat.users)).target)], list(cat.args[0])
        weight = self._part_weights(conv, parts)[parts.index(up)]
        return _BilinearConv(weight, None if conv.bias is None else conv.bias.detach(),
                             _bilinear_factor(up, self._modules) or 1)

    def _concat_conv(self, m: nn.Conv2d, parts: list[fx.Node], relu: bool, fusion: _Fusion
                     ) -> tuple[_Window, list[fx.Node]]:
        """The op of a convolution of a channel concatenation of ``parts`` (:func:`concat_conv`; its ReLU fused as
        ``fusion`` allows), and the nodes it reads. A folded up-sampling's part (:class:`_BilinearConv`, bias
        included) comes first: the other parts' convolutions are added into its rows in place."""
        (k, _), (s, sw), (d, dw), (p, pw) = _pair(m.kernel_size), _pair(m.stride), _pair(m.dilation), _pair(m.padding)
        weights = self._part_weights(m, parts)
        up = next((part for part in parts if part in self._folds), None)
        if up is None:
            bias = None if m.bias is None else m.bias.detach()

            def fn(xs: list[torch.Tensor]) -> torch.Tensor:
                if relu and not fusion.ok:
                    return F.relu(concat_conv(xs, weights, bias, (s, sw), (0, pw), (d, dw), False))
                return concat_conv(xs, weights, bias, (s, sw), (0, pw), (d, dw), relu)
            return _Window(fn, k, s, d, p, 0.0, inputs=len(parts)), parts
        rest = [(part, w) for part, w in zip(parts, weights, strict=True) if part is not up]

        def add(xs: list[torch.Tensor]) -> torch.Tensor:
            y = xs[0][:, :, p:xs[0].shape[2] - p]  # the folded part's rows: no padding rows read
            for i, (x, (_, w)) in enumerate(zip(xs[1:], rest, strict=True)):
                y = onednn_conv_add(y, x, w, (1, 1), (0, pw), (1, 1), relu and fusion.ok and i == len(rest) - 1)
            return F.relu(y) if relu and not fusion.ok else y
        return _Window(add, k, 1, 1, p, 0.0, inputs=len(parts)), [up] + [part for part, _ in rest]

    def band_rows(self, width: int) -> int:
        """Input rows per band for an image ``width`` pixels wide: as many as keep the band's largest feature map
        within BAND_BYTES, or make BAND_PIXELS within BAND_BYTES_MAX; a multiple of the factor."""
        row = self._bytes_per_pixel * max(width, 1)
        rows = max(BAND_BYTES / row, min(BAND_PIXELS / max(width, 1), BAND_BYTES_MAX / row))
        return max(self.factor, int(rows) // self.factor * self.factor)

    def _normalisation(self) -> tuple[np.ndarray, np.ndarray]:
        """The model's per-band mean and std as float32 arrays (its one-line error when it has none)."""
        if self.model.mean is None or self.model.std is None:
            self.model.normalise(torch.zeros(1))  # raises the model's own message
        return (self.model.mean.flatten().numpy().astype(np.float32),
                self.model.std.flatten().numpy().astype(np.float32))

    def stream(self, raster: Raster, *, logits: bool = False, rows: int | None = None, progress: bool = False,
               desc: str = "rows", post: Callable[[int, torch.Tensor], Any] | None = None
               ) -> Iterator[tuple[int, Any]]:
        """Class probabilities (the model's, calibrated) or ``logits`` of ``raster``, top to bottom, as (first
        row, C×h×W float32), or as (first row, ``post(first row, band)``) when ``post`` is given: a band's last
        step, run by the workers too. The graph's steps run on :func:`workers` threads
        (:mod:`fcnkit.inference.bandflow`)."""
        from tqdm import tqdm

        height, width, bands = raster.shape
        p = self.plan
        rows = rows or self.band_rows(width)
        left, right, bottom = p.before, p.after(width), p.after(height)
        mean, std = self._normalisation()
        # one value per band of a row: a row vector the width of the image, so numpy's loops run over whole
        # rows (broadcasting over the last axis of B values runs about 14x slower)
        mean, std = np.tile(mean, width), np.tile(std, width)
        starts = list(range(0, height, rows))

        def load(_: list, b: int) -> Rows:
            """Band b's input rows, normalised and padded by the plan (the top padding before the first band, the
            bottom padding after the last). Done with numpy: torch would start another team of threads here."""
            y0, y1 = starts[b], min(starts[b] + rows, height)
            a = raster.read(y0, y1, 0, width).astype(np.float32)  # a copy: the reader's array is not ours
            flat = a.reshape(y1 - y0, width * bands)
            np.subtract(flat, mean, out=flat)
            np.divide(flat, std, out=flat)
            if fusion.ok and not np.isfinite(flat).all():
                fusion.ok = False  # NaN must reach the scores as in a whole-image pass (see _Fusion)
            top = p.before if y0 == 0 else 0
            if left or right or top or (y1 == height and bottom):
                a = np.pad(a, ((top, bottom if y1 == height else 0), (left, right), (0, 0)), mode="edge")
            # H×W×B memory is channels-last already; viewed as 1×H×W×B first so that even the batch stride says so
            # (torch reads a batch stride of B as plain NCHW layout and the net's maps follow: several times slower)
            return [torch.from_numpy(a).view(1, *a.shape).permute(0, 3, 1, 2)]

        state = {"skip": p.crop, "done": 0}  # output rows still to drop before the crop; rows handed on

        def emit(args: list, b: int) -> tuple[int, int, Any] | None:
            """The band's finished output rows, cropped to the image, as probabilities or logits (or ``post`` of
            them): (first row, rows, value)."""
            if not args[0]:
                return None
            y = (args[0][0] if len(args[0]) == 1 else torch.cat(args[0], dim=2)).float()
            cut = min(state["skip"], y.shape[2])
            y, state["skip"] = y[:, :, cut:], state["skip"] - cut
            y = y[:, :, :height - state["done"], p.crop:p.crop + width].contiguous()
            if not y.shape[2]:
                return None
            y = y if logits else self.model.probabilities(y)
            y0, state["done"] = state["done"], state["done"] + y.shape[2]
            return y0, y.shape[2], y[0] if post is None else post(y0, y[0])

        fusion = _Fusion(self._finite_weights)
        nodes = self._build(fusion)
        index = {self._input: 0} | {node: j + 1 for j, (node, _, _) in enumerate(nodes)}
        steps: list[Callable[[list, int], object]] = [load]
        deps: list[list[int]] = [[]]
        for _, op, ins in nodes:
            steps.append(lambda args, b, op=op: op.step(args, b + 1 == len(starts)))
            deps.append([index[i] for i in ins])
        steps.append(emit)
        deps.append([index[self._output]])

        n = workers()
        bf16 = self.bf16

        @contextlib.contextmanager
        def setup() -> Iterator[None]:
            with contextlib.ExitStack() as stack:
                if n > 1:
                    stack.enter_context(one_thread_per_worker())
                stack.enter_context(torch.inference_mode())
                stack.enter_context(torch.autocast("cpu", torch.bfloat16, enabled=bf16))
                yield

        t0 = time.perf_counter()
        bar = tqdm(total=height, unit="row", desc=desc, disable=not progress, leave=False)
        with bar:
            for out in run_bands(steps, deps, len(starts), workers=n, window=BANDS_IN_FLIGHT, setup=setup):
                if out is None:
                    continue
                yield out[0], out[2]
                bar.update(out[1])
                bar.set_postfix_str(pixel_rate(state["done"] * width, time.perf_counter() - t0))
        if state["done"] != height:
            raise RuntimeError(f"row streaming produced {state['done']} of {height} rows")


def workers() -> int:
    """Worker threads for row streaming: torch's thread count, each worker running its operations on one
    thread, where this process can pin them (:func:`~fcnkit.inference.bandflow.can_pin_threads`); else one
    worker whose operations use all of torch's threads."""
    n = torch.get_num_threads()
    return n if n > 1 and can_pin_threads() else 1
