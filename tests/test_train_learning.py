"""Learning on real imagery made outside this project, from sparse labels.

Image: ``skimage.data.coins()`` — a 303×384 greyscale photograph of coins that ships inside the
scikit-image package (no download). Labels: Otsu's threshold (Otsu 1979, ``skimage.filters.threshold_otsu``),
a documented classical method: pixels above it are "coin", the rest "background". The net sees only a few
thin strokes of those labels on the left half (everything else is the ignore value) and is scored against
the dense Otsu labels of the right half, which it never saw.
"""

import numpy as np
from PIL import Image
from skimage import data, filters
from tiny_train import fit

from fcnkit import Model
from fcnkit.config import config_from_dict
from fcnkit.data.classes import ClassInfo, ClassTable, write_classes
from fcnkit.metrics import segmentation_scores
from fcnkit.train import validate

IGNORE = 255


def _coins():
    image = data.coins()
    truth = (image > filters.threshold_otsu(image)).astype(np.uint8)  # 1 = coin, 0 = background
    return image, truth


def _strokes(truth, rng, count=8, half_width=1):
    """Sparse labels: a few short straight strokes (rows and columns), everything else ignore."""
    sparse = np.full_like(truth, IGNORE)
    h, w = truth.shape
    for i in range(count):
        length = rng.integers(w // 3, w)
        if i % 2:
            r, c = rng.integers(half_width, h - half_width), rng.integers(0, w - length + 1)
            sparse[r - half_width:r + half_width + 1, c:c + length] = truth[r - half_width:r + half_width + 1,
                                                                            c:c + length]
        else:
            c, r = rng.integers(half_width, w - half_width), rng.integers(0, max(h - length, 0) + 1)
            sparse[r:r + length, c - half_width:c + half_width + 1] = truth[r:r + length,
                                                                            c - half_width:c + half_width + 1]
    return sparse


def test_learns_otsu_labels_of_coins_from_strokes(tmp_path):
    image, truth = _coins()
    half = image.shape[1] // 2
    sparse = _strokes(truth[:, :half], np.random.default_rng(0))
    labelled = sparse != IGNORE
    assert labelled.mean() < 0.15 and set(np.unique(sparse[labelled])) == {0, 1}  # sparse, both classes
    ds = tmp_path / "coins"
    (ds / "images").mkdir(parents=True)
    (ds / "masks").mkdir()
    Image.fromarray(image[:, :half]).save(ds / "images" / "left.png")
    Image.fromarray(sparse).save(ds / "masks" / "left.png")
    classes = ClassTable((ClassInfo(0, "background", (40, 40, 40)), ClassInfo(1, "coin", (230, 190, 60))))
    write_classes(ds / "classes.toml", classes)

    cfg = config_from_dict({
        "model": {"bands": 1, "num_classes": 2, "widths": [8, 16], "blocks": [1, 1], "head": [16], "fusion": "sum",
                  "min_size": 16},
        "train": {"epochs": 4, "batch": 8, "patch": 64, "patches_per_epoch": 48, "lr": 1e-2, "warmup": 1,
                  "val_fraction": 0.0, "balanced": True, "threads": 1, "seed": 1},
    })
    result = fit(cfg, ds, tmp_path / "run", progress=False)
    loaded = Model.load(result.model_path)
    right = image[:, half:, None]
    cm, _, _ = validate(loaded, [right], [truth[:, half:]])
    miou = segmentation_scores(cm)["mean_iou"]
    # chance: a constant prediction of the larger class scores about 0.35 mIoU here
    frac = truth[:, half:].mean()
    assert max(frac, 1 - frac) / 2 < 0.4
    assert miou > 0.8, miou
