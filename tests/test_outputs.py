"""Per-pixel maps and area tables, checked against scipy's entropy, numpy's argmax and the csv module."""

import csv
import io
import math

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.stats import entropy

from fcnkit.data.classes import ClassInfo, ClassTable
from fcnkit.outputs import area_rows, areas_csv, class_maps, normalised_entropy, overlay, percentiles, to_byte

CLASSES = ClassTable((ClassInfo(0, "open ground", (200, 180, 120)), ClassInfo(1, "water", (40, 100, 200)),
                      ClassInfo(2, "roof", (210, 60, 50))))


def _probs(shape, seed=0):
    rng = np.random.default_rng(seed)
    logits = rng.normal(scale=2.0, size=shape).astype(np.float32)
    e = np.exp(logits - logits.max(-1, keepdims=True))
    return e / e.sum(-1, keepdims=True)


def test_normalised_entropy_is_shannon_entropy_in_base_c():
    # scipy.stats.entropy(p, base=C) = -Σ p log_C p: Shannon entropy normalised to [0, 1] by log C.
    p = _probs((40, 30, 3))
    ref = entropy(p, base=3, axis=-1)
    np.testing.assert_allclose(normalised_entropy(p), ref, atol=1e-5)
    assert np.allclose(normalised_entropy(np.full((2, 2, 5), 0.2)), 1.0)
    assert np.allclose(normalised_entropy(np.eye(4)[None]), 0.0, atol=1e-6)


def test_class_maps_match_argmax_max_and_entropy():
    p = _probs((25, 35, 3), 1)
    labels, conf, unc = class_maps(np.moveaxis(p, -1, 0))  # planar C×h×w in
    np.testing.assert_array_equal(labels, p.argmax(-1))  # numpy argmax: first maximum on ties, like torch
    np.testing.assert_array_equal(conf, np.rint(p.max(-1) * 255).astype(np.uint8))
    np.testing.assert_array_equal(unc, np.rint(entropy(p, base=3, axis=-1) * 255).astype(np.uint8))
    assert conf.min() >= math.floor(255 / 3)  # the top class of 3 has probability >= 1/3


def test_to_byte_rounds_to_nearest_and_clips():
    np.testing.assert_array_equal(to_byte(np.array([0.0, 0.5 / 255, 0.499, 1.0, 1.2, -0.1])),
                                  [0, 0, 127, 255, 255, 0])  # round-half-to-even at 0.5/255 (numpy rint)


def test_area_table_rows_and_csv_with_a_nodata_row():
    counts = np.array([300, 0, 700])
    rows = area_rows(counts, CLASSES, counts * 0.25)
    assert [r["pixels"] for r in rows] == [300, 0, 700]
    assert [r["share"] for r in rows] == [0.3, 0.0, 0.7]  # of the valid pixels
    assert [r["area_m2"] for r in area_rows(counts, CLASSES, None)] == [None, None, None]
    parsed = list(csv.DictReader(io.StringIO(areas_csv(rows, (255, 42)))))  # read back with the csv module
    assert [p["name"] for p in parsed] == [*CLASSES.names, "nodata"]
    assert [p["area_m2"] for p in parsed] == ["75.0000", "0.0000", "175.0000", ""]
    assert [int(p["pixels"]) for p in parsed] == [300, 0, 700, 42] and parsed[-1]["id"] == "255"


def test_overlay_is_alpha_blend_of_class_colours():
    rgb = np.full((2, 2, 3), 100, np.uint8)
    labels = np.array([[0, 1], [2, 0]], np.uint8)
    out = overlay(rgb, labels, CLASSES.colors, alpha=0.5)
    want = np.rint(0.5 * 100 + 0.5 * np.array(CLASSES.colors, float)[labels]).astype(np.uint8)
    np.testing.assert_array_equal(out, want)


def test_preview_keeps_only_its_samples_in_memory():
    # Regression: the preview once kept a strided view of every band it read, i.e. the whole image.
    import tracemalloc

    import fcnkit.report  # noqa: F401 - imported before measuring: its first import (matplotlib) allocates ~27 MB
    from fcnkit.data.raster import RowStore
    from fcnkit.outputs import _preview

    class Fresh:  # a raster whose reads allocate, like a TIFF decoder
        shape, path, geo, masked = (8192, 1024, 4), None, None, False

        def read(self, y0, y1, x0, x1):
            return np.ones((y1 - y0, x1 - x0, 4), np.uint8)

    labels = RowStore((8192, 1024), np.uint8)
    tracemalloc.start()
    rgb, small, valid = _preview(Fresh(), labels, None, 4)
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    assert rgb.shape == (2048, 256, 3) and small.shape == (2048, 256) and valid is None
    assert peak < 20 * 2**20, peak  # one band (2 MB), the samples and display temporaries, not the 32 MB image


@settings(max_examples=80, deadline=None)
@given(n=st.integers(1, 3000), top=st.integers(1, 65535), signed=st.booleans(), seed=st.integers(0, 10**6),
       qs=st.lists(st.floats(0, 100), min_size=1, max_size=3))
def test_percentiles_of_integers_equal_numpys(n, top, signed, seed, qs):
    # Reference: numpy.percentile (linear method, Hyndman & Fan's 7th) on the same values as float32.
    rng = np.random.default_rng(seed)
    dtype = np.int16 if signed else (np.uint8 if top < 256 else np.uint16)
    lo = -min(top, 32768) if signed else 0
    values = rng.integers(lo, min(top, np.iinfo(dtype).max) + 1, n).astype(dtype)
    np.testing.assert_allclose(percentiles(values, qs), np.percentile(values.astype(np.float32), qs),
                               rtol=1e-6, atol=1e-6)
