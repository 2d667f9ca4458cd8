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

import torch
from torch import fx, nn
from torch.nn import functional as F

from fcnkit.data.raster import Raster
from fcnkit.errors import ConfigError

# Input pixels per band: on a 2-core CPU (scripts/bench_tiling.py) bands of 2048×256 ran 10 % faster than
# 2048×64 and 2048×512 for the demo net; smaller bands spend more time carrying rows over between layers.
BAND_PIXELS = 512 * 1024


class NotStreamable(ConfigError):
    """The net has a layer that row streaming cannot run exactly."""


def _pair(v: int | tuple[int, ...]) -> tuple[int, int]:
    return (v, v) if isinstance(v, int) else (int(v[0]), int(v[1]))


class _Op:
    """One graph node: receives each input's new rows (in order, top to bottom) and returns the output rows that
    are now complete (or None). Row indices are those of the whole (padded) image."""

    def __init__(self, inputs: int) -> None:
        self.buf: list[torch.Tensor | None] = [None] * inputs
        self.start = [0] * inputs  # image row of buf[i][:, :, 0]
        self.done = 0  # output rows emitted so far

    def _append(self, chunks: Sequence[torch.Tensor | None]) -> None:
        for i, c in enumerate(chunks):
            if c is not None:
                b = self.buf[i]
                self.buf[i] = c if b is None else torch.cat([b, c], dim=2)

    def _end(self, i: int = 0) -> int:
        b = self.buf[i]
        return self.start[i] + (0 if b is None else b.shape[2])

    def _rows(self, lo: int, hi: int, i: int = 0) -> torch.Tensor:
        b = self.buf[i]
        assert b is not None and lo >= self.start[i]
        return b[:, :, lo - self.start[i]:hi - self.start[i]]

    def _trim(self, keep_from: int, i: int = 0) -> None:
        b = self.buf[i]
        cut = min(max(0, keep_from - self.start[i]), 0 if b is None else b.shape[2])
        if b is not None and cut:
            self.buf[i] = b[:, :, cut:] if cut < b.shape[2] else None
        self.start[i] += cut

    def step(self, chunks: Sequence[torch.Tensor | None], last: bool) -> torch.Tensor | None:
        raise NotImplementedError


class _Pointwise(_Op):
    """Activations, dropout, batch norm…: rows map to rows."""

    def __init__(self, fn: Callable[[torch.Tensor], torch.Tensor], copy: bool) -> None:
        super().__init__(1)
        self.fn, self.copy = fn, copy  # copy: the input is also read elsewhere and fn may work in place

    def step(self, chunks, last):
        c = chunks[0]
        return None if c is None else self.fn(c.clone() if self.copy else c)


class _Window(_Op):
    """Convolution or pooling with kernel k, stride s, dilation d and padding p along rows; ``fn`` is the layer
    with its row padding removed (rows are padded here, with ``fill``)."""

    def __init__(self, fn: Callable[[torch.Tensor], torch.Tensor], k: int, s: int, d: int, p: int,
                 fill: float) -> None:
        super().__init__(1)
        self.fn, self.k, self.s, self.d, self.p, self.fill = fn, k, s, d, p, fill

    def step(self, chunks, last):
        self._append(chunks)
        end, k, s, d, p = self._end(), self.k, self.s, self.d, self.p
        span = d * (k - 1)
        if last:
            stop = (end + 2 * p - span - 1) // s + 1
        else:
            stop = max(0, (end - 1 + p - span) // s + 1)
        if stop <= self.done:
            return None
        lo, hi = self.done * s - p, (stop - 1) * s - p + span + 1
        x = self._rows(max(lo, 0), min(hi, end))
        if lo < 0 or hi > end:
            x = F.pad(x, (0, 0, max(0, -lo), max(0, hi - end)), value=self.fill)
        y = self.fn(x)
        self.done = stop
        self._trim(stop * s - p)
        return y


class _Transposed(_Op):
    """Transposed convolution (kernel k ≥ stride s, padding p along rows), computed in float32."""

    def __init__(self, m: nn.ConvTranspose2d) -> None:
        super().__init__(1)
        (self.k, _), (self.s, _), (self.p, pw) = _pair(m.kernel_size), _pair(m.stride), _pair(m.padding)
        (op, opw), (d, dw) = _pair(m.output_padding), _pair(m.dilation)
        if d != 1 or dw != 1 or self.k < self.s or op > self.p:
            raise NotStreamable("a transposed convolution with dilation, kernel < stride or output padding > "
                                "padding cannot be streamed")
        self.fn = lambda x: F.conv_transpose2d(x, m.weight, m.bias, (self.s, m.stride[1]), (0, pw), (0, opw),
                                               m.groups)
        self.extra = op

    def step(self, chunks, last):
        self._append(chunks)
        end, k, s, p = self._end(), self.k, self.s, self.p
        stop = (end - 1) * s - 2 * p + k + self.extra if last else end * s - p
        if stop <= self.done:
            return None
        lo = max(0, -(-(self.done + p - k + 1) // s))
        hi = min(end, (stop - 1 + p) // s + 1)
        with torch.autocast("cpu", enabled=False):  # bf16 transposed convolutions are slow on CPUs
            y = self.fn(self._rows(lo, hi).float())
        base = lo * s - p
        y = y[:, :, self.done - base:stop - base]
        self.done = stop
        self._trim(max(0, -(-(stop + p - k + 1) // s)))
        return y


class _Interpolate(_Op):
    """Bilinear up-sampling by an integer factor f (align_corners=False): output row o reads input rows
    ⌊(o + ½)/f − ½⌋ and the next one."""

    def __init__(self, f: int) -> None:
        super().__init__(1)
        self.f = f

    def _first(self, o: int) -> int:
        return max(0, (2 * o + 1 - self.f) // (2 * self.f))

    def step(self, chunks, last):
        self._append(chunks)
        end, f = self._end(), self.f
        stop = end * f if last else max(0, ((2 * end - 1) * f - 2) // 2 + 1)
        if stop <= self.done:
            return None
        lo = self._first(self.done)
        hi = end if last else min(end, self._first(stop - 1) + 2)
        y = F.interpolate(self._rows(lo, hi), scale_factor=f, mode="bilinear", align_corners=False)
        y = y[:, :, self.done - lo * f:stop - lo * f]
        self.done = stop
        self._trim(self._first(stop))
        return y


class _Merge(_Op):
    """Addition or channel concatenation of several inputs: emits the rows every input has reached."""

    def __init__(self, inputs: int, fn: Callable[[list[torch.Tensor]], torch.Tensor]) -> None:
        super().__init__(inputs)
        self.fn = fn

    def step(self, chunks, last):
        self._append(chunks)
        stop = min(self._end(i) for i in range(len(self.buf)))
        if stop <= self.done:
            return None
        y = self.fn([self._rows(self.done, stop, i) for i in range(len(self.buf))])
        self.done = stop
        for i in range(len(self.buf)):
            self._trim(stop, i)
        return y


_POINTWISE = (nn.ReLU, nn.ReLU6, nn.LeakyReLU, nn.GELU, nn.SiLU, nn.Sigmoid, nn.Tanh, nn.ELU, nn.Hardswish,
              nn.Dropout, nn.Dropout2d, nn.Identity, nn.BatchNorm2d)


def _module_op(m: nn.Module, name: str, copy: bool) -> _Op:
    if isinstance(m, nn.Conv2d):
        if m.padding_mode != "zeros" or isinstance(m.padding, str):
            raise NotStreamable(f"{name}: convolution padding {m.padding!r} ({m.padding_mode}) cannot be streamed")
        (k, _), (s, sw), (d, dw), (p, pw) = (_pair(m.kernel_size), _pair(m.stride), _pair(m.dilation),
                                             _pair(m.padding))
        fn = lambda x, m=m: F.conv2d(x, m.weight, m.bias, (s, sw), (0, pw), (d, dw), m.groups)  # noqa: E731
        return _Window(fn, k, s, d, p, 0.0)
    if isinstance(m, nn.MaxPool2d) and not m.ceil_mode and not m.return_indices:
        (k, kw), (s, sw), (d, dw), (p, pw) = (_pair(m.kernel_size), _pair(m.stride or m.kernel_size),
                                              _pair(m.dilation), _pair(m.padding))
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
    """Runs a :class:`~fcnkit.nets.segnet.SegNet` over an image in full-width bands of rows (see module notes).

    The net is copied with batch norms folded into their convolutions and run channels-last; ``bf16`` runs it
    under bfloat16 autocast (transposed convolutions stay float32). Raises :class:`NotStreamable` for a net
    it cannot run exactly."""

    def __init__(self, model: nn.Module, bf16: bool = False) -> None:
        from fcnkit.nets.segnet import SegNet
        from fcnkit.tiling import fuse_conv_bn

        if not isinstance(model, SegNet):
            raise NotStreamable(f"model: a {type(model).__name__} cannot be streamed in rows (only config-built "
                                "nets)")
        self.factor, self.bf16 = model.factor, bf16
        body = fuse_conv_bn(model).body.to(memory_format=torch.channels_last)
        try:
            gm = fx.symbolic_trace(body)
        except Exception as e:  # tracing errors come in many types
            raise NotStreamable(f"model: cannot read its graph ({' '.join(str(e).split())})") from None
        self._graph = gm
        self._build()  # fail now, not on the first image, if a layer cannot be streamed

    def _build(self) -> list[tuple[fx.Node, _Op, list[fx.Node]]]:
        """Fresh ops (empty row buffers) for every node of the graph, in execution order."""
        modules = dict(self._graph.named_modules())
        nodes = []
        for node in self._graph.graph.nodes:
            ins = list(node.all_input_nodes)
            if node.op == "placeholder":
                self._input = node
            elif node.op == "output":
                self._output = ins[0]
            else:
                copy = len(ins) == 1 and len(ins[0].users) > 1
                if node.op == "call_module":
                    op = _module_op(modules[str(node.target)], str(node.target), copy)
                elif node.op == "call_function":
                    op = _function_op(node, len(ins), copy)
                else:
                    raise NotStreamable(f"{node.name}: {node.op} {node.target} cannot be streamed in rows")
                nodes.append((node, op, ins))
        return nodes

    def band_rows(self, width: int) -> int:
        """Input rows per band for an image ``width`` pixels wide: about BAND_PIXELS, a multiple of the factor."""
        return max(self.factor, BAND_PIXELS // max(width, 1) // self.factor * self.factor)

    def _push(self, nodes: list[tuple[fx.Node, _Op, list[fx.Node]]], x: torch.Tensor,
              last: bool) -> torch.Tensor | None:
        """Feed the next band of input rows through every node; the output rows completed by it."""
        out: dict[fx.Node, torch.Tensor | None] = {self._input: x}
        with torch.inference_mode(), torch.autocast("cpu", torch.bfloat16, enabled=self.bf16):
            for node, op, ins in nodes:
                out[node] = op.step([out[i] for i in ins], last)
        y = out[self._output]
        return None if y is None else y.float()

    def stream(self, raster: Raster, *, mean: Sequence[float], std: Sequence[float], logits: bool = False,
               rows: int | None = None, progress: bool = False,
               desc: str = "rows") -> Iterator[tuple[int, torch.Tensor]]:
        """Class probabilities (or ``logits``) of ``raster``, top to bottom, as (first row, C×h×W float32)."""
        from tqdm import tqdm

        height, width, bands = raster.shape
        f = self.factor
        rows = rows or self.band_rows(width)
        pad_w, pad_h = -width % f, -height % f
        m = torch.tensor(mean, dtype=torch.float32).view(1, bands, 1, 1)
        s = torch.tensor(std, dtype=torch.float32).view(1, bands, 1, 1)

        def load(y0: int) -> torch.Tensor:
            y1 = min(y0 + rows, height)
            x = torch.from_numpy(raster.read(y0, y1, 0, width).astype("float32", copy=False))
            x = x.permute(2, 0, 1)[None].sub(m).div_(s)
            x = F.pad(x, (0, pad_w, 0, pad_h if y1 == height else 0), mode="replicate") if pad_w or (
                pad_h and y1 == height) else x
            return x.contiguous(memory_format=torch.channels_last)

        nodes = self._build()
        starts = list(range(0, height, rows))
        done, t0 = 0, time.perf_counter()
        bar = tqdm(total=height, unit="row", desc=desc, disable=not progress, leave=False)
        with ThreadPoolExecutor(1) as pool, bar:
            nxt = pool.submit(load, starts[0])
            for k in range(len(starts)):
                x = nxt.result()
                if k + 1 < len(starts):
                    nxt = pool.submit(load, starts[k + 1])
                y = self._push(nodes, x, k + 1 == len(starts))
                if y is None or done >= height:
                    continue
                y = y[:, :, :height - done, :width].contiguous()
                y = y if logits else torch.softmax(y, dim=1)
                yield done, y[0]
                done += y.shape[2]
                bar.update(y.shape[2])
                bar.set_postfix_str(f"{done * width / 1e6 / (time.perf_counter() - t0):.2f} MP/s")
        if done != height:
            raise RuntimeError(f"row streaming produced {done} of {height} rows")
