"""Blending windows for overlapping tiles: raised cosine (Hann), linear ramp, and none (centre crop).

Pure arithmetic, no I/O. A tile's weight is the outer product of two 1-D windows. Each 1-D window is 1 in
its middle and tapers over the part it shares with a neighbouring tile: the rising ramp at its start and the
falling ramp (one minus the rising ramp) at its end, so where two tiles overlap by ``n`` pixels their
weights add up to exactly 1. A side lying on the image border gets no taper, so weights never vanish there.

Ramps are sampled at pixel centres, ``t = (i + 0.5) / n``, never at the ends of the interval, so no pixel
of a tile gets weight exactly 0 (except in centre-crop mode, whose weights are 0 or 1 by design). A tile of
2r pixels overlapping both neighbours by r gets the whole window: for ``hann`` that is
sin²(π (i + ½) / 2r), the Hann window evaluated at pixel centres:

* ``hann``:   sin²(π t / 2) — the first half of a raised-cosine (Hann) window;
* ``linear``: t             — the first half of a triangular (Bartlett) window;
* ``none``:   0 for the first ⌊n/2⌋ pixels, then 1 — each pixel is taken from the tile whose centre is
  nearer, which is what exact tiling needs.
"""

from __future__ import annotations

import numpy as np

WINDOWS = ("hann", "linear", "none")


def check_window(kind: str) -> str:
    if kind not in WINDOWS:
        raise ValueError(f"window: {kind!r} is not one of: {', '.join(WINDOWS)}")
    return kind


def ramp(kind: str, n: int) -> np.ndarray:
    """The rising ramp of ``n`` float64 weights in (0, 1] (or {0, 1} for ``none``)."""
    check_window(kind)
    if n <= 0:
        return np.zeros(0)
    t = (np.arange(n) + 0.5) / n
    if kind == "hann":
        return np.sin(np.pi * t / 2) ** 2
    if kind == "linear":
        return t
    return (np.arange(n) >= n // 2).astype(np.float64)


def window(kind: str, length: int, rise: int, fall: int) -> np.ndarray:
    """1-D weights of a tile of ``length`` pixels that overlaps its predecessor by ``rise`` pixels and its
    successor by ``fall`` pixels (0 on a side that lies on the image border)."""
    if not (0 <= rise <= length and 0 <= fall <= length):
        raise ValueError(f"overlaps {rise} and {fall} do not fit a tile of {length} pixels")
    w = np.ones(length)
    w[:rise] *= ramp(kind, rise)
    if fall:
        w[length - fall:] *= 1 - ramp(kind, fall)
    return w
