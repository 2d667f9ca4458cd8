"""The preview card of a mapped image: legend with shares, and a full-resolution inset where the map is busiest."""

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

from fcnkit.data.raster import ArrayRaster
from fcnkit.outputs import SampledReads
from fcnkit.preview import INSET, choose_inset, preview_card


def test_the_inset_goes_where_most_classes_meet():
    small = np.zeros((60, 80), np.uint8)
    small[40:50, 60:70] = 1
    small[44:48, 64:72] = 2
    small[0:5, 0:5] = 255  # unlabelled (nodata) counts for nothing
    r, c = choose_inset(small, 10, ignore=255)
    window = small[r:r + 10, c:c + 10]
    assert set(np.unique(window)) == {0, 1, 2}


def test_card_holds_overview_inset_frame_and_legend():
    rng = np.random.default_rng(0)
    overview = rng.integers(0, 255, (200, 150, 3), dtype=np.uint8)
    inset = rng.integers(0, 255, (INSET, INSET, 3), dtype=np.uint8)
    card = preview_card(overview, inset, (10, 20, 50, 60), ["ground", "water"], [(200, 180, 120), (40, 90, 200)],
                        [0.75, 0.25], "scene: 600x450 px, 1:3 overview")
    assert card.dtype == np.uint8 and card.shape[1] >= 150 + INSET and card.shape[0] >= INSET
    h0 = 12 + 26  # the overview sits under the title, the inset to its right, pixel for pixel
    np.testing.assert_array_equal(card[h0 + 30:h0 + 50, 12 + 60:12 + 100], overview[30:50, 60:100])
    np.testing.assert_array_equal(card[h0:h0 + INSET, 12 * 2 + 150:12 * 2 + 150 + INSET][5:-5, 5:-5],
                                  inset[5:-5, 5:-5])
    legend = card[h0 + INSET + 20:]  # the legend's colour swatches are drawn in the class colours
    for color in ((200, 180, 120), (40, 90, 200)):
        assert (legend.reshape(-1, 3) == color).all(axis=1).sum() > 50


@settings(max_examples=60, deadline=None)
@given(h=st.integers(1, 60), w=st.integers(1, 60), step=st.integers(1, 9), band=st.integers(1, 25),
       tile=st.integers(4, 30), overlap=st.integers(0, 3), tiles=st.booleans())
def test_sampled_reads_keep_the_preview_grid_of_whatever_covers_the_image(h, w, step, band, tile, overlap, tiles):
    # Reference: numpy's strided view of the whole image from the preview's mid-cell offsets. Reads come as
    # full-width bands (row streaming) or overlapping windows (tiles), in any order; the grid is known only
    # once every sample has been read.
    img = np.random.default_rng(h * w + step).integers(0, 255, (h, w, 3), dtype=np.uint8)
    tap = SampledReads(ArrayRaster(img), step)
    oy, ox = min(step // 2, h - 1), min(step // 2, w - 1)
    if tiles:
        regions = [(y, min(y + tile + overlap, h), x, min(x + tile + overlap, w))
                   for y in range(0, h, tile) for x in range(0, w, tile)]
    else:
        regions = [(y, min(y + band, h), 0, w) for y in range(0, h, band)]
    last = [r for r in regions if r[0] <= oy < r[1] and r[2] <= ox < r[3]]  # those holding the first sample
    for i, (y0, y1, x0, x1) in enumerate([r for r in regions[::-1] if r not in last] + last):
        if i <= len(regions) - len(last):
            assert tap.samples() is None  # the first sample is still missing
        np.testing.assert_array_equal(tap.read(y0, y1, x0, x1), img[y0:y1, x0:x1])  # passed through
    np.testing.assert_array_equal(tap.samples(), img[oy::step, ox::step])
