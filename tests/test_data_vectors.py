"""Vector labels (fcnkit.data.vectors, dataset folders with a vector label file): rasterised onto each image's
grid as shapely's own predicates place them (pixel centres inside a polygon, within half the width of a line or
point), reprojected with pyproj, declared in classes.toml, checked, read for training — and training from a
GeoPackage of polygons and lines gets as far as training from dense masks of the same strokes."""

from __future__ import annotations

import numpy as np
import pyogrio.raw
import pyproj
import pytest
import rasterio
import shapely
from affine import Affine

from fcnkit.cli import main
from fcnkit.data.classes import ClassInfo, ClassTable, write_classes
from fcnkit.data.dataset import check_dataset, find_samples, format_check, read_sample
from fcnkit.data.raster import GeoRef
from fcnkit.data.vectors import VectorSettings, load_vector_labels, rasterise
from fcnkit.errors import DataError

CLASSES = ClassTable((ClassInfo(0, "bare", (150, 120, 90)), ClassInfo(1, "moss", (40, 160, 40)),
                      ClassInfo(2, "pool", (30, 60, 200))))
UTM = "EPSG:32633"  # projected, metres; the features are invented shapes, no place is shown
GRID = Affine(0.5, 0, 500000.0, 0, -0.5, 6000000.0)


def _write_vectors(path, geoms, values, crs=UTM, field="class", driver=None):
    """Write features with pyogrio (GDAL's vector drivers), independently of fcnkit."""
    values = np.asarray(values, dtype=object if isinstance(values[0], str) else np.int32)
    pyogrio.raw.write(path, shapely.to_wkb(np.asarray(geoms, dtype=object)), field_data=[values], fields=[field],
                      geometry_type="Unknown", crs=crs, driver=driver)
    return path


def _features(rng, n=12):
    """Random polygons, lines and points inside the 60×80-pixel grid, in UTM metres."""
    x0, y0 = GRID.c, GRID.f
    geoms, classes = [], []
    for i in range(n):
        cx, cy = x0 + rng.uniform(3, 37), y0 - rng.uniform(3, 27)
        kind = i % 3
        if kind == 0:
            geoms.append(shapely.Polygon([(cx + 4 * np.cos(a), cy + 3 * np.sin(a))
                                          for a in np.sort(rng.uniform(0, 2 * np.pi, 7))]))
        elif kind == 1:
            geoms.append(shapely.LineString(np.column_stack([cx + np.cumsum(rng.normal(0, 2, 5)),
                                                             cy + np.cumsum(rng.normal(0, 2, 5))])))
        else:
            geoms.append(shapely.MultiPoint([(cx, cy), (cx + 3.3, cy - 1.1)]))
        classes.append(int(rng.integers(0, 3)))
    return geoms, classes


def _reference(geoms, classes, shape, transform, width_px):
    """Each pixel centre tested with shapely: inside a polygon, or within width/2 pixels of a line or point;
    claimed by exactly one class, else ignore."""
    h, w = shape
    cols, rows = np.meshgrid(np.arange(w) + 0.5, np.arange(h) + 0.5)
    xs, ys = transform @ (cols.ravel(), rows.ravel())
    half = width_px / 2 * abs(transform.a)  # square pixels: width in metres
    claims = np.zeros((len(CLASSES.classes), h * w), bool)
    for g, c in zip(geoms, classes, strict=True):
        if g.geom_type in ("Polygon", "MultiPolygon"):
            claims[c] |= shapely.contains_xy(g, xs, ys)
        else:
            claims[c] |= shapely.distance(g, shapely.points(xs, ys)) <= half
    out = np.full(h * w, CLASSES.ignore, np.uint8)
    one = claims.sum(0) == 1
    out[one] = claims.argmax(0)[one]
    return out.reshape(h, w)


def test_rasterised_labels_match_shapelys_predicates(tmp_path):
    geoms, classes = _features(np.random.default_rng(0))
    path = _write_vectors(tmp_path / "l.gpkg", geoms, classes)
    labels = load_vector_labels(VectorSettings(path, width=3), CLASSES)
    assert labels.counts == {"polygons": 4, "lines": 4, "points": 4}
    got = rasterise(labels, GeoRef(rasterio.crs.CRS.from_string(UTM), GRID), (60, 80), CLASSES)
    want = _reference(geoms, classes, (60, 80), GRID, 3)
    assert (want != CLASSES.ignore).mean() > 0.05  # the features label a fair share of the image
    polygons_only = _reference(geoms[0::3], classes[0::3], (60, 80), GRID, 3)
    inside = polygons_only != CLASSES.ignore
    # polygons: exactly GDAL's pixel-centre rule; buffers: round caps drawn with 32 segments per circle, so a
    # centre within 0.5 % of the half width from the edge may differ
    agree = got == want
    assert agree[inside & (want != CLASSES.ignore)].all()
    assert agree.mean() > 0.995, agree.mean()


def test_features_in_another_crs_are_reprojected(tmp_path):
    geoms, classes = _features(np.random.default_rng(1))
    to_lonlat = pyproj.Transformer.from_crs(UTM, "EPSG:4326", always_xy=True)
    lonlat = [shapely.transform(g, lambda xy: np.column_stack(to_lonlat.transform(xy[:, 0], xy[:, 1])))
              for g in geoms]
    geo = GeoRef(rasterio.crs.CRS.from_string(UTM), GRID)
    native = rasterise(load_vector_labels(VectorSettings(_write_vectors(tmp_path / "a.gpkg", geoms, classes)),
                                          CLASSES), geo, (60, 80), CLASSES)
    moved = rasterise(load_vector_labels(VectorSettings(_write_vectors(tmp_path / "b.geojson", lonlat, classes,
                                                                       crs="EPSG:4326")), CLASSES),
                      geo, (60, 80), CLASSES)
    assert (native == moved).mean() > 0.999  # the same places, to a round trip through degrees


def test_class_names_shapefiles_and_conflicts(tmp_path):
    a = shapely.box(500002, 5999980, 500012, 5999990)
    b = shapely.box(500008, 5999980, 500018, 5999990)  # overlaps a by 4 m × 10 m
    path = _write_vectors(tmp_path / "l.shp", [a, b], ["moss", "pool"], field="kind")
    labels = load_vector_labels(VectorSettings(path, attribute="kind"), CLASSES)
    got = rasterise(labels, GeoRef(rasterio.crs.CRS.from_string(UTM), GRID), (60, 80), CLASSES)
    assert (got == 1).sum() == 12 * 20 and (got == 2).sum() == 12 * 20  # 6 m × 10 m each, in 0.5 m pixels
    assert (got[20:40, 16:24] == CLASSES.ignore).all()  # claimed by both: unlabelled


@pytest.mark.parametrize("case,expected", [
    ("unknown name", "feature 2 (FID) has class 'lichen'"),  # GeoPackage feature ids count from 1
    ("id out of range", "feature 1 (FID) has class 7"),
    ("no such field", "no field 'class' (fields: kind"),
])
def test_bad_vector_labels_name_the_file_and_feature(tmp_path, case, expected):
    box = shapely.box(500002, 5999980, 500012, 5999990)
    if case == "unknown name":
        path = _write_vectors(tmp_path / "l.gpkg", [box, box], ["moss", "lichen"])
    elif case == "id out of range":
        path = _write_vectors(tmp_path / "l.gpkg", [box], [7])
    else:
        path = _write_vectors(tmp_path / "l.gpkg", [box], [1], field="kind")
    with pytest.raises(DataError) as e:
        load_vector_labels(VectorSettings(path), CLASSES)
    assert str(e.value).startswith(str(path)) and expected in str(e.value), str(e.value)


def _dataset(root, images=2, vector="labels.gpkg", table=None, georeferenced=True):
    (root / "images").mkdir(parents=True)
    rng = np.random.default_rng(2)
    geoms, classes = _features(rng, 9)
    for i in range(images):
        a = rng.integers(0, 255, (3, 60, 80)).astype(np.uint8)
        a[:, :, :4] = 0
        profile = {"crs": UTM, "transform": GRID} if georeferenced else {}
        with rasterio.open(root / "images" / f"s{i}.tif", "w", driver="GTiff", width=80, height=60, count=3,
                           dtype="uint8", nodata=0, photometric="minisblack", **profile) as ds:
            ds.write(a)
    write_classes(root / "classes.toml", CLASSES)
    if table is not None:
        with open(root / "classes.toml", "a") as f:
            f.write("\n[vector_labels]\n" + table)
    _write_vectors(root / vector, geoms, classes)
    return geoms, classes


def test_a_dataset_with_a_vector_label_file_reads_and_checks_like_masks(tmp_path, capsys):
    geoms, classes = _dataset(tmp_path)
    samples, table = find_samples(tmp_path)
    assert [s.stem for s in samples] == ["s0", "s1"] and all(s.mask.name == "labels.gpkg" for s in samples)
    sample = read_sample(samples[0], table)
    want = _reference(geoms, classes, (60, 80), GRID, 3)
    want[:, :4] = CLASSES.ignore  # nodata pixels of the image are unlabelled
    assert (sample.mask == want).mean() > 0.995 and sample.nodata_pixels == 60 * 4
    assert (sample.mask[:, :4] == CLASSES.ignore).all()
    report = check_dataset(tmp_path)
    assert report.ok, report.problems
    text = format_check(report)
    assert "vector labels: labels.gpkg, attribute 'class': 3 polygons, 3 lines, 3 points" in text
    assert "480 nodata pixels in 2 images" in text
    assert main(["check", str(tmp_path)]) == 0
    assert "moss" in capsys.readouterr().out


def test_classes_toml_declares_file_attribute_and_width(tmp_path):
    _dataset(tmp_path, vector="strokes.geojson", table='file = "strokes.geojson"\nwidth = 5\n')
    samples, table = find_samples(tmp_path)
    assert samples[0].vector.width == 5 and samples[0].vector.file.name == "strokes.geojson"
    assert check_dataset(tmp_path).ok


@pytest.mark.parametrize("case,expected", [
    ("masks too", "a dataset has masks/ or vector labels, not both"),
    ("bad width", "width = -1"),
    ("missing file", "nothing.gpkg: missing"),
    ("not georeferenced", "not georeferenced, so vector labels cannot be placed"),
])
def test_bad_declarations_are_reported_by_check(tmp_path, case, expected):
    table = {"masks too": "", "bad width": "width = -1\n", "missing file": 'file = "nothing.gpkg"\n'}.get(case)
    _dataset(tmp_path, table=table, georeferenced=case != "not georeferenced")
    if case == "masks too":
        (tmp_path / "masks").mkdir()
    report = check_dataset(tmp_path)
    assert not report.ok and any(expected in p for p in report.problems), report.problems
    with pytest.raises(DataError, match=expected) if case != "not georeferenced" else pytest.raises(DataError):
        samples, table = find_samples(tmp_path)
        read_sample(samples[0], table)
