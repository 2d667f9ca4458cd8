"""Data-parallel training: two processes on localhost through torchrun (gloo backend)."""

import csv
import subprocess
import sys

import pytest
from tiny_train import tiny, write_toml

from fcnkit import Model
from fcnkit.data.dataset import find_samples
from fcnkit.data.imageio import read_image, read_mask
from fcnkit.data.scenes import make_scenes
from fcnkit.metrics import segmentation_scores
from fcnkit.train import split_indices, validate


def test_two_processes_train_and_reduce_metrics(tmp_path):
    data = make_scenes(tmp_path / "data", count=4, size=48, seed=5)
    cfg = tmp_path / "cfg.toml"
    write_toml(cfg, tiny(train={"val_fraction": 0.5, "class_weights": "none", "dice": 0.0}))
    out = tmp_path / "run"
    # `torchrun --standalone --nproc_per_node=2 -m fcnkit train ...` (torchrun is torch.distributed.run)
    proc = subprocess.run([sys.executable, "-m", "torch.distributed.run", "--standalone", "--nproc_per_node=2",
                           "-m", "fcnkit", "train", str(cfg), "--data", str(data), "--out", str(out), "--quiet"],
                          capture_output=True, text=True, timeout=300)
    assert proc.returncode == 0, proc.stderr[-3000:]
    assert proc.stdout.count("best validation mean IoU") == 1  # rank 0 alone reports
    assert sorted(p.name for p in out.iterdir()) == ["metrics.csv", "model.safetensors", "resume.pt"]
    rows = list(csv.DictReader((out / "metrics.csv").open()))
    assert [r["epoch"] for r in rows] == ["1", "2"]
    # each process validated one of the two validation images; the CSV must hold the score of both together
    loaded = Model.load(out / "model.safetensors")
    samples, classes = find_samples(data)
    ordered = sorted(samples, key=lambda s: s.stem)
    val = [ordered[i] for i in split_indices(len(ordered), 0.5, 0)[1]]
    assert len(val) == 2
    cm, _, _ = validate(loaded, [read_image(s.image) for s in val], [read_mask(s.mask, classes) for s in val])
    best = rows[loaded.extra["epoch"] - 1]
    assert segmentation_scores(cm)["mean_iou"] == pytest.approx(float(best["val_mean_iou"]), rel=1e-4)
