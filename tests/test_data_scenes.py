"""Synthetic scenes: determinism, the dataset format, a real learning problem, NIR physics, the tiled mosaic."""

from __future__ import annotations

import tracemalloc

import numpy as np
import pytest
import rasterio
import tifffile
from hypothesis import given
from hypothesis import strategies as st
from sklearn.metrics import balanced_accuracy_score
from sklearn.neighbors import KNeighborsClassifier
from sklearn.tree import DecisionTreeClassifier

from fcnkit.cli import main
from fcnkit.data import scenes
from fcnkit.data.classes import load_classes
from fcnkit.data.dataset import check_dataset, find_samples
from fcnkit.data.imageio import read_image, read_mask
from fcnkit.data.scenes import (
    GRID_NAME,
    GRID_ORIGIN,
    ROOF,
    SCENE_CLASSES,
    TRACK,
    VEGETATION,
    WATER,
    feather_weights,
    make_scenes,
    render_scene,
    write_mosaic,
)
from fcnkit.errors import ConfigError, DataError


def test_render_is_deterministic_per_seed():
    a_img, a_lab = render_scene(96, np.random.default_rng([5, 0]))
    b_img, b_lab = render_scene(96, np.random.default_rng([5, 0]))
    c_img, _ = render_scene(96, np.random.default_rng([5, 1]))
    np.testing.assert_array_equal(a_img, b_img)
    np.testing.assert_array_equal(a_lab, b_lab)
    assert not np.array_equal(a_img, c_img)
    assert a_img.shape == (96, 96, 4) and a_img.dtype == np.uint8 and a_lab.dtype == np.uint8
    rgb, lab = render_scene(96, np.random.default_rng([5, 0]), nir=False)
    np.testing.assert_array_equal(rgb, a_img[..., :3])  # the NIR switch only drops the band
    np.testing.assert_array_equal(lab, a_lab)
    assert render_scene((40, 70), np.random.default_rng(0))[0].shape == (40, 70, 4)


def test_every_class_appears():
    labels = np.concatenate([render_scene(128, np.random.default_rng([0, i]))[1].ravel() for i in range(8)])
    counts = np.bincount(labels, minlength=256)
    assert (counts[:5] > 0).all() and counts[5:].sum() == 0


def test_make_scenes_writes_the_dataset_format(tmp_path, capsys):
    out = make_scenes(tmp_path / "d", count=3, size=64, seed=9)
    report = check_dataset(out)
    assert report.ok, report.problems
    assert load_classes(out / "classes.toml") == SCENE_CLASSES
    samples, _ = find_samples(out)
    for i, s in enumerate(samples):
        img, lab = render_scene(64, np.random.default_rng([9, i]))
        np.testing.assert_array_equal(read_image(s.image), img)
        np.testing.assert_array_equal(read_mask(s.mask, SCENE_CLASSES), lab)
    assert main(["scenes", "--out", str(tmp_path / "rgb"), "--count", "2", "--size", "48", "--seed", "9",
                 "--no-nir"]) == 0
    rgb_samples, _ = find_samples(tmp_path / "rgb")
    assert [p.image.suffix for p in rgb_samples] == [".png", ".png"]
    np.testing.assert_array_equal(read_image(rgb_samples[1].image),
                                  render_scene(48, np.random.default_rng([9, 1]), nir=False)[0])


def test_make_scenes_refuses_to_overwrite_and_bad_values(tmp_path, capsys):
    (tmp_path / "full").mkdir()
    (tmp_path / "full" / "keep.txt").write_text("mine")
    with pytest.raises(DataError, match="not an empty folder"):
        make_scenes(tmp_path / "full", 1, 32, 0)
    assert main(["scenes", "--out", str(tmp_path / "full"), "--count", "1"]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "full" in err and (tmp_path / "full" / "keep.txt").read_text() == "mine"
    with pytest.raises(ConfigError, match="count = 0"):
        make_scenes(tmp_path / "new", 0, 32, 0)


def _pixels(seed, classes, bands, limit=4000):
    """Single-pixel values and labels of ``classes`` from 10 scenes, at most ``limit`` of them (a random subset)."""
    xs, ys = [], []
    for i in range(10):
        img, lab = render_scene(128, np.random.default_rng([seed, i]))
        keep = np.isin(lab, classes)
        xs.append(img[keep][:, :bands])
        ys.append(lab[keep])
    x, y = np.concatenate(xs).astype(np.float64), np.concatenate(ys)
    pick = np.random.default_rng(seed).permutation(y.size)[:limit]
    return x[pick], y[pick]


@pytest.mark.parametrize("clf", [DecisionTreeClassifier(min_samples_leaf=5, random_state=0),
                                 KNeighborsClassifier(n_neighbors=15)], ids=["tree", "knn"])
def test_no_per_pixel_colour_rule_separates_roofs_from_tracks(clf):
    # Reference classifiers: scikit-learn's decision tree and k-nearest neighbours on single-pixel values, fitted
    # on scenes of one seed and scored on another. Roofs and tracks share one colour distribution, so they stay
    # near chance (0.5 balanced accuracy); only shape and context tell them apart.
    x_train, y_train = _pixels(1, (ROOF, TRACK), bands=4)
    x_test, y_test = _pixels(2, (ROOF, TRACK), bands=4)
    assert min(np.bincount(y_test)[[ROOF, TRACK]]) > 400
    score = balanced_accuracy_score(y_test, clf.fit(x_train, y_train).predict(x_test))
    assert score < 0.65, score
    # The same classifier does separate classes that differ per pixel (water and vegetation, via NIR), so the
    # low score above is a property of the scenes, not of the classifier.
    x_train, y_train = _pixels(1, (WATER, VEGETATION), bands=4)
    x_test, y_test = _pixels(2, (WATER, VEGETATION), bands=4)
    assert balanced_accuracy_score(y_test, clf.fit(x_train, y_train).predict(x_test)) > 0.97


def test_nir_is_bright_on_vegetation_and_dark_on_water():
    # Physical fact of remote sensing (common practice, e.g. in the NDVI): leaves reflect strongly in the near
    # infrared and water absorbs it. Checked on every scene that holds both classes.
    checked = 0
    for i in range(12):
        img, lab = render_scene(128, np.random.default_rng([4, i]))
        if (lab == WATER).sum() > 100 and (lab == VEGETATION).sum() > 100:
            nir = img[..., 3].astype(float)
            assert nir[lab == VEGETATION].mean() > 3 * nir[lab == WATER].mean()
            red = img[..., 0].astype(float)
            ndvi_veg = (nir - red)[lab == VEGETATION].mean() / (nir + red)[lab == VEGETATION].mean()
            assert ndvi_veg > 0.3  # dense vegetation has NDVI well above bare soil (from memory: ~0.3–0.8)
            checked += 1
    assert checked >= 3


def test_mosaic_blocks_tiles_and_georeferencing(tmp_path):
    path, mask = tmp_path / "m.tif", tmp_path / "m_labels.tif"
    write_mosaic(path, (600, 520), 3, block=256, distinct=None, mask_path=mask, pixel_size=0.25)
    with tifffile.TiffFile(path) as tif:  # tifffile: a reader independent of GDAL, which wrote the file
        page = tif.pages[0]
        assert page.is_tiled and (page.tilelength, page.tilewidth) == (256, 256)
        image = page.asarray()
        # GeoTIFF tags (numbers from the GeoTIFF 1.0 specification, recalled from memory): pixel scale, then the
        # tie point of pixel corner (0, 0) at the grid origin; tifffile's GeoTIFF decoder reads the key directory.
        assert page.tags[33550].value == (0.25, 0.25, 0.0)
        assert page.tags[33922].value == (0.0, 0.0, 0.0, *GRID_ORIGIN, 0.0)
        geo = tif.geotiff_metadata
        assert geo["GTCitationGeoKey"] == GRID_NAME and int(geo["ProjLinearUnitsGeoKey"]) == 9001
        assert int(geo["GTRasterTypeGeoKey"]) == 1  # pixel is area
    with rasterio.open(mask) as ds:  # the label map: class colours and names, on the same grid
        assert ds.compression.value == "DEFLATE" and ds.transform == rasterio.open(path).transform
        assert [ds.colormap(1)[i][:3] for i in range(5)] == SCENE_CLASSES.colors
        assert ds.tags(1)["CLASS_3"] == "roof" and ds.crs.to_wkt().startswith('LOCAL_CS["' + GRID_NAME)
    assert image.shape == (600, 520, 4)
    labels = read_mask(mask, SCENE_CLASSES)
    m = 24  # the default feather: scenes rendered m px larger on every side, cross-faded over 2m at seams
    for by, bx in ((0, 0), (1, 1), (2, 2)):  # block (i, j) is the scene of (seed, i, j), edge blocks cropped
        y, x = by * 256, bx * 256
        bh, bw = min(256, 600 - y), min(256, 520 - x)
        img, lab = render_scene((bh + 2 * m, bw + 2 * m), np.random.default_rng([3, by, bx]))
        inner = (slice(m, bh - m), slice(m, bw - m))  # beyond the feathered seams: the scene itself
        np.testing.assert_array_equal(image[y:y + bh, x:x + bw][inner], img[m:m + bh, m:m + bw][inner])
        np.testing.assert_array_equal(labels[y:y + bh, x:x + bw], lab[m:m + bh, m:m + bw])  # hard seamlines
    assert not list(tmp_path.glob(".*partial*"))


@given(length=st.integers(48, 400), cut=st.data(), margin=st.integers(0, 20))
def test_feather_weights_are_a_partition_of_unity(length, cut, margin):
    """Across any seam, the two blocks' weights sum to 1 (so blending keeps brightness), ramp through 0.5 at the
    seamline, and stay 1 inside each block and at the image's own borders."""
    seam = cut.draw(st.integers(max(1, margin), max(1, length - max(margin, 1))))
    left = np.zeros(length + 2 * margin)
    right = np.zeros(length + 2 * margin)
    left[margin:margin + seam + margin] = feather_weights(length, 0, seam, margin)[margin:]
    right[seam:seam + length - seam + 2 * margin] = feather_weights(length, seam, length, margin)
    total = (left + right)[margin:margin + length]
    np.testing.assert_allclose(total, 1.0)
    if margin:
        np.testing.assert_allclose(left[margin + seam - 1] + left[margin + seam], 1.0)  # symmetric about it


def test_feathered_seams_leave_no_hard_line(tmp_path):
    """The jump between the columns either side of a seamline is no larger than between neighbouring columns
    elsewhere in the image, unlike with hard seams (feather 0)."""
    jumps = {}
    for feather in (0, 24):
        write_mosaic(tmp_path / f"f{feather}.tif", (256, 512), 4, block=256, distinct=None, geo=False,
                     feather=feather)
        with rasterio.open(tmp_path / f"f{feather}.tif") as ds:
            a = ds.read().astype(np.float32).mean(axis=0)
        steps = np.abs(np.diff(a, axis=1)).mean(axis=0)  # mean jump between each pair of neighbouring columns
        jumps[feather] = steps[255] / np.median(steps)  # at the seam, against a typical pair of columns
    assert jumps[24] < 2 < jumps[0], jumps


def test_mosaic_memory_is_bounded(tmp_path):
    # Peak Python-side allocations (numpy reports to tracemalloc) stay far below the image's own size.
    side = 4096
    tracemalloc.start()
    try:
        write_mosaic(tmp_path / "big.tif", side, 0, block=256, distinct=4, geo=False, mask_path=tmp_path / "l.tif")
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert peak < 0.25 * side * side * 4, peak  # one row of blocks and the scene pool, not the image
    with tifffile.TiffFile(tmp_path / "big.tif") as tif:
        assert tif.series[0].shape == (side, side, 4) and 33550 not in tif.pages[0].tags
        corner = tif.pages[0].asarray()[:256, :256]
    m = 24  # the default feather; the corner block's inside, away from its two seams, is a pooled scene
    pool = [render_scene(256 + 2 * m, np.random.default_rng([0, k]))[0] for k in range(4)]
    variants = [np.rot90(p, t)[:, ::f][m:256, m:256] for p in pool for t in range(4) for f in (1, -1)]
    assert any(np.array_equal(corner[:256 - m, :256 - m], v[:256 - m, :256 - m]) for v in variants)


def test_scribbled_masks_are_sparse_and_agree_with_the_dense_labels(tmp_path):
    out = make_scenes(tmp_path / "s", count=3, size=96, seed=2, strokes=2)
    for i, s in enumerate(find_samples(out)[0]):
        image, dense = render_scene(96, np.random.default_rng([2, i]))
        sparse = read_mask(s.mask, SCENE_CLASSES)
        np.testing.assert_array_equal(read_image(s.image), image)  # the images do not change
        labelled = sparse != SCENE_CLASSES.ignore
        assert 0 < labelled.mean() < 0.15
        np.testing.assert_array_equal(sparse[labelled], dense[labelled])  # strokes stay inside their class
        assert set(np.unique(sparse[labelled])) <= set(np.unique(dense))
        assert len(np.unique(sparse[labelled])) >= len(np.unique(dense)) - 1  # nearly every class is scribbled
    assert check_dataset(out).ok
    with pytest.raises(ConfigError, match="strokes = 0"):
        make_scenes(tmp_path / "z", count=1, size=32, seed=0, strokes=0)


def test_shade_looks_like_water_in_rgb_but_not_in_nir(monkeypatch):
    # Record which pixels the shadow sweep darkened, then ask a scikit-learn decision tree (the reference
    # classifier) to tell shaded land from water by single-pixel values, trained on one seed, scored on another.
    shaded = {}
    original = scenes._shade

    def recording(rng, img, height):
        before = img.copy()
        original(rng, img, height)
        shaded["mask"] = (img != before).any(axis=-1)

    monkeypatch.setattr(scenes, "_shade", recording)

    def pixels(seed, bands):
        xs, ys = [], []
        for i in range(10):
            img, lab = render_scene(128, np.random.default_rng([seed, i]))
            land = shaded["mask"] & (lab != WATER)
            xs += [img[land][:, :bands], img[lab == WATER][:, :bands]]
            ys += [np.zeros(land.sum()), np.ones((lab == WATER).sum())]
        return np.concatenate(xs).astype(np.float64), np.concatenate(ys)

    scores = {}
    for bands in (3, 4):
        x_train, y_train = pixels(1, bands)
        x_test, y_test = pixels(2, bands)
        tree = DecisionTreeClassifier(min_samples_leaf=5, random_state=0).fit(x_train, y_train)
        scores[bands] = balanced_accuracy_score(y_test, tree.predict(x_test))
    assert scores[3] < 0.75 < 0.95 < scores[4], scores  # water absorbs near-infrared; shaded land still reflects it
