"""Accuracy and area from a stratified reference sample (pure arithmetic, no I/O).

Estimators of Olofsson, Foody, Herold, Stehman, Woodcock & Wulder 2014, "Good practices for estimating area
and assessing accuracy of land change", Remote Sensing of Environment 148: 42–57, for stratified random
sampling with the map classes as strata. With N_i mapped pixels in stratum i, W_i = N_i / N its weight and
n_ij the sample points of map class i whose reference class is j (n_i· = Σ_j n_ij):

* error matrix in area proportions   p_ij = W_i n_ij / n_i·
* overall accuracy                    O = Σ_j p_jj,   V(O) = Σ_i W_i² U_i (1 − U_i) / (n_i· − 1)
* user's accuracy of class i          U_i = p_ii / p_i·,   V(U_i) = U_i (1 − U_i) / (n_i· − 1)
* producer's accuracy of class j      P_j = p_jj / p_·j,   V(P_j) = N̂_·j⁻² [ N_j·² (1 − P_j)² U_j (1 − U_j) / (n_j· − 1)
                                          + P_j² Σ_{i≠j} N_i·² (n_ij / n_i·)(1 − n_ij / n_i·) / (n_i· − 1) ],
                                      N̂_·j = Σ_i N_i· n_ij / n_i·
* area proportion of class k          p_·k = Σ_i W_i n_ik / n_i·,
                                      SE(p_·k) = √ Σ_i W_i² (n_ik / n_i·)(1 − n_ik / n_i·) / (n_i· − 1)
* error-adjusted area                 A_k = A p_·k ± 1.96 A SE(p_·k)  (A: mapped area in total)

Intervals are the paper's normal ones, estimate ± 1.96 SE, not clipped to [0, 1] or to positive areas.
Sample size (the paper's section on sample size, after Cochran 1977, "Sampling techniques", 3rd ed.):
n = (Σ_i W_i S_i / S(O))², S_i = √(U_i (1 − U_i)) with U_i the anticipated user's accuracies and S(O) the
target standard error of overall accuracy.

The core functions broadcast over leading axes, so a Monte Carlo study evaluates thousands of samples at once.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

Z95 = 1.96  # two-sided 95 % normal quantile as used by Olofsson et al. 2014
CAUTION = ("Statistical estimates from a reference sample: they are as good as the sample design and the reference "
           "labels. Where decisions affect people, property or safety, have them verified by qualified people "
           "under local rules.")


def _div(num: np.ndarray, den: np.ndarray) -> np.ndarray:
    """num / den with NaN where den == 0."""
    num, den = np.broadcast_arrays(np.asarray(num, np.float64), np.asarray(den, np.float64))
    out = np.full(num.shape, np.nan)
    np.divide(num, den, out=out, where=den != 0)
    return out


@dataclass(frozen=True)
class StratifiedEstimates:
    """Estimates and standard errors; arrays over classes (with any leading axes of the input counts)."""

    weights: np.ndarray  # W_i, stratum weights (mapped area proportions)
    proportions: np.ndarray  # p_ij, error matrix in estimated area proportions (rows map, columns reference)
    overall: np.ndarray
    overall_se: np.ndarray
    users: np.ndarray
    users_se: np.ndarray
    producers: np.ndarray
    producers_se: np.ndarray
    area: np.ndarray  # p_·k, estimated area proportion of each reference class
    area_se: np.ndarray


def stratified_estimates(sample_counts: Any, mapped_pixels: Any) -> StratifiedEstimates:
    """Olofsson et al. 2014 estimators from a K×K sample error matrix (rows map class, columns reference
    class; leading axes allowed) and the K mapped pixel counts. Strata with no mapped pixels must have no
    sample; a stratum with pixels needs at least two sample points (variances divide by n_i· − 1)."""
    n = np.asarray(sample_counts, dtype=np.float64)
    mapped = np.asarray(mapped_pixels, dtype=np.float64)
    k = mapped.shape[-1]
    if mapped.ndim != 1 or n.shape[-2:] != (k, k):
        raise ValueError(f"sample error matrix of shape {n.shape} does not match {k} mapped classes")
    if (n < 0).any() or (mapped < 0).any() or mapped.sum() <= 0:
        raise ValueError("counts must be non-negative and some pixels mapped")
    ni = n.sum(axis=-1)  # n_i·
    if ((mapped > 0) & (ni < 2)).any():
        raise ValueError("every stratum with mapped pixels needs at least two sample points")
    w = mapped / mapped.sum()
    frac = _div(n, ni[..., None])  # n_ij / n_i·
    frac = np.where(w[:, None] > 0, frac, 0.0)  # empty strata weigh nothing
    inv = np.where(w > 0, _div(np.ones_like(ni), ni - 1), 0.0)  # 1 / (n_i· − 1)
    p = w[:, None] * frac
    diag = np.diagonal(p, axis1=-2, axis2=-1)
    row, col = p.sum(axis=-1), p.sum(axis=-2)
    users = _div(diag, row)
    producers = _div(diag, col)
    u_var = np.where(w > 0, np.nan_to_num(users) * (1 - np.nan_to_num(users)), 0.0) * inv
    overall = diag.sum(axis=-1)
    overall_var = (w ** 2 * u_var).sum(axis=-1)
    cell_var = (w ** 2 * inv)[..., None] * frac * (1 - frac)  # W_i² (n_ij/n_i·)(1 − n_ij/n_i·)/(n_i· − 1)
    area_var = cell_var.sum(axis=-2)
    # producer's accuracy, with weights in place of pixel counts (both sides of the ratio scale by N²)
    off = area_var - np.diagonal(cell_var, axis1=-2, axis2=-1)  # Σ_{i≠j}
    prod_var = _div(w ** 2 * (1 - producers) ** 2 * u_var + producers ** 2 * off, col ** 2)
    return StratifiedEstimates(weights=w, proportions=p, overall=overall, overall_se=np.sqrt(overall_var),
                               users=users, users_se=np.sqrt(np.where(w > 0, u_var, np.nan)),
                               producers=producers, producers_se=np.sqrt(prod_var), area=col,
                               area_se=np.sqrt(area_var))


def plan_sample_size(mapped_pixels: Sequence[float], expected_users_accuracy: float | Sequence[float],
                     target_se: float = 0.01) -> int:
    """Total sample size giving overall accuracy the standard error ``target_se`` (Cochran 1977, as in
    Olofsson et al. 2014): n = (Σ W_i √(U_i (1 − U_i)) / S(O))², rounded up; U_i anticipated per class
    (one value for all, or one per class)."""
    mapped = np.asarray(mapped_pixels, dtype=np.float64)
    if mapped.ndim != 1 or (mapped < 0).any() or mapped.sum() <= 0:
        raise ValueError("mapped pixel counts must be non-negative, some positive")
    u = np.broadcast_to(np.asarray(expected_users_accuracy, dtype=np.float64), mapped.shape)
    if ((u <= 0) | (u >= 1)).any():
        raise ValueError("anticipated user's accuracies must lie strictly between 0 and 1")
    if not 0 < target_se < 1:
        raise ValueError(f"target standard error {target_se} (expected between 0 and 1)")
    w = mapped / mapped.sum()
    return math.ceil(round(float((w @ np.sqrt(u * (1 - u)) / target_se) ** 2), 9))


def allocate_sample(total: int, mapped_pixels: Sequence[int], minimum: int = 50) -> np.ndarray:
    """Sample points per stratum: proportional to mapped area with a floor.

    Rule: every stratum with pixels gets at least ``min(minimum, its pixels)`` points; the strata whose
    proportional share of what remains would fall below that floor are set to it, the rest of ``total`` is
    shared among the others in proportion to their pixels (repeated until stable), and no stratum gets more
    points than it has pixels. Shares are made whole by largest remainders. Rare classes so get enough points
    for their user's accuracy while the large ones keep proportional allocation, a compromise recommended by
    Olofsson et al. 2014. When the floors alone exceed ``total``, the floors win (the result sums to more).
    """
    mapped = np.asarray(mapped_pixels, dtype=np.int64)
    if mapped.ndim != 1 or (mapped < 0).any():
        raise ValueError("mapped pixel counts must be non-negative")
    if total < 0 or minimum < 0:
        raise ValueError("sample size and minimum must be non-negative")
    floor = np.minimum(minimum, mapped)
    fixed = np.full(mapped.shape, -1, np.int64)  # -1: shared proportionally
    fixed[mapped == 0] = 0
    while True:
        free = fixed < 0
        rest = max(0, total - int(fixed[~free].sum()))
        share = rest * mapped[free] / max(1, mapped[free].sum())
        low = share < floor[free]
        high = share > mapped[free]
        if not (low.any() or high.any()):
            break
        idx = np.flatnonzero(free)
        fixed[idx[low]] = floor[idx[low]]
        fixed[idx[high]] = mapped[idx[high]]
    out = fixed.copy()
    free = fixed < 0
    if free.any():
        base = np.floor(share).astype(np.int64)
        extra = rest - int(base.sum())
        order = np.argsort(-(share - base), kind="stable")[:extra]
        base[order] += 1
        out[free] = base
    return out


def _interval(estimate: float, se: float) -> dict[str, Any]:
    ok = math.isfinite(estimate) and math.isfinite(se)
    return {"estimate": estimate if math.isfinite(estimate) else None, "se": se if math.isfinite(se) else None,
            "ci95": [estimate - Z95 * se, estimate + Z95 * se] if ok else None}


def assessment_table(sample_counts: Any, mapped_pixels: Sequence[int], *, names: Sequence[str] | None = None,
                     ids: Sequence[int] | None = None, pixel_area_m2: float | None = None) -> dict[str, Any]:
    """The estimates as a JSON-ready dict for files and reports: overall accuracy, and per class its mapped
    pixels, weight, sample points, user's and producer's accuracy and error-adjusted area (proportion, pixels,
    m² and ha when the pixel area is known), each with SE and 95 % interval; both error matrices."""
    counts = np.asarray(sample_counts, dtype=np.int64)
    mapped = np.asarray(mapped_pixels, dtype=np.int64)
    est = stratified_estimates(counts, mapped)
    k = len(mapped)
    ids = list(range(k)) if ids is None else [int(i) for i in ids]
    names = [f"class {i}" for i in ids] if names is None else [str(s) for s in names]
    total = int(mapped.sum())
    classes = []
    for i in range(k):
        area: dict[str, Any] = {"proportion": _interval(float(est.area[i]), float(est.area_se[i])),
                                "pixels": _interval(total * float(est.area[i]), total * float(est.area_se[i]))}
        if pixel_area_m2 is not None:
            m2 = total * pixel_area_m2
            area["m2"] = _interval(m2 * float(est.area[i]), m2 * float(est.area_se[i]))
            area["ha"] = _interval(m2 / 1e4 * float(est.area[i]), m2 / 1e4 * float(est.area_se[i]))
        classes.append({
            "id": ids[i], "name": names[i], "mapped_pixels": int(mapped[i]), "weight": float(est.weights[i]),
            "mapped_area_m2": None if pixel_area_m2 is None else float(mapped[i] * pixel_area_m2),
            "sample_points": int(counts[i].sum()), "reference_points": int(counts[:, i].sum()),
            "users_accuracy": _interval(float(est.users[i]), float(est.users_se[i])),
            "producers_accuracy": _interval(float(est.producers[i]), float(est.producers_se[i])),
            "area": area,
        })
    return {
        "method": "stratified random sample, map classes as strata; estimators of Olofsson et al. 2014 "
                  "(Remote Sensing of Environment 148: 42-57); 95 % intervals = estimate ± 1.96 SE",
        "total_pixels": total, "pixel_area_m2": pixel_area_m2,
        "total_area_m2": None if pixel_area_m2 is None else total * pixel_area_m2,
        "sample_points": int(counts.sum()),
        "overall_accuracy": _interval(float(est.overall), float(est.overall_se)),
        "classes": classes,
        "error_matrix_counts": counts.tolist(),
        "error_matrix_proportions": est.proportions.tolist(),
        "caution": CAUTION,
    }


TABLE_FIELDS = ("quantity", "class_id", "class", "reference_id", "reference", "estimate", "se", "ci95_low",
                "ci95_high", "unit")


def assessment_rows(table: dict[str, Any]) -> list[dict[str, Any]]:
    """``assessment_table`` as tidy rows (``TABLE_FIELDS``) for a CSV file: one quantity per row."""
    rows: list[dict[str, Any]] = []

    def add(quantity: str, value: dict[str, Any], unit: str, c: dict[str, Any] | None = None,
            ref: dict[str, Any] | None = None) -> None:
        lo, hi = value["ci95"] or (None, None)
        rows.append({"quantity": quantity, "class_id": c["id"] if c else None, "class": c["name"] if c else None,
                     "reference_id": ref["id"] if ref else None, "reference": ref["name"] if ref else None,
                     "estimate": value["estimate"], "se": value["se"], "ci95_low": lo, "ci95_high": hi,
                     "unit": unit})

    add("overall_accuracy", table["overall_accuracy"], "fraction")
    for c in table["classes"]:
        add("users_accuracy", c["users_accuracy"], "fraction", c)
        add("producers_accuracy", c["producers_accuracy"], "fraction", c)
        for unit, key in (("fraction", "proportion"), ("pixels", "pixels"), ("m2", "m2"), ("ha", "ha")):
            if key in c["area"]:
                add("area", c["area"][key], unit, c)
        add("mapped_pixels", {"estimate": c["mapped_pixels"], "se": None, "ci95": None}, "pixels", c)
    for c, row in zip(table["classes"], table["error_matrix_proportions"], strict=True):
        for ref, p in zip(table["classes"], row, strict=True):
            add("error_matrix_proportion", {"estimate": p, "se": None, "ci95": None}, "fraction", c, ref)
    return rows
