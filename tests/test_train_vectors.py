"""Training from labels drawn as polygons and lines in a GeoPackage reaches the accuracy of training from dense
masks of the same strokes (drawn pixel by pixel with shapely's predicates), on synthetic Kessmoor scenes
placed on the fictional local grid."""

from __future__ import annotations

import numpy as np
import pyogrio.raw
import pytest
import rasterio
import shapely
from rasterio.features import shapes
from scipy import ndimage

from fcnkit import Model
from fcnkit.config import config_from_dict
from fcnkit.data.classes import write_classes
from fcnkit.data.dataset import find_samples, read_sample
from fcnkit.data.imageio import write_label_png
from fcnkit.data.scenes import KESSMOOR_CRS, SCENE_CLASSES, _curve, kessmoor_grid, render_scene
from fcnkit.metrics import segmentation_scores
from fcnkit.train import validate

pytestmark = pytest.mark.usefixtures("torch_one_thread")

SIZE, WIDTH = 64, 3  # scene side (pixels), stroke width (pixels)


def _grid(i):
    return kessmoor_grid(0.5, origin=(40000.0 + 100.0 * i, 90000.0))  # scenes side by side on the grid


def _strokes(label, grid, rng):
    """Polygons around a few whole regions of the areal classes and short lines inside every class, in grid
    coordinates: what a person labelling in a GIS would draw."""
    geoms, classes = [], []
    for c in (1, 2, 3):  # water, vegetation, roofs: a polygon around up to two regions each
        comp, n = ndimage.label(label == c)
        sizes = np.bincount(comp.ravel())[1:]
        for k in rng.permutation(np.flatnonzero(sizes >= 12) + 1)[:2]:
            for geom, _ in shapes((comp == k).astype(np.uint8), mask=comp == k, transform=grid.transform):
                geoms.append(shapely.geometry.shape(geom))
                classes.append(c)
    for c in np.unique(label):  # lines: stretches of random curves at least 2 px inside their class
        inner = ndimage.distance_transform_edt(label == c) >= 2
        ys, xs = np.nonzero(inner)
        for _ in range(3 if ys.size else 0):
            k = rng.integers(ys.size)
            pts = _curve(rng, SIZE, SIZE, 30, (float(ys[k]), float(xs[k])))
            r, q = np.round(pts[:, 0]).astype(int), np.round(pts[:, 1]).astype(int)
            ok = (r >= 0) & (r < SIZE) & (q >= 0) & (q < SIZE)
            ok[ok] = inner[r[ok], q[ok]]
            runs = np.split(np.arange(len(ok)), np.flatnonzero(np.diff(ok.astype(int))) + 1)
            best = max((run for run in runs if ok[run[0]]), key=len, default=[])
            if len(best) >= 5:
                xy = grid.transform @ (pts[best, 1], pts[best, 0])
                geoms.append(shapely.LineString(np.column_stack(xy)))
                classes.append(int(c))
    return geoms, classes


def _drawn(geoms, classes, grid):
    """The strokes drawn pixel by pixel with shapely: centres inside a polygon or within WIDTH/2 of a line."""
    cols, rows = np.meshgrid(np.arange(SIZE) + 0.5, np.arange(SIZE) + 0.5)
    xs, ys = grid.transform @ (cols.ravel(), rows.ravel())
    points = shapely.points(xs, ys)
    claims = np.zeros((SCENE_CLASSES.num_classes, SIZE * SIZE), bool)
    for g, c in zip(geoms, classes, strict=True):
        if g.geom_type == "Polygon":
            claims[c] |= shapely.contains_xy(g, xs, ys)
        else:
            claims[c] |= shapely.distance(g, points) <= WIDTH / 2 * 0.5  # 0.5 m pixels
    out = np.full(SIZE * SIZE, SCENE_CLASSES.ignore, np.uint8)
    one = claims.sum(0) == 1
    out[one] = claims.argmax(0)[one]
    return out.reshape(SIZE, SIZE)


def _datasets(root, count=8, seed=5):
    """The same georeferenced images twice: with a GeoPackage of strokes, and with masks drawn from it."""
    vec, dense = root / "vector", root / "dense"
    for d in (vec, dense):
        (d / "images").mkdir(parents=True)
        write_classes(d / "classes.toml", SCENE_CLASSES)
    (dense / "masks").mkdir()
    all_geoms, all_classes = [], []
    for i in range(count):
        image, label = render_scene(SIZE, np.random.default_rng([seed, i]))
        grid = _grid(i)
        for d in (vec, dense):
            with rasterio.open(d / "images" / f"s{i}.tif", "w", driver="GTiff", width=SIZE, height=SIZE, count=4,
                               dtype="uint8", crs=grid.crs, transform=grid.transform, photometric="minisblack") as ds:
                ds.write(np.moveaxis(image, 2, 0))
        geoms, classes = _strokes(label, grid, np.random.default_rng([seed, i, 1]))
        write_label_png(dense / "masks" / f"s{i}.png", _drawn(geoms, classes, grid), SCENE_CLASSES)
        all_geoms += geoms
        all_classes += classes
    pyogrio.raw.write(vec / "labels.gpkg", shapely.to_wkb(np.array(all_geoms, dtype=object)),
                      field_data=[np.array(all_classes, np.int32)], fields=["class"], geometry_type="Unknown",
                      crs=KESSMOOR_CRS, driver="GPKG")
    return vec, dense


def test_training_from_polygons_and_lines_matches_dense_masks_of_the_same_strokes(tmp_path):
    vec, dense = _datasets(tmp_path)
    samples, classes = find_samples(vec)
    kinds = {g.geom_type for g in shapely.from_wkb(pyogrio.raw.read(vec / "labels.gpkg")[2])}
    assert kinds == {"Polygon", "LineString"}
    for s, d in zip(samples, find_samples(dense)[0], strict=True):  # the two label sources agree
        a, b = read_sample(s, classes).mask, read_sample(d, classes).mask
        assert (a != SCENE_CLASSES.ignore).mean() > 0.05 and (a == b).mean() > 0.995

    cfg = config_from_dict({
        "model": {"bands": 4, "num_classes": 5, "widths": [8, 16], "blocks": [1, 1], "head": [16], "fusion": "sum",
                  "min_size": 16},
        "train": {"epochs": 6, "batch": 8, "patch": 32, "patches_per_epoch": 64, "lr": 1e-2, "warmup": 1,
                  "val_fraction": 0.0, "balanced": True, "threads": 1, "seed": 3},
    })
    test = [render_scene(SIZE, np.random.default_rng([99, i])) for i in range(3)]
    scores = []
    for data in (vec, dense):
        loaded = Model.build(cfg).fit(data, out_dir=tmp_path / f"run-{data.name}", progress=False)
        cm, _, _ = validate(loaded, [img for img, _ in test], [lab for _, lab in test])
        scores.append(segmentation_scores(cm)["mean_iou"])
    print(f"test mIoU: vector labels {scores[0]:.4f}, dense masks of the same strokes {scores[1]:.4f}")
    assert scores[1] > 0.3, scores  # the strokes teach something: 5 classes, chance is far lower
    assert abs(scores[0] - scores[1]) <= 0.03, scores
