"""Score a model on a labelled folder: ``evaluate`` runs each image through the same inference as ``segment``
(so labelled images of any size work), accumulates one confusion matrix over every labelled pixel, prints the
scores of Long et al. 2015 with per-class IoU and Dice, and writes them as JSON and, on request, as an HTML
report (fcnkit.report).
"""

from __future__ import annotations

import json
import math
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from fcnkit.atomic import write_text_atomic
from fcnkit.data.classes import ClassTable
from fcnkit.data.dataset import Sample, find_samples
from fcnkit.data.imageio import DEFAULT_MAX_PIXELS, read_mask
from fcnkit.data.raster import open_raster
from fcnkit.describe import describe
from fcnkit.errors import ConfigError, DataError
from fcnkit.export import check_destination
from fcnkit.inference.engines import make_engine
from fcnkit.inference.scan import predict_scores
from fcnkit.inference.tiles import DEFAULT_TILE
from fcnkit.metrics import confusion_matrix, segmentation_scores
from fcnkit.model import Model
from fcnkit.outputs import normalised_entropy, strided_rgb

if TYPE_CHECKING:
    from fcnkit.report import Example


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


def _score_one(model: Model, sample: Sample, classes: ClassTable, settings: dict[str, Any],
               max_pixels: int | None, progress: bool,
               notes: list[str]) -> tuple[np.ndarray, ImageScore, Example]:
    from fcnkit.report import PANEL_SIDE, Example

    k = classes.num_classes
    raster = open_raster(sample.image, max_pixels)
    try:
        h, w, bands = raster.shape
        if bands != model.bands:
            raise DataError(f"{sample.image}: has {bands} bands but the model expects {model.bands}")
        mask = read_mask(sample.mask, classes, max_pixels)
        if mask.shape != (h, w):
            raise DataError(f"{sample.mask}: mask is {mask.shape[1]}x{mask.shape[0]} but its image is {w}x{h}")
        probs = predict_scores(model, raster, progress=progress, echo=notes.append, **settings)
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


def evaluate(model: str | Path | Model, data_dir: str | Path, *, json_path: str | Path | None = None,
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
    name = str(model) if not isinstance(model, Model) else "model"
    if not isinstance(model, Model):
        if curves is None and (Path(model).parent / "metrics.csv").is_file():
            curves = Path(model).parent / "metrics.csv"
        model = Model.load(model)
    samples, classes = find_samples(data_dir)
    same_classes(model.classes, classes, name, data_dir)
    runner = make_engine(engine, model) if engine != "torch" else "torch"  # built once for every image
    settings = {"scan": scan, "tile": tile, "overlap": overlap, "batch": batch, "window": window, "exact": exact,
                "tta": tta, "engine": runner}
    k = classes.num_classes
    cm = np.zeros((k, k), np.int64)
    scored: list[tuple[ImageScore, Example]] = []
    notes: list[str] = []
    for sample in samples:
        one, score, example = _score_one(model, sample, classes, settings, max_pixels, progress, notes)
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
                 "scan": _scan_fact(scan, tile, window, exact, tta, notes)}
        result.paths["report"] = write_report(report, result.scores, cm, classes, facts=facts, curves=curves,
                                              title=f"Evaluation on {data_dir.name}", examples=worst,
                                              description=describe(model.net))
    return result


def _scan_fact(scan: str, tile: int | None, window: str | None, exact: bool, tta: bool, notes: list[str]) -> str:
    """How the images were scanned, for the report."""
    if notes:
        return sorted(set(notes))[0] if len(set(notes)) == 1 else "; ".join(sorted(set(notes)))
    if scan in ("auto", "rows", "whole"):
        return "rows (exact)" if scan != "whole" else "whole images (exact)"
    return (f"tiles of {tile or DEFAULT_TILE} px, {window or 'hann'} window" + (", exact" if exact else "")
            + (", flip TTA" if tta else ""))
