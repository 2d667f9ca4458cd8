"""Score a net on labelled images: ``evaluate`` for a model file and a dataset folder, and the in-memory
``evaluate_images`` that training uses for validation.

``evaluate`` runs each image through the same tiled inference as ``segment`` (so labelled images of any
size work), accumulates one confusion matrix over every labelled pixel, prints the scores of Long et al. 2015
with per-class IoU and Dice, and writes them as JSON and, on request, as an HTML report (fcnkit.report).

``evaluate_images``: images up to ``block`` × ``block`` pixels go through the net in one piece (the net pads
and crops itself). Larger ones are cut into blocks, each run with ``margin`` pixels of context on every side
and cropped back, so memory stays bounded; with the net's tile margin as ``margin`` the blocks give the
whole-image result.
"""

from __future__ import annotations

import json
import math
from collections.abc import Iterator, Sequence
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import torch
from torch import nn

from fcnkit.atomic import write_text_atomic
from fcnkit.data.classes import ClassTable
from fcnkit.data.dataset import Sample, find_samples, sample_mask
from fcnkit.data.imageio import DEFAULT_MAX_PIXELS
from fcnkit.data.raster import open_raster
from fcnkit.describe import describe
from fcnkit.errors import ConfigError, DataError
from fcnkit.export import check_destination, make_engine
from fcnkit.losses import pixel_cross_entropy
from fcnkit.metrics import confusion_matrix, segmentation_scores
from fcnkit.modelfile import LoadedModel, load_model
from fcnkit.outputs import normalised_entropy, strided_rgb
from fcnkit.tiling import DEFAULT_TILE, choose_scan, predict_scores

if TYPE_CHECKING:
    from fcnkit.report import Example


def _blocks(n: int, block: int, margin: int) -> Iterator[tuple[int, int, int, int]]:
    """(read_start, read_stop, keep_start, keep_stop) along one axis of length n."""
    for start in range(0, n, block):
        stop = min(start + block, n)
        yield max(start - margin, 0), min(stop + margin, n), start, stop


def evaluate_images(model: nn.Module, images: Sequence[np.ndarray], masks: Sequence[np.ndarray], *,
                    mean: Sequence[float], std: Sequence[float], num_classes: int, ignore: int = 255,
                    weight: torch.Tensor | None = None, margin: int = 0, block: int = 1024,
                    channels_last: bool = False) -> tuple[np.ndarray, float, float]:
    """Confusion matrix (rows = truth) over H×W×B images and H×W masks, plus the summed cross-entropy of
    the labelled pixels and its normaliser (their count, or their summed class weights)."""
    factor = int(getattr(model, "factor", 1))
    block = max(factor, block // factor * factor)
    margin = -(-margin // factor) * factor  # block and read origins stay on the net's pooling grid
    m = torch.tensor(mean, dtype=torch.float32).view(-1, 1, 1)
    s = torch.tensor(std, dtype=torch.float32).view(-1, 1, 1)
    fmt = torch.channels_last if channels_last else torch.contiguous_format
    cm = np.zeros((num_classes, num_classes), np.int64)
    ce = norm = 0.0
    was_training = model.training
    model.eval()
    with torch.inference_mode():
        for image, mask in zip(images, masks, strict=True):
            h, w = mask.shape
            for y0, y1, ky0, ky1 in _blocks(h, block, margin):
                for x0, x1, kx0, kx1 in _blocks(w, block, margin):
                    x = torch.from_numpy(np.ascontiguousarray(image[y0:y1, x0:x1])).permute(2, 0, 1).float()
                    x = ((x - m) / s).unsqueeze(0).contiguous(memory_format=fmt)
                    logits = model(x)[..., ky0 - y0:ky1 - y0, kx0 - x0:kx1 - x0]
                    target = torch.from_numpy(mask[ky0:ky1, kx0:kx1].astype(np.int64)).unsqueeze(0)
                    total, n = pixel_cross_entropy(logits, target, weight, ignore)
                    ce, norm = ce + total.item(), norm + n.item()
                    cm += confusion_matrix(target, logits.argmax(1), num_classes, ignore)
    model.train(was_training)
    return cm, ce, norm


# --- evaluating a model file on a labelled folder --------------------------------------------------------


@dataclass(frozen=True)
class ImageScore:
    """One image's share of an evaluation."""

    stem: str
    labelled_pixels: int
    pixel_accuracy: float
    mean_iou: float


@dataclass
class Evaluation:
    """The result of :func:`evaluate`: scores over every labelled pixel of the folder, and per image."""

    model: str
    data_dir: Path
    classes: ClassTable
    confusion: np.ndarray
    scores: dict[str, Any]
    images: list[ImageScore]
    paths: dict[str, Path] = field(default_factory=dict)

    def to_dict(self) -> dict[str, Any]:
        """JSON-able (undefined scores as null)."""
        from fcnkit import __version__
        from fcnkit.report import json_safe

        return json_safe({
            "model": self.model, "data": str(self.data_dir), "fcnkit_version": __version__,
            "classes": self.classes.names, "ignore": self.classes.ignore, "scores": self.scores,
            "confusion_matrix": self.confusion.tolist(), "images": [asdict(s) for s in self.images],
        })

    def table(self) -> str:
        """The printable metrics table."""
        s = self.scores
        total = int(self.confusion.sum())
        lines = [f"{len(self.images)} images, {total:,} labelled pixels in {self.data_dir}", ""]
        for key, label in SCORE_LABELS:
            lines.append(f"{label:<26}{_num(s[key]):>8}")
        lines += ["", f"{'class':<18}{'true pixels':>13}{'share':>8}{'accuracy':>10}{'IoU':>8}{'Dice':>8}"]
        for i, name in enumerate(self.classes.names):
            share = s["support"][i] / total if total else math.nan
            lines.append(f"{name[:17]:<18}{s['support'][i]:>13,}{share:>8.1%}{_num(s['accuracy'][i]):>10}"
                         f"{_num(s['iou'][i]):>8}{_num(s['dice'][i]):>8}")
        return "\n".join(lines)


SCORE_LABELS = (("pixel_accuracy", "pixel accuracy"), ("mean_accuracy", "mean accuracy"),
                ("mean_iou", "mean IoU"), ("fw_iou", "frequency-weighted IoU"))


def _num(v: float | None) -> str:
    return "n/a" if v is None or math.isnan(v) else f"{v:.4f}"


def same_classes(model_classes: ClassTable, data_classes: ClassTable, model: str, data_dir: Path) -> None:
    """DataError unless the folder's classes.toml has the model's ids and names (colours may differ)."""
    def pairs(t: ClassTable) -> list[tuple[int, str]]:
        return list(zip(t.ids, t.names, strict=True))

    if pairs(model_classes) != pairs(data_classes):
        shown = ", ".join(f"{i}={n}" for i, n in pairs(data_classes))
        want = ", ".join(f"{i}={n}" for i, n in pairs(model_classes))
        raise DataError(f"{data_dir / 'classes.toml'}: classes ({shown}) differ from those of {model} ({want})")


def _score_one(loaded: LoadedModel, sample: Sample, classes: ClassTable, settings: dict[str, Any],
               engine: Any, max_pixels: int | None, progress: bool) -> tuple[np.ndarray, ImageScore, Example]:
    from fcnkit.report import PANEL_SIDE, Example

    k = classes.num_classes
    raster = open_raster(sample.image, max_pixels)
    try:
        h, w, bands = raster.shape
        if bands != len(loaded.meta.mean):
            raise DataError(f"{sample.image}: has {bands} bands but the model expects {len(loaded.meta.mean)}")
        mask = sample_mask(sample, classes, raster, max_pixels)  # masks or vector labels; nodata unlabelled
        probs = predict_scores(loaded.model, raster, mean=loaded.meta.mean, std=loaded.meta.std, engine=engine,
                               progress=progress, **settings)
        cm = np.zeros((k, k), np.int64)
        step = max(1, math.ceil(max(h, w) / PANEL_SIDE))
        for y0 in range(0, h, 256):
            pred = probs[:, y0:y0 + 256].argmax(0)
            cm += confusion_matrix(mask[y0:y0 + 256], pred, k, classes.ignore)
        small = np.ascontiguousarray(probs[:, ::step, ::step])
        image = strided_rgb(raster, step)
    finally:
        raster.close()
    s = segmentation_scores(cm)
    score = ImageScore(sample.stem, int(cm.sum()), s["pixel_accuracy"], s["mean_iou"])
    example = Example(sample.stem, s["mean_iou"], image, mask[::step, ::step], small.argmax(0),
                      normalised_entropy(small, axis=0))
    return cm, score, example


def evaluate(model: str | Path | LoadedModel, data_dir: str | Path, *, json_path: str | Path | None = None,
             report: str | Path | None = None, curves: str | Path | None = None, examples: int = 3,
             scan: str = "auto", tile: int | None = None, overlap: int | None = None, batch: int | None = None,
             window: str | None = None, exact: bool = False, tta: bool = False, engine: str = "torch",
             max_pixels: int | None = DEFAULT_MAX_PIXELS, progress: bool = True) -> Evaluation:
    """Score a model on every image/mask pair of a labelled folder, by the same row streaming or tiled inference
    as ``segment`` (the same ``scan`` and tile settings).

    Writes the scores as JSON to ``json_path`` and an HTML report to ``report`` when given. ``curves`` is a
    training metrics CSV for the report (default: ``metrics.csv`` beside the model file, when present);
    ``examples`` the number of worst-scoring images shown side by side.
    """
    data_dir = Path(data_dir)
    if examples < 0:
        raise ConfigError(f"examples: {examples} must be >= 0")
    for out in (json_path, report):
        if out is not None:
            check_destination(out, DataError)
    if curves is not None and not Path(curves).is_file():
        raise DataError(f"{curves}: no such training metrics CSV")
    name = str(model) if not isinstance(model, LoadedModel) else "model"
    if isinstance(model, (str, Path)):
        if curves is None and (Path(model).parent / "metrics.csv").is_file():
            curves = Path(model).parent / "metrics.csv"
        model = load_model(model)
    samples, classes = find_samples(data_dir)
    same_classes(model.meta.classes, classes, name, data_dir)
    settings = {"scan": scan, "tile": tile, "overlap": overlap, "batch": batch, "window": window, "exact": exact,
                "tta": tta}
    tiles_asked = any(v is not None for v in (tile, overlap, batch, window))
    used = choose_scan(model.model, scan, tiles_asked=tiles_asked, tta=tta, engine=engine)
    runner = make_engine(engine, model.model) if engine != "torch" else None
    k = classes.num_classes
    cm = np.zeros((k, k), np.int64)
    scored: list[tuple[ImageScore, Example]] = []
    for sample in samples:
        one, score, example = _score_one(model, sample, classes, settings, runner, max_pixels, progress)
        cm += one
        scored.append((score, example))
    if not cm.sum():
        raise DataError(f"{data_dir / 'masks'}: no labelled pixels (every mask pixel is the ignore value "
                        f"{classes.ignore})")
    result = Evaluation(name, data_dir, classes, cm, segmentation_scores(cm), [s for s, _ in scored])
    if json_path is not None:
        write_text_atomic(json_path, json.dumps(result.to_dict(), indent=1) + "\n")
        result.paths["json"] = Path(json_path)
    if report is not None:
        from fcnkit.report import write_report

        worst = sorted((e for _, e in scored if not math.isnan(e.score)), key=lambda e: e.score)[:examples]
        facts = {"model": name, "data": str(data_dir), "images": str(len(samples)),
                 "scan": "rows (exact)" if used == "rows" else
                 f"tiles of {tile or DEFAULT_TILE} px, {window or 'hann'} window" + (", exact" if exact else "")
                 + (", flip TTA" if tta else "")}
        result.paths["report"] = write_report(report, result.scores, cm, classes, facts=facts, curves=curves,
                                              title=f"Evaluation on {data_dir.name}", examples=worst,
                                              description=describe(model.model))
    return result
