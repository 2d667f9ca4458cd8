"""The preview card of a mapped image: legend with shares, and a full-resolution inset where the map is busiest."""

import numpy as np

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
