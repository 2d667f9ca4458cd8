"""Patch sampling and augmentation: determinism, class balance, image/mask alignment, ignore padding."""

from __future__ import annotations

import numpy as np
import pytest
import torch
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.stats import chisquare

from fcnkit.data.patches import PatchDataset
from fcnkit.errors import DataError

pytestmark = pytest.mark.usefixtures("torch_one_thread")

H, W = 70, 90


def _coordinates():
    """An image whose bands hold each pixel's row and column (and 1 inside the image), and a mask coding both."""
    yy, xx = np.mgrid[0:H, 0:W]
    image = np.stack([yy, xx, np.full_like(yy, 1)], axis=-1).astype(np.uint16)
    mask = ((yy % 15) * 16 + xx % 15).astype(np.uint8)  # ≤ 238, never the ignore value
    return image, mask


def test_items_are_deterministic_per_seed_epoch_and_index():
    image, mask = _coordinates()
    ds = PatchDataset([image], [mask], 16, 8, augment=True, seed=4)
    a = [ds[i] for i in range(8)]
    b = [PatchDataset([image], [mask], 16, 8, augment=True, seed=4)[i] for i in range(8)]
    assert all(torch.equal(x[0], y[0]) and torch.equal(x[1], y[1]) for x, y in zip(a, b, strict=True))
    torch.manual_seed(123)  # the global torch generator does not leak into items, nor items into it
    state = torch.get_rng_state()
    assert torch.equal(ds[3][0], a[3][0]) and torch.equal(torch.get_rng_state(), state)
    ds.set_epoch(1)
    assert not torch.equal(ds[3][0], a[3][0])
    other = PatchDataset([image], [mask], 16, 8, augment=True, seed=5)
    assert not torch.equal(other[3][0], a[3][0])
    img, m = a[0]
    assert img.dtype == torch.float32 and img.shape == (3, 16, 16) and m.dtype == torch.int64 and m.shape == (16, 16)
    with pytest.raises(IndexError):
        ds[8]


@pytest.mark.parametrize("scale", [None, (1.0, 1.0), (0.6, 1.6)])
def test_augmentation_moves_image_and_mask_together(scale):
    exact = scale in (None, (1.0, 1.0))  # a zoom range of exactly 1 (the default) zooms nothing
    image, mask = _coordinates()
    ds = PatchDataset([image], [mask], 24, 60, augment=True, scale=scale, seed=1, brightness=0, contrast=0)
    orientations = set()
    for i in range(len(ds)):
        img, m = ds[i]
        y, x, inside = img[0], img[1], img[2]
        keep = (m != 255) & (inside > 0.999)  # pixels fully inside the image (bilinear blends at its edge)
        code_y, code_x = m[keep] // 16, m[keep] % 16
        if exact:  # flips and quarter turns are exact
            assert torch.equal(code_y, (y[keep] % 15).long()) and torch.equal(code_x, (x[keep] % 15).long())
        else:  # bilinear image vs nearest mask at the same position (mod 15): on a linear ramp bilinear
            # interpolation returns the sample position itself, and nearest-neighbour sampling at pixel centres
            # is never more than half a source pixel from it (definition of nearest-neighbour interpolation;
            # corner-aligned sampling, torch's legacy "nearest", would be up to a whole pixel off)
            for code, coord in ((code_y, y[keep]), (code_x, x[keep])):
                d = (code.double() - coord.double() % 15).abs()
                assert torch.minimum(d, 15 - d).max() <= 0.5 + 1e-4
        if exact:  # orientation: where the source rows and columns run along the patch's edges
            orientations.add(tuple(float(v) for v in (y[0, -1] - y[0, 0], x[0, -1] - x[0, 0],
                                                       y[-1, 0] - y[0, 0], x[-1, 0] - x[0, 0])))
    if exact:
        assert len(orientations) == 8  # all eight flips/quarter turns occur


def test_nearest_resampling_keeps_mask_values_and_ignore():
    rng = np.random.default_rng(0)
    mask = rng.choice(np.array([0, 3, 7, 255], np.uint8), size=(50, 50))
    image = rng.integers(0, 256, (50, 50, 4)).astype(np.uint8)
    ds = PatchDataset([image], [mask], 20, 40, augment=True, scale=(0.5, 2.0), seed=2)
    values = set()
    for i in range(len(ds)):
        values |= set(ds[i][1].unique().tolist())
    assert values <= {0, 3, 7, 255} and {0, 3, 7} <= values


def test_crops_leaving_the_image_are_padded_with_ignore():
    image = np.full((6, 5, 2), 9, np.uint8)
    mask = np.ones((6, 5), np.uint8)
    img, m = PatchDataset([image], [mask], 10, 1, seed=0)[0]
    assert (m == 1).sum() == 30 and (m == 255).sum() == 70  # the whole image, centred, the rest ignore
    assert torch.equal(img[0] == 9, m == 1) and (img[:, m == 255] == 0).all()


def test_balanced_sampling_centres_on_each_class_equally():
    mask = np.zeros((120, 150), np.uint8)
    mask[3:6, 140:145] = 1  # 15 pixels
    mask[100:101, 10:40] = 2  # 30 pixels
    mask[:, :2] = 255
    image = np.zeros((120, 150, 1), np.uint8)
    n = 1500
    ds = PatchDataset([image, image], [mask, mask], 9, n, balanced=True, seed=3)
    centres = np.array([int(ds[i][1][4, 4]) for i in range(n)])
    counts = np.bincount(centres, minlength=3)[:3]
    assert counts.sum() == n  # the centre is always a labelled pixel
    # Reference: Pearson's chi-square test (scipy.stats.chisquare) against equal class frequencies.
    assert chisquare(counts).pvalue > 1e-3, counts
    plain = PatchDataset([image], [mask], 9, n, seed=3)
    plain_counts = np.bincount([int(plain[i][1][4, 4]) for i in range(n)], minlength=256)
    assert plain_counts[1] + plain_counts[2] < 0.05 * n  # without balancing rare classes are rarely the centre


def test_brightness_and_contrast_touch_the_image_only():
    image, mask = _coordinates()
    image = (image * 2).astype(np.uint8)
    plain = PatchDataset([image], [mask], 16, 10, augment=True, scale=None, seed=6, brightness=0, contrast=0)
    jitter = PatchDataset([image], [mask], 16, 10, augment=True, scale=None, seed=6, brightness=0.5, contrast=0.5)
    changed = 0
    for i in range(10):
        (a, ma), (b, mb) = plain[i], jitter[i]
        assert torch.equal(ma, mb)  # same geometry
        assert b.min() >= 0 and b.max() <= 255  # clamped to the uint8 range of the source
        changed += not torch.equal(a, b)
    assert changed == 10


def test_bad_arguments():
    image, mask = _coordinates()
    with pytest.raises(ValueError, match="patch = 0"):
        PatchDataset([image], [mask], 0, 1)
    with pytest.raises(ValueError, match="scale = "):
        PatchDataset([image], [mask], 8, 1, scale=(2.0, 1.0))
    with pytest.raises(DataError, match="sample 0"):
        PatchDataset([image], [mask[:10]], 8, 1)


@settings(max_examples=40, deadline=None)
@given(h=st.integers(1, 40), w=st.integers(1, 40), patch=st.integers(1, 30), seed=st.integers(0, 10**6),
       balanced=st.booleans())
def test_unaugmented_patches_are_windows_of_the_padded_image(h, w, patch, seed, balanced):
    """Property: a patch is a P×P window of the image padded with 0 / ignore, never shifted or mixed."""
    yy, xx = np.mgrid[0:h, 0:w]
    image = np.stack([yy + 1, xx + 1], axis=-1).astype(np.uint16)  # 0 only in padding
    mask = ((yy * 7 + xx) % 200).astype(np.uint8)
    mask[0, 0] = 255
    img, m = PatchDataset([image], [mask], patch, 1, balanced=balanced, seed=seed)[0]
    y, x = img[0].long() - 1, img[1].long() - 1
    inside = img[0] > 0
    assert torch.equal(inside, img[1] > 0)
    assert torch.equal(m[inside], torch.from_numpy(mask)[y[inside], x[inside]].long())
    assert (m[~inside] == 255).all()
    rows, cols = torch.nonzero(inside, as_tuple=True)
    if rows.numel():  # source coordinates advance one by one across the window
        assert torch.equal(y[inside] - rows, torch.full_like(rows, int(y[inside][0] - rows[0])))
        assert torch.equal(x[inside] - cols, torch.full_like(cols, int(x[inside][0] - cols[0])))
    if not balanced and h >= patch and w >= patch:
        assert inside.all()  # plain crops stay inside an image that is large enough
    if balanced and h * w > 1:  # (a 1×1 image holds only the ignore pixel: nothing to balance)
        assert m[patch // 2, patch // 2] != 255  # the centre is a labelled pixel


def test_balancing_left_to_the_data_follows_the_labelled_share():
    image = np.zeros((40, 50, 1), np.uint8)
    dense = np.zeros((40, 50), np.uint8)
    dense[:, 25:] = 1
    sparse = np.full((40, 50), 255, np.uint8)
    sparse[10, 5:20], sparse[30, 30:45] = 0, 1  # two strokes: 30 of 2000 pixels labelled
    half = dense.copy()
    half[:, : 25] = 255  # exactly half labelled: not under the sparse share
    assert not PatchDataset([image], [dense], 8, 4, balanced=None).balanced
    assert not PatchDataset([image], [half], 8, 4, balanced=None).balanced
    auto = PatchDataset([image, image], [dense, sparse], 8, 50, balanced=None, seed=1)
    assert not auto.balanced  # 2030 of 4000 labelled: the share is taken over all images together
    auto = PatchDataset([image], [sparse], 9, 50, balanced=None, seed=1)
    assert auto.balanced and all(auto[i][1][4, 4] != 255 for i in range(50))  # every centre on a stroke
    assert not PatchDataset([image], [sparse], 8, 4, balanced=False).balanced  # an explicit choice stands
