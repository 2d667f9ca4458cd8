"""The one-command demo: synthetic scenes → training → evaluation report → mapping a large mosaic.

Everything happens in one output folder (default ``fcnkit-demo``), in the invented Kessmoor scenario of
:mod:`fcnkit.data.scenes`:

1. training and held-out test scenes are rendered as dataset folders;
2. the shipped ``demo`` config is trained on the training scenes (a validation split is held back by the trainer);
3. the best model is evaluated on the test scenes, with the JSON scores and the HTML report;
4. a large GeoTIFF mosaic (8192×8192 by default) and its true labels are written block by block;
5. the mosaic is mapped by exact row streaming (labels, confidence, uncertainty and overlay as Cloud-Optimised
   GeoTIFFs, area table, class polygons of 25 m² or more as a GeoPackage), and the map is scored against the
   mosaic's true labels;
6. a stratified random reference sample is drawn from the map, its reference classes are filled in from the
   mosaic's true labels (in real use a person does this, in a GIS or in the field), and accuracy and area
   are estimated with 95 % intervals (Olofsson et al. 2014); the report gets that section.

The ``quick`` plan runs the same steps at toy sizes in seconds (the test suite runs it).
"""

from __future__ import annotations

import json
import shutil
import time
from collections.abc import Callable
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import torch

from fcnkit.atomic import write_text_atomic
from fcnkit.config import Config, load_config, replace_section
from fcnkit.errors import DataError
from fcnkit.units import pixel_rate

CONFIG = "demo"  # the shipped config (fcnkit/configs/demo.toml)
MARKER = ".fcnkit-demo"
MIN_POLYGON_M2 = 25.0  # class polygons smaller than this (100 pixels of 0.5 m) are left out of the demo's layer
PARTS = ("scenes", "run", "map", "evaluation.json", "report.html", "mosaic.tif", "mosaic_truth.tif",
         "sample.gpkg", "sample_filled.csv", "assessment.json", "assessment.csv",
         "mosaic_scores.json", "figures.json")


@dataclass(frozen=True)
class DemoPlan:
    """Sizes of one demo run (the defaults are the full demo)."""

    train_scenes: int = 40
    test_scenes: int = 8
    scene_size: int = 256
    mosaic_size: int = 8192
    seed: int = 2026
    train: dict[str, Any] = field(default_factory=dict)  # overrides of the config's [train] table
    sample_points: int = 600  # reference sample size (points)
    sample_minimum: int = 50  # at least this many points per mapped class


FULL = DemoPlan()
QUICK = DemoPlan(train_scenes=5, test_scenes=2, scene_size=96, mosaic_size=640, sample_points=120, sample_minimum=10,
                 train={"epochs": 1, "patches_per_epoch": 8, "batch": 4, "patch": 64})


@dataclass
class DemoResult:
    """Where everything went, the figures printed, and the wall and CPU time of each step (seconds)."""

    out_dir: Path
    paths: dict[str, Path]
    figures: dict[str, Any]
    seconds: dict[str, float]
    cpu_seconds: dict[str, float]


def prepare(out: Path, overwrite: bool = False) -> None:
    """Create ``out``, or with ``overwrite`` clear the demo's own outputs from an earlier run; refuse any other
    non-empty folder."""
    if out.exists() and not out.is_dir():
        raise DataError(f"{out}: exists and is not a folder (choose another demo output folder)")
    if out.is_dir() and any(out.iterdir()):
        if not (out / MARKER).is_file():
            raise DataError(f"{out}: not empty and not an earlier demo output (choose another folder; "
                            "nothing was changed)")
        if not overwrite:
            raise DataError(f"{out}: holds an earlier demo run; refusing to replace it (--overwrite, or "
                            "overwrite=True in Python, replaces it)")
        for name in PARTS:
            p = out / name
            if p.is_dir():
                shutil.rmtree(p)
            elif p.exists():
                p.unlink()
    out.mkdir(parents=True, exist_ok=True)
    (out / MARKER).write_text("made by `fcnkit demo`; `fcnkit demo --overwrite` replaces its outputs here\n")


def demo_config(plan: DemoPlan) -> Config:
    cfg = load_config(CONFIG)
    return replace_section(cfg, "train", **plan.train) if plan.train else cfg


def _score_map(labels_path: Path, truth_path: Path, num_classes: int, ignore: int) -> dict[str, Any]:
    """Scores of a label map against a true label raster of the same size, read a band of rows at a time."""
    from fcnkit.data.raster import open_raster
    from fcnkit.metrics import confusion_matrix, segmentation_scores

    pred, truth = open_raster(labels_path, None, indices=True), open_raster(truth_path, None, indices=True)
    try:
        h, w, _ = truth.shape
        cm = np.zeros((num_classes, num_classes), np.int64)
        for y0 in range(0, h, 1024):
            y1 = min(y0 + 1024, h)
            cm += confusion_matrix(truth.read(y0, y1, 0, w)[..., 0], pred.read(y0, y1, 0, w)[..., 0],
                                   num_classes, ignore)
    finally:
        pred.close()
        truth.close()
    return segmentation_scores(cm)


def fill_from_truth(sample: Any, truth: Path, out: Path) -> Path:
    """The demo's stand-in for a person filling in a reference sample: each point's reference class read from
    the mosaic's true labels, written as a CSV sample file (csv module, atomically)."""
    import csv
    import io

    from fcnkit.atomic import write_text_atomic
    from fcnkit.data.raster import open_raster
    from fcnkit.data.scenes import SCENE_CLASSES

    raster = open_raster(truth, None, indices=True)
    try:
        refs = [int(raster.read(int(r), int(r) + 1, int(c), int(c) + 1)[0, 0, 0])
                for r, c in zip(sample.rows, sample.cols, strict=True)]
    finally:
        raster.close()
    buf = io.StringIO()
    writer = csv.writer(buf, lineterminator="\n")
    writer.writerow(["point_id", "row", "col", "x", "y", "map_id", "map_class", "reference"])
    for i, (r, c, x, y, m, ref) in enumerate(zip(sample.rows, sample.cols, sample.x, sample.y, sample.map_ids, refs,
                                                 strict=True)):
        writer.writerow([i + 1, int(r), int(c), float(x), float(y), int(m), SCENE_CLASSES.names[int(m)],
                         SCENE_CLASSES.names[ref]])
    write_text_atomic(out, buf.getvalue())
    return out


def _true_pixels(truth: Path, k: int) -> np.ndarray:
    """Pixels per class of the mosaic's true labels (read a band of rows at a time)."""
    from fcnkit.data.raster import open_raster

    raster = open_raster(truth, None, indices=True)
    try:
        h, w, _ = raster.shape
        return sum((np.bincount(raster.read(y0, min(y0 + 1024, h), 0, w).ravel(), minlength=256)[:k]
                    for y0 in range(0, h, 1024)), np.zeros(k, np.int64))
    finally:
        raster.close()


def _assessment_lines(table: dict[str, Any], true_pixels: np.ndarray) -> str:
    """The estimates beside the mosaic's true areas, which a real survey never knows."""
    o = table["overall_accuracy"]
    lines = [f"      {table['sample_points']} reference points; overall accuracy {o['estimate']:.3f} ± "
             f"{1.96 * o['se']:.3f} (95 %)",
             f"      {'class':<14}{'mapped ha':>11}{'estimated ha (95 % interval)':>34}{'true ha':>10}"]
    px = table["pixel_area_m2"] / 1e4
    for c, true in zip(table["classes"], true_pixels, strict=True):
        a = c["area"]["ha"]
        lines.append(f"      {c['name']:<14}{c['mapped_pixels'] * px:>11.2f}{a['estimate']:>12.2f} "
                     f"({a['ci95'][0]:>7.2f} – {a['ci95'][1]:>7.2f}){true * px:>10.2f}")
    return "\n".join(lines)


def _area_table(areas: list[dict[str, Any]]) -> str:
    has_m2 = any(a.get("area_m2") is not None for a in areas)
    head = f"      {'class':<14}{'pixels':>14}{'share':>8}" + (f"{'area m²':>14}{'hectares':>10}" if has_m2 else "")
    lines = [head]
    for a in areas:
        line = f"      {a['name']:<14}{a['pixels']:>14,}{a['share']:>8.1%}"
        if has_m2:
            line += f"{a['area_m2']:>14,.0f}{a['area_m2'] / 1e4:>10.2f}"
        lines.append(line)
    return "\n".join(lines)


def run_demo(out_dir: str | Path = "fcnkit-demo", *, quick: bool = False, progress: bool = True,
             echo: Callable[[str], None] = print, overwrite: bool = False) -> DemoResult:
    """Run every demo step into ``out_dir`` and print what happened and where each output is."""
    from fcnkit.data.scenes import SCENE_CLASSES, make_scenes, write_mosaic
    from fcnkit.evaluate import evaluate
    from fcnkit.inference.segment import segment_image
    from fcnkit.model import Model
    from fcnkit.outputs import OutputOptions
    from fcnkit.report import json_safe
    from fcnkit.sampling import assess_sample, draw_sample

    plan = QUICK if quick else FULL
    out = Path(out_dir)
    cfg = demo_config(plan)
    prepare(out, overwrite)
    paths: dict[str, Path] = {}
    figures: dict[str, Any] = {}
    seconds: dict[str, float] = {}
    cpu: dict[str, float] = {}
    start, cpu_start = time.perf_counter(), time.process_time()

    def step(name: str, text: str) -> None:
        seconds[name] = time.perf_counter() - start - sum(seconds.values())
        cpu[name] = time.process_time() - cpu_start - sum(cpu.values())
        echo(f"      done in {seconds[name]:.1f} s (CPU time of all threads {cpu[name]:.1f} s)")
        if text:
            echo(text)

    n = 6
    echo(f"[1/{n}] rendering {plan.train_scenes} training and {plan.test_scenes} test scenes "
         f"({plan.scene_size}x{plan.scene_size}, 4 bands: RGB + near-infrared) of the fictional Kessmoor district")
    paths["train_scenes"] = make_scenes(out / "scenes" / "train", plan.train_scenes, plan.scene_size, plan.seed)
    paths["test_scenes"] = make_scenes(out / "scenes" / "test", plan.test_scenes, plan.scene_size, plan.seed + 1)
    step("scenes", "")

    epochs = f"{cfg.train.epochs} epoch" + ("s" if cfg.train.epochs > 1 else "")
    echo(f"[2/{n}] training the {CONFIG} config ({epochs} of {cfg.train.patches_per_epoch} patches of "
         f"{cfg.train.patch} px)")
    model = Model.build(cfg).fit(paths["train_scenes"], out_dir=out / "run", progress=progress)
    result = model.last_run
    paths["model"], paths["curves"] = result.model_path, result.run_dir / "metrics.csv"
    figures["best_epoch"], figures["val_mean_iou"] = result.best_epoch, result.best_mean_iou
    step("train", f"      best validation mean IoU {result.best_mean_iou:.4f} at epoch {result.best_epoch}")

    echo(f"[3/{n}] evaluating the model on the {plan.test_scenes} held-out test scenes")
    ev = evaluate(paths["model"], paths["test_scenes"], json_path=out / "evaluation.json", curves=paths["curves"],
                  progress=progress)
    paths["evaluation"] = ev.paths["json"]
    figures["test"] = {k: ev.scores[k] for k in ("pixel_accuracy", "mean_accuracy", "mean_iou", "fw_iou")}
    figures["test"]["mean_iou_interval"] = ev.interval
    figures["test"]["calibration"] = {k: ev.calibration[k] for k in ("temperature", "ece", "ece_uncalibrated")}
    step("evaluate", "\n".join("      " + line for line in ev.table().splitlines()))

    side = plan.mosaic_size
    echo(f"[4/{n}] writing a {side}x{side} 4-band GeoTIFF mosaic ({side * side / 1e6:.3g} MP, 0.5 m pixels) "
         "and its true labels")
    paths["mosaic"] = write_mosaic(out / "mosaic.tif", side, plan.seed + 2, mask_path=out / "mosaic_truth.tif",
                                   progress=progress)
    paths["mosaic_truth"] = out / "mosaic_truth.tif"
    step("mosaic", "")

    echo(f"[5/{n}] mapping the mosaic in bands of rows (exact: equal to whole-image inference)")
    seg = segment_image(paths["model"], paths["mosaic"], out / "map", progress=progress,
                        outputs=OutputOptions(polygons="gpkg", min_area_m2=MIN_POLYGON_M2))
    paths.update({f"map_{k}": Path(v) for k, v in seg.paths.items()})
    label_path = seg.paths["labels"]
    mosaic_scores = _score_map(label_path, paths["mosaic_truth"], SCENE_CLASSES.num_classes, SCENE_CLASSES.ignore)
    figures["mosaic"] = {k: mosaic_scores[k] for k in ("pixel_accuracy", "mean_iou")}
    map_seconds = time.perf_counter() - start - sum(seconds.values())
    figures["pixels_per_second"] = side * side / map_seconds
    step("map", f"      {pixel_rate(side * side, map_seconds)} including writing the outputs; against the mosaic's "
         f"true labels: pixel accuracy {mosaic_scores['pixel_accuracy']:.4f}, mean IoU "
         f"{mosaic_scores['mean_iou']:.4f}\n      class areas:\n{_area_table(seg.areas)}")
    figures["areas"] = seg.areas

    echo(f"[6/{n}] drawing a reference sample from the map, filling it from the true labels, estimating accuracy "
         "and area with 95 % intervals")
    sample = draw_sample(label_path, out / "sample.gpkg", classes=SCENE_CLASSES, total=plan.sample_points,
                         minimum=plan.sample_minimum, seed=plan.seed)
    paths["sample"] = sample.paths["gpkg"]
    paths["sample_filled"] = fill_from_truth(sample, paths["mosaic_truth"], out / "sample_filled.csv")
    table = assess_sample(paths["sample_filled"], labels=label_path, classes=SCENE_CLASSES,
                          json_path=out / "assessment.json", csv_path=out / "assessment.csv")
    paths["assessment"], paths["assessment_csv"] = out / "assessment.json", out / "assessment.csv"
    paths["report"] = ev.write_report(out / "report.html", assessment=table)
    figures["assessment"] = table
    true_pixels = _true_pixels(paths["mosaic_truth"], SCENE_CLASSES.num_classes)
    figures["true_pixels"] = true_pixels.tolist()
    step("assess", _assessment_lines(table, true_pixels))

    total = sum(seconds.values())
    figures.update(plan=asdict(plan), epochs=cfg.train.epochs, seconds=seconds, threads=torch.get_num_threads())
    paths["figures"] = out / "figures.json"  # what scripts/readme_figures.py turns into the README's figures
    write_text_atomic(paths["figures"], json.dumps(json_safe(figures), indent=1) + "\n")
    echo("")
    echo(f"fcnkit demo finished in {total // 60:.0f} min {total % 60:.0f} s "
         f"({', '.join(f'{k} {v:.0f} s' for k, v in seconds.items())}; CPU time {sum(cpu.values()):.0f} s "
         f"on {torch.get_num_threads()} threads)")
    width = max(len(k) for k in paths)
    for key, p in paths.items():
        echo(f"  {key:<{width}}  {p}")
    echo("Open the report in a browser; open the map rasters (Cloud-Optimised GeoTIFFs with class names, colours "
         "and nodata) and the class polygons (GeoPackage) in any GIS viewer. The figures are estimates on synthetic "
         "scenes.")
    return DemoResult(out, paths, figures, seconds, cpu)
