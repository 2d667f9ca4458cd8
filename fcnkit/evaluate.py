"""Score a model on a labelled folder: ``evaluate`` runs each image through the same inference as ``segment``
(so labelled images of any size work), accumulates one confusion matrix over every labelled pixel, prints the
scores of Long et al. 2015 with per-class IoU and Dice, and writes them as JSON and, on request, as an HTML
report (fcnkit.report).
"""

from __future__ import annotations

import contextlib
import json
import math
from collections.abc import Callable
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from fcnkit.atomic import ESCAPES, atomic_output, write_text_atomic
from fcnkit.calibration import ReliabilityAccumulator, scaled_softmax
from fcnkit.data.classes import ClassTable
from fcnkit.data.dataset import Sample, find_samples, sample_mask
from fcnkit.data.imageio import DEFAULT_MAX_PIXELS
from fcnkit.data.raster import open_raster
from fcnkit.describe import describe
from fcnkit.destinations import check_outputs, dataset_files
from fcnkit.errors import ConfigError, DataError
from fcnkit.inference.engines import make_engine
from fcnkit.inference.scan import predict_scores
from fcnkit.inference.tiles import DEFAULT_TILE
from fcnkit.inputfiles import require_regular
from fcnkit.metrics import bootstrap_mean_iou, confusion_matrix, segmentation_scores
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
    """The result of :func:`evaluate`: scores over every labelled pixel of the folder, per image (with a
    bootstrap interval of the mean IoU over images), and the calibration of the model's confidences there."""

    model: str
    data_dir: Path
    classes: ClassTable
    confusion: np.ndarray
    scores: dict[str, Any]
    images: list[ImageScore]
    interval: dict[str, Any]  # bootstrap interval of mean IoU over images (fcnkit.metrics.bootstrap_mean_iou)
    calibration: dict[str, Any]  # reliability of the model's confidences here, with and without its temperature
    paths: dict[str, Path] = field(default_factory=dict)
    facts: dict[str, str] = field(default_factory=dict)  # for the report's header
    examples: list[Example] = field(default_factory=list)  # the worst-scoring images, for the report
    description: dict[str, Any] = field(default_factory=dict)  # the net's geometry and cost (fcnkit.describe)
    curves: Path | None = None  # the training run's metrics CSV, when known
    kept_epoch: int | None = None  # the training epoch whose weights the model holds

    def render_report(self, *, assessment: dict[str, Any] | None = None) -> str:
        """The HTML report of this evaluation (fcnkit.report), with an area and accuracy ``assessment`` from a
        reference sample when given (fcnkit.assessment.assessment_table)."""
        from fcnkit.report import render_report

        return render_report(
            self.scores, self.confusion, self.classes, facts=self.facts, curves=self.curves,
            title=f"Evaluation on {self.data_dir.name}", examples=self.examples, description=self.description,
            images=[asdict(s) for s in self.images], interval=self.interval, calibration=self.calibration,
            kept_epoch=self.kept_epoch, assessment=assessment)

    def write_report(self, path: str | Path, *, assessment: dict[str, Any] | None = None) -> Path:
        """:meth:`render_report`, written atomically to ``path``."""
        write_text_atomic(path, self.render_report(assessment=assessment))
        self.paths["report"] = Path(path)
        return self.paths["report"]

    def to_dict(self) -> dict[str, Any]:
        """JSON-able (undefined scores as null)."""
        from fcnkit import __version__
        from fcnkit.report import json_safe

        return json_safe({
            "model": self.model, "data": str(self.data_dir), "fcnkit_version": __version__,
            "classes": self.classes.names, "ignore": self.classes.ignore, "scores": self.scores,
            "mean_iou_interval": self.interval, "calibration": self.calibration,
            "confusion_matrix": self.confusion.tolist(), "images": [asdict(s) for s in self.images],
        })

    def table(self) -> str:
        """The printable metrics table."""
        s = self.scores
        total = int(self.confusion.sum())
        lines = [f"{len(self.images)} images, {total:,} labelled pixels in {self.data_dir}", ""]
        for key, label in SCORE_LABELS:
            lines.append(f"{label:<26}{_num(s[key]):>8}")
        iv = self.interval
        if len(self.images) > 1:
            lines.append(f"{'mean IoU, 95 % interval':<26}{_num(iv['low']):>8} – {_num(iv['high'])} "
                         f"(bootstrap over {iv['images']} images)")
        cal = self.calibration
        lines.append(f"{'calibration error (ECE)':<26}{_num(cal['ece']):>8} (temperature {cal['temperature']:.3g}; "
                     f"{_num(cal['ece_uncalibrated'])} without)")
        lines += ["", f"{'class':<18}{'true pixels':>13}{'share':>8}{'predicted':>13}{'bias':>8}{'recall':>8}"
                      f"{'precision':>10}{'IoU':>8}{'Dice':>8}"]
        for i, name in enumerate(self.classes.names):
            share = s["support"][i] / total if total else math.nan
            lines.append(f"{name[:17]:<18}{s['support'][i]:>13,}{share:>8.1%}{s['predicted'][i]:>13,}"
                         f"{_bias(s['predicted'][i], s['support'][i]):>8}{_num(s['recall'][i]):>8}"
                         f"{_num(s['precision'][i]):>10}{_num(s['iou'][i]):>8}{_num(s['dice'][i]):>8}")
        lines.append("recall = producer's accuracy, precision = user's accuracy; bias = predicted / true pixels − 1")
        return "\n".join(lines)


SCORE_LABELS = (("pixel_accuracy", "pixel accuracy"), ("mean_accuracy", "mean accuracy"),
                ("mean_iou", "mean IoU"), ("fw_iou", "frequency-weighted IoU"))


def _num(v: float | None) -> str:
    return "n/a" if v is None or math.isnan(v) else f"{v:.4f}"


def _bias(predicted: int, true: int) -> str:
    return f"{predicted / true - 1:+.1%}" if true else "n/a"


def same_classes(model_classes: ClassTable, data_classes: ClassTable, model: str, data_dir: Path) -> None:
    """DataError unless the folder's classes.toml has the model's ids and names (colours may differ)."""
    def pairs(t: ClassTable) -> list[tuple[int, str]]:
        return list(zip(t.ids, t.names, strict=True))

    if pairs(model_classes) != pairs(data_classes):
        shown = ", ".join(f"{i}={n}" for i, n in pairs(data_classes))
        want = ", ".join(f"{i}={n}" for i, n in pairs(model_classes))
        raise DataError(f"{data_dir / 'classes.toml'}: classes ({shown}) differ from those of {model} ({want})")


def _score_one(model: Model, sample: Sample, classes: ClassTable, settings: dict[str, Any],
               max_pixels: int | None, progress: bool, notes: list[str], note: Callable[[str], None] | None,
               reliability: tuple[ReliabilityAccumulator, ReliabilityAccumulator]) -> tuple[np.ndarray, ImageScore,
                                                                                          Example]:
    """One image's confusion matrix, score and example panels; its confidences are added to ``reliability``
    (with the model's temperature, and without)."""
    from fcnkit.report import PANEL_SIDE, Example

    k = classes.num_classes
    raster = open_raster(sample.image, max_pixels)
    try:
        h, w, bands = raster.shape
        if bands != model.bands:
            raise DataError(f"{sample.image}: has {bands} bands but the model expects {model.bands}")
        mask = sample_mask(sample, classes, raster, max_pixels)  # masks or vector labels; nodata unlabelled
        raster.fill = model.normalisation[0]  # nodata pixels reach the net as the training mean (unscored)
        logits = predict_scores(model, raster, logits=True, progress=progress, echo=notes.append, note=note,
                                desc=Path(sample.image).name, **settings)
        cm = np.zeros((k, k), np.int64)
        step = max(1, math.ceil(max(h, w) / PANEL_SIDE))
        for y0 in range(0, h, 256):
            z, truth = logits[:, y0:y0 + 256], mask[y0:y0 + 256]
            cm += confusion_matrix(truth, z.argmax(0), k, classes.ignore)
            for acc, temperature in zip(reliability, (model.temperature, 1.0), strict=True):
                acc.add(scaled_softmax(z, temperature, axis=0), truth, axis=0, ignore=classes.ignore)
        small = scaled_softmax(np.ascontiguousarray(logits[:, ::step, ::step]), model.temperature, axis=0)
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
             max_pixels: int | None = DEFAULT_MAX_PIXELS, progress: bool = True,
             note: Callable[[str], None] | None = None, overwrite: bool = False) -> Evaluation:
    """Score a model on every image/mask pair of a labelled folder, by the same row streaming or tiled inference
    as ``segment`` (the same ``scan`` and tile settings).

    Writes the scores as JSON to ``json_path`` and an HTML report to ``report`` when given (both or neither:
    they get their final names together, after the work). ``curves`` is a training metrics CSV for the report
    (default: ``metrics.csv`` beside the model file, when present), read before the work; ``examples`` the number
    of worst-scoring images shown side by side. ``note`` receives one-line notes, such as images outside the
    model's training range (default: warnings).
    """
    from fcnkit.report import read_curves

    data_dir = Path(data_dir)
    if examples < 0:
        raise ConfigError(f"examples: {examples} must be >= 0")
    if curves is not None:
        require_regular(curves, DataError)
    if curves is not None and not Path(curves).is_file():
        raise DataError(f"{curves}: no such training metrics CSV")
    path = Path(model) if not isinstance(model, Model) else model.path
    name = str(model) if not isinstance(model, Model) else "model"
    if curves is None and path is not None and (path.parent / "metrics.csv").is_file():
        curves = path.parent / "metrics.csv"
    outputs = [p for p in (json_path, report) if p is not None]
    check_outputs(outputs, inputs=[path, curves, *dataset_files(data_dir)], overwrite=overwrite, error=DataError)
    if curves is not None and report is not None:
        read_curves(curves)  # unreadable: refused now, not after the whole evaluation
    if not isinstance(model, Model):
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
    reliability = (ReliabilityAccumulator(), ReliabilityAccumulator())
    per_image = []
    for sample in samples:
        one, score, example = _score_one(model, sample, classes, settings, max_pixels, progress, notes, note,
                                         reliability)
        cm += one
        per_image.append(one)
        scored.append((score, example))
    if not cm.sum():
        raise DataError(f"{data_dir / 'masks'}: no labelled pixels (every mask pixel is the ignore value "
                        f"{classes.ignore})")
    calibrated, raw = (acc.result() for acc in reliability)
    calibration = {"temperature": model.temperature, "ece": calibrated.ece, "ece_uncalibrated": raw.ece,
                   "reliability": calibrated.to_dict(), "reliability_uncalibrated": raw.to_dict(),
                   "fitted_in_training": model.extra.get("calibration")}
    worst = sorted((e for _, e in scored if not math.isnan(e.score)), key=lambda e: e.score)[:examples]
    result = Evaluation(name, data_dir, classes, cm, segmentation_scores(cm), [s for s, _ in scored],
                        bootstrap_mean_iou(np.stack(per_image)), calibration,
                        facts=_facts(model, name, data_dir, len(samples), _scan_fact(scan, tile, window, exact, tta,
                                                                                     notes)),
                        examples=worst, description=describe(model.net),
                        curves=Path(curves) if curves else None, kept_epoch=model.extra.get("epoch"))
    with contextlib.ExitStack() as stack:  # both files complete before either gets its final name
        if json_path is not None:
            tmp = stack.enter_context(atomic_output(json_path))
            tmp.write_bytes((json.dumps(result.to_dict(), indent=1) + "\n").encode("utf-8", ESCAPES))
        if report is not None:
            tmp = stack.enter_context(atomic_output(report))
            tmp.write_bytes(result.render_report().encode("utf-8", ESCAPES))
    if json_path is not None:
        result.paths["json"] = Path(json_path)
    if report is not None:
        result.paths["report"] = Path(report)
    return result


def _facts(model: Model, name: str, data_dir: Path, images: int, scan: str) -> dict[str, str]:
    """The report header: what was evaluated, on what, how, and where the model came from."""
    from fcnkit import __version__

    extra, m = model.extra, model.config.get("model", {})
    facts = {"model": name, "data": str(data_dir), "images": str(images), "scan": scan}
    if "trained_on" in extra:
        facts["trained on"] = str(extra["trained_on"])
    net = f"{model.kind}" + (f", widths {'-'.join(map(str, m['widths']))}, fusion {m.get('fusion', 'none')}"
                             if "widths" in m else "")
    facts["net"] = f"{net}, {model.bands} bands, {model.num_classes} classes"
    if "epoch" in extra:
        facts["kept epoch"] = f"{extra['epoch']} (validation mean IoU {_num(extra.get('val_mean_iou'))})"
    facts["temperature"] = f"{model.temperature:.3g}"
    facts["fcnkit"] = __version__
    return facts


def _scan_fact(scan: str, tile: int | None, window: str | None, exact: bool, tta: bool, notes: list[str]) -> str:
    """How the images were scanned, for the report."""
    if notes:
        return sorted(set(notes))[0] if len(set(notes)) == 1 else "; ".join(sorted(set(notes)))
    if scan in ("auto", "rows", "whole"):
        return "rows (exact)" if scan != "whole" else "whole images (exact)"
    return (f"tiles of {tile or DEFAULT_TILE} px, {window or 'hann'} window" + (", exact" if exact else "")
            + (", flip TTA" if tta else ""))
