"""From a patch classifier to a segmenter on the demo scenes: train a small CNN to name the class at the centre
of 32×32 patches, convert it (certificate), map whole scenes with the dense net, then grow an FCN from it and
fine-tune that on the same scenes.

    .venv/bin/python scripts/bench_convert.py [--steps 400] [--epochs 4] [--out DIR]

Prints: the certificate; mean IoU on test-scene scenes of the dense map, of the grown segmenter before and after
fine-tuning; and the speed of the dense net against classifying every window one by one (the OverFeat argument,
Sermanet et al. 2014) as a ratio of timings taken in this run.
"""

from __future__ import annotations

import argparse
import tempfile
import time
from pathlib import Path

import numpy as np
import torch
from torch import nn

from fcnkit import Model, convert_classifier, grow_segmenter, make_scenes
from fcnkit.convert.sources import sequential_spec
from fcnkit.data.dataset import find_samples
from fcnkit.data.imageio import read_image, read_mask
from fcnkit.metrics import confusion_matrix, segmentation_scores

PATCH = 32


def patch_classifier(classes: int) -> nn.Sequential:
    def block(cin: int, cout: int) -> list[nn.Module]:
        return [nn.Conv2d(cin, cout, 3, padding=1), nn.BatchNorm2d(cout), nn.ReLU(), nn.MaxPool2d(2)]

    return nn.Sequential(*block(3, 16), *block(16, 32), *block(32, 48), nn.Flatten(),
                         nn.Linear(48 * 4 * 4, 64), nn.ReLU(), nn.Dropout(0.2), nn.Linear(64, classes))


def centre_patches(images: list[np.ndarray], masks: list[np.ndarray], n: int, rng: np.random.Generator):
    xs, ys = [], []
    while len(xs) < n:
        i = rng.integers(len(images))
        h, w = masks[i].shape
        r, c = rng.integers(0, h - PATCH), rng.integers(0, w - PATCH)
        label = masks[i][r + PATCH // 2, c + PATCH // 2]
        if label == 255:
            continue
        xs.append(images[i][r:r + PATCH, c:c + PATCH])
        ys.append(label)
    x = torch.from_numpy(np.stack(xs).astype(np.float32).transpose(0, 3, 1, 2))
    return x, torch.from_numpy(np.array(ys, dtype=np.int64))


def miou(model: nn.Module, images: list[np.ndarray], masks: list[np.ndarray], k: int, mean, std) -> float:
    cm = np.zeros((k, k), np.int64)
    model.eval()
    with torch.no_grad():
        for image, mask in zip(images, masks, strict=True):
            x = torch.from_numpy(((image - np.array(mean)) / np.array(std)).astype(np.float32).transpose(2, 0, 1))
            cm += confusion_matrix(mask, model(x[None])[0].argmax(0).numpy(), k)
    return segmentation_scores(cm)["mean_iou"]


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--steps", type=int, default=400)
    ap.add_argument("--epochs", type=int, default=4)
    ap.add_argument("--out", type=Path)
    args = ap.parse_args()
    torch.manual_seed(0)
    out = args.out or Path(tempfile.mkdtemp(prefix="fcnkit-bench-convert-"))
    data = make_scenes(out / "train", 12, 128, seed=11, nir=False)
    samples, classes = find_samples(data)
    tests, _ = find_samples(make_scenes(out / "test", 4, 128, seed=99, nir=False))
    k = classes.num_classes
    images = [read_image(s.image).astype(np.float32) for s in samples]
    masks = [read_mask(s.mask, classes) for s in samples]
    test_images = [read_image(s.image).astype(np.float32) for s in tests]
    test_masks = [read_mask(s.mask, classes) for s in tests]
    mean, std = [float(v) for v in np.mean([i.mean((0, 1)) for i in images], 0)], [60.0] * 3

    def normed(image: np.ndarray) -> np.ndarray:
        return (image - np.array(mean, np.float32)) / np.array(std, np.float32)

    clf = patch_classifier(k)
    opt = torch.optim.Adam(clf.parameters(), 2e-3)
    rng = np.random.default_rng(0)
    t = time.perf_counter()
    for _ in range(args.steps):
        x, y = centre_patches([normed(i) for i in images], masks, 32, rng)
        loss = nn.functional.cross_entropy(clf.train()(x), y)
        opt.zero_grad()
        loss.backward()
        opt.step()
    x, y = centre_patches([normed(i) for i in test_images], test_masks, 512, rng)
    with torch.no_grad():
        acc = float((clf.eval()(x).argmax(1) == y).float().mean())
    print(f"patch classifier: {args.steps} steps in {time.perf_counter() - t:.0f} s; test-scene centre-pixel "
          f"accuracy {acc:.3f}")

    conv = convert_classifier(clf, PATCH)
    print(conv.certificate.format())
    print(f"dense map (argmax of scores placed at window centres), test-scene mIoU "
          f"{miou(conv.net, test_images, test_masks, k, mean, std):.3f}")

    # speed: dense net over a 128 px scene vs the classifier on each of its windows at the same stride
    s = conv.certificate.stride
    scene = torch.from_numpy(normed(test_images[0]).transpose(2, 0, 1))[None]
    with torch.no_grad():
        t = time.perf_counter()
        dense = conv.dense(scene)
        t_dense = time.perf_counter() - t
        windows = scene.unfold(2, PATCH, s).unfold(3, PATCH, s)  # 1×C×h×w×P×P
        h, w = windows.shape[2:4]
        batch = windows.permute(0, 2, 3, 1, 4, 5).reshape(h * w, 3, PATCH, PATCH)
        t = time.perf_counter()
        one_by_one = clf(batch)
        t_windows = time.perf_counter() - t
    diff = float((dense[0].permute(1, 2, 0).reshape(h * w, -1) - one_by_one).abs().max())
    print(f"{h * w} windows at stride {s}: dense net {t_windows / t_dense:.1f}x faster than classifying each "
          f"window (max |difference| {diff:.2g}; with padding the windows' borders differ, OverFeat §3.5)")

    grown = grow_segmenter(clf, PATCH, keep=tuple(range(k)), skips=(4, 2))
    model = Model.from_conversion(grown, source={"source": "sequential", "layers": sequential_spec(clf, "bench")},
                                  classes=classes, mean=mean, std=std)
    print(f"grown FCN (skips 4, 2), before fine-tuning: test-scene mIoU "
          f"{miou(grown.net, test_images, test_masks, k, mean, std):.3f}")
    settings = {"epochs": args.epochs, "batch": 8, "patch": 64, "patches_per_epoch": 128, "val_fraction": 0.25,
                "lr": 1e-3}
    t = time.perf_counter()
    result = model.fit(data, out_dir=out / "run", progress=False, **settings).last_run
    tuned = model.net
    print(f"after {args.epochs} epochs of fine-tuning ({time.perf_counter() - t:.0f} s): test-scene mIoU "
          f"{miou(tuned, test_images, test_masks, k, mean, std):.3f} (validation split of the run: "
          f"{result.best_mean_iou:.3f})")


if __name__ == "__main__":
    main()
