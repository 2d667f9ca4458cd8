"""Up-sampling by sub-pixel phases against torch: transposed convolutions, and bilinear up-sampling followed by a
convolution, over any window of rows and columns."""

import pytest
import torch
from hypothesis import given, settings
from hypothesis import strategies as st
from torch.nn import functional as F

from fcnkit.inference.onednn import ONEDNN
from fcnkit.inference.phases import (
    bilinear_conv,
    bilinear_conv_by_phases,
    bilinear_conv_taps,
    bilinear_conv_weight,
    phase_weight,
    transposed_by_phases,
)


@settings(max_examples=60, deadline=None)
@given(cin=st.integers(1, 4), cout=st.integers(1, 4), s=st.tuples(st.integers(1, 4), st.integers(1, 4)),
       extra=st.tuples(st.integers(0, 5), st.integers(0, 5)), h=st.integers(1, 6), w=st.integers(1, 6),
       bias=st.booleans(), channels_last=st.booleans(), crop=st.tuples(*[st.floats(0, 1)] * 4),
       seed=st.integers(0, 100))
def test_transposed_convolution_by_phases_equals_torch(cin, cout, s, extra, h, w, bias, channels_last, crop, seed):
    # Reference: F.conv_transpose2d of torch (no padding), cropped to any window of rows and columns; kernels
    # from the stride up to stride + 5 (FCN up-sampling uses kernel 2 x stride), any strides per axis.
    if not ONEDNN:
        pytest.skip("this torch build has no fused oneDNN convolution")
    k = (s[0] + extra[0], s[1] + extra[1])
    g = torch.Generator().manual_seed(seed)
    weight, b = torch.randn(cin, cout, *k, generator=g), torch.randn(cout, generator=g) if bias else None
    x = torch.randn(1, cin, h, w, generator=g).contiguous(memory_format=torch.channels_last)
    ref = F.conv_transpose2d(x, weight, b, s)
    (r0, r1), (c0, c1) = [(min(ends), max(ends) + 1) for ends in
                          [[int(f * (n - 1)) for f in pair] for pair, n in zip((crop[:2], crop[2:]), ref.shape[2:],
                                                                               strict=True)]]
    got = transposed_by_phases(x, phase_weight(weight, s, channels_last), b, s, k, (r0, r1), (c0, c1),
                               channels_last)
    torch.testing.assert_close(got, ref[:, :, r0:r1, c0:c1], rtol=0, atol=1e-5)


def _bilinear_then_conv(x, weight, bias, f):
    # Reference: torch's bilinear up-sampling (align_corners=False), then its "same" zero-padded convolution.
    up = F.interpolate(x, scale_factor=f, mode="bilinear", align_corners=False)
    return F.conv2d(up, weight, bias, padding=(weight.shape[2] - 1) // 2)


@settings(max_examples=80, deadline=None)
@given(f=st.integers(2, 4), k=st.sampled_from([1, 3, 5]), h=st.integers(1, 12), w=st.integers(1, 9),
       cin=st.integers(1, 3), cout=st.integers(1, 3), bias=st.booleans(), window=st.tuples(*[st.floats(0, 1)] * 4),
       before=st.integers(0, 3), seed=st.integers(0, 100))
def test_bilinear_conv_by_phases_equals_torch(f, k, h, w, cin, cout, bias, window, before, seed):
    # Reference: torch (above) on the whole map; here any window of output rows, from only the input rows it
    # needs (as in one band of row streaming: the map's height unknown until its last rows), and any window
    # of rows and columns by the plain path.
    if not ONEDNN:
        pytest.skip("this torch build has no fused oneDNN convolution")
    g = torch.Generator().manual_seed(seed)
    weight, b = torch.randn(cout, cin, k, k, generator=g), torch.randn(cout, generator=g) if bias else None
    x = torch.randn(1, cin, h, w, generator=g).contiguous(memory_format=torch.channels_last)
    ref = _bilinear_then_conv(x, weight, b, f)
    (o0, o1), (c0, c1) = [(min(ends), max(ends) + 1) for ends in
                          [[int(t * (n - 1)) for t in pair] for pair, n in zip((window[:2], window[2:]),
                                                                               ref.shape[2:], strict=True)]]
    torch.testing.assert_close(bilinear_conv(x, 0, h, (o0, o1), (c0, c1), weight, b, f), ref[:, :, o0:o1, c0:c1],
                               rtol=0, atol=1e-5)
    phased, r = bilinear_conv_weight(weight, f)
    first = max(0, o0 // f - r - 1 - before)  # rows held: from a few more than needed, to all that are needed
    last = o1 // f + r + 2 >= h  # the band holds the map's last row: its height is known
    end = h if last else -(-o1 // f) + r + 1
    got = bilinear_conv_by_phases(x[:, :, first:end], first, h if last else None, (o0, o1), weight, b, phased,
                                  None if b is None else b.repeat(f * f), f, r)
    torch.testing.assert_close(got, ref[:, :, o0:o1], rtol=0, atol=1e-5)
    assert got.is_contiguous(memory_format=torch.channels_last)


def test_bilinear_conv_taps_match_the_up_sampling():
    # Reference: torch's bilinear up-sampling by 2 (align_corners=False) reads 1/4 and 3/4 of the two nearest
    # input rows (common practice: the "half-pixel" convention); a 3x3 convolution after it therefore reads
    # input rows i-1..i+1 for both output rows 2i and 2i+1, with these weights of its taps (worked by hand).
    a, r = bilinear_conv_taps(2, 3)
    assert r == 1
    expected = torch.tensor([[[0.75, 0.25, 0.0], [0.25, 0.75, 0.75], [0.0, 0.0, 0.25]],
                             [[0.25, 0.0, 0.0], [0.75, 0.75, 0.25], [0.0, 0.25, 0.75]]], dtype=torch.float64)
    torch.testing.assert_close(a, expected)
