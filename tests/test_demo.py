"""The quick demo runs end to end and produces every file it promises."""

from __future__ import annotations

import json

import pytest

from fcnkit.cli import main
from fcnkit.demo import MARKER, QUICK, prepare, run_demo
from fcnkit.errors import DataError


def test_quick_demo_end_to_end(tmp_path):
    printed: list[str] = []
    out = tmp_path / "demo"
    result = run_demo(out, quick=True, progress=False, echo=printed.append)
    text = "\n".join(printed)
    promised = ["train_scenes", "test_scenes", "model", "curves", "evaluation", "report", "mosaic", "mosaic_truth"]
    for key in promised:
        assert key in result.paths
    assert any(k.startswith("map_") for k in result.paths)
    for key, path in result.paths.items():
        assert path.exists(), key
        assert str(path) in text  # the summary says where every output is
    assert not list(out.rglob(".*.partial-*"))  # nothing left half-written
    scores = json.loads(result.paths["evaluation"].read_text())["scores"]
    assert 0.0 <= scores["mean_iou"] <= 1.0
    assert result.paths["report"].read_text().startswith("<!DOCTYPE html>")
    # the area table covers the whole mosaic
    assert sum(a["pixels"] for a in result.figures["areas"]) == QUICK.mosaic_size ** 2
    # the GIS round trip: the maps are COGs on the mosaic's grid, the class polygons a GeoPackage on it too
    import pyogrio
    import rasterio

    with rasterio.open(result.paths["mosaic"]) as src, rasterio.open(result.paths["map_labels"]) as ds:
        assert (ds.crs, ds.transform) == (src.crs, src.transform)
        assert ds.tags(ns="IMAGE_STRUCTURE")["LAYOUT"] == "COG" and ds.tags(1)["CLASS_1"] == "water"
    info = pyogrio.read_info(result.paths["map_polygons"])
    assert info["features"] > 0 and "Kessmoor" in info["crs"]
    assert "fcnkit demo finished in" in text and "pixel accuracy" in text


def test_rerun_clears_only_the_demos_own_outputs(tmp_path):
    out = tmp_path / "demo"
    prepare(out)
    (out / "run").mkdir()
    (out / "run" / "model.safetensors").write_text("old")
    (out / "report.html").write_text("old")
    (out / "my_notes.txt").write_text("kept")
    with pytest.raises(DataError, match="holds an earlier demo run; refusing to replace it"):
        prepare(out)  # the one overwrite rule: nothing replaced unless asked
    assert (out / "report.html").read_text() == "old"
    prepare(out, overwrite=True)  # an earlier demo's folder: its outputs go, anything else stays
    assert sorted(p.name for p in out.iterdir()) == sorted([MARKER, "my_notes.txt"])


def test_demo_refuses_a_foreign_folder(tmp_path, capsys):
    (tmp_path / "notes.txt").write_text("mine")
    assert main(["demo", "--quick", "--out", str(tmp_path)]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "not empty" in err
    assert [p.name for p in tmp_path.iterdir()] == ["notes.txt"]
