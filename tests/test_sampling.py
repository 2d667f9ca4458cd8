"""Stratified reference samples drawn from label rasters, filled from a known truth, and assessed."""

from __future__ import annotations

import csv
import json
import warnings
from pathlib import Path

import numpy as np
import pyogrio.raw
import pytest
import rasterio

import fcnkit.sampling as sampling
from fcnkit.assessment import allocate_sample, plan_sample_size, stratified_estimates
from fcnkit.data.classes import ClassInfo, ClassTable
from fcnkit.errors import DataError
from fcnkit.sampling import assess_sample, count_classes, draw_sample, georeference, read_sample

NAMES = ["open ground", "woodland", "water"]
TABLE = ClassTable(tuple(ClassInfo(i, n, c) for i, (n, c) in
                         enumerate(zip(NAMES, [(180, 150, 110), (30, 110, 40), (40, 90, 200)], strict=True))))
TRANSFORM = rasterio.Affine(10.0, 0.0, 420_000.0, 0.0, -10.0, 5_710_000.0)  # fictional Kessmoor grid, 10 m pixels
CRS = "EPSG:32632"


def make_scene(seed: int = 0, shape: tuple[int, int] = (24, 30)) -> tuple[np.ndarray, np.ndarray]:
    """A truth raster of three classes and a map that errs on about 15 % of the pixels."""
    rng = np.random.default_rng(seed)
    truth = rng.choice(3, shape, p=[0.2, 0.3, 0.5]).astype(np.uint8)
    mapped = truth.copy()
    wrong = rng.random(shape) < 0.15
    mapped[wrong] = (truth[wrong] + rng.integers(1, 3, wrong.sum())) % 3
    return truth, mapped


def write_labels(path: Path, labels: np.ndarray, *, geo: bool = True, nodata: int | None = None) -> Path:
    profile = {"driver": "GTiff", "height": labels.shape[0], "width": labels.shape[1], "count": 1,
               "dtype": labels.dtype.name}
    if geo:
        profile.update(crs=CRS, transform=TRANSFORM)
    if nodata is not None:
        profile["nodata"] = nodata
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", rasterio.errors.NotGeoreferencedWarning)
        with rasterio.open(path, "w", **profile) as dst:
            dst.write(labels, 1)
    return path


def fill(sample: Path, truth: np.ndarray, out: Path, *, by: str = "name", blank: int = 0) -> Path:
    """Copy a drawn sample to ``out`` with the reference class of each point read off ``truth`` (the
    interpreter's job); ``blank`` points at the end are left unfilled."""
    if sample.suffix == ".csv":
        with open(sample, newline="") as f:
            rows = list(csv.DictReader(f))
        for k, r in enumerate(rows):
            t = int(truth[int(r["row"]), int(r["col"])])
            r["reference"] = "" if k >= len(rows) - blank else (NAMES[t] if by == "name" else str(t))
        with open(out, "w", newline="") as f:
            w = csv.DictWriter(f, list(rows[0]))
            w.writeheader()
            w.writerows(rows)
        return out
    meta, _, geometry, data = pyogrio.raw.read(sample)
    fields = list(meta["fields"])
    rows, cols = data[fields.index("row")], data[fields.index("col")]
    ref = np.array([NAMES[truth[r, c]] if by == "name" else str(truth[r, c]) for r, c in zip(rows, cols,
                                                                                              strict=True)], object)
    data[fields.index("reference")] = ref
    driver = "GPKG" if out.suffix == ".gpkg" else "GeoJSON"
    pyogrio.raw.write(out, geometry, data, fields, driver=driver, geometry_type="Point", crs=meta["crs"])
    return out


def error_matrix_at_points(sample: Path, truth: np.ndarray, mapped: np.ndarray) -> np.ndarray:
    with open(sample, newline="") as f:
        rows = list(csv.DictReader(f))
    m = np.zeros((3, 3), np.int64)
    for r in rows:
        y, x = int(r["row"]), int(r["col"])
        m[mapped[y, x], truth[y, x]] += 1
    return m


def test_round_trip_matches_pure_estimator_and_truth(tmp_path):
    truth, mapped = make_scene(1)
    labels = write_labels(tmp_path / "labels.tif", mapped)
    s = draw_sample(labels, tmp_path / "sample.csv", classes=TABLE, total=120, minimum=20, seed=3)
    counts = np.bincount(mapped.ravel(), minlength=3)
    np.testing.assert_array_equal(s.mapped_pixels, counts)
    np.testing.assert_array_equal(s.allocation, allocate_sample(120, counts, 20))
    np.testing.assert_array_equal(np.bincount(s.map_ids, minlength=3), s.allocation)
    filled = fill(tmp_path / "sample.csv", truth, tmp_path / "filled.csv")
    table = assess_sample(filled, labels=labels, classes=TABLE, json_path=tmp_path / "a.json",
                          csv_path=tmp_path / "a.csv")
    est = stratified_estimates(error_matrix_at_points(filled, truth, mapped), counts)
    assert table["pixel_area_m2"] == pytest.approx(100.0)  # 10 m × 10 m from the GeoTIFF transform
    assert table["overall_accuracy"]["estimate"] == pytest.approx(float(est.overall))
    true_area = np.bincount(truth.ravel(), minlength=3) * 100.0
    for i, c in enumerate(table["classes"]):
        assert c["name"] == NAMES[i]
        assert c["area"]["m2"]["estimate"] == pytest.approx(counts.sum() * 100.0 * est.area[i])
        assert c["area"]["ha"]["estimate"] == pytest.approx(c["area"]["m2"]["estimate"] / 1e4)
        assert c["users_accuracy"]["se"] == pytest.approx(float(est.users_se[i]))
        assert c["producers_accuracy"]["estimate"] == pytest.approx(float(est.producers[i]))
        # against the truth: within three standard errors (a seeded draw)
        assert abs(c["area"]["m2"]["estimate"] - true_area[i]) < 3 * c["area"]["m2"]["se"]
    assert json.loads((tmp_path / "a.json").read_text())["classes"][0]["name"] == "open ground"
    with open(tmp_path / "a.csv", newline="") as f:
        rows = list(csv.DictReader(f))
    overall = [r for r in rows if r["quantity"] == "overall_accuracy"]
    assert float(overall[0]["estimate"]) == pytest.approx(float(est.overall))


@pytest.mark.parametrize("suffix", [".gpkg", ".geojson"])
def test_vector_sample_is_georeferenced(tmp_path, suffix):
    truth, mapped = make_scene(2)
    labels = write_labels(tmp_path / "labels.tif", mapped)
    s = draw_sample(labels, tmp_path / f"sample{suffix}", classes=TABLE, total=40, minimum=5, seed=0)
    meta, _, geometry, data = pyogrio.raw.read(tmp_path / f"sample{suffix}")
    assert list(meta["fields"]) == list(sampling.SAMPLE_FIELDS)
    assert meta["geometry_type"] == "Point"
    assert rasterio.crs.CRS.from_user_input(meta["crs"]) == rasterio.crs.CRS.from_user_input(CRS)
    fields = list(meta["fields"])
    rows, cols = data[fields.index("row")], data[fields.index("col")]
    # reference: rasterio.transform.xy gives the map coordinates of pixel centres
    xs, ys = rasterio.transform.xy(TRANSFORM, rows, cols, offset="center")
    np.testing.assert_allclose(data[fields.index("x")], xs)
    np.testing.assert_allclose(data[fields.index("y")], ys)
    import shapely

    pts = shapely.from_wkb(geometry)
    np.testing.assert_allclose(shapely.get_x(pts), xs)
    assert all(v is None for v in data[fields.index("reference")])  # empty, for the interpreter
    assert [NAMES[m] for m in data[fields.index("map_id")]] == list(data[fields.index("map_class")])
    assert (mapped[rows, cols] == data[fields.index("map_id")]).all()
    assert len(s.rows) == 40
    filled = fill(tmp_path / f"sample{suffix}", truth, tmp_path / f"filled{suffix}", by="id")
    table = assess_sample(filled, labels=labels, classes=TABLE)
    assert table["sample_points"] == 40


def test_selection_is_uniform_within_each_class(tmp_path, monkeypatch):
    # every pixel of a class must have the same chance: over 200 seeded draws, the times each pixel is picked
    # should pass a chi-square goodness-of-fit test of uniformity (reference: scipy.stats.chisquare)
    from scipy.stats import chisquare

    monkeypatch.setattr(sampling, "BAND_PIXELS", 23)  # bands of two rows on a width of 10
    mapped = np.random.default_rng(4).choice(2, (9, 10), p=[0.4, 0.6]).astype(np.uint8)
    from PIL import Image

    labels = tmp_path / "labels.png"
    Image.fromarray(mapped).save(labels)  # grey PNG: no georeferencing to look up, quicker to repeat
    hits = np.zeros(mapped.shape)
    for seed in range(200):
        s = draw_sample(labels, tmp_path / "s.csv", total=12, minimum=4, seed=seed, overwrite=True)
        assert (mapped[s.rows, s.cols] == s.map_ids).all()
        assert len(set(zip(s.rows, s.cols, strict=True))) == len(s.rows)  # without replacement
        hits[s.rows, s.cols] += 1
    for k in range(2):
        assert chisquare(hits[mapped == k]).pvalue > 0.001


def test_bands_bound_memory_and_do_not_change_the_sample(tmp_path, monkeypatch):
    truth, mapped = make_scene(3, (40, 25))
    labels = write_labels(tmp_path / "labels.tif", mapped)
    whole = draw_sample(labels, tmp_path / "a.csv", total=30, minimum=5, seed=9)
    reads: list[int] = []
    real_open = sampling.open_raster

    def spy(path, max_pixels, **options):
        raster = real_open(path, max_pixels, **options)
        read = raster.read

        def recorded(y0, y1, x0, x1):
            reads.append((y1 - y0) * (x1 - x0))
            return read(y0, y1, x0, x1)
        raster.read = recorded
        return raster

    monkeypatch.setattr(sampling, "open_raster", spy)
    monkeypatch.setattr(sampling, "BAND_PIXELS", 60)
    banded = draw_sample(labels, tmp_path / "b.csv", total=30, minimum=5, seed=9)
    assert max(reads) <= 60 and len(reads) >= 2 * 40 // 2  # count pass + selection pass, 2 rows at a time
    np.testing.assert_array_equal(banded.rows, whole.rows)
    np.testing.assert_array_equal(banded.cols, whole.cols)


def test_planned_size_and_summary(tmp_path):
    _, mapped = make_scene(4, (60, 60))
    labels = write_labels(tmp_path / "labels.tif", mapped)
    s = draw_sample(labels, tmp_path / "s.csv", classes=TABLE, target_se=0.05,
                    expected_accuracy=[0.7, 0.8, 0.9], minimum=10)
    counts = np.bincount(mapped.ravel(), minlength=3)
    planned = plan_sample_size(counts, [0.7, 0.8, 0.9], 0.05)
    assert s.planned_total == planned and len(s.rows) == allocate_sample(planned, counts, 10).sum()
    assert "Cochran 1977" in s.how and "woodland" in s.summary()


def test_ignore_nodata_and_palette_png(tmp_path):
    from PIL import Image

    _, mapped = make_scene(5)
    mapped[:4] = 255
    labels = write_labels(tmp_path / "labels.tif", mapped, nodata=255)
    s = draw_sample(labels, tmp_path / "s.csv", total=30, minimum=5)
    assert s.class_ids == [0, 1, 2] and (s.rows >= 4).all()
    np.testing.assert_array_equal(count_classes(labels)[:3], np.bincount(mapped[mapped < 255], minlength=3))
    im = Image.fromarray(mapped).convert("P")
    im.putpalette(TABLE.palette())
    im.save(tmp_path / "labels.png")
    s2 = draw_sample(tmp_path / "labels.png", tmp_path / "s2.csv", classes=TABLE, total=30, minimum=5)
    assert (mapped[s2.rows, s2.cols] == s2.map_ids).all() and s2.crs is None
    np.testing.assert_allclose(s2.x, s2.cols + 0.5)  # pixel-centre image coordinates without georeferencing
    mapped[5, 5] = 7
    write_labels(tmp_path / "bad.tif", mapped)
    with pytest.raises(DataError, match=r"bad\.tif: pixel value 7 is not a class id"):
        draw_sample(tmp_path / "bad.tif", tmp_path / "s3.csv", classes=TABLE, total=30)


def test_georeference_of_plain_files(tmp_path):
    _, mapped = make_scene(6)
    g = georeference(write_labels(tmp_path / "plain.tif", mapped, geo=False))
    assert g.crs is None and g.transform is None and g.pixel_area_m2 is None
    assert georeference(tmp_path / "x.png").transform is None


@pytest.mark.parametrize("crs, area", [
    ("EPSG:32632", 4.0),  # metres: 2 m × 2 m
    ("EPSG:2263", 4.0 * (1200 / 3937) ** 2),  # US survey feet; 1 US survey foot = 1200/3937 m (NIST)
    ("EPSG:4326", None),  # degrees: a pixel's area varies with latitude, none is given
])
def test_pixel_area_from_crs_units(tmp_path, crs, area):
    path = tmp_path / "g.tif"
    with rasterio.open(path, "w", driver="GTiff", height=3, width=3, count=1, dtype="uint8", crs=crs,
                       transform=rasterio.Affine(2.0, 0.0, 100.0, 0.0, -2.0, 50.0)) as dst:
        dst.write(np.zeros((1, 3, 3), np.uint8))
    g = georeference(path)
    assert g.pixel_area_m2 == (pytest.approx(area, rel=1e-12) if area is not None else None)


def test_chips(tmp_path):
    truth, mapped = make_scene(7)
    labels = write_labels(tmp_path / "labels.tif", mapped)
    image = np.random.default_rng(0).integers(0, 255, (*mapped.shape, 3), dtype=np.uint8)
    with rasterio.open(tmp_path / "image.tif", "w", driver="GTiff", height=mapped.shape[0], width=mapped.shape[1],
                       count=3, dtype="uint8", crs=CRS, transform=TRANSFORM) as dst:
        dst.write(np.moveaxis(image, 2, 0))
    from PIL import Image

    s = draw_sample(labels, tmp_path / "s.csv", total=12, minimum=2, image=tmp_path / "image.tif",
                    chips=tmp_path / "chips", chip_size=16)
    files = sorted((tmp_path / "chips").glob("point_*.png"))
    assert len(files) == len(s.rows) == 12
    chip = np.asarray(Image.open(files[0]))
    assert chip.shape == (256, 256, 3)
    assert (chip[8 * 16 - 1, 8 * 16 - 1:8 * 16 + 17] == (255, 255, 0)).all()  # the point's pixel outlined
    with pytest.raises(DataError, match="mapped image"):
        draw_sample(labels, tmp_path / "s2.csv", total=12, chips=tmp_path / "chips")
    small = write_labels(tmp_path / "small.tif", mapped[:10])
    with pytest.raises(DataError, match=r"small\.tif: 30x10 pixels, but the label map .* has 30x24"):
        draw_sample(labels, tmp_path / "s3.csv", total=12, image=small, chips=tmp_path / "chips3")
    with pytest.raises(DataError, match=r"chips: holds earlier results \(point_\*\.png\)"):
        draw_sample(labels, tmp_path / "s4.csv", total=12, image=tmp_path / "image.tif", chips=tmp_path / "chips")


def test_assess_from_counts_file_equals_assess_from_map(tmp_path):
    truth, mapped = make_scene(8)
    labels = write_labels(tmp_path / "labels.tif", mapped)
    draw_sample(labels, tmp_path / "s.csv", classes=TABLE, total=60, minimum=10, seed=2)
    filled = fill(tmp_path / "s.csv", truth, tmp_path / "f.csv")
    counts = np.bincount(mapped.ravel(), minlength=3)
    (tmp_path / "counts.csv").write_text("id,name,pixels\n" + "".join(f"{i},{NAMES[i]},{counts[i]}\n"
                                                                      for i in range(3)))
    (tmp_path / "counts.json").write_text(json.dumps(
        {"pixel_area_m2": 100.0, "classes": [{"id": i, "pixels": int(counts[i])} for i in range(3)]}))
    a = assess_sample(filled, labels=labels, classes=TABLE)
    b = assess_sample(filled, counts=tmp_path / "counts.csv", classes=TABLE, pixel_area_m2=100.0)
    c = assess_sample(filled, counts=tmp_path / "counts.json")  # names from the sample's map_class field
    for t in (b, c):
        assert t["classes"] == a["classes"] and t["overall_accuracy"] == a["overall_accuracy"]


def test_bad_samples_name_file_and_value(tmp_path):
    truth, mapped = make_scene(9)
    labels = write_labels(tmp_path / "labels.tif", mapped)
    draw_sample(labels, tmp_path / "s.csv", classes=TABLE, total=45, minimum=10, seed=5)
    good = fill(tmp_path / "s.csv", truth, tmp_path / "good.csv")
    rows = list(csv.DictReader(open(good, newline="")))

    def write(name: str, rows: list[dict], fields: list[str] | None = None) -> Path:
        p = tmp_path / name
        with open(p, "w", newline="") as f:
            w = csv.DictWriter(f, fields or list(rows[0]), extrasaction="ignore")
            w.writeheader()
            w.writerows(rows)
        return p

    with pytest.raises(DataError, match=r"unfilled\.csv: 3 of 45 points have no 'reference' class"):
        assess_sample(fill(tmp_path / "s.csv", truth, tmp_path / "unfilled.csv", blank=3), labels=labels)
    no_field = write("nofield.csv", rows, [f for f in rows[0] if f != "reference"])
    with pytest.raises(DataError, match=r"nofield\.csv: no field 'reference'"):
        assess_sample(no_field, labels=labels)
    odd = [dict(r) for r in rows]
    odd[4]["reference"] = "marsh"
    with pytest.raises(DataError, match=rf"odd\.csv: point {odd[4]['point_id']}: reference class 'marsh' is unknown"):
        assess_sample(write("odd.csv", odd), labels=labels, classes=TABLE)
    missing = [r for r in rows if r["map_id"] != "2"]
    with pytest.raises(DataError, match=r"missing\.csv: class 'water' \(id 2\) has [\d,]+ mapped pixels but 0 sample"):
        assess_sample(write("missing.csv", missing), labels=labels, classes=TABLE)
    moved = [dict(r) for r in rows]
    y, x = int(moved[0]["row"]), int(moved[0]["col"])
    moved[0]["map_id"] = str((mapped[y, x] + 1) % 3)
    with pytest.raises(DataError, match=r"moved\.csv: point 1: map_id \d, but the label map .* has \d at row"):
        assess_sample(write("moved.csv", moved), labels=labels)
    with pytest.raises(DataError, match="either the label map"):
        assess_sample(good)
    with pytest.raises(DataError, match=r"nothere\.gpkg: no such sample file"):
        assess_sample(tmp_path / "nothere.gpkg", labels=labels)
    (tmp_path / "junk.gpkg").write_bytes(b"not a geopackage")
    with pytest.raises(DataError, match=r"junk\.gpkg: not a readable GPKG file"):
        assess_sample(tmp_path / "junk.gpkg", labels=labels)
    with pytest.raises(DataError, match=r"s\.txt: unsupported sample file type"):
        draw_sample(labels, tmp_path / "s.txt", total=10)
    assert len(read_sample(good)) == 45
