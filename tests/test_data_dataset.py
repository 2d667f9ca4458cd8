"""Dataset folders: pairing, the check report (every kind of problem, named), band statistics."""

from __future__ import annotations

import numpy as np
import pytest
import tifffile
from PIL import Image

from fcnkit.cli import main
from fcnkit.data.classes import ClassInfo, ClassTable, write_classes
from fcnkit.data.dataset import band_stats, check_dataset, find_samples, format_check
from fcnkit.data.imageio import write_label_png
from fcnkit.errors import DataError

CLASSES = ClassTable((ClassInfo(0, "bare", (150, 120, 90)), ClassInfo(1, "moss", (40, 160, 40)),
                      ClassInfo(2, "pool", (30, 60, 200))))


def _dataset(root, n=3, size=(20, 24), bands=3):
    """A small valid dataset; returns the list of masks written."""
    rng = np.random.default_rng(1)
    (root / "images").mkdir(parents=True)
    (root / "masks").mkdir()
    write_classes(root / "classes.toml", CLASSES)
    masks = []
    for i in range(n):
        img = rng.integers(0, 256, (*size, bands)).astype(np.uint8)
        tifffile.imwrite(root / "images" / f"s{i}.tif", img, photometric="minisblack", planarconfig="contig")
        ids = rng.integers(0, 3, size).astype(np.uint8)
        ids[0, : i + 1] = 255
        write_label_png(root / "masks" / f"s{i}.png", ids, CLASSES)
        masks.append(ids)
    return masks


def test_valid_dataset_report(tmp_path, capsys):
    masks = _dataset(tmp_path)
    report = check_dataset(tmp_path)
    assert report.ok, report.problems
    counts = np.bincount(np.concatenate([m.ravel() for m in masks]), minlength=256)
    assert report.class_pixels == counts[:3].tolist() and report.ignore_pixels == counts[255]
    assert sum(report.class_shares) == pytest.approx(1.0)
    assert [(i.height, i.width, i.bands) for i in report.images] == [(20, 24, 3)] * 3
    text = format_check(report)
    assert "3 × 20×24 px, 3 bands, uint8" in text and text.splitlines()[-1].startswith("ok: 3 image/mask pairs")
    assert main(["check", str(tmp_path)]) == 0
    assert "moss" in capsys.readouterr().out


def test_find_samples_pairs_by_stem(tmp_path):
    _dataset(tmp_path)
    samples, classes = find_samples(tmp_path)
    assert classes == CLASSES
    assert [(s.stem, s.image.name, s.mask.name) for s in samples] == [
        ("s0", "s0.tif", "s0.png"), ("s1", "s1.tif", "s1.png"), ("s2", "s2.tif", "s2.png")]


def _break(root, kind):
    """Introduce one kind of problem; return the file name the report must mention."""
    if kind == "missing mask":
        (root / "masks" / "s1.png").unlink()
        return "s1.tif"
    if kind == "missing image":
        (root / "images" / "s2.tif").unlink()
        return "s2.png"
    if kind == "size mismatch":
        write_label_png(root / "masks" / "s0.png", np.zeros((20, 23), np.uint8), CLASSES)
        return "s0.png"
    if kind == "unknown ids":
        Image.fromarray(np.full((20, 24), 9, np.uint8)).save(root / "masks" / "s1.png")
        return "s1.png"
    if kind == "unreadable image":
        (root / "images" / "s0.tif").write_bytes(b"garbage" * 10)
        return "s0.tif"
    if kind == "truncated image":
        data = (root / "images" / "s2.tif").read_bytes()
        (root / "images" / "s2.tif").write_bytes(data[: len(data) // 2])
        return "s2.tif"
    if kind == "zero-byte mask":
        (root / "masks" / "s0.png").write_bytes(b"")
        return "s0.png"
    if kind == "duplicate ids":
        (root / "classes.toml").write_text(
            '[[classes]]\nid = 0\nname = "a"\ncolor = "#000001"\n[[classes]]\nid = 0\nname = "b"\ncolor = "#000002"\n')
        return "classes.toml"
    if kind == "duplicate colours":
        (root / "classes.toml").write_text(
            '[[classes]]\nid = 0\nname = "a"\ncolor = "#000001"\n[[classes]]\nid = 1\nname = "b"\ncolor = "#000001"\n')
        return "classes.toml"
    if kind == "band count":
        tifffile.imwrite(root / "images" / "s1.tif", np.zeros((20, 24), np.uint8))
        return "s1.tif"
    if kind == "unsupported file":
        (root / "images" / "notes.txt").write_text("hello")
        return "notes.txt"
    if kind == "duplicate stem":
        Image.fromarray(np.zeros((20, 24, 3), np.uint8)).save(root / "images" / "s0.png")
        return "s0"
    if kind == "missing folder":
        for p in (root / "masks").iterdir():
            p.unlink()
        (root / "masks").rmdir()
        return "masks"
    raise AssertionError(kind)


KINDS = ["missing mask", "missing image", "size mismatch", "unknown ids", "unreadable image", "truncated image",
         "zero-byte mask", "duplicate ids", "duplicate colours", "band count", "unsupported file", "duplicate stem",
         "missing folder"]


@pytest.mark.parametrize("kind", KINDS)
def test_check_finds_each_problem_and_names_the_file(tmp_path, kind, capsys):
    _dataset(tmp_path)
    name = _break(tmp_path, kind)
    report = check_dataset(tmp_path)
    assert not report.ok
    assert any(name in p for p in report.problems), report.problems
    assert main(["check", str(tmp_path)]) == 2
    out = capsys.readouterr().out.splitlines()
    assert out[-1].startswith("FAILED: ") and any(name in line for line in out)


def test_check_lists_every_problem_not_just_the_first(tmp_path):
    _dataset(tmp_path, n=4)
    for kind in ("missing mask", "size mismatch", "missing image"):  # s1, s0 and s2
        _break(tmp_path, kind)
    Image.fromarray(np.full((20, 24), 9, np.uint8)).save(tmp_path / "masks" / "s3.png")
    problems = check_dataset(tmp_path).problems
    assert len(problems) == 4
    assert [name in " ".join(problems) for name in ("s0.png", "s1.tif", "s2.png", "s3.png")] == [True] * 4


def test_find_samples_stops_at_structural_problems(tmp_path):
    _dataset(tmp_path)
    _break(tmp_path, "missing mask")
    with pytest.raises(DataError, match=r"s1.tif: no mask with stem 's1'"):
        find_samples(tmp_path)
    with pytest.raises(DataError, match="not a folder"):
        find_samples(tmp_path / "nowhere")
    assert main(["check", str(tmp_path / "nowhere")]) == 2


def test_band_stats_match_numpy_over_all_pixels():
    # Reference: numpy mean and (population) std over the pooled pixels of all images.
    rng = np.random.default_rng(3)
    images = [rng.integers(0, 65536, (h, w, 2)).astype(np.uint16) for h, w in ((30, 17), (5, 90), (64, 64))]
    images[1][..., 1] += 20000  # different means per image exercise the pairwise merge
    pooled = np.concatenate([im.reshape(-1, 2) for im in images]).astype(np.float64)
    mean, std = band_stats(images)
    np.testing.assert_allclose(mean, pooled.mean(axis=0), rtol=1e-12)
    np.testing.assert_allclose(std, pooled.std(axis=0), rtol=1e-9)


def test_band_stats_from_paths_and_band_mismatch(tmp_path):
    _dataset(tmp_path)
    samples, _ = find_samples(tmp_path)
    arrays = [tifffile.imread(s.image) for s in samples]
    assert band_stats([s.image for s in samples]) == band_stats(arrays)
    with pytest.raises(DataError, match="2 bands but the first image has 3"):
        band_stats([arrays[0], arrays[1][..., :2]])


def test_a_broken_image_does_not_hide_its_masks_problem(tmp_path):
    _dataset(tmp_path)
    _break(tmp_path, "unreadable image")  # images/s0.tif
    Image.fromarray(np.full((20, 24), 9, np.uint8)).save(tmp_path / "masks" / "s0.png")
    problems = check_dataset(tmp_path).problems
    assert len(problems) == 2 and "s0.tif" in problems[0] and "s0.png" in problems[1]
