"""Training patches cut from labelled images of any size, with augmentation that moves image and mask together.

One 10k×10k labelled image yields as many patches as an epoch asks for: random crops of a set size, optionally
class-balanced (pick a class uniformly, then one of its pixels as the crop centre), so rare classes and sparse
scribbles are seen as often as common ones. With ``balanced=None`` (training's default) crops are balanced when the
labels are sparse — under ``SPARSE_SHARE`` of the pixels labelled, as with scribbled strokes — and plain
otherwise. Crops that leave the image are padded: image with 0, mask with the ignore value, so padding never
counts in the loss.

Augmentation is torchvision.transforms.v2 acting on a ``tv_tensors.Image`` and a ``tv_tensors.Mask`` in one
call, so every geometric step (zoom, flips, quarter turns) is applied identically to both; masks are resampled
nearest-neighbour. The zoom resizes a centred square of the crop (one resize rather than an affine warp that
samples a grid), a zoom range of exactly 1 skips it, and quarter turns are exact index permutations
(torch.rot90): an augmented 96-pixel patch of 3 bands took 1.5-1.8 ms with a zoom and 1.0 ms without, against
3.6-4.3 ms for the affine warp, measured side by side on one thread of a busy 2-core machine, where the demo net's
training step on 8 such patches takes 100-150 ms. Brightness and contrast act on the image only, for any number
of bands in raw units (torchvision's ColorJitter assumes 1 or 3 channels scaled to [0, 1]).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any

import numpy as np
import torch
from torch.utils.data import Dataset
from torchvision import tv_tensors
from torchvision.transforms import v2
from torchvision.transforms.v2 import functional as F

from fcnkit.errors import DataError

# Labels covering less than this share of the pixels count as sparse, and are sampled class-balanced when
# ``balanced`` is left to the data. Measured on the texture mosaics of scripts/bench_train_vs_script.py (demo
# config, 20 s budget, one thread, mean held-out mIoU over 4 seeds): with scribbles (about 2 % of the pixels
# labelled) balanced crops reached 0.33 against 0.29 for plain ones; with dense labels 0.51 against 0.67.
SPARSE_SHARE = 0.5


class BandJitter(v2.Transform):
    """Random contrast about each band's mean, then a random brightness gain; the image only, masks pass through.

    Factors are drawn uniformly from [1 - amount, 1 + amount]; values are clamped to [0, ``limit``] (the
    integer range of the source data) when ``limit`` is given.
    """

    _transformed_types = (tv_tensors.Image,)

    def __init__(self, brightness: float = 0.2, contrast: float = 0.2, limit: float | None = None) -> None:
        super().__init__()
        self.brightness, self.contrast, self.limit = brightness, contrast, limit

    def make_params(self, flat_inputs: list[Any]) -> dict[str, float]:
        u = torch.rand(2) * 2 - 1
        return {"gain": 1 + float(u[0]) * self.brightness, "contrast": 1 + float(u[1]) * self.contrast}

    def transform(self, inpt: Any, params: dict[str, Any]) -> Any:
        mean = inpt.mean(dim=(-2, -1), keepdim=True)
        out = ((inpt - mean) * params["contrast"] + mean) * params["gain"]
        if self.limit is not None:
            out = out.clamp(0, self.limit)
        return tv_tensors.wrap(out, like=inpt)


class RandomZoom(v2.Transform):
    """Zoom about the centre by a factor drawn uniformly from ``scale`` (above 1 enlarges) and keep the centre
    ``patch``×``patch``: the centred square of side patch / factor is resized to ``patch``: bilinear for images,
    nearest for masks, both sampling at pixel centres (torch's "nearest" would sample at pixel corners and shift
    the mask by up to a source pixel against the image). Inputs must be at least patch / min(scale) a side."""

    def __init__(self, patch: int, scale: tuple[float, float]) -> None:
        super().__init__()
        self.patch, self.scale = patch, scale

    def make_params(self, flat_inputs: list[Any]) -> dict[str, float]:
        return {"factor": float(torch.empty(1).uniform_(*self.scale))}

    def transform(self, inpt: Any, params: dict[str, Any]) -> Any:
        h, w = inpt.shape[-2:]
        side = max(1, min(round(self.patch / params["factor"]), h, w))
        box = ((h - side) // 2, (w - side) // 2, side, side, [self.patch, self.patch])
        if isinstance(inpt, tv_tensors.Mask):
            plain = inpt.as_subclass(torch.Tensor)[None]
            out = F.resized_crop(plain, *box, interpolation=v2.InterpolationMode.NEAREST_EXACT)[0]
            return tv_tensors.wrap(out, like=inpt)
        return F.resized_crop(inpt, *box, interpolation=v2.InterpolationMode.BILINEAR, antialias=False)


class RandomQuarterTurn(v2.Transform):
    """Turn image and mask together by 90° with probability ``p`` (an exact permutation of pixels)."""

    def __init__(self, p: float = 0.5) -> None:
        super().__init__()
        self.p = p

    def make_params(self, flat_inputs: list[Any]) -> dict[str, bool]:
        return {"turn": bool(torch.rand(1) < self.p)}

    def transform(self, inpt: Any, params: dict[str, Any]) -> Any:
        return tv_tensors.wrap(inpt.rot90(1, (-2, -1)), like=inpt) if params["turn"] else inpt


def augmentation(patch: int, *, scale: tuple[float, float] | None = (0.8, 1.25), brightness: float = 0.2,
                 contrast: float = 0.2, limit: float | None = None) -> v2.Compose:
    """The v2 pipeline applied to (Image, Mask) pairs of side ≥ ``patch`` (≥ patch / scale[0] with ``scale``);
    returns ``patch``-sided pairs.

    ``scale`` zooms by a factor drawn from the range (above 1 enlarges), then the centre ``patch``×``patch``
    is kept; flips and quarter turns give all eight orientations.
    """
    zoom = scale is not None and tuple(scale) != (1.0, 1.0)  # a range of exactly 1 is no zoom: skip the resize
    steps: list[v2.Transform] = [RandomZoom(patch, scale) if zoom else v2.CenterCrop(patch)]
    steps += [
        v2.RandomHorizontalFlip(),
        v2.RandomVerticalFlip(),
        RandomQuarterTurn(),
        BandJitter(brightness, contrast, limit),
    ]
    return v2.Compose(steps)


class PatchDataset(Dataset):
    """``count`` random patches per epoch from H×W×B images (arrays or memmaps) and their H×W uint8 masks.

    Item i of epoch e is a pure function of (seed, e, i); call ``set_epoch(e)`` before each epoch. Returns
    (image float32 tensor B×P×P in raw pixel units, mask int64 tensor P×P). ``balanced=None`` balances the
    crops when labels are sparse (see ``SPARSE_SHARE``); ``self.balanced`` tells what was chosen.
    """

    def __init__(self, images: Sequence[np.ndarray], masks: Sequence[np.ndarray], patch: int, count: int, *,
                 balanced: bool | None = False, ignore: int = 255, augment: bool = False,
                 scale: tuple[float, float] | None = (0.8, 1.25), seed: int = 0, brightness: float = 0.2,
                 contrast: float = 0.2) -> None:
        _check_args(patch, count, ignore, scale)
        if len(images) != len(masks) or not images:
            raise ValueError(f"images, masks: expected equally long non-empty lists, got {len(images)} and "
                             f"{len(masks)}")
        self.images = [im[..., None] if im.ndim == 2 else im for im in images]
        self.masks = list(masks)
        for k, (im, m) in enumerate(zip(self.images, self.masks, strict=True)):
            if m.ndim != 2 or m.dtype != np.uint8 or im.shape[:2] != m.shape:
                raise DataError(f"sample {k}: image {im.shape} and mask {m.shape} {m.dtype} (expected an H×W uint8 "
                                "mask the size of its image)")
            if im.shape[2] != self.images[0].shape[2]:
                raise DataError(f"sample {k}: {im.shape[2]} bands but sample 0 has {self.images[0].shape[2]}")
        rows = [_row_counts(m) for m in self.masks] if balanced is None else None
        if rows is not None:
            labelled = sum(int(r.sum() - r[:, ignore].sum()) for r in rows)
            balanced = labelled < SPARSE_SHARE * sum(m.size for m in self.masks)
        self.patch, self.count, self.balanced, self.ignore, self.seed = patch, count, balanced, ignore, seed
        self.epoch = 0
        zoom_out = scale[0] if augment and scale is not None else 1.0
        self.crop = max(patch, math.ceil(patch / zoom_out))  # source side that still fills P×P after zooming
        limit = {np.dtype(np.uint8): 255.0, np.dtype(np.uint16): 65535.0}.get(self.images[0].dtype)
        self.augment = augmentation(patch, scale=scale, brightness=brightness, contrast=contrast,
                                    limit=limit) if augment else None
        areas = np.array([m.size for m in self.masks], np.float64)
        self._image_p = areas / areas.sum()
        if balanced:
            self._index_classes(rows)

    def set_epoch(self, epoch: int) -> None:
        self.epoch = int(epoch)

    def __len__(self) -> int:
        return self.count

    def __getitem__(self, i: int) -> tuple[torch.Tensor, torch.Tensor]:
        if not 0 <= i < self.count:
            raise IndexError(f"patch {i} out of range 0..{self.count - 1}")
        rng = np.random.default_rng([self.seed, self.epoch, i])
        j, top, left = self._pick(rng)
        image, mask = self._cut(j, top, left)
        if self.augment is not None:
            with torch.random.fork_rng(devices=[]):  # v2 draws from torch's global CPU generator
                torch.default_generator.manual_seed(int(rng.integers(2**62)))  # CPU only: torch.manual_seed
                # would also queue seeds for every accelerator backend, at ~1 ms each
                image, mask = self.augment(image, mask)
        return image.as_subclass(torch.Tensor), mask.as_subclass(torch.Tensor).long()

    # --- sampling -------------------------------------------------------------------------------------------

    def _pick(self, rng: np.random.Generator) -> tuple[int, int, int]:
        """(image index, top, left) of the next crop of side ``self.crop``."""
        c = self.crop
        if self.balanced and self._values.size:
            k = int(rng.integers(self._values.size))  # a class, uniformly
            j = int(rng.choice(len(self.masks), p=self._totals[:, k] / self._totals[:, k].sum()))
            y, x = self._nth_pixel(j, k, int(rng.integers(self._totals[j, k])))
            return j, y - c // 2, x - c // 2
        j = int(rng.choice(len(self.masks), p=self._image_p))
        h, w = self.masks[j].shape
        top = int(rng.integers(h - c + 1)) if h >= c else (h - c) // 2
        left = int(rng.integers(w - c + 1)) if w >= c else (w - c) // 2
        return j, top, left

    def _index_classes(self, rows: list[np.ndarray] | None = None) -> None:
        """Per image, cumulative per-row pixel counts of every labelled value: O(rows × classes) memory."""
        rows = rows if rows is not None else [_row_counts(m) for m in self.masks]
        present = np.flatnonzero(sum(r.sum(axis=0) for r in rows))
        self._values = present[present != self.ignore]
        self._cum = [np.cumsum(r[:, self._values], axis=0) for r in rows]
        self._totals = np.array([c[-1] for c in self._cum], np.int64).reshape(len(rows), self._values.size)

    def _nth_pixel(self, j: int, k: int, n: int) -> tuple[int, int]:
        """Row and column of the n-th pixel (row-major) of value ``self._values[k]`` in mask j."""
        cum = self._cum[j][:, k]
        row = int(np.searchsorted(cum, n, side="right"))
        before = int(cum[row - 1]) if row else 0
        return row, int(np.flatnonzero(self.masks[j][row] == self._values[k])[n - before])

    def _cut(self, j: int, top: int, left: int) -> tuple[tv_tensors.Image, tv_tensors.Mask]:
        """The crop as float32 Image and uint8 Mask, padded with 0 / ignore where it leaves the image."""
        c, (h, w) = self.crop, self.masks[j].shape
        y0, y1, x0, x1 = max(top, 0), min(top + c, h), max(left, 0), min(left + c, w)
        img = np.ascontiguousarray(self.images[j][y0:y1, x0:x1].transpose(2, 0, 1), dtype=np.float32)
        image = tv_tensors.Image(torch.from_numpy(img))
        mask = tv_tensors.Mask(torch.from_numpy(np.ascontiguousarray(self.masks[j][y0:y1, x0:x1])))
        pad = [x0 - left, y0 - top, left + c - x1, top + c - y1]
        if any(pad):
            image, mask = F.pad(image, pad, fill=0.0), F.pad(mask, pad, fill=self.ignore)
        return image, mask


def _row_counts(mask: np.ndarray) -> np.ndarray:
    """H×256 counts of each value in each row, computed in bounded chunks."""
    h, w = mask.shape
    out = np.empty((h, 256), np.int64)
    step = max(1, (1 << 22) // max(w, 1))
    for r in range(0, h, step):
        chunk = np.asarray(mask[r:r + step])
        n = chunk.shape[0]
        idx = (np.arange(n, dtype=np.int64)[:, None] * 256 + chunk).ravel()
        out[r:r + n] = np.bincount(idx, minlength=n * 256).reshape(n, 256)
    return out


def _check_args(patch: int, count: int, ignore: int, scale: tuple[float, float] | None) -> None:
    for name, value, low in (("patch", patch, 1), ("count", count, 1)):
        if not isinstance(value, int) or value < low:
            raise ValueError(f"{name} = {value!r} (expected an integer ≥ {low})")
    if not isinstance(ignore, int) or not 0 <= ignore <= 255:
        raise ValueError(f"ignore = {ignore!r} (expected an integer 0..255)")
    if scale is not None and not (len(scale) == 2 and 0 < scale[0] <= scale[1]):
        raise ValueError(f"scale = {scale!r} (expected (low, high) with 0 < low ≤ high, or None)")
