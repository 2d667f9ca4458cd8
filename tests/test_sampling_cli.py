"""`fcnkit sample` and `fcnkit assess` on a synthetic Kessmoor mosaic: draw, fill from the known truth, assess;
every bad input gives one line and exit status 2."""

from __future__ import annotations

import csv
import json

import numpy as np
import pytest
import rasterio

from fcnkit.cli import main
from fcnkit.data.classes import write_classes
from fcnkit.data.scenes import SCENE_CLASSES, write_mosaic
from fcnkit.sampling import assess_sample


@pytest.fixture(scope="module")
def mosaic(tmp_path_factory):
    """The demo's mosaic truth (a GeoTIFF on the fictional local grid, 0.5 m pixels) and a map of it that errs
    on 12 % of the pixels, written on the same grid."""
    d = tmp_path_factory.mktemp("mosaic")
    write_mosaic(d / "image.tif", 512, 3, mask_path=d / "truth.tif", block=256)
    with rasterio.open(d / "truth.tif") as src:
        truth = src.read(1)
        profile = src.profile
    rng = np.random.default_rng(0)
    mapped = truth.copy()
    wrong = rng.random(truth.shape) < 0.12
    mapped[wrong] = (truth[wrong] + rng.integers(1, SCENE_CLASSES.num_classes, wrong.sum())) % \
        SCENE_CLASSES.num_classes
    profile.pop("photometric", None)
    with rasterio.open(d / "labels.tif", "w", **profile) as dst:
        dst.write(mapped, 1)
    write_classes(d / "classes.toml", SCENE_CLASSES)
    return d, truth, mapped


def fill_csv(src, dst, truth, blank=0):
    rows = list(csv.DictReader(open(src, newline="")))
    for k, r in enumerate(rows):
        r["reference"] = "" if k >= len(rows) - blank else SCENE_CLASSES.names[truth[int(r["row"]), int(r["col"])]]
    with open(dst, "w", newline="") as f:
        w = csv.DictWriter(f, list(rows[0]))
        w.writeheader()
        w.writerows(rows)


def test_sample_fill_assess(mosaic, tmp_path, capsys):
    d, truth, mapped = mosaic
    code = main(["sample", str(d / "labels.tif"), "--out", f"{tmp_path / 's.gpkg'},{tmp_path / 's.csv'}",
                 "--classes", str(d / "classes.toml"), "--target-se", "0.04", "--min-per-class", "15",
                 "--image", str(d / "image.tif"), "--chips", str(tmp_path / "chips"), "--chip-size", "32"])
    out, err = capsys.readouterr()
    assert code == 0 and "Cochran 1977" in out and "wrote gpkg:" in err and "fill in the 'reference' field" in out
    points = list(csv.DictReader(open(tmp_path / "s.csv", newline="")))
    assert len(list((tmp_path / "chips").glob("*.png"))) == len(points) > 0
    fill_csv(tmp_path / "s.csv", tmp_path / "filled.csv", truth)
    code = main(["assess", str(tmp_path / "filled.csv"), "--labels", str(d / "labels.tif"), "--classes",
                 str(d / "classes.toml"), "--out", f"{tmp_path / 'a.json'},{tmp_path / 'a.csv'}",
                 "--report", str(tmp_path / "a.html")])
    out = capsys.readouterr().out
    assert code == 0 and "overall accuracy" in out and "qualified people" in out
    page = (tmp_path / "a.html").read_text(encoding="utf-8")
    assert "error-adjusted area" in page and "open ground" in page and 'id="fcnkit-metrics"' in page
    doc = json.loads((tmp_path / "a.json").read_text())
    api = assess_sample(tmp_path / "filled.csv", labels=d / "labels.tif", classes=SCENE_CLASSES)
    assert doc["classes"] == json.loads(json.dumps(api["classes"]))
    assert doc["pixel_area_m2"] == pytest.approx(0.25)  # 0.5 m pixels of the mosaic's local metric grid
    true_px = np.bincount(truth.ravel(), minlength=SCENE_CLASSES.num_classes)
    for c in doc["classes"]:
        if c["mapped_pixels"]:  # the truth lies within 3.5 SE of each estimate (seeded; a loose check)
            assert abs(c["area"]["pixels"]["estimate"] - true_px[c["id"]]) <= 3.5 * c["area"]["pixels"]["se"] + 1
    assert sum(1 for _ in csv.DictReader(open(tmp_path / "a.csv", newline=""))) > 10


@pytest.mark.parametrize("extra, message", [
    (["--expected-accuracy", "0.9,0.8"], "2 anticipated user's accuracies for"),
    (["--expected-accuracy", "1.5"], "strictly between 0 and 1"),
    (["--chips", "chipdir"], "need the mapped image"),
    (["--points", "0"], "expected at least 1"),
])
def test_sample_errors(mosaic, tmp_path, capsys, extra, message):
    d, _, _ = mosaic
    code = main(["sample", str(d / "labels.tif"), "--out", str(tmp_path / "s.csv"), *extra])
    err = capsys.readouterr().err
    assert code == 2
    assert message in err and len(err.strip().splitlines()) == 1


@pytest.mark.parametrize("argv, message", [
    (["sample", "m.tif", "--out", "s.csv", "--points", "3", "--target-se", "0.1"], "not allowed with argument"),
    (["sample", "m.tif", "--out", "s.csv", "--expected-accuracy", "x"], "comma-separated list of numbers"),
    (["assess", "s.csv"], "one of the arguments --labels --counts is required"),
])
def test_argument_errors_exit_2(capsys, argv, message):
    with pytest.raises(SystemExit) as e:
        main(argv)
    err = capsys.readouterr().err
    assert e.value.code == 2 and message in err and len(err.strip().splitlines()) == 1


def test_assess_errors(mosaic, tmp_path, capsys):
    d, truth, _ = mosaic
    main(["sample", str(d / "labels.tif"), "--out", str(tmp_path / "s.csv"), "--points", "60", "--min-per-class",
          "5", "--classes", str(d / "classes.toml")])
    capsys.readouterr()
    fill_csv(tmp_path / "s.csv", tmp_path / "part.csv", truth, blank=2)
    fill_csv(tmp_path / "s.csv", tmp_path / "full.csv", truth)
    cases = [
        (["assess", str(tmp_path / "part.csv"), "--labels", str(d / "labels.tif")],
         "part.csv: 2 of 60 points have no 'reference' class"),
        (["assess", str(tmp_path / "s.csv"), "--labels", str(d / "labels.tif"), "--reference-field", "truth"],
         "s.csv: no field 'truth'"),
        (["assess", str(tmp_path / "none.csv"), "--labels", str(d / "labels.tif")], "none.csv: no such sample file"),
        (["assess", str(tmp_path / "full.csv"), "--counts", str(tmp_path / "nocounts.csv")],
         "nocounts.csv: no such counts file"),
        (["assess", str(tmp_path / "part.csv"), "--labels", str(d / "labels.tif"), "--pixel-size", "-1"],
         "--pixel-size -1.0"),
        (["assess", str(tmp_path / "full.csv"), "--labels", str(d / "labels.tif"), "--out",
          str(tmp_path / "no" / "a.json")], "a.json: cannot write here"),
        (["assess", str(tmp_path / "full.csv"), "--labels", str(d / "labels.tif"), "--out", "a.txt"],
         "--out a.txt: expected one .json and/or one .csv file"),
    ]
    for argv, message in cases:
        code = main(argv)
        err = capsys.readouterr().err
        assert code == 2, argv
        assert message in err and len(err.strip().splitlines()) == 1, err
