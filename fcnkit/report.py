"""A self-contained HTML report on a segmenter's quality: one file, every image embedded as a base64 PNG.

Contents: the headline scores; a per-class table (support, accuracy, IoU, Dice); the confusion matrix as a
row-normalised heat map with counts; per-class IoU bars; training curves from a run's metrics CSV; the
worst-scoring examples side by side (image, truth, prediction, error mask, uncertainty); the net's geometry;
and a cautions paragraph. Charts are drawn with matplotlib's Agg canvas (no display, no global pyplot state);
the full numbers are also embedded as JSON (``<script id="fcnkit-metrics">``) for machines.
"""

from __future__ import annotations

import base64
import csv
import html
import io
import json
import math
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
from PIL import Image

from fcnkit.atomic import write_text_atomic
from fcnkit.errors import DataError

if TYPE_CHECKING:
    from fcnkit.data.classes import ClassTable

PANEL_SIDE = 256  # longest side of an example panel, pixels
CORRECT_RGB = (226, 231, 236)
WRONG_RGB = (214, 39, 72)
IGNORE_RGB = (40, 40, 40)
INK, ACCENT = "#1d2b36", "#0f7c82"

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
    return (colormaps["magma"](np.clip(u, 0, 1))[..., :3] * 255).astype(np.uint8)


# --- charts ---------------------------------------------------------------------------------------------


def _confusion_chart(cm: np.ndarray, names: Sequence[str]) -> str:
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
    ax.set_xticks(range(k), names, rotation=35, ha="right")
    ax.set_yticks(range(k), names)
    ax.set_xlabel("predicted class")
    ax.set_ylabel("true class")
    ax.set_title("Confusion matrix (share of each true class; pixel counts)", fontsize=9, loc="left")
    fig.colorbar(im, ax=ax, fraction=0.046, pad=0.04, format=lambda v, _: f"{v:.0%}")
    return _figure_uri(fig)


def _iou_chart(scores: dict[str, Any], classes: ClassTable) -> str:
    iou = np.array([np.nan if v is None else v for v in scores["iou"]], float)
    dice = np.array([np.nan if v is None else v for v in scores["dice"]], float)
    k = len(iou)
    fig = Figure(figsize=(6.4, 0.9 + 0.42 * k))
    ax = fig.add_subplot()
    y = np.arange(k)
    colors = [tuple(c / 255 for c in rgb) for rgb in classes.colors]
    ax.barh(y, np.nan_to_num(iou), color=colors, edgecolor=INK, linewidth=0.6, label="IoU")
    ax.scatter(np.nan_to_num(dice), y, marker="|", s=220, color=INK, label="Dice", zorder=3)
    for yi, v in zip(y, iou, strict=True):
        ax.text(0.01 if math.isnan(v) else min(v, 0.9) + 0.01, yi, "n/a" if math.isnan(v) else f"{v:.3f}",
                va="center", fontsize=8, color=INK)
    ax.axvline(scores["mean_iou"], color=ACCENT, linestyle="--", linewidth=1, label="mean IoU")
    ax.set_yticks(y, classes.names)
    ax.invert_yaxis()
    ax.set_xlim(0, 1)
    ax.set_xlabel("intersection over union")
    ax.legend(loc="lower left", bbox_to_anchor=(0, 1), ncol=3, fontsize=7, frameon=False)
    ax.spines[["top", "right"]].set_visible(False)
    return _figure_uri(fig)


def _reliability_chart(curves: Sequence[tuple[str, dict[str, Any], str]]) -> str:
    """Reliability diagram: accuracy against mean confidence per confidence bin (Guo et al. 2017, figure 1),
    one line per (label, Reliability.to_dict(), colour), bins with no pixels left out; the diagonal is
    perfect calibration. Below it, the share of pixels in each bin."""
    fig = Figure(figsize=(4.6, 4.8))
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
    return _figure_uri(fig)


def read_curves(path: str | Path) -> dict[str, list[float]]:
    """Numeric columns of a metrics CSV (one row per epoch), by header name."""
    path = Path(path)
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


def _curves_chart(cols: dict[str, list[float]], classes: ClassTable, kept: int | None = None) -> str | None:
    x_name = next((n for n in ("epoch", "step") if n in cols), None)
    low = {n: n.lower() for n in cols}
    panels = [  # (title, prefix dropped from the legend, columns)
        ("loss", "", [n for n, lo in low.items() if "loss" in lo]),
        ("validation scores", "val_", [n for n, lo in low.items() if lo.startswith("val_") and "loss" not in lo]),
        ("per-class validation IoU", "iou_", [n for n, lo in low.items() if lo.startswith("iou_")]),
        ("learning rate", "", [n for n, lo in low.items() if lo in ("lr", "learning_rate")]),
    ]
    panels = [p for p in panels if p[2]]
    if not panels:
        return None
    class_rgb = {n.replace(" ", "_"): c for n, c in zip(classes.names, classes.colors, strict=True)}
    fig = Figure(figsize=(3.2 * len(panels), 2.8))
    for i, (title, prefix, names) in enumerate(panels):
        ax = fig.add_subplot(1, len(panels), i + 1)
        for name in names:
            x = cols[x_name] if x_name else list(range(1, len(cols[name]) + 1))
            label = name[len(prefix):]
            rgb = class_rgb.get(label) if prefix == "iou_" else None
            ax.plot(x, cols[name], marker="o", markersize=3, linewidth=1.4, label=label,
                    color=None if rgb is None else tuple(c / 255 for c in rgb))
        if kept is not None:
            ax.axvline(kept, color=INK, linestyle=":", linewidth=1.2, label=f"kept: epoch {kept}")
        ax.set_title(title, fontsize=9, loc="left")
        ax.set_xlabel(x_name or "row")
        ax.xaxis.set_major_locator(MaxNLocator(integer=True))
        ax.grid(alpha=0.3)
        ax.spines[["top", "right"]].set_visible(False)
        ax.legend(fontsize=7, frameon=False)
    fig.tight_layout()
    return _figure_uri(fig)


# --- HTML -----------------------------------------------------------------------------------------------

_CSS = """
body{font:15px/1.5 system-ui,-apple-system,"Segoe UI",sans-serif;color:#1d2b36;background:#f3f5f4;margin:0}
header{background:#1d2b36;color:#eef3f1;padding:22px 36px 18px;border-bottom:5px solid #0f7c82}
header h1{margin:0 0 4px;font-size:22px;font-weight:600} header p{margin:0;color:#a9bcc0;font-size:13px}
main{max-width:1120px;margin:0 auto;padding:8px 36px 40px}
section{background:#fff;border-radius:6px;margin:18px 0;padding:16px 22px;box-shadow:0 1px 2px #0001}
h2{font-size:16px;margin:0 0 12px;color:#0f7c82;letter-spacing:.02em;text-transform:uppercase}
.cards{display:flex;gap:14px;flex-wrap:wrap}
.card{flex:1 1 180px;border-left:4px solid #0f7c82;padding:6px 14px;background:#f6faf9}
.card b{display:block;font-size:26px;font-variant-numeric:tabular-nums} .card span{font-size:12px;color:#55686f}
table{border-collapse:collapse;font-variant-numeric:tabular-nums;font-size:14px}
th,td{padding:4px 12px;text-align:right;border-bottom:1px solid #e3e8e6} th{color:#55686f;font-weight:600}
td.name,th.name{text-align:left} .sw{display:inline-block;width:12px;height:12px;margin-right:7px;
border:1px solid #0004;vertical-align:-1px}
.charts{display:flex;gap:18px;flex-wrap:wrap;align-items:flex-start} .charts img{max-width:100%}
.example{margin:12px 0 18px} .example h3{font-size:14px;margin:0 0 6px;font-weight:600}
.panels{display:flex;gap:8px;flex-wrap:wrap} figure{margin:0;text-align:center;font-size:12px;color:#55686f}
figure img{display:block;max-width:200px;image-rendering:pixelated;border:1px solid #d5dcda}
pre{background:#f6faf9;padding:10px 14px;overflow-x:auto;font-size:12.5px}
.caution{border-left:5px solid #c9822b;background:#fdf6ec}
.muted{color:#55686f;font-size:13px}
"""


def _fmt(v: Any) -> str:
    if v is None or (isinstance(v, float) and math.isnan(v)):
        return "n/a"
    return f"{v:.4f}"


def _summary_cards(scores: dict[str, Any]) -> str:
    items = [("pixel_accuracy", "pixel accuracy"), ("mean_accuracy", "mean accuracy"),
             ("mean_iou", "mean IoU"), ("fw_iou", "frequency-weighted IoU")]
    cards = "".join(f'<div class="card" data-key="{k}"><b>{_fmt(scores[k])}</b><span>{label}</span></div>'
                    for k, label in items)
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
            f'<td data-key="accuracy">{_fmt(scores["accuracy"][i])}</td>'
            f'<td data-key="precision">{_fmt(scores["precision"][i])}</td>'
            f'<td data-key="iou">{_fmt(scores["iou"][i])}</td><td data-key="dice">{_fmt(scores["dice"][i])}</td></tr>')
    head = ('<tr><th class="name">class</th><th>id</th><th>true pixels</th><th>share</th><th>predicted pixels</th>'
            '<th>bias</th><th>recall<br><small>producer\'s accuracy</small></th>'
            '<th>precision<br><small>user\'s accuracy</small></th><th>IoU</th><th>Dice</th></tr>')
    note = ('<p class="muted">Recall (producer\'s accuracy): the share of a class\'s true pixels predicted as it. '
            'Precision (user\'s accuracy): the share of pixels predicted as a class that truly are. Bias: predicted '
            '÷ true pixels − 1, how much a pixel count over- or under-states the class here.</p>')
    return f'<table id="per-class">{head}{"".join(rows)}</table>{note}'


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
    head = '<tr><th class="name">image</th><th>labelled pixels</th><th>pixel accuracy</th><th>mean IoU</th></tr>'
    return f'{text}<table id="per-image">{head}{rows}</table>'


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
    return (f'<div class="charts">{_img(_reliability_chart(curves), "reliability diagram")}<div>'
            f'<table id="calibration"><tr><th class="name">expected calibration error</th><th>ECE</th></tr>{table}'
            f'</table><p class="muted">{how} ECE: the pixel-weighted gap between confidence and accuracy over 15 '
            "equal-width confidence bins (Guo et al. 2017); 0 means a pixel mapped with confidence 0.8 is right "
            "80 % of the time.</p></div></div>")


def _interval_text(v: dict[str, Any], scale: float = 1.0, digits: int = 3) -> str:
    if v is None or v.get("estimate") is None:
        return "n/a"
    low, high = (x * scale for x in v["ci95"])
    return f"{v['estimate'] * scale:,.{digits}f} ± {1.96 * v['se'] * scale:,.{digits}f} ({low:,.{digits}f} – " \
           f"{high:,.{digits}f})"


def assessment_html(table: dict[str, Any]) -> str:
    """An area and accuracy assessment (fcnkit.assessment.assessment_table) as an HTML section body."""
    ha = table.get("pixel_area_m2") is not None
    rows = []
    for c in table["classes"]:
        mapped = f"{c['mapped_area_m2'] / 1e4:,.2f} ha" if ha else f"{c['mapped_pixels']:,} px"
        big = ha and c["area"]["ha"]["estimate"] is not None and abs(c["area"]["ha"]["estimate"]) >= 100
        area = _interval_text(c["area"]["ha"], digits=0 if big else 2) + " ha" if ha else \
            _interval_text(c["area"]["pixels"], digits=0) + " px"
        rows.append(f'<tr><td class="name">{html.escape(c["name"])}</td><td>{mapped}</td><td>{c["sample_points"]}</td>'
                    f'<td>{_interval_text(c["users_accuracy"])}</td><td>{_interval_text(c["producers_accuracy"])}</td>'
                    f"<td>{area}</td></tr>")
    head = ("<tr><th class=\"name\">class</th><th>mapped area</th><th>sample points</th><th>user's accuracy</th>"
            "<th>producer's accuracy</th><th>error-adjusted area, 95 % interval</th></tr>")
    names = [c["name"] for c in table["classes"]]
    matrix = "".join("<tr><td class=\"name\">" + html.escape(n) + "</td>" + "".join(
        f"<td>{v:.4f}</td>" for v in row) + "</tr>" for n, row in zip(names, table["error_matrix_proportions"],
                                                                      strict=True))
    matrix_head = "<tr><th class=\"name\">map \\ reference</th>" + "".join(
        f"<th>{html.escape(n)}</th>" for n in names) + "</tr>"
    total = f"{table['total_area_m2'] / 1e4:,.2f} ha" if ha else f"{table['total_pixels']:,} px"
    return (f"<p>Overall accuracy {_interval_text(table['overall_accuracy'])} from {table['sample_points']:,} "
            f"reference points over {total}; estimate ± 1.96 SE (95 % interval).</p>"
            f'<table id="assessment">{head}{"".join(rows)}</table>'
            f'<p class="muted">Error matrix in estimated area proportions (rows: map class, columns: reference '
            f'class):</p><table id="error-matrix">{matrix_head}{matrix}</table>'
            f'<p class="muted">{html.escape(table["method"])}. Areas counted from the map alone are biased by its '
            "errors; the error-adjusted areas correct them with the reference sample.</p>")


def _examples_html(examples: Sequence[Example], classes: ClassTable) -> str:
    out = []
    for ex in examples:
        panels = [
            (ex.image, "image"), (colorize(ex.truth, classes), "truth"), (colorize(ex.pred, classes), "prediction"),
            (_error_rgb(ex.truth, ex.pred, classes.ignore), "errors (red; dark = unlabelled)"),
            (_uncertainty_rgb(ex.uncertainty), "uncertainty (bright = unsure)"),
        ]
        figs = "".join(f"<figure>{_img(_png_uri(a), f'{ex.name}: {cap}')}<figcaption>{html.escape(cap)}"
                       f"</figcaption></figure>" for a, cap in panels)
        out.append(f'<div class="example"><h3>{html.escape(ex.name)} — mean IoU {_fmt(ex.score)}</h3>'
                   f'<div class="panels">{figs}</div></div>')
    legend = " ".join(f'<span class="sw" style="background:rgb{tuple(c)}"></span>{html.escape(n)}'
                      for n, c in zip(classes.names, classes.colors, strict=True))
    return f'<p class="muted">Class colours: {legend}</p>' + "".join(out)


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
        _header(title, facts),
        f'<section><h2>Scores</h2>{_summary_cards(scores)}<p class="muted">Over {int(cm.sum()):,} labelled '
        "pixels; unlabelled (ignore) pixels are not counted. Definitions: Long, Shelhamer &amp; Darrell 2015, "
        "section 5.</p></section>",
        f"<section><h2>Per class</h2>{_class_table(scores, classes)}</section>",
        *([f"<section><h2>Per image</h2>{_images_html(images, interval)}</section>"] if images else []),
        *([f"<section><h2>Calibration of the confidences</h2>{_calibration_html(json_safe(calibration))}</section>"]
          if calibration else []),
        f'<section><h2>Where the errors are</h2><div class="charts">'
        f'{_img(_confusion_chart(cm, classes.names), "confusion matrix")}'
        f'{_img(_iou_chart(scores, classes), "per-class IoU")}</div></section>',
    ]
    chart = _curves_chart(read_curves(curves), classes, kept_epoch) if curves else None
    if chart:
        parts.append(f'<section><h2>Training</h2>{_img(chart, "training curves")}'
                     f'<p class="muted">From {html.escape(str(curves))}.</p></section>')
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


def _header(title: str, facts: dict[str, str] | None) -> str:
    when = datetime.now(UTC).strftime("%Y-%m-%d %H:%M UTC")
    fact_line = " · ".join(f"{html.escape(k)}: {html.escape(str(v))}" for k, v in (facts or {}).items())
    return f'<header><h1>{html.escape(title)}</h1><p>{fact_line}</p><p>written {when}</p></header><main>'


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
