"""Row streaming: exact against whole-image inference on random nets and odd sizes, bounded look-ahead, choice
of scan, refusals."""

import numpy as np
import pytest
import torch
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st
from model_strategies import as_model, model_configs, randomise_statistics, whole_image
from torch import nn
from torch.nn import functional as F

from fcnkit import build_model
from fcnkit.config import config_from_dict
from fcnkit.data.raster import ArrayRaster
from fcnkit.errors import ConfigError
from fcnkit.inference.rowstream import BANDS_IN_FLIGHT, NotStreamable, RowStreamer, block_max
from fcnkit.inference.scan import ScanChoice, choose_scan, predict_scores


def _stream(model: nn.Module, img: np.ndarray, rows: int | None = None) -> list[tuple[int, np.ndarray]]:
    return [(y0, b.numpy()) for y0, b in RowStreamer(model).stream(ArrayRaster(img), logits=True, rows=rows)]


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(m=model_configs(norms=("batch", "none")), seed=st.integers(0, 1000), h=st.integers(1, 90),
       w=st.integers(1, 70), rows=st.integers(1, 40))
def test_row_streaming_equals_whole_image_inference(m, seed, h, w, rows):
    # Reference: the same net run on the whole image at once (torch). Streaming must give the same logits up
    # to float rounding (<= 1e-4, the bound for exact inference) and the same labels, for every
    # config option (strides 2 and 3, dilations, both down-samplings and up-samplings, all fusions), odd
    # sizes and band heights that are not multiples of the factor.
    assume(h * w >= 1)
    torch.manual_seed(seed)
    net = as_model(randomise_statistics(build_model(m), seed, deconv=True))
    img = np.random.default_rng(seed).normal(size=(h, w, m.bands)).astype(np.float32)
    ref = whole_image(net, img)
    bands = _stream(net, img, rows * net.plan.factor)
    assert [y0 for y0, _ in bands] == list(np.cumsum([0] + [b.shape[1] for _, b in bands])[:-1])
    out = np.concatenate([b for _, b in bands], axis=1)
    assert out.shape == ref.shape
    np.testing.assert_allclose(out, ref, atol=1e-4, rtol=0)
    assert np.array_equal(out.argmax(0), ref.argmax(0))


def test_shipped_configs_stream_exactly():
    # Reference: whole-image inference (torch), on an image several bands high with sides not divisible by
    # the nets' factors.
    from pathlib import Path

    from fcnkit.config import load_config

    for name in ("demo", "fcn8s", "fcn32s", "unet", "tiny"):
        cfg = load_config(Path(__file__).parents[1] / "fcnkit" / "configs" / f"{name}.toml")
        net = as_model(randomise_statistics(build_model(cfg), 1, deconv=True))
        img = np.random.default_rng(0).normal(size=(157, 83, net.bands)).astype(np.float32)
        bands = _stream(net, img, rows=net.plan.factor)
        assert len(bands) > 1
        np.testing.assert_allclose(np.concatenate([b for _, b in bands], axis=1), whole_image(net, img), atol=1e-4)


class _CountingRaster(ArrayRaster):
    """Records the deepest row read so far."""

    deepest = 0

    def read(self, y0, y1, x0, x1):
        self.deepest = max(self.deepest, y1)
        return super().read(y0, y1, x0, x1)


def test_bands_leave_before_the_image_is_read_and_memory_follows_width():
    # A tall image streams: the first scores arrive after reading a few bands (the receptive field's depth),
    # not the whole image, and the rows carried over between bands do not grow with the height.
    cfg = config_from_dict({"model": {"bands": 1, "num_classes": 2, "widths": [4, 4, 4], "min_size": 8}})
    net = as_model(build_model(cfg))
    raster = _CountingRaster(np.random.default_rng(0).random((4000, 40, 1)).astype(np.float32))
    streamer = RowStreamer(net)
    stream = streamer.stream(raster, rows=16)
    y0, first = next(stream)
    field = net.geometry.margin
    assert y0 == 0 and first.shape[1] > 0
    # the bands the field's depth holds back, then at most BANDS_IN_FLIGHT more being read or computed
    assert raster.deepest <= (BANDS_IN_FLIGHT + 1) * 16 + 2 * field
    assert sum(b.shape[1] for _, b in stream) + first.shape[1] == 4000


def test_wide_band_maps_stay_below_the_size_malloc_maps_afresh():
    # Bug fix: bands were sized so that their largest map filled glibc's mmap threshold (MMAP_BYTES), and the
    # rows carried over pushed the U-Net config's last up-sampling past it (139 rows for a band of 128 at 2048
    # wide): every band's map was then fresh pages from the kernel. Every map a layer hands on must stay below.
    from pathlib import Path

    from fcnkit.allocator import MMAP_BYTES
    from fcnkit.config import load_config

    cfg = load_config(Path(__file__).parents[1] / "fcnkit" / "configs" / "unet.toml")
    streamer = RowStreamer(as_model(build_model(cfg)).eval())
    largest, build = [0], streamer._build

    def measured(fusion):
        nodes = build(fusion)
        for _, op, _ in nodes:
            def step(new, last, inner=op.step):
                out = inner(new, last)
                largest[0] = max([largest[0], *(p.numel() * p.element_size() for p in out)])
                return out
            op.step = step
        return nodes

    streamer._build = measured
    rows = streamer.band_rows(2048)
    img = np.zeros((2 * rows + 8, 2048, cfg.model.bands), np.float32)
    assert sum(b.shape[1] for _, b in streamer.stream(ArrayRaster(img), logits=True)) == img.shape[0]
    assert MMAP_BYTES // 4 < largest[0] < MMAP_BYTES  # wide bands still, yet below the threshold


def test_streaming_survives_torch_fx_tracing_in_another_thread():
    # Bug fix: torch.fx patches every module call of the process while it traces; worker threads that called
    # point-wise modules (batch norm, activations) then failed with "module is not installed as a submodule"
    # when the caller traced a net (e.g. to read a model's geometry) between two bands.
    from torch import fx

    cfg = config_from_dict({"model": {"bands": 1, "num_classes": 2, "widths": [4, 4], "min_size": 8,
                                  "norm": "batch"}})
    net = as_model(randomise_statistics(build_model(cfg), 0))
    other = nn.Sequential(*[nn.Sequential(nn.Conv2d(2, 2, 1), nn.ReLU()) for _ in range(20)])
    img = np.random.default_rng(0).random((600, 32, 1)).astype(np.float32)
    before = torch.get_num_threads()
    torch.set_num_threads(2)  # two workers
    try:
        bands = []
        for _, band in RowStreamer(net).stream(ArrayRaster(img), logits=True, rows=8):
            fx.symbolic_trace(other)
            bands.append(band.numpy())
    finally:
        torch.set_num_threads(before)
    np.testing.assert_allclose(np.concatenate(bands, axis=1), whole_image(net, img), atol=1e-4, rtol=0)


def test_auto_scan_streams_when_it_can_and_says_when_it_does_not():
    net = as_model(build_model(config_from_dict({"model": {"bands": 1, "num_classes": 2, "widths": [4, 4],
                                                           "min_size": 8}})))
    assert choose_scan(net, 50, 60) == ScanChoice("rows", True, None)
    for option, said in (({"tta": True}, "flip TTA"), ({"tiles_asked": True}, "tile settings"),
                         ({"engine": "onnxruntime"}, "another engine")):
        choice = choose_scan(net, 50, 60, **option)
        assert (choice.scan, choice.exact) == ("tiles", False) and said in choice.note and "not exact" in choice.note
    # exact means equal to whole-image inference on every path: rows already are; tiles become exact tiles
    assert choose_scan(net, 50, 60, exact=True) == ScanChoice("rows", True, None)
    choice = choose_scan(net, 50, 60, exact=True, tiles_asked=True)
    assert (choice.scan, choice.exact) == ("tiles", True) and "exact tiles" in choice.note
    assert choose_scan(net, 50, 60, "tiles") == ScanChoice("tiles", False, None)
    assert choose_scan(net, 50, 60, "tiles", exact=True) == ScanChoice("tiles", True, None)
    with pytest.raises(ConfigError, match=r"exact: flip TTA .* never equal whole-image inference"):
        choose_scan(net, 50, 60, exact=True, tta=True)
    with pytest.raises(ConfigError, match=r"scan: rows cannot be combined with flip TTA"):
        choose_scan(net, 50, 60, "rows", tta=True)
    with pytest.raises(ConfigError, match=r"scan: 'columns' is not one of: auto, rows, whole, tiles"):
        choose_scan(net, 50, 60, "columns")


def test_group_norm_nets_are_mapped_whole_and_exactly():
    """A net with a global layer cannot be streamed: auto maps a small image in one pass (exact) and says so."""
    cfg = config_from_dict({"model": {"bands": 1, "num_classes": 2, "widths": [4, 4], "norm": "group", "min_size": 8}})
    net = as_model(build_model(cfg))
    with pytest.raises(NotStreamable, match="GroupNorm cannot be streamed"):
        RowStreamer(net)
    choice = choose_scan(net, 40, 40)
    assert (choice.scan, choice.exact) == ("whole", True) and "GroupNorm" in choice.note
    img = np.random.default_rng(1).random((40, 40, 1)).astype(np.float32)
    notes: list[str] = []
    np.testing.assert_allclose(predict_scores(net, img, logits=True, echo=notes.append), whole_image(net, img),
                               atol=1e-5)
    assert notes == [choice.note]
    with pytest.raises(NotStreamable):
        choose_scan(net, 40, 40, "rows")


def test_predict_scores_rows_equal_exact_tiles():
    # Two independent exact paths must agree: row streaming and exact tiling (both against the whole image).
    cfg = config_from_dict({"model": {"bands": 2, "num_classes": 3, "widths": [4, 8, 8], "fusion": "sum",
                                      "skips": [2], "min_size": 8}})
    net = as_model(randomise_statistics(build_model(cfg), 5, deconv=True))
    img = np.random.default_rng(2).random((301, 257, 2)).astype(np.float32)
    rows = predict_scores(net, img, scan="rows")
    tiles = predict_scores(net, img, scan="tiles", tile=96, exact=True)
    np.testing.assert_allclose(rows, tiles, atol=1e-5)


@settings(max_examples=40, deadline=None)
@given(k=st.sampled_from([2, 3]), c=st.integers(1, 9), h=st.integers(1, 40), w=st.integers(1, 40),
       seed=st.integers(0, 100), channels_last=st.booleans())
def test_block_max_equals_torch_max_pooling(k, c, h, w, seed, channels_last):
    # Reference: torch.nn.functional.max_pool2d (kernel = stride = k, no padding), NaN included.
    assume(h >= k and w >= k)
    x = torch.randn(1, c, h, w, generator=torch.Generator().manual_seed(seed))
    x[0, 0, 0, 0] = float("nan")
    if channels_last:
        x = x.contiguous(memory_format=torch.channels_last)
    torch.testing.assert_close(block_max(x, k), F.max_pool2d(x, k), equal_nan=True, rtol=0, atol=0)


@settings(max_examples=30, deadline=None)
@given(relu=st.booleans(), groups=st.sampled_from([1, 2]), k=st.sampled_from([1, 3]), seed=st.integers(0, 100))
def test_onednn_convolutions_equal_torch(relu, groups, k, seed):
    # Reference: F.conv2d (then F.relu) of torch, on the oneDNN kernels row streaming uses for every convolution,
    # strided, dilated, grouped and 1x1 with few output channels.
    from fcnkit.inference.onednn import ONEDNN, onednn_conv

    if not ONEDNN:
        pytest.skip("this torch build has no fused oneDNN convolution")
    g = torch.Generator().manual_seed(seed)
    w, b = torch.randn(6, 4 // groups, k, k, generator=g), torch.randn(6, generator=g)
    x = torch.randn(1, 4, 23, 31, generator=g).contiguous(memory_format=torch.channels_last)
    with torch.no_grad():
        ref = F.conv2d(x, w, b, (2, 1), (0, 1), (1, 2), groups)
        ref = F.relu(ref) if relu else ref
        torch.testing.assert_close(onednn_conv(x, w, b, (2, 1), (0, 1), (1, 2), groups, relu), ref, rtol=0, atol=1e-5)


@settings(max_examples=30, deadline=None)
@given(parts=st.lists(st.integers(1, 5), min_size=1, max_size=3), relu=st.booleans(), seed=st.integers(0, 100))
def test_concatenation_convolution_equals_torch(parts, relu, seed):
    # Reference: F.conv2d of torch.cat along channels (then F.relu): the concatenation row streaming skips by
    # convolving each part with its slice of the weights.
    from fcnkit.inference.onednn import ONEDNN, concat_conv

    if not ONEDNN:
        pytest.skip("this torch build has no fused oneDNN convolution")
    g = torch.Generator().manual_seed(seed)
    xs = [torch.randn(1, c, 17, 19, generator=g).contiguous(memory_format=torch.channels_last) for c in parts]
    w, b = torch.randn(3, sum(parts), 3, 3, generator=g), torch.randn(3, generator=g)
    with torch.no_grad():
        ref = F.conv2d(torch.cat(xs, dim=1), w, b, 1, (0, 1))
        ref = F.relu(ref) if relu else ref
        got = concat_conv(xs, list(torch.split(w, parts, dim=1)), b, (1, 1), (0, 1), (1, 1), relu)
        # the parts' sums are added in another order than one convolution adds them: a few float32 ulps
        torch.testing.assert_close(got, ref, rtol=1e-5, atol=1e-5)


def test_prepared_nets_are_rebuilt_when_the_weights_change():
    # Regression guard for the per-model cache: a BN-folded copy must never outlive a change of the weights
    # (in-place updates as by an optimiser, or new parameter tensors).
    net = build_model(config_from_dict({"model": {"bands": 1, "num_classes": 2, "widths": [4, 4], "min_size": 8}}))
    net = as_model(randomise_statistics(net, 0, deconv=True))
    img = np.random.default_rng(0).random((32, 40, 1)).astype(np.float32)
    before = predict_scores(net, img, logits=True)
    np.testing.assert_array_equal(predict_scores(net, img, logits=True), before)
    with torch.no_grad():
        next(net.parameters()).mul_(-1.5)  # in place
    after = predict_scores(net, img, logits=True)
    np.testing.assert_allclose(after, whole_image(net, img), atol=1e-4)
    assert not np.allclose(after, before)
    head = net.net.body.decoder.head
    head[-1].weight = nn.Parameter(torch.zeros_like(head[-1].weight))
    np.testing.assert_allclose(predict_scores(net, img, logits=True), whole_image(net, img), atol=1e-4)


def test_the_unet_configs_up_samplings_are_folded_into_their_convolutions():
    # Each of the U-Net config's three bilinear up-samplings feeds one concatenation-convolution, which then reads
    # the map before up-sampling (by phases); the result is checked exact by test_shipped_configs_stream_exactly.
    from pathlib import Path

    from fcnkit.config import load_config
    from fcnkit.inference.onednn import ONEDNN

    if not ONEDNN:
        pytest.skip("this torch build has no fused oneDNN convolution")
    cfg = load_config(Path(__file__).parents[1] / "fcnkit" / "configs" / "unet.toml")
    assert len(RowStreamer(as_model(build_model(cfg)).eval())._folds) == 3
