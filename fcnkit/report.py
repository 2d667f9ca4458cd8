"""A self-contained HTML report on a segmenter's quality: one file, every image embedded as a base64 PNG.

Contents: the headline scores; a per-class table (support, accuracy, IoU, Dice); the confusion matrix as a
row-normalised heat map with counts; per-class IoU bars; training curves from a run's metrics CSV; the
worst-scoring examples side by side (image, truth, prediction, error mask, uncertainty); the net's geometry;
and a cautions paragraph. Charts are drawn with matplotlib's Agg canvas (no display, no global pyplot state);
the full numbers are also embedded as JSON (``<script id="fcnkit-metrics">``, data only) for machines.

The page runs no script and fits a 1280 px wide window (checked in headless Chromium by
tests/test_report_browser.py): charts shrink to their card, the training curves stand in at most two columns,
tables too wide for the card scroll inside their own box, and every plotted column, colour map and error
colour is named in words (``SCORE_NAMES``, ``CURVE_NAMES``, the keys under the example panels).
"""

from __future__ import annotations

import base64
import csv
import html
import io
import json
import math
import textwrap
from collections.abc import Sequence
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
from matplotlib import colormaps
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from matplotlib.ticker import MaxNLocator
from matplotlib.transforms import ScaledTranslation
from PIL import Image

from fcnkit.atomic import write_text_atomic
from fcnkit.errors import DataError
from fcnkit.inputfiles import require_regular

if TYPE_CHECKING:
    from fcnkit.data.classes import ClassTable

PANEL_SIDE = 256  # longest side of an example panel, pixels
CORRECT_RGB = (226, 231, 236)
WRONG_RGB = (214, 39, 72)
IGNORE_RGB = (40, 40, 40)
INK, ACCENT = "#1d2b36", "#0f7c82"
UNCERTAINTY_CMAP = "magma"  # dark = certain, bright = unsure

# One name per score, as the printed tables and the report say it (keys as in fcnkit.metrics.segmentation_scores).
SCORE_NAMES = {"pixel_accuracy": "pixel accuracy", "mean_accuracy": "mean accuracy", "mean_iou": "mean IoU",
               "fw_iou": "frequency-weighted IoU"}
# The columns of a training run's metrics.csv (fcnkit.train) by their human names; older or other spellings of
# the same score map to the same name.
CURVE_NAMES = {
    "train_loss": "training loss", "val_loss": "validation loss", "lr": "learning rate",
    "learning_rate": "learning rate",
    **{f"val_{k}": f"validation {v}" for k, v in SCORE_NAMES.items()},
    "val_pixel_acc": "validation pixel accuracy", "val_mean_acc": "validation mean accuracy",
    "val_miou": "validation mean IoU",
}

CAUTION = (
    "Every figure and map in this report is a statistical estimate from a model trained on few examples, "
    "measured here only on the images listed. Verify results against ground truth before relying on them. "
    "Where decisions affect safety or health (medical, structural, flood or similar), defer to review by "
    "qualified people and to the rules that apply locally."
)


@dataclass(frozen=True)
class Example:
    """One evaluated image for the side-by-side panels (arrays already reduced to preview size)."""

    name: str
    score: float  # mean IoU of this image alone
    image: np.ndarray  # H×W×3 uint8 display rendering
    truth: np.ndarray  # H×W class ids (ignore value where unlabelled)
    pred: np.ndarray  # H×W class ids
    uncertainty: np.ndarray  # H×W in [0, 1] (normalised entropy)


def shrink(array: np.ndarray, side: int = PANEL_SIDE) -> np.ndarray:
    """Nearest-neighbour subsample so the longest side is at most ``side`` (keeps class ids intact)."""
    step = max(1, math.ceil(max(array.shape[:2]) / side))
    return array[::step, ::step]


# --- image encoding -----------------------------------------------------------------------------------


def _png_uri(rgb: np.ndarray) -> str:
    buf = io.BytesIO()
    Image.fromarray(np.ascontiguousarray(rgb)).save(buf, format="PNG", optimize=True)
    return "data:image/png;base64," + base64.b64encode(buf.getvalue()).decode("ascii")


def _figure_uri(fig: Figure) -> str:
    FigureCanvasAgg(fig)
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=110, bbox_inches="tight", facecolor="white")
    return "data:image/png;base64," + base64.b64encode(buf.getvalue()).decode("ascii")


def _img(uri: str, alt: str, cls: str = "") -> str:
    c = f' class="{cls}"' if cls else ""
    return f'<img{c} src="{uri}" alt="{html.escape(alt)}">'


def _chart(fig: Figure, alt: str) -> str:
    """A matplotlib figure as an image that shrinks to its box (never wider than the card holding it)."""
    return _img(_figure_uri(fig), alt, "chart")


def colorize(ids: np.ndarray, classes: ClassTable) -> np.ndarray:
    """Class-id map → RGB through the classes' palette (ignore and unknown ids black)."""
    img = Image.fromarray(np.ascontiguousarray(ids, dtype=np.uint8))  # "L"; putpalette makes it "P"
    img.putpalette(classes.palette())
    return np.asarray(img.convert("RGB"))


def _error_rgb(truth: np.ndarray, pred: np.ndarray, ignore: int) -> np.ndarray:
    out = np.empty(truth.shape + (3,), np.uint8)
    out[:] = CORRECT_RGB
    out[truth != pred] = WRONG_RGB
    out[truth == ignore] = IGNORE_RGB
    return out


def _uncertainty_rgb(u: np.ndarray) -> np.ndarray:
    return (colormaps[UNCERTAINTY_CMAP](np.clip(u, 0, 1))[..., :3] * 255).astype(np.uint8)


# --- charts ---------------------------------------------------------------------------------------------


def confusion_figure(cm: np.ndarray, names: Sequence[str]) -> Figure:
    k = len(names)
    rows = cm.sum(axis=1, keepdims=True)
    share = np.divide(cm, rows, out=np.zeros(cm.shape), where=rows > 0)
    side = 1.6 + 0.75 * k
    fig = Figure(figsize=(side + 1.2, side))
    ax = fig.add_subplot()
    im = ax.imshow(share, cmap="GnBu", vmin=0, vmax=1)
    for i in range(k):
        for j in range(k):
            ax.text(j, i, f"{share[i, j]:.0%}\n{int(cm[i, j]):,}", ha="center", va="center", fontsize=7,
                    color="white" if share[i, j] > 0.55 else INK)
    slant = k <= 10 and max(len(n) for n in names) <= 16  # slanted labels would run into each other
    ax.set_xticks(range(k), [_wrap(n) for n in names], rotation=35 if slant else 90, ha="right" if slant else "center")
    ax.set_yticks(range(k), [_wrap(n) for n in names])
    ax.set_xlabel("predicted class")
    ax.set_ylabel("true class")
    ax.set_title("Confusion matrix (share of each true class; pixel counts)", fontsize=9, loc="left")
    fig.colorbar(im, ax=ax, fraction=0.046, pad=0.04, format=lambda v, _: f"{v:.0%}")
    return fig


def iou_figure(scores: dict[str, Any], classes: ClassTable) -> Figure:
    """IoU bars with Dice marks; the values stand in two columns a fixed distance right of the axes, clear of
    every bar and mark whatever the values and however long the class names."""
    iou = np.array([np.nan if v is None else v for v in scores["iou"]], float)
    dice = np.array([np.nan if v is None else v for v in scores["dice"]], float)
    k = len(iou)
    names = [_wrap(n) for n in classes.names]
    lines = max(n.count("\n") + 1 for n in names)
    label_width = 0.065 * max(len(line) for n in names for line in n.splitlines())  # inches, 10 pt text
    fig = Figure(figsize=(5.6 + label_width, 1.1 + (0.22 + 0.18 * lines) * k), layout="constrained")
    ax = fig.add_subplot()
    y = np.arange(k)
    colors = [tuple(c / 255 for c in rgb) for rgb in classes.colors]
    ax.barh(y, np.nan_to_num(iou), color=colors, edgecolor=INK, linewidth=0.6, label="IoU")
    ax.scatter(np.nan_to_num(dice), y, marker="|", s=220, color=INK, label="Dice", zorder=3)
    ax.axvline(scores["mean_iou"], color=ACCENT, linestyle="--", linewidth=1, label=SCORE_NAMES["mean_iou"])
    for points, head, values in ((48, "IoU", iou), (96, "Dice", dice)):  # right edge of each column
        shift = ScaledTranslation(points / 72, 0, fig.dpi_scale_trans)
        ax.text(1, 1.01, head, transform=ax.transAxes + shift, ha="right", va="bottom", fontsize=9,
                color="#55686f", fontweight="bold")
        for yi, v in zip(y, values, strict=True):  # x at the axes' right edge, y in data units, then shifted
            ax.text(1, yi, "n/a" if math.isnan(v) else f"{v:.3f}", transform=ax.get_yaxis_transform() + shift,
                    ha="right", va="center", fontsize=9, color=INK, clip_on=False)
    ax.set_yticks(y, names)
    ax.invert_yaxis()
    ax.set_xlim(0, 1)
    ax.set_xlabel("intersection over union (bars); Dice (marks)")
    ax.legend(loc="lower left", bbox_to_anchor=(0, 1), ncol=3, fontsize=7, frameon=False)
    ax.spines[["top", "right"]].set_visible(False)
    return fig


def _wrap(name: str, width: int = 24) -> str:
    """A class name broken into lines of about ``width`` characters, for tick labels."""
    return textwrap.fill(name, width, break_long_words=False) or name


def reliability_figure(curves: Sequence[tuple[str, dict[str, Any], str]]) -> Figure:
    """Reliability diagram: accuracy against mean confidence per confidence bin (Guo et al. 2017, figure 1),
    one line per (label, Reliability.to_dict(), colour), bins with no pixels left out; the diagonal is
    perfect calibration. Below it, the share of pixels in each bin."""
    fig = Figure(figsize=(4.4, 4.4))
    ax, hist = fig.subplots(2, 1, height_ratios=(3, 1), sharex=True)
    ax.plot([0, 1], [0, 1], color="#9aa7ad", linewidth=1, linestyle="--", label="perfect calibration")
    width = 1 / max(len(curves[0][1]["counts"]), 1)
    for i, (label, rel, colour) in enumerate(curves):
        pts = [(c, a) for c, a in zip(rel["confidence"], rel["accuracy"], strict=True) if c is not None]
        if pts:
            ax.plot(*zip(*pts, strict=True), marker="o", markersize=3.5, linewidth=1.5, color=colour, label=label)
        share = np.asarray(rel["counts"], float) / max(sum(rel["counts"]), 1)
        left = np.asarray(rel["edges"][:-1]) + i * width / len(curves)
        hist.bar(left, share, width=width / len(curves), align="edge", color=colour, alpha=0.8)
    ax.set_ylabel("accuracy in the bin")
    ax.set_xlim(0, 1)
    ax.set_ylim(0, 1)
    ax.legend(fontsize=7, frameon=False, loc="upper left")
    ax.grid(alpha=0.3)
    hist.set_xlabel("confidence (top-class probability)")
    hist.set_ylabel("pixels", fontsize=8)
    hist.yaxis.set_major_formatter(lambda v, _: f"{v:.0%}")
    for a in (ax, hist):
        a.spines[["top", "right"]].set_visible(False)
    fig.tight_layout()
    return fig


def read_curves(path: str | Path) -> dict[str, list[float]]:
    """Numeric columns of a metrics CSV (one row per epoch), by header name."""
    path = Path(path)
    require_regular(path, DataError)
    try:
        with open(path, newline="", encoding="utf-8") as f:
            rows = list(csv.DictReader(f))
    except (OSError, UnicodeDecodeError, csv.Error) as e:
        raise DataError(f"{path}: cannot read training metrics CSV ({e.__class__.__name__})") from None
    cols: dict[str, list[float]] = {}
    for name in rows[0].keys() if rows else ():
        try:
            cols[name] = [float(r[name]) if r[name] not in ("", None) else math.nan for r in rows]
        except ValueError:
            continue  # a text column (timestamps, notes) is not plotted
    return cols


def curve_name(column: str, classes: ClassTable | None = None) -> str:
    """The human name of a metrics CSV column: "val_miou" → "validation mean IoU", "iou_slate_roof" →
    "validation IoU of slate roof"; an unknown column gets its words spelled out."""
    if column.lower() in CURVE_NAMES:
        return CURVE_NAMES[column.lower()]
    if column.lower().startswith("iou_"):
        names = {n.replace(" ", "_"): n for n in classes.names} if classes else {}
        return f"validation IoU of {names.get(column[4:], column[4:].replace('_', ' '))}"
    words = column.replace("_", " ").split()
    spelled = {"val": "validation", "train": "training", "acc": "accuracy", "miou": "mean IoU", "iou": "IoU",
               "lr": "learning rate", "fw": "frequency-weighted"}
    return " ".join(spelled.get(w.lower(), w) for w in words)


def curves_figure(cols: dict[str, list[float]], classes: ClassTable, kept: int | None = None) -> Figure | None:
    """Training curves in at most two columns of panels (so the figure fits a report's width): losses,
    validation scores, validation IoU per class, learning rate; every line named in words."""
    x_name = next((n for n in ("epoch", "step") if n in cols), None)
    low = {n: n.lower() for n in cols}
    panels = [  # (title, words dropped from each line's name as the title says them, columns)
        ("loss", "", [n for n, lo in low.items() if "loss" in lo]),
        ("validation scores", "validation ",
         [n for n, lo in low.items() if lo.startswith("val_") and "loss" not in lo]),
        ("validation IoU per class", "validation IoU of ", [n for n, lo in low.items() if lo.startswith("iou_")]),
        ("learning rate", "learning rate", [n for n, lo in low.items() if lo in ("lr", "learning_rate")]),
    ]
    panels = [p for p in panels if p[2]]
    if not panels:
        return None
    class_rgb = {n.replace(" ", "_"): c for n, c in zip(classes.names, classes.colors, strict=True)}
    ncols = min(len(panels), 2)
    nrows = math.ceil(len(panels) / ncols)
    fig = Figure(figsize=(4.5 * ncols, 2.9 * nrows), layout="constrained")
    xs = cols[x_name] if x_name else list(range(1, len(next(iter(cols.values()))) + 1))
    for i, (title, drop, names) in enumerate(panels):
        ax = fig.add_subplot(nrows, ncols, i + 1)
        for name in names:
            label = curve_name(name, classes).removeprefix(drop) or None
            rgb = class_rgb.get(name[4:]) if name.lower().startswith("iou_") else None
            ax.plot(xs, cols[name], marker="o", markersize=3, linewidth=1.4,
                    label=label, color=None if rgb is None else tuple(c / 255 for c in rgb))
        if kept is not None:
            ax.axvline(kept, color=INK, linestyle=":", linewidth=1.2,
                       label=f"kept: epoch {kept}" if i == 0 else None)
        ax.set_title(title, fontsize=9, loc="left")
        ax.set_xlabel(x_name or "row", fontsize=8)
        ax.tick_params(labelsize=7)
        ax.xaxis.set_major_locator(MaxNLocator(integer=True, min_n_ticks=1))
        if len(xs) == 1:  # one epoch: a point in a window one epoch wide each way, not a hair-thin range
            ax.set_xlim(xs[0] - 1, xs[0] + 1)
        ax.grid(alpha=0.3)
        ax.spines[["top", "right"]].set_visible(False)
        if ax.get_legend_handles_labels()[1]:
            ax.legend(fontsize=7, frameon=False, loc="center left", bbox_to_anchor=(1.0, 0.5))
    return fig


# --- HTML -----------------------------------------------------------------------------------------------

_CSS = """
*{box-sizing:border-box}
body{font:15px/1.5 system-ui,-apple-system,"Segoe UI",sans-serif;color:#1d2b36;background:#f3f5f4;margin:0}
header{background:#1d2b36;color:#eef3f1;padding:22px 36px 18px;border-bottom:5px solid #0f7c82}
header>div{max-width:1120px;margin:0 auto}
header h1{margin:0 0 10px;font-size:22px;font-weight:600} header p{margin:10px 0 0;color:#a9bcc0;font-size:13px}
dl.facts{display:grid;grid-template-columns:repeat(auto-fill,minmax(240px,1fr));gap:8px 22px;margin:0;font-size:13px}
dl.facts div{min-width:0} dl.facts div.wide{grid-column:1/-1}
dl.facts dt{color:#a9bcc0;font-size:11px;text-transform:uppercase;letter-spacing:.05em}
dl.facts dd{margin:0;overflow-wrap:anywhere}
main{max-width:1120px;margin:0 auto;padding:8px 36px 40px}
section{background:#fff;border-radius:6px;margin:18px 0;padding:16px 22px;box-shadow:0 1px 2px #0001;min-width:0}
h2{font-size:16px;margin:0 0 12px;color:#0f7c82;letter-spacing:.02em;text-transform:uppercase}
.cards{display:flex;gap:14px;flex-wrap:wrap}
.card{flex:1 1 180px;border-left:4px solid #0f7c82;padding:6px 14px;background:#f6faf9}
.card b{display:block;font-size:26px;font-variant-numeric:tabular-nums} .card span{font-size:12px;color:#55686f}
.scroll{max-width:100%;overflow-x:auto}
table{border-collapse:collapse;font-variant-numeric:tabular-nums;font-size:14px}
th,td{padding:4px 10px;text-align:right;border-bottom:1px solid #e3e8e6} td{white-space:nowrap}
th{color:#55686f;font-weight:600;vertical-align:bottom} td small{color:#55686f}
td.name,th.name{text-align:left;white-space:normal;min-width:7em} .sw{display:inline-block;width:12px;height:12px;
margin-right:7px;border:1px solid #0004;vertical-align:-1px}
.charts{display:flex;gap:18px;flex-wrap:wrap;align-items:flex-start} .charts>div{flex:1 1 320px;min-width:0}
img.chart{display:block;max-width:100%;height:auto}
.example{margin:12px 0 18px} .example h3{font-size:14px;margin:0 0 6px;font-weight:600}
.panels{display:grid;grid-template-columns:repeat(auto-fill,minmax(150px,180px));gap:10px}
figure{margin:0;font-size:12px;color:#55686f;min-width:0}
figure img{display:block;width:100%;height:auto;image-rendering:pixelated;border:1px solid #d5dcda}
figcaption{margin-top:3px;line-height:1.3}
.key{display:flex;flex-wrap:wrap;gap:2px 10px;font-size:11px;margin-top:2px}
.ramp{height:8px;border:1px solid #d5dcda;margin-top:3px}
.ends{display:flex;justify-content:space-between;font-size:11px}
pre{background:#f6faf9;padding:10px 14px;overflow-x:auto;font-size:12.5px}
.caution{border-left:5px solid #c9822b;background:#fdf6ec}
.muted{color:#55686f;font-size:13px}
"""


def _fmt(v: Any) -> str:
    if v is None or (isinstance(v, float) and math.isnan(v)):
        return "n/a"
    return f"{v:.4f}"


def _summary_cards(scores: dict[str, Any]) -> str:
    cards = "".join(f'<div class="card" data-key="{k}"><b>{_fmt(scores[k])}</b><span>{label}</span></div>'
                    for k, label in SCORE_NAMES.items())
    return f'<div class="cards">{cards}</div>'


def _bias(predicted: int, true: int) -> str:
    return f"{predicted / true - 1:+.1%}" if true else "n/a"


def _class_table(scores: dict[str, Any], classes: ClassTable) -> str:
    support, predicted = scores["support"], scores["predicted"]
    total = sum(support) or 1
    rows = []
    for i, (cid, name, color) in enumerate(zip(classes.ids, classes.names, classes.colors, strict=True)):
        sw = f'<span class="sw" style="background:rgb{tuple(color)}"></span>'
        rows.append(
            f'<tr data-class="{html.escape(name)}"><td class="name">{sw}{html.escape(name)}</td><td>{cid}</td>'
            f'<td>{support[i]:,}</td><td>{support[i] / total:.1%}</td><td>{predicted[i]:,}</td>'
            f'<td data-key="bias">{_bias(predicted[i], support[i])}</td>'
            f'<td data-key="recall">{_fmt(scores["recall"][i])}</td>'
            f'<td data-key="precision">{_fmt(scores["precision"][i])}</td>'
            f'<td data-key="iou">{_fmt(scores["iou"][i])}</td><td data-key="dice">{_fmt(scores["dice"][i])}</td></tr>')
    head = ('<tr><th class="name">class</th><th>id</th><th>true pixels</th><th>share</th><th>predicted pixels</th>'
            '<th>bias</th><th>recall<br><small>producer\'s accuracy</small></th>'
            '<th>precision<br><small>user\'s accuracy</small></th><th>IoU</th><th>Dice</th></tr>')
    note = ('<p class="muted">Recall (producer\'s accuracy): the share of a class\'s true pixels predicted as it. '
            'Precision (user\'s accuracy): the share of pixels predicted as a class that truly are. Bias: predicted '
            '÷ true pixels − 1, how much a pixel count over- or under-states the class here.</p>')
    return f'<div class="scroll"><table id="per-class">{head}{"".join(rows)}</table></div>{note}'


def _images_html(images: Sequence[dict[str, Any]], interval: dict[str, Any] | None) -> str:
    rows = "".join(f'<tr><td class="name">{html.escape(str(im["stem"]))}</td><td>{im["labelled_pixels"]:,}</td>'
                   f'<td>{_fmt(im["pixel_accuracy"])}</td><td>{_fmt(im["mean_iou"])}</td></tr>' for im in images)
    text = ""
    if interval and interval.get("images", 0) > 1:
        text = (f'<p>Mean IoU {_fmt(interval["mean_iou"])}, 95 % interval {_fmt(interval["low"])} – '
                f'{_fmt(interval["high"])}: a percentile bootstrap resampling whole images '
                f'({interval["resamples"]:,} resamples of {interval["images"]} images; Efron &amp; Tibshirani 1993). '
                "Images, not pixels, are the units, as the pixels of one image are not independent. The interval "
                "says how much the score could move with another set of images like these.</p>")
    head = (f'<tr><th class="name">image</th><th>labelled pixels</th><th>{SCORE_NAMES["pixel_accuracy"]}</th>'
            f'<th>{SCORE_NAMES["mean_iou"]}</th></tr>')
    return f'{text}<div class="scroll"><table id="per-image">{head}{rows}</table></div>'


def _calibration_html(cal: dict[str, Any]) -> str:
    t = cal["temperature"]
    curves = [("without temperature (T = 1)", cal["reliability_uncalibrated"], "#c9822b")]
    if t != 1.0:
        curves.append((f"with the model's temperature (T = {t:.3g})", cal["reliability"], ACCENT))
    rows = [("here, with the model's temperature", cal["ece"]), ("here, without (T = 1)", cal["ece_uncalibrated"])]
    fit = cal.get("fitted_in_training") or {}
    if fit.get("fitted"):
        rows += [("validation split in training, before", fit["ece_before"]),
                 ("validation split in training, after", fit["ece_after"])]
        how = (f"The temperature T = {t:.4g} was fitted after training on {fit['pixels']:,} labelled pixels of the "
               "validation split, minimising their negative log-likelihood (temperature scaling, Guo et al. 2017); "
               "it rescales every confidence and uncertainty map without changing any label.")
    else:
        how = f"No temperature was fitted ({html.escape(fit.get('note', 'the model file has none'))})."
    table = "".join(f'<tr><td class="name">{html.escape(k)}</td><td>{_fmt(v)}</td></tr>' for k, v in rows)
    return (f'<div class="charts">{_chart(reliability_figure(curves), "reliability diagram")}<div>'
            '<div class="scroll"><table id="calibration"><tr><th class="name">expected calibration error</th>'
            f'<th>ECE</th></tr>{table}'
            f'</table></div><p class="muted">{how} ECE: the pixel-weighted gap between confidence and accuracy over 15 '
            "equal-width confidence bins (Guo et al. 2017); 0 means a pixel mapped with confidence 0.8 is right "
            "80 % of the time.</p></div></div>")


def _interval_text(v: dict[str, Any] | None, scale: float = 1.0, digits: int = 3, unit: str = "",
                   cell: bool = False) -> str:
    """"estimate ± 1.96 SE (low – high)"; as a table ``cell``, the interval goes on a second, smaller line."""
    if v is None or v.get("estimate") is None:
        return "n/a"
    low, high = (x * scale for x in v["ci95"])
    head = f"{v['estimate'] * scale:,.{digits}f} ± {1.96 * v['se'] * scale:,.{digits}f}{unit}"
    span = f"{low:,.{digits}f} – {high:,.{digits}f}"
    return f"{head}<br><small>{span}</small>" if cell else f"{head} ({span})"


def assessment_html(table: dict[str, Any]) -> str:
    """An area and accuracy assessment (fcnkit.assessment.assessment_table) as an HTML section body."""
    ha = table.get("pixel_area_m2") is not None
    rows = []
    for c in table["classes"]:
        mapped = f"{c['mapped_area_m2'] / 1e4:,.2f} ha" if ha else f"{c['mapped_pixels']:,} px"
        big = ha and c["area"]["ha"]["estimate"] is not None and abs(c["area"]["ha"]["estimate"]) >= 100
        area = _interval_text(c["area"]["ha"], digits=0 if big else 2, unit=" ha", cell=True) if ha else \
            _interval_text(c["area"]["pixels"], digits=0, unit=" px", cell=True)
        rows.append(f'<tr><td class="name">{html.escape(c["name"])}</td><td>{mapped}</td><td>{c["sample_points"]}</td>'
                    f'<td>{_interval_text(c["users_accuracy"], cell=True)}</td>'
                    f'<td>{_interval_text(c["producers_accuracy"], cell=True)}</td><td>{area}</td></tr>')
    head = ("<tr><th class=\"name\">class</th><th>mapped area</th><th>sample points</th><th>user's accuracy</th>"
            "<th>producer's accuracy</th><th>error-adjusted area</th></tr>")
    names = [c["name"] for c in table["classes"]]
    matrix = "".join("<tr><td class=\"name\">" + html.escape(n) + "</td>" + "".join(
        f"<td>{v:.4f}</td>" for v in row) + "</tr>" for n, row in zip(names, table["error_matrix_proportions"],
                                                                      strict=True))
    matrix_head = "<tr><th class=\"name\">map \\ reference</th>" + "".join(
        f"<th>{html.escape(n)}</th>" for n in names) + "</tr>"
    total = f"{table['total_area_m2'] / 1e4:,.2f} ha" if ha else f"{table['total_pixels']:,} px"
    return (f"<p>Overall accuracy {_interval_text(table['overall_accuracy'])} from {table['sample_points']:,} "
            f"reference points over {total}. Each estimate is shown ± 1.96 SE, with its 95 % interval beneath.</p>"
            f'<div class="scroll"><table id="assessment">{head}{"".join(rows)}</table></div>'
            f'<p class="muted">Error matrix in estimated area proportions (rows: map class, columns: reference '
            f'class):</p><div class="scroll"><table id="error-matrix">{matrix_head}{matrix}</table></div>'
            f'<p class="muted">{html.escape(table["method"])}. Areas counted from the map alone are biased by its '
            "errors; the error-adjusted areas correct them with the reference sample.</p>")


def _css_ramp(cmap: str, stops: int = 11) -> str:
    """A CSS gradient through a matplotlib colour map: a colour bar that needs no image."""
    rgb = (colormaps[cmap](np.linspace(0, 1, stops))[:, :3] * 255).round().astype(int)
    return "linear-gradient(to right," + ",".join(f"rgb({r},{g},{b})" for r, g, b in rgb) + ")"


def _swatch(rgb: Sequence[int], label: str) -> str:
    return f'<span><span class="sw" style="background:rgb{tuple(rgb)}"></span>{html.escape(label)}</span>'


# What the colours of the error and uncertainty panels mean, shown under each such panel.
_ERROR_KEY = ('<div class="key">' + _swatch(CORRECT_RGB, "correct") + _swatch(WRONG_RGB, "wrong")
              + _swatch(IGNORE_RGB, "unlabelled") + "</div>")
_UNCERTAINTY_KEY = (f'<div class="ramp" style="background:{_css_ramp(UNCERTAINTY_CMAP)}"></div>'
                    '<div class="ends"><span>0</span><span>0.5</span><span>1</span></div>'
                    '<div class="key">0: certain; 1: all classes equally likely</div>')


def _examples_html(examples: Sequence[Example], classes: ClassTable) -> str:
    out = []
    for ex in examples:
        panels = [
            (ex.image, "image", ""), (colorize(ex.truth, classes), "truth", ""),
            (colorize(ex.pred, classes), "prediction", ""),
            (_error_rgb(ex.truth, ex.pred, classes.ignore), "errors", _ERROR_KEY),
            (_uncertainty_rgb(ex.uncertainty), "uncertainty (normalised entropy)", _UNCERTAINTY_KEY),
        ]
        figs = "".join(f"<figure>{_img(_png_uri(a), f'{ex.name}: {cap}')}<figcaption>{html.escape(cap)}{key}"
                       f"</figcaption></figure>" for a, cap, key in panels)
        out.append(f'<div class="example"><h3>{html.escape(ex.name)} — {SCORE_NAMES["mean_iou"]} {_fmt(ex.score)}'
                   f'</h3><div class="panels">{figs}</div></div>')
    legend = "".join(_swatch(c, n) for n, c in zip(classes.names, classes.colors, strict=True))
    return f'<div class="key muted">Class colours (truth, prediction): {legend}</div>' + "".join(out)


def _json_block(data: dict[str, Any]) -> str:
    text = json.dumps(data, allow_nan=False).replace("</", "<\\/")
    return f'<script type="application/json" id="fcnkit-metrics">{text}</script>'


def json_safe(value: Any) -> Any:
    """Replace NaN/inf floats (undefined scores) with None, recursively, so strict JSON can hold them."""
    if isinstance(value, float):
        return None if not math.isfinite(value) else value
    if isinstance(value, dict):
        return {k: json_safe(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [json_safe(v) for v in value]
    if isinstance(value, np.generic):
        return json_safe(value.item())
    return value


def render_report(scores: dict[str, Any], cm: np.ndarray, classes: ClassTable, *, title: str = "Segmentation report",
                  facts: dict[str, str] | None = None, curves: str | Path | None = None,
                  examples: Sequence[Example] = (), description: dict[str, Any] | None = None,
                  images: Sequence[dict[str, Any]] = (), interval: dict[str, Any] | None = None,
                  calibration: dict[str, Any] | None = None, kept_epoch: int | None = None,
                  assessment: dict[str, Any] | None = None) -> str:
    """The report as one HTML string (see the module docstring).

    ``scores`` is :func:`fcnkit.metrics.segmentation_scores` of ``cm``; ``facts`` are short label → value
    lines for the header (model, data, images…); ``curves`` a training metrics CSV (``kept_epoch`` marked on
    it); ``description`` the output of :func:`fcnkit.describe`; ``images`` per-image scores with ``interval``
    (:func:`fcnkit.metrics.bootstrap_mean_iou`); ``calibration`` the reliability of the confidences
    (:class:`fcnkit.evaluate.Evaluation`); ``assessment`` an area and accuracy assessment from a reference
    sample (:func:`fcnkit.assessment.assessment_table`).
    """
    from fcnkit.describe import format_description

    cm = np.asarray(cm)
    scores = json_safe(scores)
    parts = [
        _header(title, facts, kept_epoch),
        f'<section><h2>Scores</h2>{_summary_cards(scores)}<p class="muted">Over {int(cm.sum()):,} labelled '
        "pixels; unlabelled (ignore) pixels are not counted. Definitions: Long, Shelhamer &amp; Darrell 2015, "
        "section 5.</p></section>",
        f"<section><h2>Per class</h2>{_class_table(scores, classes)}</section>",
        *([f"<section><h2>Per image</h2>{_images_html(images, interval)}</section>"] if images else []),
        *([f"<section><h2>Calibration of the confidences</h2>{_calibration_html(json_safe(calibration))}</section>"]
          if calibration else []),
        f'<section><h2>Where the errors are</h2><div class="charts">'
        f'{_chart(confusion_figure(cm, classes.names), "confusion matrix")}'
        f'{_chart(iou_figure(scores, classes), "per-class IoU and Dice")}</div></section>',
    ]
    chart = curves_figure(read_curves(curves), classes, kept_epoch) if curves else None
    if chart:
        kept = (f" Dotted line: epoch {kept_epoch}, whose weights the model holds (the best validation "
                f"{SCORE_NAMES['mean_iou']})." if kept_epoch is not None else "")
        parts.append(f'<section><h2>Training</h2>{_chart(chart, "training curves")}'
                     f'<p class="muted">From {html.escape(str(curves))}.{kept}</p></section>')
    if examples:
        parts.append(f"<section><h2>Worst-scoring examples</h2>{_examples_html(examples, classes)}</section>")
    if assessment:
        parts.append(f"<section><h2>Accuracy and area estimates from a reference sample</h2>"
                     f"{assessment_html(json_safe(assessment))}</section>")
    if description:
        parts.append(f"<section><h2>The net</h2><pre>{html.escape(format_description(description))}</pre>"
                     "</section>")
    parts.append(f'<section class="caution"><h2>Cautions</h2><p>{CAUTION}</p></section></main>')
    payload = json_safe({"scores": scores, "confusion_matrix": cm.astype(int).tolist(),
                         "classes": list(classes.names), "facts": facts or {}, "images": list(images),
                         "mean_iou_interval": interval, "calibration": calibration, "assessment": assessment})
    return _page(title, "".join(parts) + _json_block(payload))


def _page(title: str, body: str) -> str:
    return (f'<!DOCTYPE html><html lang="en"><head><meta charset="utf-8"><title>{html.escape(title)}</title>'
            f'<meta name="viewport" content="width=device-width,initial-scale=1"><style>{_CSS}</style></head>'
            f"<body>{body}</body></html>\n")


def _header(title: str, facts: dict[str, str] | None, kept_epoch: int | None = None) -> str:
    """Title, then the facts as a definition list that wraps in columns (long paths take a whole line)."""
    from fcnkit import __version__

    facts = dict(facts or {})
    if kept_epoch is not None and "kept epoch" not in facts:
        facts["kept epoch"] = str(kept_epoch)
    when = datetime.now(UTC).strftime("%Y-%m-%d %H:%M UTC")
    by = "" if "fcnkit" in facts else f" by fcnkit {__version__}"  # the version, unless a fact already says it
    items = "".join(f'<div{" class=wide" if len(str(v)) > 60 else ""}><dt>{html.escape(k)}</dt>'
                    f"<dd>{html.escape(str(v))}</dd></div>" for k, v in facts.items())
    dl = f'<dl class="facts">{items}</dl>' if items else ""
    return f"<header><div><h1>{html.escape(title)}</h1>{dl}<p>written {when}{by}</p></div></header><main>"


def write_assessment_report(path: str | Path, table: dict[str, Any], *, title: str = "Accuracy and area assessment",
                            facts: dict[str, str] | None = None) -> Path:
    """A report of an area and accuracy assessment alone (fcnkit.assessment.assessment_table), atomically."""
    path = Path(path)
    body = (_header(title, facts) + f"<section><h2>Accuracy and area estimates from a reference sample</h2>"
            f"{assessment_html(json_safe(table))}</section>"
            f'<section class="caution"><h2>Cautions</h2><p>{CAUTION}</p></section></main>'
            + _json_block(json_safe({"assessment": table, "facts": facts or {}})))
    write_text_atomic(path, _page(title, body))
    return path


def write_report(path: str | Path, scores: dict[str, Any], cm: np.ndarray, classes: ClassTable,
                 **kwargs: Any) -> Path:
    """Render the report (see :func:`render_report`) and write it atomically to ``path``."""
    path = Path(path)
    write_text_atomic(path, render_report(scores, cm, classes, **kwargs))
    return path
