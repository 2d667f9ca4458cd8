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
an integer factor, additions and concatenations, and point-wise layers. Nets with anything else (e.g. group
norm, global pooling) raise :class:`NotStreamable`; tiled inference handles those.
"""

from __future__ import annotations

import math
import operator
import time
from collections.abc import Callable, Iterator, Sequence
from concurrent.futures import ThreadPoolExecutor
from typing import TYPE_CHECKING

import torch
from torch import fx, nn
from torch.nn import functional as F

from fcnkit.data.raster import Raster
from fcnkit.errors import ConfigError
from fcnkit.units import pixel_rate

if TYPE_CHECKING:
    from fcnkit.model import Model

# Input pixels per band: on the 2-core development CPU, bands of 2048×256 pixels ran the demo and FCN-8s nets
# at least as fast as 128- or 512-row bands, and 64-row bands 10–30 % slower (more calls, more rows carried).
BAND_PIXELS = 512 * 1024


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
    """A layer whose output rows each depend on a short run of input rows. Each step computes the output rows
    now complete: those whose inputs lie inside one piece straight from that piece (no copy), the few whose
    inputs straddle pieces from a copy of just those rows. Subclasses give the row arithmetic."""

    MIN_ROWS = 4  # output rows worth computing from one piece on their own

    def __init__(self) -> None:
        super().__init__(1)

    def stop(self, end: int, last: bool) -> int:
        """Output rows complete once input rows 0..end have arrived (all of them when ``last``)."""
        raise NotImplementedError

    def need(self, o0: int, o1: int, end: int) -> tuple[int, int]:
        """Input rows that output rows o0..o1 read."""
        raise NotImplementedError

    def inside(self, a: int, b: int, end: int, last: bool) -> tuple[int, int]:
        """Output rows computable exactly from input rows a..b alone."""
        raise NotImplementedError

    def compute(self, x: torch.Tensor, a: int, o0: int, o1: int) -> torch.Tensor:
        """Output rows o0..o1 from ``x``, the input rows from ``a`` on."""
        raise NotImplementedError

    def receive(self, new: Rows, last: bool) -> None:
        self.inputs[0].pieces += [p for p in new if p.shape[2]]

    def step(self, new, last):
        self.receive(new[0], last)
        buf = self.inputs[0]
        end = buf.end
        stop = self.stop(end, last)
        if stop <= self.done:
            return []
        out: Rows = []
        o = self.done
        for a, b, piece in buf.spans():
            m0, m1 = self.inside(a, b, end, last)
            m0, m1 = max(m0, o), min(m1, stop)
            if m1 - m0 < self.MIN_ROWS:
                continue
            if m0 > o:
                out.append(self._from_buffer(o, m0, end))
            i0, i1 = self.need(m0, m1, end)
            out.append(self.compute(piece[:, :, i0 - a:i1 - a], i0, m0, m1))
            o = m1
        if stop > o:
            out.append(self._from_buffer(o, stop, end))
        self.done = stop
        buf.drop_before(self.need(self.done, self.done + 1, end)[0])
        return out

    def _from_buffer(self, o0: int, o1: int, end: int) -> torch.Tensor:
        i0, i1 = self.need(o0, o1, end)
        return self.compute(self.inputs[0].rows(i0, i1), i0, o0, o1)


class _Window(_Local):
    """Convolution or pooling with kernel k, stride s, dilation d and padding p along rows; ``fn`` is the layer
    with its row padding removed. The padding rows (``fill``) are added as pieces of their own at the top and
    bottom, so rows here are counted from the top of the padded input."""

    def __init__(self, fn: Callable[[torch.Tensor], torch.Tensor], k: int, s: int, d: int, p: int,
                 fill: float) -> None:
        super().__init__()
        self.fn, self.s, self.span, self.p, self.fill = fn, s, d * (k - 1), p, fill
        self.pad: torch.Tensor | None = None  # p rows of fill, made from the first piece's shape

    def receive(self, new, last):
        if self.p and new and self.pad is None:
            n, c, _, w = new[0].shape
            self.pad = torch.full((n, c, self.p, w), self.fill, dtype=new[0].dtype).contiguous(
                memory_format=torch.channels_last)
            self.inputs[0].pieces.append(self.pad)
        super().receive(new, last)
        if self.pad is not None and last:
            self.inputs[0].pieces.append(self.pad)

    def stop(self, end, last):
        return max(0, (end - 1 - self.span) // self.s + 1)

    def need(self, o0, o1, end):
        return o0 * self.s, (o1 - 1) * self.s + self.span + 1

    def inside(self, a, b, end, last):
        return -(-a // self.s), max(0, (b - 1 - self.span) // self.s + 1)

    def compute(self, x, a, o0, o1):
        return self.fn(x)


class _Transposed(_Local):
    """Transposed convolution (kernel k ≥ stride s, padding p along rows), computed in float32: output row o
    receives input rows ⌈(o + p − k + 1)/s⌉ … ⌊(o + p)/s⌋."""

    MIN_ROWS = 1 << 62  # one call per band: up-sampling inputs are narrow score maps, cheap to copy

    def __init__(self, m: nn.ConvTranspose2d) -> None:
        super().__init__()
        (self.k, _), (self.s, _), (self.p, pw) = _pair(m.kernel_size), _pair(m.stride), _pair(m.padding)
        (self.extra, opw), (d, dw) = _pair(m.output_padding), _pair(m.dilation)
        if d != 1 or dw != 1 or self.k < self.s or self.extra > self.p:
            raise NotStreamable("a transposed convolution with dilation, kernel < stride or output padding > "
                                "padding cannot be streamed")
        self.fn = lambda x: F.conv_transpose2d(x, m.weight, m.bias, (self.s, m.stride[1]), (0, pw), (0, opw),
                                               m.groups)
        self.height: int | None = None  # input height, known at the last band

    def receive(self, new, last):
        super().receive(new, last)
        if last:
            self.height = self.inputs[0].end

    def stop(self, end, last):
        return (end - 1) * self.s - 2 * self.p + self.k + self.extra if last else end * self.s - self.p

    def need(self, o0, o1, end):
        return max(0, -(-(o0 + self.p - self.k + 1) // self.s)), min(end, (o1 - 1 + self.p) // self.s + 1)

    def inside(self, a, b, end, last):
        o0 = 0 if a == 0 else max(0, (a - 1) * self.s - self.p + self.k)
        return o0, self.stop(b, last and b == end)

    def compute(self, x, a, o0, o1):
        with torch.autocast("cpu", enabled=False):  # bf16 transposed convolutions are slow on CPUs
            y = self.fn(x.float())
        base = a * self.s - self.p
        return y[:, :, o0 - base:o1 - base]


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

    def compute(self, x, a, o0, o1):
        y = F.interpolate(x, scale_factor=self.f, mode="bilinear", align_corners=False)
        return y[:, :, o0 - a * self.f:o1 - a * self.f]


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


def _conv_relu(x: torch.Tensor, m: nn.Conv2d, stride: tuple[int, int], padding: tuple[int, int],
               dilation: tuple[int, int]) -> torch.Tensor:
    """Convolution with the ReLU after it done by oneDNN in the same pass (the fused kernel torch's own compiler
    uses on CPUs); results equal conv2d followed by relu.

    The fused ReLU turns NaN into 0 where ``relu`` keeps it, so rows would quietly differ from whole-image
    inference: input that is not finite (its sum is not; a sum that merely overflows also lands here, harmlessly)
    takes the unfused path, and the NaN reaches the scores, where every scan refuses it. A NaN born inside one
    convolution from finite input needs sums overflowing float32 both ways, which pixels within the training
    range check's limit (fcnkit.inputrange) cannot produce with finite weights."""
    if not bool(torch.isfinite(x.sum())):
        return F.relu(F.conv2d(x, m.weight, m.bias, stride, padding, dilation, m.groups))
    return torch.ops.mkldnn._convolution_pointwise(x, m.weight, m.bias, list(padding), list(stride), list(dilation),
                                                   m.groups, "relu", [None], "")


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


FUSED_RELU = hasattr(torch.ops.mkldnn, "_convolution_pointwise") and torch.backends.mkldnn.is_available()


def _module_op(m: nn.Module, name: str, copy: bool, relu: bool = False) -> _Op:
    """The op of one module; ``relu``: a Conv2d also applies the ReLU that follows it."""
    if isinstance(m, nn.Conv2d):
        if m.padding_mode != "zeros" or isinstance(m.padding, str):
            raise NotStreamable(f"{name}: convolution padding {m.padding!r} ({m.padding_mode}) cannot be streamed")
        (k, _), (s, sw), (d, dw), (p, pw) = (_pair(m.kernel_size), _pair(m.stride), _pair(m.dilation),
                                             _pair(m.padding))
        if relu:
            return _Window(lambda x: _conv_relu(x, m, (s, sw), (0, pw), (d, dw)), k, s, d, p, 0.0)
        return _Window(lambda x: F.conv2d(x, m.weight, m.bias, (s, sw), (0, pw), (d, dw), m.groups), k, s, d, p, 0.0)
    if isinstance(m, nn.MaxPool2d) and not m.ceil_mode and not m.return_indices:
        (k, kw), (s, sw), (d, dw), (p, pw) = (_pair(m.kernel_size), _pair(m.stride or m.kernel_size),
                                              _pair(m.dilation), _pair(m.padding))
        if k == kw == s == sw and d == dw == 1 and p == pw == 0:
            return _Window(lambda x: block_max(x, k), k, s, d, p, -math.inf)
        return _Window(lambda x: F.max_pool2d(x, (k, kw), (s, sw), (0, pw), (d, dw)), k, s, d, p, -math.inf)
    if isinstance(m, nn.ConvTranspose2d):
        return _Transposed(m)
    if isinstance(m, nn.Upsample) and m.mode == "bilinear" and not m.align_corners and m.scale_factor is not None:
        f = m.scale_factor
        if isinstance(f, (int, float)) and float(f).is_integer():
            return _Interpolate(int(f))
    if isinstance(m, _POINTWISE):
        return _Pointwise(m, copy)
    raise NotStreamable(f"{name}: layer type {type(m).__name__} cannot be streamed in rows")


def _function_op(node: fx.Node, inputs: int, copy: bool) -> _Op:
    t = node.target
    if t in (operator.add, torch.add) and inputs == 2:
        return _Merge(2, lambda xs: xs[0] + xs[1])
    if t is torch.cat and node.kwargs.get("dim", node.args[1] if len(node.args) > 1 else 0) in (1, -3):
        return _Merge(inputs, lambda xs: torch.cat(xs, dim=1))
    if t is F.interpolate:
        f, kw = node.kwargs.get("scale_factor"), node.kwargs
        if (kw.get("mode") == "bilinear" and not kw.get("align_corners") and isinstance(f, (int, float))
                and float(f).is_integer() and len(node.args) == 1):
            return _Interpolate(int(f))
    if t in (F.relu, torch.relu) and inputs == 1:
        return _Pointwise(F.relu, copy)
    raise NotStreamable(f"{node.name}: operation {getattr(t, '__name__', t)} cannot be streamed in rows")


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
        self._build()  # fail now, not on the first image, if a layer cannot be streamed

    def _build(self) -> list[tuple[fx.Node, _Op, list[fx.Node]]]:
        """Fresh ops (empty row buffers) for every node of the graph, in execution order."""
        modules = dict(self._graph.named_modules())
        fused = self._fusable_relus(modules)
        nodes = []
        for node in self._graph.graph.nodes:
            ins = list(node.all_input_nodes)
            if node.op == "placeholder":
                self._input = node
            elif node.op == "output":
                self._output = ins[0]
            else:
                copy = len(ins) == 1 and len(ins[0].users) > 1
                if node in fused.values():
                    op = _Pointwise(lambda x: x, False)  # done by the convolution before it
                elif node.op == "call_module":
                    op = _module_op(modules[str(node.target)], str(node.target), copy, relu=node in fused)
                elif node.op == "call_function":
                    op = _function_op(node, len(ins), copy)
                else:
                    raise NotStreamable(f"{node.name}: {node.op} {node.target} cannot be streamed in rows")
                nodes.append((node, op, ins))
        return nodes

    def _fusable_relus(self, modules: dict[str, nn.Module]) -> dict[fx.Node, fx.Node]:
        """Convolutions whose output goes only (through identities) to a ReLU, mapped to that ReLU. Not under
        bf16 autocast, which the fused kernel does not follow."""
        if self.bf16 or not FUSED_RELU:
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

    def band_rows(self, width: int) -> int:
        """Input rows per band for an image ``width`` pixels wide: about BAND_PIXELS, a multiple of the factor."""
        return max(self.factor, BAND_PIXELS // max(width, 1) // self.factor * self.factor)

    def _push(self, nodes: list[tuple[fx.Node, _Op, list[fx.Node]]], x: torch.Tensor,
              last: bool) -> torch.Tensor | None:
        """Feed the next band of input rows through every node; the output rows completed by it."""
        out: dict[fx.Node, Rows] = {self._input: [x]}
        with torch.inference_mode(), torch.autocast("cpu", torch.bfloat16, enabled=self.bf16):
            for node, op, ins in nodes:
                out[node] = op.step([out[i] for i in ins], last)
        y = out[self._output]
        return torch.cat(y, dim=2).float() if y else None

    def stream(self, raster: Raster, *, logits: bool = False, rows: int | None = None, progress: bool = False,
               desc: str = "rows") -> Iterator[tuple[int, torch.Tensor]]:
        """Class probabilities (the model's, calibrated) or ``logits`` of ``raster``, top to bottom, as (first
        row, C×h×W float32)."""
        from tqdm import tqdm

        height, width, bands = raster.shape
        p = self.plan
        rows = rows or self.band_rows(width)
        left, right, bottom = p.before, p.after(width), p.after(height)

        def load(y0: int) -> torch.Tensor:
            """Input rows y0..y0+rows, normalised and padded by the plan (the top padding before the first band,
            the bottom padding after the last)."""
            y1 = min(y0 + rows, height)
            x = torch.from_numpy(raster.read(y0, y1, 0, width).astype("float32", copy=False))
            x = self.model.normalise(x.permute(2, 0, 1)[None])
            top = p.before if y0 == 0 else 0
            if left or right or top or (y1 == height and bottom):
                x = F.pad(x, (left, right, top, bottom if y1 == height else 0), mode="replicate")
            return x.contiguous(memory_format=torch.channels_last)

        nodes = self._build()
        starts = list(range(0, height, rows))
        skip, done, t0 = p.crop, 0, time.perf_counter()  # output rows before the crop; rows handed on
        bar = tqdm(total=height, unit="row", desc=desc, disable=not progress, leave=False)
        with ThreadPoolExecutor(1) as pool, bar:
            nxt = pool.submit(load, starts[0])
            for k in range(len(starts)):
                x = nxt.result()
                if k + 1 < len(starts):
                    nxt = pool.submit(load, starts[k + 1])
                y = self._push(nodes, x, k + 1 == len(starts))
                if y is None:
                    continue
                cut = min(skip, y.shape[2])
                y, skip = y[:, :, cut:], skip - cut
                y = y[:, :, :height - done, p.crop:p.crop + width].contiguous()
                if not y.shape[2]:
                    continue
                y = y if logits else self.model.probabilities(y)
                yield done, y[0]
                done += y.shape[2]
                bar.update(y.shape[2])
                bar.set_postfix_str(pixel_rate(done * width, time.perf_counter() - t0))
        if done != height:
            raise RuntimeError(f"row streaming produced {done} of {height} rows")
