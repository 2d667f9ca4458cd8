"""Train a model from a dataset folder (or image and mask arrays) into a run folder, resumably.

Each epoch draws ``train.patches_per_epoch`` patches from the training images (fcnkit.data.patches), fits
them with per-pixel cross-entropy over labelled pixels (optionally class-weighted and with a Dice term),
then scores the held-out whole images. The best model by validation mean IoU is kept as
RUN_DIR/model.safetensors; RUN_DIR/resume.pt lets ``resume=True`` continue exactly (see fcnkit.runstate);
RUN_DIR/metrics.csv gets a row per epoch. With ``train.seconds`` the whole call, calibration included, keeps to a
wall-time budget (fcnkit.budget). Under torchrun the patches of an epoch are shared out among the
processes (DistributedDataParallel, gloo), validation images too, and rank 0 alone writes files.
"""

from __future__ import annotations

import contextlib
import dataclasses
import functools
import json
import math
import random
import shutil
import signal
import tempfile
import threading
import time
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import torch
from torch import nn
from torch.nn.parallel import DistributedDataParallel
from torch.utils.data import DataLoader
from tqdm import tqdm

from fcnkit import parallel, runstate
from fcnkit.budget import SAVE_SECONDS, TimeBudget
from fcnkit.config import TrainConfig, config_from_dict
from fcnkit.cores import CoreWatch
from fcnkit.data.classes import ClassTable
from fcnkit.data.dataset import Sample, band_stats, find_samples, mixed_images, read_sample
from fcnkit.data.imageio import DEFAULT_MAX_PIXELS
from fcnkit.data.patches import PatchDataset
from fcnkit.destinations import check_outputs, dataset_files
from fcnkit.errors import ConfigError, DataError, FcnkitError, Interrupted, ModelFileError
from fcnkit.inputrange import training_stats
from fcnkit.losses import median_frequency_weights, pixel_cross_entropy, segmentation_loss
from fcnkit.metrics import confusion_matrix, segmentation_scores
from fcnkit.schedules import lr_factor
from fcnkit.units import pixel_rate

if TYPE_CHECKING:
    from fcnkit.model import Model


@dataclass
class TrainResult:
    """What a finished (or early-stopped) run produced."""

    run_dir: Path
    model_path: Path
    epochs: int  # epochs completed
    best_epoch: int
    best_mean_iou: float  # NaN when there is no validation split
    stopped_early: bool
    history: list[dict[str, Any]]
    out_of_time: bool = False  # stopped by the train.seconds budget


class TrainingInterrupted(Interrupted):
    """Ctrl-C or SIGTERM during training: a resume point was written first; the message says where."""


def train(model: Model, data: str | Path | Sequence[np.ndarray], masks: Sequence[np.ndarray] | None = None, *,
          out_dir: str | Path | None = None, resume: bool = False, progress: bool = True,
          max_pixels: int | None = None, note: Callable[[str], None] | None = None, **settings: Any) -> TrainResult:
    """Train ``model`` on a dataset folder ``data``, or on image arrays ``data`` (H×W×B) and ``masks`` (H×W class
    ids), writing the run to ``out_dir`` (a temporary folder, removed afterwards, when None). ``settings``
    override the model config's [train] table. The model's net is built first when the data has to give its
    band and class counts; its normalisation is measured on the training images unless it has one already
    (a loaded model being fine-tuned keeps its own). The model ends holding the weights of its best epoch.
    Images and masks above ``max_pixels`` pixels are refused (default 2^27). ``note`` receives one-line remarks
    on the data (nodata pixels met)."""
    start = time.perf_counter()  # a time budget counts from here
    t = _settings(model, settings)
    group, threads = parallel.start(), torch.get_num_threads()
    temporary = out_dir is None
    run_dir = Path(tempfile.mkdtemp(prefix="fcnkit-run-")) if temporary else Path(out_dir)
    try:
        with runstate.RunLock(run_dir) if group.main else contextlib.nullcontext():
            if group.main:  # the run's own files never replace its inputs (the --init model, the data)
                check_outputs([run_dir / n for n in (runstate.MODEL_FILE, runstate.RESUME_FILE,
                                                     runstate.METRICS_FILE)],
                              inputs=[model.path, *(dataset_files(data) if isinstance(data, (str, Path)) else ())],
                              replace_weights=True)
            if t.threads:
                torch.set_num_threads(t.threads)
            run = _prepare(model, t, data, masks, run_dir, resume, group,
                           DEFAULT_MAX_PIXELS if max_pixels is None else max_pixels, note)
            run.cores = CoreWatch(threads) if not t.threads else None
            budget = TimeBudget(t.seconds or 0.0, run.p["seconds"] + run.p["epoch_seconds"], start)
            try:
                with _StopRequest() as stop:
                    result = _loop(run, stop, progress, budget)
            except FcnkitError:
                if not resume and not run.p["epoch"] and group.main:  # refused before its first epoch: no run
                    (run_dir / runstate.RESUME_FILE).unlink(missing_ok=True)
                raise
            model.net.load_state_dict(run.best_state)
            model.eval()
            _calibrate(run)
            return result
    finally:
        torch.set_num_threads(threads)
        parallel.finish(group)
        if temporary:
            shutil.rmtree(run_dir, ignore_errors=True)


def _settings(model: Model, overrides: dict[str, Any]) -> TrainConfig:
    """The model config's [train] table with ``overrides``, validated (and written back into the config, so the
    model file records what the run used)."""
    table = {**model.config.get("train", {}), **overrides}
    t = config_from_dict({"train": table}).train
    model.config = {**model.config, "train": dataclasses.asdict(t)}
    return t


@dataclass
class _Run:
    """Everything the loop needs; ``p`` is the progress saved in each resume point."""

    t: TrainConfig
    run_dir: Path
    group: parallel.Group
    model: Model
    net: nn.Module  # the model, wrapped for data-parallel training when there are several processes
    opt: torch.optim.Optimizer
    patches: PatchDataset
    val_images: list[np.ndarray]
    val_masks: list[np.ndarray]
    has_val: bool
    weight: torch.Tensor | None
    margin: int
    steps_per_epoch: int
    data_id: str
    p: dict[str, Any]
    best_state: dict[str, torch.Tensor]
    best_sample: _PixelSample | None = None  # the best epoch's calibration pixels (when it ran in this session)
    cores: CoreWatch | None = None  # chooses the thread count when train.threads = 0

    @functools.cached_property
    def val_labelled(self) -> int:
        """Labelled validation pixels of this process (the masks do not change during a run)."""
        return sum(int((m != self.model.classes.ignore).sum()) for m in self.val_masks)


def _prepare(model: Model, t: TrainConfig, data: str | Path | Sequence[np.ndarray],
             masks: Sequence[np.ndarray] | None, run_dir: Path, resume: bool, group: parallel.Group,
             max_pixels: int | None, note: Callable[[str], None] | None = None) -> _Run:
    torch.manual_seed(t.seed)
    np.random.seed(t.seed)
    random.seed(t.seed)
    notes: list[str] = []
    images, labels, classes, keys, data_id = _data(data, masks, model, max_pixels, notes)
    if group.main and note is not None:
        for text in notes:
            note(text)
    if not model.built:
        model._make_net(images[0].shape[2], classes.num_classes)
    if model.path is not None:  # fine-tuning a model file: the run records where it started
        model.extra = {**model.extra, "init": str(model.path)}
    trained_on = str(Path(data).resolve()) if isinstance(data, (str, Path)) else f"{len(images)} image arrays"
    model.extra = {**model.extra, "trained_on": trained_on}
    model.input_stats = training_stats(images)  # what mapping later compares new images with
    _check_fits(model, images, classes)
    _check_memory(model, t)
    if group.main:
        runstate.claim_run_dir(run_dir, resume)
    state = runstate.load_resume(run_dir / runstate.RESUME_FILE, model.config, data_id) if resume else None
    if state is not None:
        runstate.check_resume(run_dir / runstate.RESUME_FILE, state, model.net.state_dict())
    order = sorted(range(len(images)), key=lambda i: keys[i])
    train_i, val_i = split_indices(len(order), t.val_fraction, t.seed)
    train_x, train_y = [images[order[i]] for i in train_i], [labels[order[i]] for i in train_i]
    val_x = [images[order[i]] for i in val_i][group.rank::group.world]
    val_y = [labels[order[i]] for i in val_i][group.rank::group.world]
    if state is not None:  # the normalisation the run began with, whatever the data says now
        model.set_normalisation(state["mean"].tolist(), state["std"].tolist())
    elif model.normalisation is None:
        model.set_normalisation(*band_stats(train_x))
    weight = None
    if t.class_weights == "median":
        weight = torch.tensor(median_frequency_weights(train_y, classes.num_classes, classes.ignore),
                              dtype=torch.float32)
    per_rank = t.patches_per_epoch // group.world
    if per_rank < 1:
        raise ConfigError(f"train.patches_per_epoch: {t.patches_per_epoch} is fewer than the {group.world} "
                          "training processes")
    patches = PatchDataset(train_x, train_y, t.patch, t.patches_per_epoch, balanced=t.balanced,
                           ignore=classes.ignore, augment=t.augment, scale=tuple(t.scale), seed=t.seed)
    fmt = torch.channels_last if t.channels_last else torch.contiguous_format
    model.to(memory_format=fmt)
    if t.optimizer == "adamw":
        opt: torch.optim.Optimizer = torch.optim.AdamW(model.parameters(), lr=t.lr, weight_decay=t.weight_decay)
    else:
        opt = torch.optim.SGD(model.parameters(), lr=t.lr, momentum=t.momentum, weight_decay=t.weight_decay)
    p = {"epoch": 0, "batch": 0, "step": 0, "seconds": 0.0, "epoch_seconds": 0.0, "loss_sum": 0.0,
         "loss_batches": 0, "pixels": 0, "best_mean_iou": -math.inf, "best_epoch": 0, "bad_epochs": 0,
         "stopped_early": False, "out_of_time": False, "history": []}
    best_state = _copy_state(model)
    if state is not None:
        try:
            model.net.load_state_dict(state["model"])
            opt.load_state_dict(state["optimizer"])
            runstate.set_rng_states(state["rng"])
            if len(state.get("torch_rng_by_rank", [])) == group.world:  # each process's own dropout stream
                torch.set_rng_state(state["torch_rng_by_rank"][group.rank])
        except (KeyError, TypeError, ValueError, RuntimeError, IndexError, AttributeError) as e:
            first = " ".join(str(e).split())[:160] or type(e).__name__
            raise ModelFileError(f"{run_dir / runstate.RESUME_FILE}: resume point cannot be continued ({first}); "
                                 "start a new run in another output folder") from None
        p = state["progress"]
        best_state = {k: v.clone() for k, v in state.get("best", _copy_state(model)).items()}
    net = DistributedDataParallel(model) if group.world > 1 else model
    run = _Run(t, run_dir, group, model, net, opt, patches, val_x, val_y, bool(val_i), weight,
               _context_margin(model), math.ceil(per_rank / t.batch), data_id, p, best_state)
    if state is None:
        if group.main:
            run_dir.mkdir(parents=True, exist_ok=True)
        _save_resume(run)  # a run folder always holds a resume point, from the first moment
    return run


def _copy_state(model: Model) -> dict[str, torch.Tensor]:
    return {k: v.detach().clone() for k, v in model.net.state_dict().items()}


def split_indices(n: int, val_fraction: float, seed: int) -> tuple[list[int], list[int]]:
    """Deterministic split of n images (sorted by name) into training and validation: a seeded permutation;
    round(n × val_fraction) images (at least 1 and at most n − 1) go to validation when val_fraction > 0 and
    there are at least two images."""
    n_val = min(max(round(n * val_fraction), 1), n - 1) if val_fraction > 0 and n >= 2 else 0
    val = set(np.random.default_rng(seed).permutation(n)[:n_val].tolist())
    return [i for i in range(n) if i not in val], [i for i in range(n) if i in val]


def _data(data: str | Path | Sequence[np.ndarray], masks: Sequence[np.ndarray] | None, model: Model,
          max_pixels: int | None, notes: list[str]) -> tuple[list[np.ndarray], list[np.ndarray], ClassTable,
                                                             list[str], str]:
    """Images, masks, class table, each image's name (file stem, or index) and an identity of the data (what a
    resume point must find again); one-line remarks on the data go to ``notes``."""
    if isinstance(data, (str, Path)):
        if masks is not None:
            raise ConfigError("masks: give them only with image arrays (a dataset folder holds its own masks/)")
        samples, classes = find_samples(data)
        images, labels = _read(samples, classes, max_pixels, model.bands if model.built else None, notes)
        ident = ",".join(f"{s.stem}:{s.image.stat().st_size}:{s.mask.stat().st_size}" for s in samples)
        return images, labels, classes, [s.stem for s in samples], f"{Path(data).resolve()}|{ident}"
    if masks is None or len(masks) != len(data) or not len(data):
        raise ConfigError(f"masks: expected one H×W mask per image ({len(data)} images, "
                          f"{'no' if masks is None else len(masks)} masks)")
    images = [np.asarray(x)[..., None] if np.asarray(x).ndim == 2 else np.asarray(x) for x in data]
    labels = [np.asarray(m) for m in masks]
    for i, (x, m) in enumerate(zip(images, labels, strict=True)):
        if x.ndim != 3 or m.shape != x.shape[:2]:
            raise DataError(f"images[{i}]: image {x.shape} and mask {m.shape} (expected H×W×B and H×W)")
        if m.dtype.kind not in "ui" or (m.size and (m.min() < 0 or m.max() > 255)):
            raise DataError(f"masks[{i}]: expected class ids 0..254 (255 = unlabelled), got {m.dtype} values")
    for i, x in enumerate(images):
        if x.dtype.kind not in "uifb":
            raise DataError(f"images[{i}]: pixel type {x.dtype} (expected integers or real numbers)")
        if x.dtype.kind == "f" and not np.isfinite(x).all():
            raise DataError(f"images[{i}]: {int((~np.isfinite(x)).sum())} NaN or infinite pixel values (expected "
                            "finite numbers; mask or fill them first)")
    labels = [m.astype(np.uint8) for m in labels]
    classes = model.classes
    if classes is None:
        ignore = 255
        top = max(int(m[m != ignore].max(initial=0)) for m in labels)
        classes = ClassTable.generic(max(top + 1, 2))
    for i, m in enumerate(labels):
        bad = (m >= classes.num_classes) & (m != classes.ignore)
        if bad.any():
            raise DataError(f"masks[{i}]: ids {sorted(set(m[bad].tolist()))[:5]} are not classes 0.."
                            f"{classes.num_classes - 1} or the ignore value {classes.ignore}")
    digest = runstate.array_digest(images, labels)
    return images, labels, classes, [f"{i:09d}" for i in range(len(images))], f"arrays|{digest}"


def _check_fits(model: Model, images: list[np.ndarray], classes: ClassTable) -> None:
    """The data must have the model's bands and classes."""
    if classes.num_classes != model.num_classes:
        raise ConfigError(f"model.num_classes: the net has {model.num_classes} classes but the data has "
                          f"{classes.num_classes}")
    if model.classes is not None and model.classes.names != classes.names:
        raise DataError(f"classes: the data's classes ({', '.join(classes.names)}) differ from the model's "
                        f"({', '.join(model.classes.names)})")
    model.classes = classes
    for i, x in enumerate(images):
        if x.shape[2] != model.bands:
            raise ConfigError(f"model.bands: the net takes {model.bands} bands but image {i} has {x.shape[2]}")


THREAD_WINDOW = 2.0  # seconds of training between choices of the thread count (train.threads = 0)


def _loop(run: _Run, stop: _StopRequest, progress: bool, budget: TimeBudget) -> TrainResult:
    t, p, g = run.t, run.p, run.group
    ignore, total_steps = run.model.classes.ignore, t.epochs * run.steps_per_epoch
    fmt = torch.channels_last if t.channels_last else torch.contiguous_format
    val_pixels = sum(m.size for m in run.val_masks)
    if budget.active and t.calibrate and run.has_val and "calibration" not in p:  # not fitted yet
        budget.calibration = _calibration_seconds(run)
    if run.cores is not None:  # one thread until the cores others leave free have been measured
        torch.set_num_threads(run.cores.choice)
    chosen = time.perf_counter()
    first_step = p["step"]  # weights are still the ones this run started from until an optimiser step
    while (budget.active or p["epoch"] < t.epochs) and not p["stopped_early"] and not p.get("out_of_time"):
        if budget.active and p["epoch"] and not p["batch"] and parallel.any_rank(g, budget.must_stop(val_pixels))[0]:
            p["out_of_time"] = True  # the last epoch's end left no time for another step and the closing
            break
        epoch, tic, lr = p["epoch"], time.perf_counter() - p["epoch_seconds"], 0.0
        of = "" if budget.active else f"/{t.epochs}"  # with a budget, time decides the number of epochs
        bar = tqdm(total=run.steps_per_epoch, initial=p["batch"], desc=f"epoch {epoch + 1}{of}", unit="batch",
                   disable=not (progress and g.main), dynamic_ncols=True)
        run.net.train()
        step_tic = time.perf_counter()
        for x, y in _batches(run, epoch, p["batch"]):
            if run.cores is not None and step_tic - chosen > THREAD_WINDOW:  # other programs come and go
                torch.set_num_threads(run.cores.threads())
                chosen = step_tic
            at = budget.schedule_step(p["step"], total_steps, val_pixels)  # steps, or time with a budget
            lr = t.lr * lr_factor(at, total_steps, t.warmup * run.steps_per_epoch, t.schedule)
            for group in run.opt.param_groups:
                group["lr"] = lr
            x = x.contiguous(memory_format=fmt)  # raw pixels: the model normalises them
            with torch.autocast("cpu", dtype=torch.bfloat16, enabled=t.bf16):
                logits = run.net(x)
            loss = segmentation_loss(logits, y, run.weight, ignore, t.dice)
            forward_seconds = time.perf_counter() - step_tic
            diverged, stopping = parallel.any_rank(g, not torch.isfinite(loss).item(), stop.requested)
            if diverged:
                raise _diverged(run, x, logits, loss, lr, p["step"] - first_step)
            run.opt.zero_grad(set_to_none=True)
            loss.backward()
            run.opt.step()
            p["step"], p["batch"], p["loss_batches"] = p["step"] + 1, p["batch"] + 1, p["loss_batches"] + 1
            p["loss_sum"], p["pixels"] = p["loss_sum"] + loss.item(), p["pixels"] + y.numel()
            bar.update()
            bar.set_postfix(loss=f"{p['loss_sum'] / p['loss_batches']:.4f}",
                            speed=pixel_rate(p["pixels"] * g.world, time.perf_counter() - tic))
            if stopping:
                p["epoch_seconds"] = time.perf_counter() - tic
                bar.close()
                _interrupt(run, stop.signum)
            budget.note_step(time.perf_counter() - step_tic, forward_seconds / y.numel())  # loading included
            step_tic = time.perf_counter()
            if budget.active and parallel.any_rank(g, budget.must_stop(val_pixels))[0]:  # one verdict for all
                p["out_of_time"] = True
                break
        bar.close()
        end_tic = time.perf_counter()
        _end_epoch(run, lr, end_tic - tic)
        budget.closing = time.perf_counter() - end_tic
        if parallel.any_rank(g, stop.requested)[0]:  # Ctrl-C during validation: stop before the next epoch
            _interrupt(run, stop.signum)
    best = p["best_mean_iou"] if p["best_mean_iou"] > -math.inf else math.nan
    return TrainResult(run.run_dir, run.run_dir / runstate.MODEL_FILE, p["epoch"], p["best_epoch"], best,
                       p["stopped_early"], p["history"], bool(p.get("out_of_time")))


def _diverged(run: _Run, x: torch.Tensor, logits: torch.Tensor, loss: torch.Tensor, lr: float,
              steps: int) -> FcnkitError:
    """The error for a loss that is not finite, saying what is not: the pixels, the starting model's scores, the
    class weights, or — after training steps — the weights or scores (then the learning rate is to blame)."""
    p = run.p
    at = f"epoch {p['epoch'] + 1}, batch {p['batch'] + 1}"
    kept = f"stopped, the last good files in {run.run_dir} are kept"
    if not bool(torch.isfinite(loss)):  # this process's own batch (else another process's)
        if not bool(torch.isfinite(x).all()):
            return DataError(f"training patches of {at} hold NaN or infinite pixel values; check the images")
        if run.weight is not None and not bool(torch.isfinite(run.weight).all()):
            return ConfigError(f"train.class_weights: NaN or infinite class weights {run.weight.tolist()}")
        weights_finite = all(bool(torch.isfinite(w).all()) for w in run.model.parameters())
        if weights_finite and not bool(torch.isfinite(logits).all()) and steps == 0:
            start = run.model.extra.get("init") or ("the resume point" if p["step"] else "the config's initial net")
            mean, std = run.model.normalisation
            return DataError(f"{start}: its class scores are NaN or infinite on the training patches of {at}, before "
                             f"any training step (pixel values up to {float(x.abs().max()):g}, normalised by mean "
                             f"{mean} and std {std}): the starting weights overflow on this data; check the data's "
                             "range or the starting model")
        what = ("weights NaN or infinite" if not weights_finite else "class scores NaN or infinite, weights finite"
                if not bool(torch.isfinite(logits).all()) else "class scores and weights finite")
        return ConfigError(f"train.lr: the loss became {loss.item()} at {at} (lr {lr:.3g}; {what} after {steps} "
                           f"training steps); {kept}; try a lower train.lr")
    return ConfigError(f"train.lr: the loss became NaN or infinite in another training process at {at} (lr {lr:.3g}); "
                       f"{kept}; try a lower train.lr")


def _end_epoch(run: _Run, lr: float, train_seconds: float) -> None:
    """Validate, record the epoch, keep the best model, write the resume point and the metrics table."""
    t, p, g, model = run.t, run.p, run.group, run.model
    tic = time.perf_counter()
    parallel.share_buffers(g, model)
    sample = _PixelSample(run) if t.calibrate and run.has_val else None
    cm, ce, norm = validate(model, run.val_images, run.val_masks, weight=run.weight, margin=run.margin,
                            channels_last=t.channels_last, on_block=sample)
    sums = parallel.all_sum(g, torch.tensor([p["loss_sum"], p["loss_batches"], p["pixels"], ce, norm]))
    cm = parallel.all_sum(g, torch.from_numpy(cm)).numpy().round().astype(np.int64)
    scores = segmentation_scores(cm)
    loss_sum, batches, pixels, ce, norm = sums.tolist()
    row = {"epoch": p["epoch"] + 1, "seconds": round(p["seconds"] + train_seconds + time.perf_counter() - tic, 2),
           "lr": lr, "train_loss": loss_sum / max(batches, 1), "val_loss": ce / norm if norm > 0 else math.nan,
           "val_pixel_accuracy": scores["pixel_accuracy"], "val_mean_accuracy": scores["mean_accuracy"],
           "val_mean_iou": scores["mean_iou"], "val_fw_iou": scores["fw_iou"],
           "pixels_per_second": round(pixels / max(train_seconds, 1e-9))}
    names = [name.replace(" ", "_") for name in model.classes.names]
    row.update({f"iou_{name}": v for name, v in zip(names, scores["iou"], strict=True)})
    miou = scores["mean_iou"] if not math.isnan(scores["mean_iou"]) else -math.inf
    p.update(epoch=p["epoch"] + 1, batch=0, seconds=row["seconds"], epoch_seconds=0.0, loss_sum=0.0,
             loss_batches=0, pixels=0, history=[*p["history"], row])
    if p["best_epoch"] == 0 or miou > p["best_mean_iou"] or not run.has_val:  # without validation: keep the latest
        p.update(best_mean_iou=miou, best_epoch=p["epoch"], bad_epochs=0)
        run.best_state = _copy_state(model)
        run.best_sample = sample
        model.extra = {**model.extra, "epoch": p["epoch"], "val_mean_iou": scores["mean_iou"]}
        if g.main:
            model.save(run.run_dir / runstate.MODEL_FILE)
    else:
        p["bad_epochs"] += 1
        p["stopped_early"] = bool(t.patience) and p["bad_epochs"] >= t.patience
    _save_resume(run)
    if g.main:
        runstate.write_metrics(run.run_dir / "metrics.csv", p["history"])


def _blocks(n: int, block: int, margin: int) -> Iterator[tuple[int, int, int, int]]:
    """(read_start, read_stop, keep_start, keep_stop) along one axis of length n."""
    for start in range(0, n, block):
        stop = min(start + block, n)
        yield max(start - margin, 0), min(stop + margin, n), start, stop


def _scored_blocks(model: Model, images: Sequence[np.ndarray], masks: Sequence[np.ndarray], *, margin: int = 0,
                   block: int = 1024, channels_last: bool = False) -> Iterator[tuple[torch.Tensor, torch.Tensor]]:
    """(logits 1×C×h×w, labels 1×h×w) of every image, in blocks: images up to ``block`` × ``block`` pixels go
    through the model in one piece; larger ones are cut into blocks, each run with ``margin`` pixels of context
    on every side and cropped back, so memory stays bounded. With the net's tile margin as ``margin`` the
    blocks give the whole-image result."""
    factor = model.plan.factor
    block = max(factor, block // factor * factor)
    margin = -(-margin // factor) * factor  # block and read origins stay on the net's pooling grid
    fmt = torch.channels_last if channels_last else torch.contiguous_format
    was_training = model.training
    model.eval()
    try:
        with torch.inference_mode():
            for image, mask in zip(images, masks, strict=True):
                h, w = mask.shape
                for y0, y1, ky0, ky1 in _blocks(h, block, margin):
                    for x0, x1, kx0, kx1 in _blocks(w, block, margin):
                        x = torch.from_numpy(np.ascontiguousarray(image[y0:y1, x0:x1])).permute(2, 0, 1).float()
                        logits = model(x.unsqueeze(0).contiguous(memory_format=fmt))
                        yield (logits[..., ky0 - y0:ky1 - y0, kx0 - x0:kx1 - x0],
                               torch.from_numpy(mask[ky0:ky1, kx0:kx1].astype(np.int64)).unsqueeze(0))
    finally:
        model.train(was_training)


def validate(model: Model, images: Sequence[np.ndarray], masks: Sequence[np.ndarray], *,
             weight: torch.Tensor | None = None, margin: int = 0, block: int = 1024, channels_last: bool = False,
             on_block: Callable[[torch.Tensor, torch.Tensor], None] | None = None) -> tuple[np.ndarray, float, float]:
    """Confusion matrix (rows = truth) of ``model`` over H×W×B images and H×W masks, plus the summed
    cross-entropy of the labelled pixels and its normaliser (their count, or their summed class weights).
    ``on_block`` is shown every block's logits (1×C×h×w) and labels (1×h×w) as they are scored."""
    k, ignore = model.num_classes, model.classes.ignore
    cm = np.zeros((k, k), np.int64)
    ce = norm = 0.0
    for logits, target in _scored_blocks(model, images, masks, margin=margin, block=block,
                                         channels_last=channels_last):
        if on_block is not None:
            on_block(logits, target)
        total, n = pixel_cross_entropy(logits, target, weight, ignore)
        ce, norm = ce + total.item(), norm + n.item()
        cm += confusion_matrix(target, logits.argmax(1), k, ignore)
    return cm, ce, norm


# Labelled validation pixels each process keeps for fitting the temperature. Measured on two models of the texture
# mosaics of scripts/bench_train_vs_script.py: temperatures fitted on five random 50,000-pixel samples of 295,000
# held-out pixels spread by 1.5-2 % (200,000: 0.5-0.7 %), no more than the validation and the held-out fit differ
# by, and the fit took 0.22 s instead of 0.85 s on one thread.
CALIBRATION_PIXELS = 50_000


class _PixelSample:
    """A seeded random choice of labelled validation pixels — their logits and labels, up to CALIBRATION_PIXELS
    per process — taken block by block as the validation images are scored (the same pixels every time the
    same images are scored). The best epoch's sample is what the temperature is fitted on, so calibration
    does not run the validation images through the net again."""

    def __init__(self, run: _Run) -> None:
        self.ignore = run.model.classes.ignore
        self.keep = min(1.0, CALIBRATION_PIXELS / max(run.val_labelled, 1))
        self.rng = np.random.default_rng(run.t.seed + run.group.rank)
        self.x: list[np.ndarray] = []
        self.y: list[np.ndarray] = []

    def __call__(self, logits: torch.Tensor, target: torch.Tensor) -> None:
        z = logits[0].flatten(1).T.float().numpy()
        y = target[0].flatten().numpy()
        chosen = (y != self.ignore) & (self.rng.random(y.shape) < self.keep)
        self.x.append(z[chosen])
        self.y.append(y[chosen])


def _calibrate(run: _Run) -> None:
    """Fit the temperature of softmax(logits / T) on the validation split (Guo et al. 2017), once per run:
    the best model's logits on a seeded sample of labelled validation pixels, pooled over every process. The
    fit, and the reliability of the confidences before and after, go into the model and its file."""
    model, t, p, g = run.model, run.t, run.p, run.group
    if "calibration" not in p:
        if not (t.calibrate and run.has_val):
            reason = "train.calibrate is false" if not t.calibrate else "no validation split"
            p["calibration"] = {"temperature": 1.0, "fitted": False, "note": f"not calibrated: {reason}"}
        elif not len((pixels := _validation_pixels(run))[1]):
            p["calibration"] = {"temperature": 1.0, "fitted": False,
                                "note": "not calibrated: no labelled validation pixels"}
        else:
            p["calibration"] = _fit_calibration(*pixels, t.seed)
        model.temperature = p["calibration"]["temperature"]
        model.extra = {**model.extra, "calibration": p["calibration"]}
        if g.main and (run.run_dir / runstate.MODEL_FILE).exists():
            model.save(run.run_dir / runstate.MODEL_FILE)
        _save_resume(run)
    else:  # a finished run resumed: the fit it recorded
        model.temperature = p["calibration"]["temperature"]
        model.extra = {**model.extra, "calibration": p["calibration"]}


def _fit_calibration(logits: np.ndarray, labels: np.ndarray, seed: int) -> dict[str, Any]:
    """The temperature fitted on N×C logits and N labels, and the reliability before and after, as recorded."""
    from fcnkit.calibration import fit_temperature, reliability, scaled_softmax

    fit = fit_temperature(logits, labels, axis=1, ignore=None, max_pixels=len(labels), seed=seed)
    before = reliability(scaled_softmax(logits, 1.0, axis=1), labels, axis=1, ignore=None)
    after = reliability(scaled_softmax(logits, fit.temperature, axis=1), labels, axis=1, ignore=None)
    return {"temperature": fit.temperature, "fitted": True, "pixels": fit.pixels, "nll_before": fit.nll_before,
            "nll_after": fit.nll_after, "at_bound": fit.at_bound, "ece_before": before.ece, "ece_after": after.ece,
            "reliability_before": before.to_dict(), "reliability_after": after.to_dict(),
            "method": "temperature scaling on the validation split (Guo et al. 2017); "
                      "ECE over 15 equal-width confidence bins"}


CALIBRATION_PROBE = 16_384  # stand-in pixels timed to estimate the calibration's cost under a time budget
# The fit's cost per pixel can grow once its float64 arrays outgrow the caches: measured 5-6 µs per pixel at
# 2,048-16,384 pixels and 4-10 µs at 50,000 (one thread, 4 classes), so the probe's time is scaled up by this.
CALIBRATION_CACHE_FACTOR = 1.5


def _calibration_seconds(run: _Run) -> float:
    """Seconds the calibration after training will take on this machine: ``_fit_calibration`` timed on up to
    CALIBRATION_PROBE random stand-in pixels (its iterations do not depend on the values) and scaled to the pixels
    the real fit will use, plus saving the model file and the resume point."""
    k = run.model.num_classes
    pixels = min(run.val_labelled, CALIBRATION_PIXELS) * run.group.world
    probe = min(pixels, CALIBRATION_PROBE)
    if not probe:
        return 2 * SAVE_SECONDS
    rng = np.random.default_rng(run.t.seed)
    logits = (3 * rng.standard_normal((probe, k))).astype(np.float32)
    labels = rng.integers(0, k, probe)
    tic = time.perf_counter()
    _fit_calibration(logits, labels, run.t.seed)
    scale = pixels / probe * (CALIBRATION_CACHE_FACTOR if pixels > probe else 1.0)
    return (time.perf_counter() - tic) * scale + 2 * SAVE_SECONDS


def _validation_pixels(run: _Run) -> tuple[np.ndarray, np.ndarray]:
    """The best model's logits (N×C) and labels (N) at up to CALIBRATION_PIXELS labelled validation pixels per
    process, a seeded random choice, pooled over every process (ignored pixels labelled −1): the sample the
    best epoch's validation kept, or, when that epoch ran in an earlier session, the same pixels scored again."""
    model, g = run.model, run.group
    sample = run.best_sample
    if sample is None:  # the best epoch ran in an earlier session
        sample = _PixelSample(run)
        for logits, target in _scored_blocks(model, run.val_images, run.val_masks, margin=run.margin,
                                             channels_last=run.t.channels_last):
            sample(logits, target)
    k = model.num_classes
    x = np.concatenate(sample.x) if sample.x else np.zeros((0, k), np.float32)
    y = np.concatenate(sample.y) if sample.y else np.zeros(0, np.int64)
    if g.world > 1:  # equal shapes for the exchange: pad with ignored rows, dropped afterwards
        size = int(parallel.all_sum(g, torch.tensor([float(len(y))]), op="max").item())
        x = np.concatenate([x, np.zeros((size - len(y), k), np.float32)])
        y = np.concatenate([y, np.full(size - len(y), -1, np.int64)])
        x = np.concatenate([v.numpy() for v in parallel.gather(g, torch.from_numpy(x))])
        y = np.concatenate([v.numpy() for v in parallel.gather(g, torch.from_numpy(y))])
        x, y = x[y >= 0], y[y >= 0]
    return x.astype(np.float32), y.astype(np.int64)


def _read(samples: list[Sample], classes: ClassTable, max_pixels: int | None = DEFAULT_MAX_PIXELS,
          bands: int | None = None, notes: list[str] | None = None) -> tuple[list[np.ndarray], list[np.ndarray]]:
    """Every image and mask of a dataset folder; each image must have ``bands`` bands (the net's, when it is
    built) and as many as the first. A line about nodata pixels met goes to ``notes``."""
    images, masks = [], []
    notes = [] if notes is None else notes
    nodata = met = 0
    for s in samples:
        sample = read_sample(s, classes, max_pixels)  # masks or vector labels; nodata pixels unlabelled
        image = sample.image
        if bands is not None and image.shape[2] != bands:
            raise ConfigError(f"model.bands: the net takes {bands} bands but {s.image} has {image.shape[2]}")
        images.append(image)
        masks.append(sample.mask)
        nodata += sample.nodata_pixels
        met += sample.nodata_pixels > 0
    mixed = mixed_images([(s.image, x.shape[2], str(x.dtype)) for s, x in zip(samples, images, strict=True)])
    if mixed:  # the rule `check` applies
        raise DataError(mixed[0])
    if nodata:
        notes.append(f"nodata: {nodata:,} pixels in {met} of {len(samples)} images are unlabelled and left out of "
                     "the band statistics")
    return images, masks


def _check_memory(model: Model, t: TrainConfig) -> None:
    """Refuse a batch of patches whose training step would not fit in memory, before any file is touched."""
    from fcnkit.memory import check_training_memory
    from fcnkit.nets import layer_graph

    try:
        graph = layer_graph(model.net)
    except (ValueError, TypeError, RuntimeError):
        return  # a net the geometry reader cannot trace: no estimate
    check_training_memory(graph, t.patch, t.batch, model.bands, sum(p.numel() for p in model.parameters()))


def _context_margin(model: Model) -> int:
    """Context validation blocks need to match whole-image predictions: the net's tile margin (0 when the
    net mixes every position, and so cannot be cut exactly anyway)."""
    try:
        return model.geometry.margin or 0
    except (ValueError, ConfigError):
        return 0


def _ignore_sigint(_: int) -> None:
    signal.signal(signal.SIGINT, signal.SIG_IGN)  # loader workers: Ctrl-C is the main process's to handle


def _batches(run: _Run, epoch: int, skip: int) -> DataLoader:
    """This process's share of the epoch's patches, in batches, from batch ``skip`` on."""
    t, g = run.t, run.group
    run.patches.set_epoch(epoch)
    per_rank = t.patches_per_epoch // g.world
    indices = list(range(g.rank, per_rank * g.world, g.world))[skip * t.batch:]
    # own generator: creating the loader must not draw from the global RNG a resumed run restores
    return DataLoader(run.patches, batch_size=t.batch, sampler=indices, num_workers=t.workers,
                      worker_init_fn=_ignore_sigint if t.workers else None,
                      generator=torch.Generator().manual_seed(t.seed + epoch))


def _save_resume(run: _Run) -> None:
    """Write the resume point (rank 0; every process takes part, as each one's torch RNG state is kept)."""
    torch_by_rank = parallel.gather(run.group, torch.get_rng_state())
    if run.group.main:
        mean, std = run.model.normalisation
        runstate.save_resume(run.run_dir / runstate.RESUME_FILE, {
            "config_hash": runstate.config_hash(run.model.config), "config": json.dumps(run.model.config),
            "data": run.data_id, "model": run.model.net.state_dict(), "best": run.best_state,
            "mean": torch.tensor(mean), "std": torch.tensor(std), "optimizer": run.opt.state_dict(),
            "rng": runstate.rng_states(), "torch_rng_by_rank": torch_by_rank, "progress": run.p})


def _interrupt(run: _Run, signum: int) -> None:
    _save_resume(run)
    what = "terminated" if signum == signal.SIGTERM else "interrupted"
    raise TrainingInterrupted(f"{what}; resume point saved to {run.run_dir / runstate.RESUME_FILE}, continue with "
                              "--resume", signum)


STOP_SIGNALS = (signal.SIGINT, signal.SIGTERM)


class _StopRequest:
    """The first Ctrl-C (SIGINT) or SIGTERM asks the loop to stop after the current batch and write a resume
    point; a second one interrupts at once."""

    def __enter__(self) -> _StopRequest:
        self.requested = False
        self.signum = signal.SIGINT
        self._previous: dict[int, Any] = {}
        if threading.current_thread() is threading.main_thread():
            self._previous = {s: signal.signal(s, self._handle) for s in STOP_SIGNALS}
        return self

    def _handle(self, signum: int, frame: Any) -> None:
        if self.requested:
            raise Interrupted("stopped at once (second signal); the last resume point is kept", signum)
        self.requested, self.signum = True, signum

    def __exit__(self, *exc: object) -> None:
        for s, previous in self._previous.items():
            signal.signal(s, previous)
