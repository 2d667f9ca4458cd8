"""The preview card of a mapped image, for people rather than GIS software: the class overlay of the whole image,
a zoomed inset at full resolution (a large map's overview is too coarse to judge edges and small objects) with
its place marked on the overview, and a legend of the class colours with each class's share of the map.

Pure image composition with Pillow (no matplotlib: mapping does not pay for its import).
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
from PIL import Image, ImageDraw, ImageFont

INSET = 320  # side of the inset, in pixels of the input image (shown 1:1)
MARGIN = 12
INK, PAPER, FRAME = (29, 43, 54), (246, 248, 247), (255, 255, 255)


def choose_inset(small: np.ndarray, cells: int, ignore: int) -> tuple[int, int]:
    """The top-left cell (row, col) of the ``cells`` × ``cells`` window of the down-sampled label map ``small``
    with the most classes in it (ties: the most class boundaries), where an inset shows the most."""
    h, w = small.shape
    best, where = (-1, -1), (0, 0)
    step = max(1, cells // 2)
    for r in range(0, max(1, h - cells + 1), step):
        for c in range(0, max(1, w - cells + 1), step):
            win = small[r:r + cells, c:c + cells]
            labelled = win[win != ignore]
            kinds = len(np.unique(labelled))
            edges = int((win[1:] != win[:-1]).sum() + (win[:, 1:] != win[:, :-1]).sum())
            if (kinds, edges) > best:
                best, where = (kinds, edges), (r, c)
    return where


def _font(size: int) -> ImageFont.ImageFont:
    return ImageFont.load_default(size=size)


def preview_card(overview: np.ndarray, inset: np.ndarray | None, box: tuple[int, int, int, int] | None,
                 names: Sequence[str], colors: Sequence[tuple[int, int, int]], shares: Sequence[float],
                 title: str) -> np.ndarray:
    """The card as an H×W×3 uint8 array: ``overview`` (the class overlay of the whole image) with ``box`` (x0, y0,
    x1, y1 in overview pixels) outlined, ``inset`` (the same at full resolution) beside it, and a legend of
    ``names``, ``colors`` and ``shares`` (fractions of the mapped pixels) below, under ``title``."""
    font, small = _font(16), _font(13)
    oh, ow = overview.shape[:2]
    ih, iw = (0, 0) if inset is None else inset.shape[:2]
    rows = -(-len(names) // 3)
    legend_h = 22 * rows + 8
    width = MARGIN + ow + (MARGIN + iw if inset is not None else 0) + MARGIN
    height = MARGIN * 2 + 26 + max(oh, ih + 20) + legend_h
    card = Image.new("RGB", (max(width, 420), height), PAPER)
    draw = ImageDraw.Draw(card)
    draw.text((MARGIN, MARGIN), title, fill=INK, font=font)
    top = MARGIN + 26
    card.paste(Image.fromarray(overview), (MARGIN, top))
    if inset is not None and box is not None:
        x0, y0, x1, y1 = box
        draw.rectangle((MARGIN + x0, top + y0, MARGIN + x1, top + y1), outline=FRAME, width=2)
        draw.rectangle((MARGIN + x0 - 1, top + y0 - 1, MARGIN + x1 + 1, top + y1 + 1), outline=INK, width=1)
        left = MARGIN * 2 + ow
        card.paste(Image.fromarray(inset), (left, top))
        draw.rectangle((left - 1, top - 1, left + iw, top + ih), outline=INK, width=1)
        draw.text((left, top + ih + 4), "the framed area at full resolution", fill=INK, font=small)
    y = top + max(oh, ih + 20) + 8
    column = (card.width - 2 * MARGIN) // 3
    for i, (name, color, share) in enumerate(zip(names, colors, shares, strict=True)):
        x, yy = MARGIN + (i % 3) * column, y + (i // 3) * 22
        draw.rectangle((x, yy + 2, x + 14, yy + 16), fill=tuple(color), outline=INK)
        draw.text((x + 20, yy), f"{name} {share:.1%}", fill=INK, font=small)
    return np.asarray(card)
