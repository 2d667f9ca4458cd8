"""Calibrated class probabilities: temperature scaling, reliability diagrams and expected calibration error.

Pure arithmetic on arrays (no I/O). Method: Guo, Pleiss, Sun & Weinberger 2017, "On calibration of modern
neural networks" (ICML).

* Temperature scaling divides every logit by one temperature T > 0 before the softmax. T is fitted by
  minimising the negative log-likelihood (NLL) of the true labels on held-out labelled pixels; T > 1 softens
  over-confident scores. It never changes the arg-max, so labels and accuracy stay the same.
* Reliability: the top-class confidence of each pixel falls in one of M equal-width bins
  I_m = ((m−1)/M, m/M] (M = 15 as in the paper); per bin, acc(B_m) is the fraction of pixels whose top class
  is right and conf(B_m) their mean confidence. Expected calibration error
  ECE = Σ_m |B_m|/n · |acc(B_m) − conf(B_m)|.

Large images are handled band by band: :class:`ReliabilityAccumulator` keeps only per-bin sums, and
:func:`fit_temperature` works on a seeded subsample of bounded size.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np

BINS = 15  # Guo et al. 2017 use M = 15 bins
FIT_PIXELS = 500_000  # labelled pixels kept (at random) for fitting the temperature
TEMPERATURE_BOUNDS = (0.05, 20.0)
_GOLDEN = (math.sqrt(5) - 1) / 2


def _pixels_by_classes(scores: Any, labels: Any, axis: int, ignore: int | None) -> tuple[np.ndarray, np.ndarray]:
    """(n×C scores, n labels) of the labelled pixels; ``scores`` has the classes on ``axis``."""
    scores = np.asarray(scores)
    labels = np.asarray(labels)
    c = scores.shape[axis]
    flat = np.moveaxis(scores, axis, -1).reshape(-1, c)
    y = labels.reshape(-1)
    if y.size != flat.shape[0]:
        raise ValueError(f"labels have {y.size} pixels but the scores have {flat.shape[0]}")
    if ignore is not None:
        keep = y != ignore
        flat, y = flat[keep], y[keep]
    y = y.astype(np.int64, copy=False)
    if y.size and (y.min() < 0 or y.max() >= c):
        bad = y[(y < 0) | (y >= c)][0]
        raise ValueError(f"label {bad} is outside 0..{c - 1}")
    return flat, y


def scaled_softmax(logits: Any, temperature: float = 1.0, axis: int = 0) -> np.ndarray:
    """softmax(logits / T) along ``axis`` (the class axis; 0 for fcnkit's C×H×W score bands), in the logits'
    floating type (float64 for integers)."""
    z = np.asarray(logits)
    z = z / (z.dtype.type(temperature) if z.dtype.kind == "f" else np.float64(temperature))
    z = z - z.max(axis=axis, keepdims=True)
    e = np.exp(z)
    return e / e.sum(axis=axis, keepdims=True)


def _nll(logits: np.ndarray, labels: np.ndarray, temperature: float) -> float:
    """Mean −log softmax(logits / T)[label] over n×C logits (float64)."""
    z = logits / temperature
    top = z.max(axis=1, keepdims=True)
    log_norm = np.log(np.exp(z - top).sum(axis=1)) + top[:, 0]
    return float(np.mean(log_norm - z[np.arange(z.shape[0]), labels]))


@dataclass(frozen=True)
class TemperatureFit:
    """A fitted temperature and the NLL of the fitting pixels before (T = 1) and after."""

    temperature: float
    nll_before: float
    nll_after: float
    pixels: int  # labelled pixels the fit used (after subsampling)
    at_bound: bool  # the optimum lies at an end of the search interval (an extreme, suspicious fit)

    def to_dict(self) -> dict[str, Any]:
        return {"temperature": self.temperature, "nll_before": self.nll_before, "nll_after": self.nll_after,
                "pixels": self.pixels, "at_bound": self.at_bound}


def fit_temperature(logits: Any, labels: Any, *, axis: int = 0, ignore: int | None = 255,
                    max_pixels: int = FIT_PIXELS, seed: int = 0,
                    bounds: tuple[float, float] = TEMPERATURE_BOUNDS, tol: float = 1e-5) -> TemperatureFit:
    """Fit the temperature T minimising the NLL of softmax(logits / T) on the labelled pixels.

    ``logits`` has the classes on ``axis`` and ``labels`` the remaining shape; pixels equal to ``ignore`` are
    left out. Beyond ``max_pixels`` labelled pixels a seeded random subset of that size is used. The search is
    a golden-section search on log T over ``bounds`` (the NLL is convex in 1/T, hence unimodal in log T),
    stopped when the bracket is narrower than ``tol`` in log T: deterministic, no gradient steps to tune.
    """
    lo, hi = bounds
    if not 0 < lo < hi:
        raise ValueError(f"temperature bounds {bounds} (expected 0 < low < high)")
    z, y = _pixels_by_classes(logits, labels, axis, ignore)
    if y.size == 0:
        raise ValueError("no labelled pixels to fit a temperature on")
    if y.size > max_pixels:
        pick = np.sort(np.random.default_rng(seed).choice(y.size, max_pixels, replace=False))
        z, y = z[pick], y[pick]
    z = z.astype(np.float64)

    def f(log_t: float) -> float:
        return _nll(z, y, math.exp(log_t))

    a, b = math.log(lo), math.log(hi)
    c, d = b - _GOLDEN * (b - a), a + _GOLDEN * (b - a)
    fc, fd = f(c), f(d)
    while b - a > tol:
        if fc <= fd:
            b, d, fd = d, c, fc
            c = b - _GOLDEN * (b - a)
            fc = f(c)
        else:
            a, c, fc = c, d, fd
            d = a + _GOLDEN * (b - a)
            fd = f(d)
    log_t = (a + b) / 2
    at_bound = log_t - math.log(lo) < 10 * tol or math.log(hi) - log_t < 10 * tol
    t = math.exp(log_t)
    return TemperatureFit(temperature=t, nll_before=_nll(z, y, 1.0), nll_after=_nll(z, y, t), pixels=int(y.size),
                          at_bound=at_bound)


def bin_edges(bins: int = BINS) -> np.ndarray:
    """The M + 1 edges 0, 1/M, …, 1 of the equal-width confidence bins."""
    return np.linspace(0.0, 1.0, bins + 1)


@dataclass(frozen=True)
class Reliability:
    """Reliability-diagram data: per bin, pixel count, accuracy and mean confidence (NaN where empty)."""

    edges: np.ndarray
    counts: np.ndarray
    accuracy: np.ndarray
    confidence: np.ndarray

    @property
    def pixels(self) -> int:
        return int(self.counts.sum())

    @property
    def ece(self) -> float:
        """Expected calibration error Σ |B_m|/n · |acc(B_m) − conf(B_m)| (NaN with no pixels)."""
        n = self.counts.sum()
        if n == 0:
            return float("nan")
        full = self.counts > 0
        return float(np.sum(self.counts[full] / n * np.abs(self.accuracy[full] - self.confidence[full])))

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready (empty bins have accuracy and confidence None)."""
        def clean(v: np.ndarray) -> list[float | None]:
            return [None if math.isnan(x) else float(x) for x in v]
        return {"bins": len(self.counts), "edges": self.edges.tolist(), "counts": self.counts.tolist(),
                "accuracy": clean(self.accuracy), "confidence": clean(self.confidence), "pixels": self.pixels,
                "ece": None if self.pixels == 0 else self.ece}


class ReliabilityAccumulator:
    """Per-bin sums over any number of bands of probabilities and labels; read the result at the end."""

    def __init__(self, bins: int = BINS) -> None:
        if bins < 1:
            raise ValueError(f"bins = {bins} (expected at least 1)")
        self.edges = bin_edges(bins)
        self.counts = np.zeros(bins, np.int64)
        self.correct = np.zeros(bins, np.int64)
        self.confidence_sum = np.zeros(bins, np.float64)

    def add(self, probs: Any, labels: Any, *, axis: int = 0, ignore: int | None = 255) -> None:
        """Add a band: class probabilities with the classes on ``axis``, labels of the remaining shape."""
        p, y = _pixels_by_classes(probs, labels, axis, ignore)
        conf = p.max(axis=1).astype(np.float64)
        hit = p.argmax(axis=1) == y
        self.add_confidences(conf, hit)

    def add_confidences(self, confidence: Any, correct: Any) -> None:
        """Add pixels given directly by top-class confidence and whether the top class is right."""
        conf = np.asarray(confidence, dtype=np.float64).ravel()
        hit = np.asarray(correct, dtype=bool).ravel()
        if conf.size and (conf.min() < -1e-6 or conf.max() > 1 + 1e-6):  # float32 rounding is allowed
            raise ValueError("confidences must lie in [0, 1]")
        conf = np.clip(conf, 0.0, 1.0)
        # bin m (0-based) holds (m/M, (m+1)/M]; a confidence of exactly 0 goes to the first bin
        ids = np.searchsorted(self.edges[1:-1], conf, side="left")
        m = len(self.counts)
        self.counts += np.bincount(ids, minlength=m)
        self.correct += np.bincount(ids[hit], minlength=m)
        self.confidence_sum += np.bincount(ids, weights=conf, minlength=m)

    def result(self) -> Reliability:
        n = self.counts.astype(np.float64)
        acc = np.full(n.shape, np.nan)
        conf = np.full(n.shape, np.nan)
        np.divide(self.correct, n, out=acc, where=n > 0)
        np.divide(self.confidence_sum, n, out=conf, where=n > 0)
        return Reliability(edges=self.edges.copy(), counts=self.counts.copy(), accuracy=acc, confidence=conf)


def reliability(probs: Any, labels: Any, *, axis: int = 0, ignore: int | None = 255, bins: int = BINS) -> Reliability:
    """Reliability-diagram data of one array of probabilities (classes on ``axis``) against labels."""
    acc = ReliabilityAccumulator(bins)
    acc.add(probs, labels, axis=axis, ignore=ignore)
    return acc.result()


def expected_calibration_error(probs: Any, labels: Any, *, axis: int = 0, ignore: int | None = 255,
                               bins: int = BINS) -> float:
    """ECE of the top-class confidence in ``bins`` equal-width bins (Guo et al. 2017)."""
    return reliability(probs, labels, axis=axis, ignore=ignore, bins=bins).ece
