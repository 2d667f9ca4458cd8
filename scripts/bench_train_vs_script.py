"""fcnkit's training against a plain hand-written U-Net script (scripts/baseline_unet.py) for the same wall time.

For each budget (default 10, 20 and 40 s), with dense labels and with scribbles, both train on the same images
and are scored on the same held-out images with dense labels (whole-image prediction, one confusion matrix,
mean over classes of TP / (TP + FP + FN), the IoU of Long et al. 2015). Printed: each one's held-out mIoU,
the ratio fcnkit ÷ script and each call's measured wall time; then, per cell, the medians over seeds and the
median and range of the ratio. fcnkit runs ``Model.build(config).fit(folder)`` with the config given (default
the shipped ``demo``, with only the data's band and class counts set) and ``train.seconds`` = the budget,
every other setting at its default; the script gets the same budget.

Fairness: one process, the same torch thread count given to both (default 2, this machine's core count; fcnkit's
default ``train.threads = 0`` then uses as many of them as other programs leave cores free, fcnkit.cores), the two
runs of each cell back to back with their order alternating from cell to cell, so slow spells on a shared
machine fall on both. Each budget is the wall time of the whole call: the script's covers its set-up
(normalisation, net) and training loop; fcnkit's covers reading the dataset folder from disk, set-up, training,
its own per-epoch validation on a split of the training images, writing the run folder and fitting the
calibration temperature. The scoring after
the call is outside both budgets and identical for both. The baseline trains on all training images; fcnkit
holds out its default 20 % for choosing the best epoch, as a user running it would. The script's crops are 64
pixels, the best of 64, 96 and 128 in a pilot here (its U-Net's full-resolution layers make 128-pixel steps
about 5x dearer than 64-pixel ones on 2 cores), so the yardstick is the script at its best, not a straw man.
On a machine shared with other busy processes, 2 torch threads can be several times slower than 1 (measured here:
3-10x per step at load average 3-5): the script, which keeps them, then suffers where fcnkit drops to one thread;
`--threads 1` compares the two like for like.

Data, not the demo's: texture mosaics drawn by this file (not fcnkit.data.scenes): three bands, four classes
that differ only in texture (stripes at any angle, spots, fine grain, smooth undulation), each region with its
own random colour and contrast so colour says nothing about the class, regions bounded by warped Voronoi cells,
plus a brightness gradient and sensor noise. Scribbles: for each class present in an image, two strokes of a
3-pixel brush along a random walk inside that class's region (kept 4 pixels from its edge, as an annotator
would), everything else the ignore value — about 2 % of pixels labelled.

    .venv/bin/python scripts/bench_train_vs_script.py [--budgets 10 20 40] [--seeds 3] [--threads 2]
        [--config demo] [--set key=value ...]
"""

from __future__ import annotations

import argparse
import os
import statistics
import tempfile
import time
import tomllib
from pathlib import Path

import baseline_unet
import numpy as np
import torch
from PIL import Image
from scipy import ndimage

from fcnkit import Model, load_config
from fcnkit.config import replace_section
from fcnkit.data.classes import ClassInfo, ClassTable, write_classes
from fcnkit.metrics import confusion_matrix, segmentation_scores

CLASSES = ("stripes", "spots", "grain", "smooth")
IGNORE = 255


def _smooth_noise(rng: np.random.Generator, h: int, w: int, sigma: float) -> np.ndarray:
    n = ndimage.gaussian_filter(rng.standard_normal((h, w)), sigma, mode="wrap")
    return n / n.std()


def _texture(kind: int, rng: np.random.Generator, h: int, w: int) -> np.ndarray:
    """One class's texture over the whole frame, amplitude about 1."""
    yy, xx = np.mgrid[0:h, 0:w].astype(np.float64)
    if kind == 0:  # stripes: a sinusoidal grating, any orientation, period 4-9 px
        theta, period = rng.uniform(0, np.pi), rng.uniform(4, 9)
        return np.sin(2 * np.pi * (xx * np.cos(theta) + yy * np.sin(theta)) / period + rng.uniform(0, 2 * np.pi))
    if kind == 1:  # spots: thresholded smooth noise, blobs 3-6 px across
        n = _smooth_noise(rng, h, w, rng.uniform(1.2, 2.0))
        return np.where(n > rng.uniform(0.3, 0.9), 1.0, -0.4)
    if kind == 2:  # grain: fine noise
        return _smooth_noise(rng, h, w, 0.5)
    return _smooth_noise(rng, h, w, rng.uniform(10, 20))  # smooth: slow undulation


def texture_mosaic(rng: np.random.Generator, size: int) -> tuple[np.ndarray, np.ndarray]:
    """(image uint8 size×size×3, labels uint8 size×size) of warped Voronoi regions, each one texture class."""
    n = int(rng.integers(5, 10))
    seeds, kinds = rng.uniform(0, size, (n, 2)), rng.integers(0, len(CLASSES), n)
    yy, xx = np.mgrid[0:size, 0:size].astype(np.float64)
    wy, wx = (8 * _smooth_noise(rng, size, size, 10) for _ in range(2))
    cell = (((yy + wy)[..., None] - seeds[:, 0]) ** 2 + ((xx + wx)[..., None] - seeds[:, 1]) ** 2).argmin(-1)
    image = np.zeros((size, size, 3))
    for k in range(n):
        inside = cell == k
        base, loading = rng.uniform(70, 185, 3), rng.uniform(0.5, 1.0, 3)
        image[inside] = base + rng.uniform(12, 35) * _texture(int(kinds[k]), rng, size, size)[inside, None] * loading
    gy, gx = rng.uniform(-0.15, 0.15, 2)
    image += (gy * (yy - size / 2) + gx * (xx - size / 2))[..., None] + rng.normal(0, 4, image.shape)
    return np.clip(image, 0, 255).astype(np.uint8), kinds[cell].astype(np.uint8)


def scribbles(labels: np.ndarray, rng: np.random.Generator, strokes: int = 2, steps: int = 40) -> np.ndarray:
    """Sparse labels: per class present, ``strokes`` random-walk strokes (3-px brush) inside its eroded region."""
    out = np.full_like(labels, IGNORE)
    h, w = labels.shape
    for c in np.unique(labels):
        region = ndimage.binary_erosion(labels == c, iterations=4)
        ys, xs = np.nonzero(region)
        for _ in range(strokes if ys.size else 0):
            i = int(rng.integers(ys.size))
            y, x, angle = float(ys[i]), float(xs[i]), rng.uniform(0, 2 * np.pi)
            for _ in range(steps):
                r, q = int(round(y)), int(round(x))
                if not (0 <= r < h and 0 <= q < w and region[r, q]):
                    break
                out[max(r - 1, 0):r + 2, max(q - 1, 0):q + 2] = c
                angle += rng.normal(0, 0.3)
                y, x = y + 1.5 * np.sin(angle), x + 1.5 * np.cos(angle)
    return out


def write_dataset(folder: Path, images: list[np.ndarray], masks: list[np.ndarray]) -> Path:
    """An fcnkit dataset folder: images/*.png, masks/*.png (class ids, 255 unlabelled), classes.toml."""
    (folder / "images").mkdir(parents=True)
    (folder / "masks").mkdir()
    for i, (image, mask) in enumerate(zip(images, masks, strict=True)):
        Image.fromarray(image).save(folder / "images" / f"m{i:03d}.png")
        Image.fromarray(mask).save(folder / "masks" / f"m{i:03d}.png")
    colours = ((220, 60, 60), (60, 190, 60), (60, 60, 220), (220, 210, 60))
    write_classes(folder / "classes.toml", ClassTable(tuple(ClassInfo(i, n, c) for i, (n, c) in
                                                          enumerate(zip(CLASSES, colours, strict=True)))))
    return folder


def mean_iou(predict, images: list[np.ndarray], masks: list[np.ndarray], k: int = len(CLASSES)) -> float:
    """Mean over classes of TP / (TP + FP + FN) from one confusion matrix over all images' pixels."""
    cm = sum(confusion_matrix(mask, predict(image), k, ignore=None) for image, mask in zip(images, masks, strict=True))
    return float(segmentation_scores(cm)["mean_iou"])


def run_baseline(images, masks, val_images, val_masks, seconds: float, seed: int, patch: int) -> tuple[float, float]:
    tic = time.perf_counter()
    model, mean, std = baseline_unet.train(images, masks, len(CLASSES), seconds, patch=patch, seed=seed)
    wall = time.perf_counter() - tic
    return mean_iou(lambda im: baseline_unet.predict(model, mean, std, im), val_images, val_masks), wall


def run_fcnkit(cfg, data: Path, out: Path, val_images, val_masks) -> tuple[float, float, int]:
    tic = time.perf_counter()
    model = Model.build(cfg).fit(data, out_dir=out, progress=False)  # cfg's [train] table as it is
    wall = time.perf_counter() - tic
    return mean_iou(model.predict, val_images, val_masks), wall, model.last_run.epochs


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--budgets", type=float, nargs="+", default=[10.0, 20.0, 40.0], help="seconds of wall time")
    ap.add_argument("--seeds", type=int, default=3, help="datasets and initialisations per cell")
    ap.add_argument("--threads", type=int, default=2, help="torch threads, the same for both")
    ap.add_argument("--config", default="demo", help="fcnkit config (bands and classes set to the data's)")
    ap.add_argument("--set", action="append", default=[], metavar="KEY=VALUE",
                    help="override an fcnkit [train] key, value in TOML syntax")
    ap.add_argument("--baseline-patch", type=int, default=64,
                    help="the script's crop side (64: the best of 64, 96 and 128 in a pilot on a 2-core machine)")
    ap.add_argument("--train-images", type=int, default=24)
    ap.add_argument("--val-images", type=int, default=8)
    ap.add_argument("--size", type=int, default=192, help="image side in pixels (a multiple of 8)")
    args = ap.parse_args()
    torch.set_num_threads(args.threads)
    cfg = replace_section(load_config(args.config), "model", bands=3, num_classes=len(CLASSES))
    changes = {k: tomllib.loads(f"v = {v}")["v"] for k, v in (item.split("=", 1) for item in args.set)}
    if changes:
        cfg = replace_section(cfg, "train", **changes)
    print(f"fcnkit config {args.config} (model.bands = 3, model.num_classes = {len(CLASSES)}"
          + "".join(f", train.{k} = {v!r}" for k, v in changes.items()) + f"); torch threads {args.threads}; "
          f"{args.train_images} training and {args.val_images} held-out images of {args.size}² px; "
          f"load average {os.getloadavg()[0]:.1f} on {os.cpu_count()} cores")
    print(f"{'budget':>6} {'labels':>9} {'seed':>4} | {'fcnkit':>8} {'script':>8} {'ratio':>6} | "
          f"{'wall fcn':>8} {'wall scr':>8} {'epochs':>6}")
    scores: dict[tuple[float, str], list[tuple[float, float]]] = {}
    cell, bp = 0, args.baseline_patch
    with tempfile.TemporaryDirectory() as tmp:
        for seed in range(args.seeds):
            rng = np.random.default_rng(1000 + seed)
            train_set = [texture_mosaic(rng, args.size) for _ in range(args.train_images)]
            val_set = [texture_mosaic(rng, args.size) for _ in range(args.val_images)]
            images, dense = [s[0] for s in train_set], [s[1] for s in train_set]
            val_images, val_masks = [s[0] for s in val_set], [s[1] for s in val_set]
            for labels in ("dense", "scribbles"):
                masks = dense if labels == "dense" else [scribbles(m, rng) for m in dense]
                data = write_dataset(Path(tmp) / f"{labels}-{seed}", images, masks)
                for budget in args.budgets:
                    run_cfg = replace_section(cfg, "train", seconds=budget, seed=seed)
                    out = Path(tmp) / f"run-{cell}"
                    if cell % 2 == 0:
                        base, base_wall = run_baseline(images, masks, val_images, val_masks, budget, seed, bp)
                        fcn, fcn_wall, epochs = run_fcnkit(run_cfg, data, out, val_images, val_masks)
                    else:
                        fcn, fcn_wall, epochs = run_fcnkit(run_cfg, data, out, val_images, val_masks)
                        base, base_wall = run_baseline(images, masks, val_images, val_masks, budget, seed, bp)
                    cell += 1
                    scores.setdefault((budget, labels), []).append((fcn, base))
                    print(f"{budget:6.0f} {labels:>9} {seed:4d} | {fcn:8.3f} {base:8.3f} {fcn / base:6.2f} | "
                          f"{fcn_wall:8.1f} {base_wall:8.1f} {epochs:6d}", flush=True)
    print(f"\nheld-out mIoU, median over {args.seeds} seeds; ratio fcnkit ÷ script per seed: median [min, max]")
    print(f"{'budget':>6} {'labels':>9} | {'fcnkit':>7} {'script':>7} | ratio")
    for (budget, labels), pairs in sorted(scores.items()):
        r = [f / b for f, b in pairs]
        fcn, base = (statistics.median(v) for v in zip(*pairs, strict=True))
        print(f"{budget:5.0f}s {labels:>9} | {fcn:7.3f} {base:7.3f} | {statistics.median(r):.2f} "
              f"[{min(r):.2f}, {max(r):.2f}]")


if __name__ == "__main__":
    main()
