"""Geometry against outside references: the size formulas of the PyTorch docs and of Dumoulin & Visin (2016),
real torch modules, the receptive-field recurrences of Araujo, Norris & Sim (Distill, 2019), gradients of real
nets, ``numel`` and forward hooks."""

from __future__ import annotations

import math
from fractions import Fraction

import pytest
import torch
from hypothesis import assume, given, settings
from hypothesis import strategies as st
from model_strategies import model_configs
from torch import nn
from torch.nn import functional as F

from fcnkit import geometry
from fcnkit.config import ModelConfig
from fcnkit.geometry import INPUT, Layer, conv_output_size, deconv_output_size
from fcnkit.nets import build_model, layer_graph

pytestmark = pytest.mark.usefixtures("torch_one_thread")

# --- single layers ---------------------------------------------------------------------------------------


@settings(max_examples=400, deadline=None)
@given(n=st.integers(1, 300), k=st.integers(1, 11), s=st.integers(1, 8), p=st.integers(0, 6), d=st.integers(1, 5))
def test_conv_output_size_matches_published_formulas(n: int, k: int, s: int, p: int, d: int) -> None:
    assume(n + 2 * p >= d * (k - 1) + 1)  # the dilated window fits the padded input at least once
    # PyTorch docs, torch.nn.Conv2d: H_out = floor((H_in + 2*padding - dilation*(kernel_size - 1) - 1)/stride + 1)
    torch_docs = math.floor((n + 2 * p - d * (k - 1) - 1) / s + 1)
    # Dumoulin & Visin 2016, dilated convolution (relationship 15; its number recalled from memory):
    # o = floor((i + 2p - k - (k - 1)(d - 1)) / s) + 1
    dumoulin_visin = (n + 2 * p - k - (k - 1) * (d - 1)) // s + 1
    # counting window positions directly: window o covers padded pixels o*s .. o*s + d(k-1)
    counted = sum(1 for o in range(n + 2 * p) if o * s + d * (k - 1) <= n + 2 * p - 1)
    assert conv_output_size(n, k, s, p, d) == torch_docs == dumoulin_visin == counted


@settings(max_examples=400, deadline=None)
@given(n=st.integers(1, 300), k=st.integers(1, 11), s=st.integers(1, 8), p=st.integers(0, 6), d=st.integers(1, 5),
       a=st.integers(0, 7))
def test_deconv_output_size_matches_published_formulas(n: int, k: int, s: int, p: int, d: int, a: int) -> None:
    assume(a < max(s, d))  # PyTorch's rule for output_padding
    out = deconv_output_size(n, k, s, p, a, d)
    assume(out >= 1)
    # PyTorch docs, torch.nn.ConvTranspose2d:
    # H_out = (H_in - 1)*stride - 2*padding + dilation*(kernel_size - 1) + output_padding + 1
    assert out == (n - 1) * s - 2 * p + d * (k - 1) + a + 1
    if d == 1:
        # Dumoulin & Visin 2016, transposed convolution (relationship 14; number from memory): o' = s(i'-1) + a + k - 2p
        assert out == s * (n - 1) + a + k - 2 * p
    if a < s and out + 2 * p >= d * (k - 1) + 1:
        # a transposed convolution is the gradient of the convolution with the same settings (Dumoulin & Visin
        # 2016, section 4): convolving its output gives back the input length
        assert conv_output_size(out, k, s, p, d) == n


@settings(max_examples=60, deadline=None)
@given(h=st.integers(1, 40), w=st.integers(1, 40), k=st.integers(1, 7), s=st.integers(1, 4), p=st.integers(0, 3),
       d=st.integers(1, 3), a=st.integers(0, 3))
def test_sizes_match_real_modules(h: int, w: int, k: int, s: int, p: int, d: int, a: int) -> None:
    x = torch.zeros(1, 1, h, w)
    weight = torch.zeros(1, 1, k, k)
    if min(h, w) + 2 * p >= d * (k - 1) + 1:
        y = F.conv2d(x, weight, stride=s, padding=p, dilation=d)
        assert tuple(y.shape[-2:]) == (conv_output_size(h, k, s, p, d), conv_output_size(w, k, s, p, d))
        if p <= k // 2:  # torch's limit for pooling padding
            y = F.max_pool2d(x, k, stride=s, padding=p, dilation=d)
            assert tuple(y.shape[-2:]) == (conv_output_size(h, k, s, p, d), conv_output_size(w, k, s, p, d))
    if a < max(s, d) and min(deconv_output_size(h, k, s, p, a, d), deconv_output_size(w, k, s, p, a, d)) >= 1:
        y = F.conv_transpose2d(x, weight, stride=s, padding=p, output_padding=a, dilation=d)
        assert tuple(y.shape[-2:]) == (deconv_output_size(h, k, s, p, a, d), deconv_output_size(w, k, s, p, a, d))


# --- receptive field of chains: Araujo, Norris & Sim, Distill 2019 -----------------------------------------

chain_layers = st.lists(
    st.tuples(st.sampled_from(["conv", "pool"]), st.integers(1, 7), st.integers(1, 4), st.integers(0, 3),
              st.integers(1, 3)),
    min_size=1, max_size=6,
)


@settings(max_examples=150, deadline=None)
@given(spec=chain_layers)
def test_chain_receptive_field_matches_closed_form(spec: list[tuple[str, int, int, int, int]]) -> None:
    graph, prev = [], INPUT
    for i, (op, k, s, p, d) in enumerate(spec):
        graph.append(Layer(f"l{i}", op, (prev,), kernel=k, stride=s, padding=p, dilation=d))
        prev = f"l{i}"
    ks, ss, ps, ds = ([t[j] for t in spec] for j in (1, 2, 3, 4))
    jump = [math.prod(ss[:i]) for i in range(len(spec))]  # product of strides before layer l
    # Araujo et al. 2019, eq. for the receptive field size: r0 = 1 + sum_l (k_l - 1) d_l prod_{i<l} s_i
    # (dilation enters through the effective kernel d(k-1)+1)
    r0 = 1 + sum((k - 1) * d * j for k, d, j in zip(ks, ds, jump, strict=True))
    # ... and for the start of the field of output u: u0 = u S0 - P0, with S0 = prod s_l, P0 = sum_l p_l prod_{i<l} s_i
    s0 = math.prod(ss)
    p0 = sum(p * j for p, j in zip(ps, jump, strict=True))

    length = 4 * r0 + 4 * p0 + 6 * s0 + 8
    sizes = [length]
    for layer in graph:
        sizes.append(geometry.layer_output_size(layer, sizes[-1]))
    assume(sizes[-1] >= 1 and min(sizes) >= 1)
    lo, hi = geometry.dependency_intervals(graph, length)
    interior = [u for u in range(len(lo)) if u * s0 - p0 >= 0 and u * s0 - p0 + r0 - 1 <= length - 1]
    for u in interior:
        assert (lo[u], hi[u]) == (u * s0 - p0, u * s0 - p0 + r0 - 1)
    field = geometry.receptive_field(graph)
    assert field.size == r0
    # left/right reach measured from the centre of the output pixel, (u + 1/2) S0 - 1/2 in input pixels
    # (half-pixel centres: common practice, also torch's align_corners=False)
    centre_minus_lo = Fraction(s0 - 1, 2) + p0
    assert field.left == max(0, math.ceil(centre_minus_lo))
    assert field.right == max(0, math.ceil(r0 - 1 - centre_minus_lo))
    assert geometry.tile_margin(graph) == max(field.left, field.right)


# --- receptive field of whole nets against gradients -----------------------------------------------------


def _positive_measurement_copy(net: nn.Module) -> nn.Module:
    """A float64 eval-mode copy of the body in which no path is silently zero: positive weights, biases,
    batch-norm scales and shifts (so with positive inputs every ReLU passes gradient), and each MaxPool2d
    replaced by an AvgPool2d of identical geometry (max pooling passes gradient to one element of its
    window only, so it would hide parts of the field)."""
    body = net.body
    for mod in list(body.modules()):
        for name, child in list(mod.named_children()):
            if isinstance(child, nn.MaxPool2d):
                assert child.dilation in (1, (1, 1)) and not child.ceil_mode
                setattr(mod, name, nn.AvgPool2d(child.kernel_size, child.stride, child.padding))
    body = body.double().eval()
    gen = torch.Generator().manual_seed(0)
    with torch.no_grad():
        for p in body.parameters():
            p.copy_(torch.rand(p.shape, generator=gen, dtype=torch.float64) * 0.5 + 0.5)
        for m in body.modules():
            if isinstance(m, nn.BatchNorm2d):
                m.running_mean.zero_()
                m.running_var.fill_(1.0)
    return body


def _hull(mask: torch.Tensor) -> tuple[int, int]:
    idx = torch.nonzero(mask).flatten()
    return int(idx.min()), int(idx.max())


@settings(max_examples=35, deadline=None)
@given(cfg=model_configs(norms=("batch", "none"), max_factor=8))
def test_receptive_field_matches_gradient_measurement(cfg: ModelConfig) -> None:
    net = build_model(cfg)
    graph = layer_graph(net)
    factor = geometry.downsampling_factor(graph)
    assert factor == net.factor == cfg.stage_output_strides()[-1]
    field = geometry.receptive_field(graph)
    body = _positive_measurement_copy(net)

    # Rows: long enough that pixels of every phase modulo the factor are interior. Columns: short, so the
    # border handling (zero padding, clamped interpolation) is checked too.
    rows = factor * math.ceil((2 * field.size + 3 * factor) / factor)
    cols = 2 * factor
    mid = factor * (rows // factor // 2)
    picks = [(mid + ph, ph % cols) for ph in range(factor)] + [(0, cols - 1), (rows - 1, 0)]
    x = (torch.rand(len(picks), cfg.bands, rows, cols, dtype=torch.float64) + 0.5).requires_grad_()
    y = body(x)
    assert y.shape == (len(picks), cfg.num_classes, rows, cols)
    total = sum(y[i, :, r, c].sum() for i, (r, c) in enumerate(picks))
    (grad,) = torch.autograd.grad(total, x)
    lo_r, hi_r = geometry.dependency_intervals(graph, rows)
    lo_c, hi_c = geometry.dependency_intervals(graph, cols)
    size = left = right = 0
    for i, (r, c) in enumerate(picks):
        reached = grad[i].abs().sum(0) > 0  # input pixels whose value changes output pixel (r, c)
        # every such pixel lies in the computed field, and the field's bounds are reached on both axes
        assert _hull(reached.any(1)) == (lo_r[r], hi_r[r])
        assert _hull(reached.any(0)) == (lo_c[c], hi_c[c])
        if i < factor:
            a, b = _hull(reached.any(1))
            assert 0 < a and b < rows - 1  # interior, as in geometry.receptive_field
            size, left, right = max(size, b - a + 1), max(left, r - a), max(right, b - r)
    # over all phases the computed worst case is reached exactly
    assert (size, left, right) == (field.size, field.left, field.right)


@settings(max_examples=15, deadline=None)
@given(cfg=model_configs(norms=("batch", "none"), max_factor=8), data=st.data())
def test_tile_margin_gives_exact_tiles(cfg: ModelConfig, data: st.DataObject) -> None:
    """A tile whose origin is a multiple of the factor and that has tile_margin pixels of context around
    the kept block reproduces the whole-image scores there."""
    torch.manual_seed(1)
    net = build_model(cfg).double().eval()
    graph = layer_graph(net)
    f, m = net.factor, geometry.tile_margin(graph)
    n = f * math.ceil((4 * m + 3 * f + 8) / f)
    x = torch.rand(1, cfg.bands, n, n, dtype=torch.float64)
    with torch.no_grad():
        whole = net(x)
        a = data.draw(st.integers(0, n - 1), label="kept start")
        t = data.draw(st.integers(1, n - a), label="kept length")
        start = max(0, a - m) // f * f
        stop = min(n, math.ceil((a + t + m) / f) * f)
        tile = net.body(x[..., start:stop, start:stop])
    kept = tile[..., a - start:a - start + t, a - start:a - start + t]
    torch.testing.assert_close(kept, whole[..., a:a + t, a:a + t], rtol=1e-9, atol=1e-9)


# --- parameters and multiply–accumulates ------------------------------------------------------------------


@settings(max_examples=40, deadline=None)
@given(cfg=model_configs(), h=st.integers(1, 30), w=st.integers(1, 30))
def test_params_and_macs_match_the_module(cfg: ModelConfig, h: int, w: int) -> None:
    net = build_model(cfg).eval()
    graph = layer_graph(net)
    assert geometry.param_count(graph) == sum(p.numel() for p in net.parameters())

    # Convention (common practice): one multiply–accumulate per weight tap applied to one value; biases,
    # norms, activations, pooling and interpolation are not counted. Conv2d: out.numel()/N · cin/groups · k²
    # (each output value is a dot product); ConvTranspose2d: in.numel()/N · cout/groups · k² (each input value
    # is scattered through its weights).
    counted = 0

    def hook(mod: nn.Module, inputs: tuple[torch.Tensor, ...], out: torch.Tensor) -> None:
        nonlocal counted
        k2 = mod.kernel_size[0] * mod.kernel_size[1]
        if isinstance(mod, nn.ConvTranspose2d):
            counted += inputs[0].numel() // inputs[0].shape[0] * mod.out_channels // mod.groups * k2
        else:
            counted += out.numel() // out.shape[0] * mod.in_channels // mod.groups * k2

    for mod in net.modules():
        if isinstance(mod, (nn.Conv2d, nn.ConvTranspose2d)):
            mod.register_forward_hook(hook)
    with torch.no_grad():
        net(torch.rand(2, cfg.bands, h, w))
    ph, pw = net.plan.padded(h), net.plan.padded(w)  # the net pads by its plan
    assert geometry.macs(graph, ph, pw) == counted
    assert geometry.macs_per_megapixel(graph) == round(Fraction(counted * 1_000_000, ph * pw))


def test_global_layers_rule_out_exact_tiling() -> None:
    graph = layer_graph(build_model(ModelConfig(bands=3, num_classes=2, widths=[4, 4], norm="group", groups=2)))
    assert not geometry.is_local(graph)
    assert {g.note for g in geometry.global_layers(graph)} == {"GroupNorm"}
    with pytest.raises(ValueError, match="global layers"):
        geometry.receptive_field(graph)


@settings(max_examples=300, deadline=None)
@given(factor=st.integers(1, 64), offset=st.integers(-64, 400), n=st.integers(1, 3000), cells=st.integers(1, 4))
def test_padding_plan_aligns_every_size(factor: int, offset: int, n: int, cells: int) -> None:
    """The one padding rule: a padded side is the offset plus a whole number (at least ``cells``) of cells, holds
    the crop and the input, and is the smallest such side (no cell computed in vain)."""
    plan = geometry.PadPlan(factor, offset, cells)
    side = plan.padded(n)
    assert plan.before >= 0 and plan.after(n) >= 0 and plan.crop >= 0
    assert (side - offset) % factor == 0 and side - offset >= cells * factor
    # the net's output (side − offset pixels at full resolution, from the offset's half on) covers the crop
    assert plan.crop + n <= side - offset
    assert side - factor < max(plan.before + n, offset + cells * factor, plan.crop + n + offset)


def test_padding_plan_records_for_traced_sizes() -> None:
    """The rule is plain arithmetic, so a size a tracer hands over as a tensor gives the same padding."""
    plan = geometry.PadPlan(8, 12, cells=2)
    for n in (1, 5, 17, 40):
        assert int(plan.after(torch.tensor(n), lambda v: v.clamp(min=0))) == plan.after(n)
