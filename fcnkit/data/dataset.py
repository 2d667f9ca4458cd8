"""Dataset folders: ``images/`` and ``masks/`` paired by file stem, plus ``classes.toml``.

``find_samples`` returns the pairs for training and stops at the first problem; ``check_dataset`` reads every
file and lists every problem (missing pair, size mismatch, unknown ids or colours, unreadable or truncated
file, inconsistent band counts, a bad class table) with the file's name. ``band_stats`` gives the per-band
mean and standard deviation used to normalise inputs.
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Iterable
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from fcnkit.data.classes import ClassTable, read_classes_toml
from fcnkit.data.imageio import DEFAULT_MAX_PIXELS, IMAGE_SUFFIXES, MASK_SUFFIXES, read_image, read_mask
from fcnkit.errors import DataError


@dataclass(frozen=True)
class Sample:
    """One image and its mask, paired by file stem."""

    stem: str
    image: Path
    mask: Path


@dataclass(frozen=True)
class ImageInfo:
    stem: str
    height: int
    width: int
    bands: int
    dtype: str


@dataclass
class CheckReport:
    """What ``check_dataset`` found: per-image facts, per-class pixel counts and every problem."""

    data_dir: Path
    classes: ClassTable | None
    images: list[ImageInfo] = field(default_factory=list)
    class_pixels: list[int] = field(default_factory=list)
    ignore_pixels: int = 0
    problems: list[str] = field(default_factory=list)

    @property
    def ok(self) -> bool:
        return not self.problems

    @property
    def class_fractions(self) -> list[float]:
        """Each class's share of the labelled (non-ignore) pixels."""
        total = sum(self.class_pixels)
        return [n / total if total else 0.0 for n in self.class_pixels]


def _scan(data_dir: Path) -> tuple[list[Sample], list[str]]:
    """Pair images/ and masks/ by stem; list unpaired, duplicate and unsupported files."""
    problems: list[str] = []
    found: dict[str, dict[str, Path]] = {}
    for sub, suffixes in (("images", IMAGE_SUFFIXES), ("masks", MASK_SUFFIXES)):
        folder = data_dir / sub
        if not folder.is_dir():
            problems.append(f"{folder}: missing folder (a dataset holds images/, masks/ and classes.toml)")
            continue
        files: dict[str, Path] = {}
        for p in sorted(folder.iterdir()):
            if p.name.startswith(".") or p.is_dir():
                continue
            if p.suffix.lower() not in suffixes:
                problems.append(f"{p}: unsupported file type (expected {', '.join(suffixes)})")
            elif p.stem in files:
                problems.append(f"{p}: same stem as {files[p.stem].name} (each stem must be unique)")
            else:
                files[p.stem] = p
        found[sub] = files
    if len(found) < 2:
        return [], problems
    images, masks = found["images"], found["masks"]
    for stem in sorted(images.keys() - masks.keys()):
        problems.append(f"{images[stem]}: no mask with stem {stem!r} in {data_dir / 'masks'}")
    for stem in sorted(masks.keys() - images.keys()):
        problems.append(f"{masks[stem]}: no image with stem {stem!r} in {data_dir / 'images'}")
    samples = [Sample(s, images[s], masks[s]) for s in sorted(images.keys() & masks.keys())]
    if not samples and not problems:
        problems.append(f"{data_dir / 'images'}: no images (expected image/mask pairs with matching stems)")
    return samples, problems


def find_samples(data_dir: str | Path) -> tuple[list[Sample], ClassTable]:
    """The image/mask pairs and class table of a dataset folder; DataError on the first structural problem."""
    data_dir = Path(data_dir)
    if not data_dir.is_dir():
        raise DataError(f"{data_dir}: not a folder (expected a dataset with images/, masks/ and classes.toml)")
    classes, problems = read_classes_toml(data_dir / "classes.toml")
    samples, scan_problems = _scan(data_dir)
    problems += scan_problems
    if problems:
        more = f" (and {len(problems) - 1} more; run `fcnkit check {data_dir}`)" if len(problems) > 1 else ""
        raise DataError(problems[0] + more)
    assert classes is not None
    return samples, classes


def check_dataset(data_dir: str | Path, max_pixels: int | None = DEFAULT_MAX_PIXELS) -> CheckReport:
    """Read every file of a dataset folder and report sizes, bands, class pixel counts and all problems."""
    data_dir = Path(data_dir)
    if not data_dir.is_dir():
        return CheckReport(data_dir, None, problems=[f"{data_dir}: not a folder"])
    classes, problems = read_classes_toml(data_dir / "classes.toml")
    report = CheckReport(data_dir, classes, problems=problems)
    samples, scan_problems = _scan(data_dir)
    report.problems += scan_problems
    counts = np.zeros(256, dtype=np.int64)
    for s in samples:
        size = None
        try:
            image = read_image(s.image, max_pixels)
            size = image.shape[:2]
            report.images.append(ImageInfo(s.stem, *image.shape, str(image.dtype)))
            del image
        except DataError as e:
            report.problems.append(str(e))
        if classes is None:
            continue
        try:
            mask = read_mask(s.mask, classes, max_pixels)
        except DataError as e:
            report.problems.append(str(e))
            continue
        if size is not None and mask.shape != size:
            report.problems.append(f"{s.mask}: {mask.shape[0]}×{mask.shape[1]} pixels but {s.image.name} is "
                                   f"{size[0]}×{size[1]}")
            continue
        counts += np.bincount(mask.ravel(), minlength=256)
    if report.images:
        usual = Counter(i.bands for i in report.images).most_common(1)[0][0]
        for i in report.images:
            if i.bands != usual:
                report.problems.append(f"{_image_path(samples, i.stem)}: {i.bands} bands but most images have {usual}")
    if classes is not None:
        report.class_pixels = [int(n) for n in counts[:classes.num_classes]]
        report.ignore_pixels = int(counts[classes.ignore])
    return report


def _image_path(samples: list[Sample], stem: str) -> Path:
    return next(s.image for s in samples if s.stem == stem)


def format_check(report: CheckReport) -> str:
    """The check report as text: class table, image sizes and bands, class pixel counts, problems, summary."""
    lines = [f"dataset {report.data_dir}"]
    if report.classes is not None:
        lines.append(f"classes: {report.classes.num_classes}, ignore value {report.classes.ignore}")
    groups: dict[tuple[int, int, int, str], list[str]] = {}
    for i in report.images:
        groups.setdefault((i.height, i.width, i.bands, i.dtype), []).append(i.stem)
    if groups:
        lines.append(f"images read: {len(report.images)}")
        for (h, w, b, dt), stems in sorted(groups.items()):
            shown = ", ".join(stems) if len(stems) <= 2 else f"{stems[0]} … {stems[-1]}"
            lines.append(f"  {len(stems):5d} × {h}×{w} px, {b} band{'s' if b > 1 else ''}, {dt}  ({shown})")
    if report.classes is not None and report.images:
        total = sum(report.class_pixels) + report.ignore_pixels
        width = max(len(n) for n in report.classes.names + ["ignore"])
        lines.append(f"  {'id':>3}  {'class':<{width}}  {'pixels':>12}  fraction")
        for c, n, f in zip(report.classes.classes, report.class_pixels, report.class_fractions, strict=True):
            lines.append(f"  {c.id:>3}  {c.name:<{width}}  {n:>12}  {f:8.4f}")
        share = report.ignore_pixels / total if total else 0.0
        lines.append(f"  {report.classes.ignore:>3}  {'ignore':<{width}}  {report.ignore_pixels:>12}  "
                     f"({share:.4f} of all mask pixels)")
        absent = [c.name for c, n in zip(report.classes.classes, report.class_pixels, strict=True) if n == 0]
        if absent:
            lines.append(f"note: no labelled pixels of {', '.join(absent)}")
    if report.problems:
        lines.append(f"problems ({len(report.problems)}):")
        lines += [f"  {p}" for p in report.problems]
    n = len(report.images)
    if report.ok:
        lines.append(f"ok: {n} image/mask pairs, {sum(report.class_pixels)} labelled pixels, no problems")
    else:
        lines.append(f"FAILED: {len(report.problems)} problem{'s' if len(report.problems) > 1 else ''} "
                     f"in {report.data_dir}")
    return "\n".join(lines)


def band_stats(images: Iterable[str | Path | np.ndarray], max_pixels: int | None = DEFAULT_MAX_PIXELS,
               ) -> tuple[list[float], list[float]]:
    """Per-band mean and standard deviation over every pixel of ``images`` (paths or H×W×B arrays), raw units.

    Each image is reduced in row blocks and the blocks are merged with the pairwise formula of Chan, Golub &
    LeVeque (1979), so memory stays small and large uint16 sums keep their precision.
    """
    n, mean, m2, bands = 0, None, None, None
    for item in images:
        arr = read_image(item, max_pixels) if isinstance(item, (str, Path)) else np.asarray(item)
        arr = arr[..., None] if arr.ndim == 2 else arr
        if bands is None:
            bands = arr.shape[2]
        elif arr.shape[2] != bands:
            name = item if isinstance(item, (str, Path)) else "array"
            raise DataError(f"{name}: {arr.shape[2]} bands but the first image has {bands}")
        rows = max(1, (1 << 22) // max(1, arr.shape[1] * bands))
        for r in range(0, arr.shape[0], rows):
            block = arr[r:r + rows].reshape(-1, bands).astype(np.float64)
            nb, mb = block.shape[0], block.mean(axis=0)
            m2b = ((block - mb) ** 2).sum(axis=0)
            if mean is None:
                n, mean, m2 = nb, mb, m2b
            else:
                delta = mb - mean
                total = n + nb
                mean = mean + delta * nb / total
                m2 = m2 + m2b + delta**2 * n * nb / total
                n = total
    if mean is None or n == 0:
        raise DataError("band_stats: no images (expected at least one image)")
    return [float(v) for v in mean], [float(v) for v in np.sqrt(m2 / n)]
