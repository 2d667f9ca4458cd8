"""Dataset folders: ``images/`` and ``masks/`` paired by file stem, plus ``classes.toml`` — or ``images/``
and one vector label file (polygons, lines, points; see :mod:`fcnkit.data.vectors`) in place of ``masks/``.

``find_samples`` returns the samples for training and stops at the first problem; ``read_sample`` reads one
sample's image and mask as training, ``check`` and evaluation all see them (nodata pixels of the image are
unlabelled); ``check_dataset`` reads every file and lists every problem (missing pair, size mismatch, unknown
ids or colours, unreadable or truncated file, inconsistent band counts, a bad class table, bad vector labels)
with the file's name. ``band_stats`` gives the per-band mean and standard deviation used to normalise inputs.
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from fcnkit.data.classes import ClassTable, read_classes_toml
from fcnkit.data.imageio import (
    DEFAULT_MAX_PIXELS,
    IMAGE_SUFFIXES,
    MASK_SUFFIXES,
    read_image_geo,
    read_image_valid,
    read_mask,
)
from fcnkit.data.raster import GeoRef, Raster
from fcnkit.data.vectors import VectorSettings, load_vector_labels, rasterise, vector_settings
from fcnkit.errors import DataError
from fcnkit.inputfiles import not_regular


@dataclass(frozen=True)
class Sample:
    """One image and its labels: a mask paired by file stem, or (``vector`` set) the dataset's vector label
    file, then also ``mask``."""

    stem: str
    image: Path
    mask: Path
    vector: VectorSettings | None = None


@dataclass
class LabelledImage:
    """An image (H×W×B; nodata pixels hold their band's mean), its mask (H×W uint8 ids; nodata pixels are
    the ignore value) and how many of its pixels are nodata."""

    image: np.ndarray
    mask: np.ndarray
    nodata_pixels: int = 0


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
    nodata_pixels: int = 0
    nodata_images: int = 0
    vector_labels: str | None = None  # what the vector label file holds, when the dataset has one

    @property
    def ok(self) -> bool:
        return not self.problems

    @property
    def class_shares(self) -> list[float]:
        """Each class's share of the labelled (non-ignore) pixels."""
        total = sum(self.class_pixels)
        return [n / total if total else 0.0 for n in self.class_pixels]


def _scan(data_dir: Path) -> tuple[list[Sample], list[str]]:
    """Pair images/ and masks/ by stem (or give every image the vector labels); list unpaired, duplicate and
    unsupported files."""
    vector, problems = vector_settings(data_dir)
    if problems:
        return [], problems
    found: dict[str, dict[str, Path]] = {}
    for sub, suffixes in (("images", IMAGE_SUFFIXES), ("masks", MASK_SUFFIXES)):
        if sub == "masks" and vector is not None:
            continue
        folder = data_dir / sub
        if not folder.is_dir():
            what = "images/ and masks/ (or a vector label file)" if sub == "masks" else "images/"
            problems.append(f"{folder}: missing folder (a dataset holds {what} and classes.toml)")
            continue
        files: dict[str, Path] = {}
        for p in sorted(folder.iterdir()):
            if p.name.startswith(".") or p.is_dir():
                continue
            special = not_regular(p)  # a FIFO would block every reader
            if special is not None:
                problems.append(special)
            elif p.suffix.lower() not in suffixes:
                problems.append(f"{p}: unsupported file type (expected {', '.join(suffixes)})")
            elif p.stem in files:
                problems.append(f"{p}: same stem as {files[p.stem].name} (each stem must be unique)")
            else:
                files[p.stem] = p
        found[sub] = files
    if "images" not in found:
        return [], problems
    images = found["images"]
    if vector is not None:
        samples = [Sample(s, images[s], vector.file, vector) for s in sorted(images)]
    else:
        if "masks" not in found:
            return [], problems
        masks = found["masks"]
        for stem in sorted(images.keys() - masks.keys()):
            problems.append(f"{images[stem]}: no mask with stem {stem!r} in {data_dir / 'masks'}")
        for stem in sorted(masks.keys() - images.keys()):
            problems.append(f"{masks[stem]}: no image with stem {stem!r} in {data_dir / 'images'}")
        samples = [Sample(s, images[s], masks[s]) for s in sorted(images.keys() & masks.keys())]
    if not samples and not problems:
        problems.append(f"{data_dir / 'images'}: no images (expected image/mask pairs with matching stems)")
    return samples, problems


def read_sample(sample: Sample, classes: ClassTable, max_pixels: int | None = DEFAULT_MAX_PIXELS,
                ) -> LabelledImage:
    """A sample's image and mask as training sees them: the mask from its file, or rasterised from the vector
    labels onto the image's grid; the image's nodata pixels unlabelled. DataError when the two disagree."""
    image, valid, geo = read_image_geo(sample.image, max_pixels)
    mask = _mask(sample, classes, image.shape[:2], geo, max_pixels)
    return LabelledImage(image, *_unlabel_nodata(mask, valid, classes))


def sample_mask(sample: Sample, classes: ClassTable, raster: Raster, max_pixels: int | None = DEFAULT_MAX_PIXELS,
                ) -> np.ndarray:
    """The mask of a sample whose image is open as ``raster`` (for evaluation, which maps the image by region
    reads): its file's or its vector labels', with the image's nodata pixels unlabelled."""
    height, width, _ = raster.shape
    mask = _mask(sample, classes, (height, width), raster.geo, max_pixels)
    if raster.masked:
        for y0 in range(0, height, 1024):
            valid = raster.valid(y0, min(y0 + 1024, height), 0, width)
            if valid is not None:
                mask[y0:y0 + 1024][~valid] = classes.ignore
    return mask


def _mask(sample: Sample, classes: ClassTable, size: tuple[int, int], geo: GeoRef | None,
          max_pixels: int | None) -> np.ndarray:
    """The sample's mask for an image of ``size`` on grid ``geo``."""
    if sample.vector is not None:
        return rasterise(load_vector_labels(sample.vector, classes), geo, size, classes, sample.image)
    mask = read_mask(sample.mask, classes, max_pixels)
    if mask.shape != size:
        raise DataError(f"{sample.mask}: {mask.shape[1]}x{mask.shape[0]} pixels but its image {sample.image.name} "
                        f"is {size[1]}x{size[0]} (expected the same size)")
    return mask


def _unlabel_nodata(mask: np.ndarray, valid: np.ndarray | None, classes: ClassTable) -> tuple[np.ndarray, int]:
    if valid is None:
        return mask, 0
    mask[~valid] = classes.ignore
    return mask, int((~valid).sum())


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
    if classes is not None and samples and samples[0].vector is not None:
        try:
            report.vector_labels = load_vector_labels(samples[0].vector, classes).describe()
        except DataError as e:
            report.problems.append(str(e))
            classes = None  # the masks cannot be made; the images are still checked
    for s in samples:
        image = valid = geo = None
        try:
            image, valid, geo = read_image_geo(s.image, max_pixels)
            report.images.append(ImageInfo(s.stem, *image.shape, str(image.dtype)))
        except DataError as e:
            report.problems.append(str(e))
        if classes is None or (image is None and s.vector is not None):
            continue
        size = image.shape[:2] if image is not None else None
        del image
        try:
            mask = _mask(s, classes, size, geo, max_pixels) if size is not None else read_mask(s.mask, classes,
                                                                                                max_pixels)
        except DataError as e:
            report.problems.append(str(e))
            continue
        mask, nodata = _unlabel_nodata(mask, valid, classes)
        report.nodata_pixels += nodata
        report.nodata_images += nodata > 0
        counts += np.bincount(mask.ravel(), minlength=256)
    report.problems += mixed_images([(_image_path(samples, i.stem), i.bands, i.dtype) for i in report.images])
    if report.classes is not None:
        report.class_pixels = [int(n) for n in counts[:report.classes.num_classes]]
        report.ignore_pixels = int(counts[report.classes.ignore])
    return report


def mixed_images(images: Sequence[tuple[Path, int, str]]) -> list[str]:
    """The images (path, bands, pixel type) whose bands or pixel type differ from most images': one net takes
    one number of bands, and one normalisation cannot fit two scales (8- and 16-bit files of one scene)."""
    if not images:
        return []
    bands = Counter(b for _, b, _ in images).most_common(1)[0][0]
    dtype = Counter(t for _, _, t in images).most_common(1)[0][0]
    problems = []
    for path, b, t in images:
        if b != bands:
            problems.append(f"{path}: {b} bands but most images have {bands} (every image needs the same bands)")
        if t != dtype:
            problems.append(f"{path}: pixel type {t} but most images are {dtype} (expected one pixel type; convert "
                            "the images to one scale)")
    return problems


def _image_path(samples: list[Sample], stem: str) -> Path:
    return next(s.image for s in samples if s.stem == stem)


def format_check(report: CheckReport) -> str:
    """The check report as text: class table, image sizes and bands, class pixel counts, problems, summary."""
    lines = [f"dataset {report.data_dir}"]
    if report.classes is not None:
        lines.append(f"classes: {report.classes.num_classes}, ignore value {report.classes.ignore}")
    if report.vector_labels is not None:
        lines.append(f"vector labels: {report.vector_labels}")
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
        lines.append(f"  {'id':>3}  {'class':<{width}}  {'pixels':>12}  share")
        for c, n, f in zip(report.classes.classes, report.class_pixels, report.class_shares, strict=True):
            lines.append(f"  {c.id:>3}  {c.name:<{width}}  {n:>12}  {f:6.1%}")
        share = report.ignore_pixels / total if total else 0.0
        lines.append(f"  {report.classes.ignore:>3}  {'ignore':<{width}}  {report.ignore_pixels:>12}  "
                     f"({share:.1%} of all mask pixels)")
        absent = [c.name for c, n in zip(report.classes.classes, report.class_pixels, strict=True) if n == 0]
        if absent:
            lines.append(f"note: no labelled pixels of {', '.join(absent)}")
        if report.nodata_pixels:
            lines.append(f"note: {report.nodata_pixels} nodata pixels in {report.nodata_images} image"
                         f"{'s' if report.nodata_images > 1 else ''} (unlabelled in training, counted as ignore)")
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
               valid: Iterable[np.ndarray | None] | None = None) -> tuple[list[float], list[float]]:
    """Per-band mean and standard deviation over the valid pixels of ``images`` (paths or H×W×B arrays), raw
    units. A path's nodata pixels are left out; for arrays, ``valid`` gives one H×W bool mask (or None: all
    valid) per image.

    Each image is reduced in row blocks and the blocks are merged with the pairwise formula of Chan, Golub &
    LeVeque (1979), so memory stays small and large uint16 sums keep their precision.
    """
    n, mean, m2, bands = 0, None, None, None
    masks = iter(valid) if valid is not None else None
    for item in images:
        if isinstance(item, (str, Path)):
            arr, ok = read_image_valid(item, max_pixels)
        else:
            arr, ok = np.asarray(item), next(masks) if masks is not None else None
        arr = arr[..., None] if arr.ndim == 2 else arr
        if bands is None:
            bands = arr.shape[2]
        elif arr.shape[2] != bands:
            name = item if isinstance(item, (str, Path)) else "array"
            raise DataError(f"{name}: {arr.shape[2]} bands but the first image has {bands}")
        rows = max(1, (1 << 22) // max(1, arr.shape[1] * bands))
        for r in range(0, arr.shape[0], rows):
            block = arr[r:r + rows].reshape(-1, bands).astype(np.float64)
            if ok is not None:
                block = block[np.asarray(ok[r:r + rows]).ravel()]
            if not block.shape[0]:
                continue
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
        raise DataError("band_stats: no images (expected at least one image with valid pixels)")
    return [float(v) for v in mean], [float(v) for v in np.sqrt(m2 / n)]
