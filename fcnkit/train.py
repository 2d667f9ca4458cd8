"""Train a segmenter from a dataset folder into a run folder, resumably.

Each epoch draws ``train.patches_per_epoch`` patches from the training images (fcnkit.data.patches), fits
them with per-pixel cross-entropy over labelled pixels (optionally class-weighted and with a Dice term),
then scores the held-out whole images. The best model by validation mean IoU is kept as
RUN_DIR/model.safetensors; RUN_DIR/resume.pt lets ``resume=True`` continue exactly (see fcnkit.runstate);
RUN_DIR/metrics.csv gets a row per epoch. Under torchrun the patches of an epoch are shared out among the
processes (DistributedDataParallel, gloo), validation images too, and rank 0 alone writes files.
"""

from __future__ import annotations

import json
import math
import random
import signal
import threading
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import torch
from torch import nn
from torch.nn.parallel import DistributedDataParallel
from torch.utils.data import DataLoader
from tqdm import tqdm

from fcnkit import geometry, parallel, runstate
from fcnkit.config import Config, config_from_dict, config_to_dict
from fcnkit.data.dataset import Sample, band_stats, find_samples, read_sample
from fcnkit.data.imageio import DEFAULT_MAX_PIXELS
from fcnkit.data.patches import PatchDataset
from fcnkit.errors import ConfigError
from fcnkit.evaluate import evaluate_images
from fcnkit.losses import median_frequency_weights, segmentation_loss
from fcnkit.metrics import segmentation_scores
from fcnkit.modelfile import ModelMeta, load_model, save_model
from fcnkit.schedules import lr_factor


@dataclass
class TrainResult:
    """What a finished (or early-stopped) run produced."""

    run_dir: Path
    model_path: Path
    epochs: int  # epochs completed
    best_epoch: int
    best_miou: float  # NaN when there is no validation split
    stopped_early: bool
    history: list[dict[str, Any]]


class TrainingInterrupted(KeyboardInterrupt):
    """Ctrl-C during training: a resume point was written first; the message says where."""


def split_samples(samples: list[Sample], val_fraction: float, seed: int) -> tuple[list[Sample], list[Sample]]:
    """Deterministic split into training and validation by whole images: a seeded permutation of the samples
    sorted by stem; round(n × val_fraction) images (at least 1 and at most n − 1) go to validation when
    val_fraction > 0 and there are at least two images."""
    ordered = sorted(samples, key=lambda s: s.stem)
    n = len(ordered)
    n_val = min(max(round(n * val_fraction), 1), n - 1) if val_fraction > 0 and n >= 2 else 0
    val = set(np.random.default_rng(seed).permutation(n)[:n_val].tolist())
    return [s for i, s in enumerate(ordered) if i not in val], [s for i, s in enumerate(ordered) if i in val]


def train(cfg: Config, data_dir: str | Path, out_dir: str | Path, *, resume: bool = False,
          init: str | Path | None = None, progress: bool = True,
          max_pixels: int | None = DEFAULT_MAX_PIXELS) -> TrainResult:
    """Train ``cfg``'s net (or the model file ``init``, whose architecture and weights then replace
    cfg.model) on the dataset folder ``data_dir``, writing the run to ``out_dir``. Images and masks above
    ``max_pixels`` pixels are refused (None: no limit)."""
    group, threads = parallel.start(), torch.get_num_threads()
    try:
        if cfg.train.threads:
            torch.set_num_threads(cfg.train.threads)
        run = _prepare(cfg, Path(data_dir), Path(out_dir), resume, init, group, max_pixels)
        with _StopRequest() as stop:
            return _loop(run, stop, progress)
    finally:
        torch.set_num_threads(threads)
        parallel.finish(group)


@dataclass
class _Run:
    """Everything the loop needs; ``p`` is the progress saved in each resume point."""

    cfg: Config
    run_dir: Path
    group: parallel.Group
    model: nn.Module
    net: nn.Module  # the model, wrapped for data-parallel training when there are several processes
    opt: torch.optim.Optimizer
    meta: ModelMeta
    patches: PatchDataset
    val_images: list[np.ndarray]
    val_masks: list[np.ndarray]
    has_val: bool
    weight: torch.Tensor | None
    margin: int
    steps_per_epoch: int
    p: dict[str, Any]


def _prepare(cfg: Config, data_dir: Path, run_dir: Path, resume: bool, init: str | Path | None,
             group: parallel.Group, max_pixels: int | None = DEFAULT_MAX_PIXELS) -> _Run:
    from fcnkit import __version__

    t = cfg.train
    torch.manual_seed(t.seed)
    np.random.seed(t.seed)
    random.seed(t.seed)
    model, cfg, base = _initial_model(cfg, init)
    _check_memory(model, cfg)
    config = base.config if base else config_to_dict(cfg)
    if group.main:
        runstate.claim_run_dir(run_dir, resume)
    state = runstate.load_resume(run_dir / runstate.RESUME_FILE, config) if resume else None
    samples, classes = find_samples(data_dir)
    if classes.num_classes != model.classes:
        raise ConfigError(f"model.classes: the net has {model.classes} classes but {data_dir / 'classes.toml'} "
                          f"lists {classes.num_classes}")
    train_s, val_s = split_samples(samples, t.val_fraction, t.seed)
    train_x, train_y = _read(train_s, classes, model.bands, max_pixels)
    val_x, val_y = _read(val_s[group.rank::group.world], classes, model.bands, max_pixels)
    mean, std = (base.mean, base.std) if base else band_stats(train_x)
    meta = ModelMeta(base.kind if base else "segnet", config, classes, list(mean), [v if v > 0 else 1.0 for v in std],
                     __version__, base.extra if base else {})
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
    model = model.to(memory_format=fmt)
    if t.optimizer == "adamw":
        opt: torch.optim.Optimizer = torch.optim.AdamW(model.parameters(), lr=t.lr, weight_decay=t.weight_decay)
    else:
        opt = torch.optim.SGD(model.parameters(), lr=t.lr, momentum=t.momentum, weight_decay=t.weight_decay)
    p = {"epoch": 0, "batch": 0, "step": 0, "seconds": 0.0, "epoch_seconds": 0.0, "loss_sum": 0.0,
         "loss_batches": 0, "pixels": 0, "best_miou": -math.inf, "best_epoch": 0, "bad_epochs": 0,
         "stopped_early": False, "history": []}
    if state is not None:
        model.load_state_dict(state["model"])
        opt.load_state_dict(state["optimizer"])
        runstate.set_rng_states(state["rng"])
        if len(state.get("torch_rng_by_rank", [])) == group.world:  # each process's own dropout stream
            torch.set_rng_state(state["torch_rng_by_rank"][group.rank])
        p = state["progress"]
    net = DistributedDataParallel(model) if group.world > 1 else model
    run = _Run(cfg, run_dir, group, model, net, opt, meta, patches, val_x, val_y, bool(val_s), weight,
               _context_margin(model), math.ceil(per_rank / t.batch), p)
    if state is None:
        if group.main:
            run_dir.mkdir(parents=True, exist_ok=True)
        _save_resume(run)  # a run folder always holds a resume point, from the first moment
    return run


def _loop(run: _Run, stop: _StopRequest, progress: bool) -> TrainResult:
    t, p, g = run.cfg.train, run.p, run.group
    ignore, total_steps = run.meta.classes.ignore, t.epochs * run.steps_per_epoch
    mean, std = (torch.tensor(v, dtype=torch.float32).view(1, -1, 1, 1) for v in (run.meta.mean, run.meta.std))
    fmt = torch.channels_last if t.channels_last else torch.contiguous_format
    while p["epoch"] < t.epochs and not p["stopped_early"]:
        epoch, tic, lr = p["epoch"], time.perf_counter() - p["epoch_seconds"], 0.0
        bar = tqdm(total=run.steps_per_epoch, initial=p["batch"], desc=f"epoch {epoch + 1}/{t.epochs}",
                   unit="batch", disable=not (progress and g.main), dynamic_ncols=True)
        run.net.train()
        for x, y in _batches(run, epoch, p["batch"]):
            lr = t.lr * lr_factor(p["step"], total_steps, t.warmup * run.steps_per_epoch, t.schedule)
            for group in run.opt.param_groups:
                group["lr"] = lr
            x = ((x - mean) / std).contiguous(memory_format=fmt)
            with torch.autocast("cpu", dtype=torch.bfloat16, enabled=t.bf16):
                logits = run.net(x)
            loss = segmentation_loss(logits, y, run.weight, ignore, t.dice)
            diverged, stopping = parallel.any_rank(g, not torch.isfinite(loss).item(), stop.requested)
            if diverged:
                raise ConfigError(f"train.lr: the loss became {loss.item()} at epoch {epoch + 1}, batch "
                                  f"{p['batch'] + 1} (lr {lr:.3g}); stopped, the last good files in {run.run_dir} "
                                  "are kept; try a lower train.lr, or check the images for NaN or inf")
            run.opt.zero_grad(set_to_none=True)
            loss.backward()
            run.opt.step()
            p["step"], p["batch"], p["loss_batches"] = p["step"] + 1, p["batch"] + 1, p["loss_batches"] + 1
            p["loss_sum"], p["pixels"] = p["loss_sum"] + loss.item(), p["pixels"] + y.numel()
            bar.update()
            bar.set_postfix(loss=f"{p['loss_sum'] / p['loss_batches']:.4f}",
                            px_s=f"{p['pixels'] * g.world / (time.perf_counter() - tic):.3g}")
            if stopping:
                p["epoch_seconds"] = time.perf_counter() - tic
                bar.close()
                _interrupt(run)
        bar.close()
        _end_epoch(run, lr, time.perf_counter() - tic)
        if parallel.any_rank(g, stop.requested)[0]:  # Ctrl-C during validation: stop before the next epoch
            _interrupt(run)
    best = p["best_miou"] if p["best_miou"] > -math.inf else math.nan
    return TrainResult(run.run_dir, run.run_dir / runstate.MODEL_FILE, p["epoch"], p["best_epoch"], best,
                       p["stopped_early"], p["history"])


def _end_epoch(run: _Run, lr: float, train_seconds: float) -> None:
    """Validate, record the epoch, keep the best model, write the resume point and the metrics table."""
    t, p, g = run.cfg.train, run.p, run.group
    k, tic = run.meta.classes.num_classes, time.perf_counter()
    parallel.share_buffers(g, run.model)
    cm, ce, norm = evaluate_images(run.model, run.val_images, run.val_masks, mean=run.meta.mean, std=run.meta.std,
                                   num_classes=k, ignore=run.meta.classes.ignore, weight=run.weight,
                                   margin=run.margin, channels_last=t.channels_last)
    sums = parallel.all_sum(g, torch.tensor([p["loss_sum"], p["loss_batches"], p["pixels"], ce, norm]))
    cm = parallel.all_sum(g, torch.from_numpy(cm)).numpy().round().astype(np.int64)
    scores = segmentation_scores(cm)
    loss_sum, batches, pixels, ce, norm = sums.tolist()
    row = {"epoch": p["epoch"] + 1, "seconds": round(p["seconds"] + train_seconds + time.perf_counter() - tic, 2),
           "lr": lr, "train_loss": loss_sum / max(batches, 1), "val_loss": ce / norm if norm > 0 else math.nan,
           "val_pixel_acc": scores["pixel_accuracy"], "val_mean_acc": scores["mean_accuracy"],
           "val_miou": scores["mean_iou"], "val_fw_iou": scores["fw_iou"],
           "pixels_per_s": round(pixels / max(train_seconds, 1e-9))}
    names = [name.replace(" ", "_") for name in run.meta.classes.names]
    row.update({f"iou_{name}": v for name, v in zip(names, scores["iou"], strict=True)})
    miou = scores["mean_iou"] if not math.isnan(scores["mean_iou"]) else -math.inf
    p.update(epoch=p["epoch"] + 1, batch=0, seconds=row["seconds"], epoch_seconds=0.0, loss_sum=0.0,
             loss_batches=0, pixels=0, history=[*p["history"], row])
    if p["best_epoch"] == 0 or miou > p["best_miou"] or not run.has_val:  # without validation: keep the latest
        p.update(best_miou=miou, best_epoch=p["epoch"], bad_epochs=0)
        if g.main:
            meta = ModelMeta(run.meta.kind, run.meta.config, run.meta.classes, run.meta.mean, run.meta.std,
                             run.meta.version, {**run.meta.extra, "epoch": p["epoch"],
                                                "val_mean_iou": scores["mean_iou"]})
            save_model(run.run_dir / runstate.MODEL_FILE, run.model, meta)
    else:
        p["bad_epochs"] += 1
        p["stopped_early"] = bool(t.patience) and p["bad_epochs"] >= t.patience
    _save_resume(run)
    if g.main:
        runstate.write_metrics(run.run_dir / "metrics.csv", p["history"])


def _initial_model(cfg: Config, init: str | Path | None) -> tuple[nn.Module, Config, ModelMeta | None]:
    """A fresh net from cfg; or the net of model file ``init``, whose model table then replaces cfg.model and
    whose metadata (kind, resolved config, normalisation) the run carries on."""
    from fcnkit.nets import build_model

    if init is None:
        return build_model(cfg), cfg, None
    loaded = load_model(init)
    m = loaded.meta
    config = {**m.config, "train": config_to_dict(cfg)["train"]}
    if m.kind == "segnet":
        cfg = config_from_dict(config)
    return loaded.model, cfg, ModelMeta(m.kind, config, m.classes, m.mean, m.std, m.version,
                                        {**m.extra, "init": str(init)})


def _read(samples: list[Sample], classes: Any, bands: int,
          max_pixels: int | None = DEFAULT_MAX_PIXELS) -> tuple[list[np.ndarray], list[np.ndarray]]:
    images, masks = [], []
    for s in samples:
        sample = read_sample(s, classes, max_pixels)  # masks or vector labels; nodata pixels unlabelled
        if sample.image.shape[2] != bands:
            raise ConfigError(f"model.bands: the net takes {bands} bands but {s.image} has {sample.image.shape[2]}")
        images.append(sample.image)
        masks.append(sample.mask)
    return images, masks


def _check_memory(model: nn.Module, cfg: Config) -> None:
    """Refuse a batch of patches whose training step would not fit in memory, before any file is touched."""
    from fcnkit.memory import check_training_memory
    from fcnkit.nets import layer_graph

    try:
        graph = layer_graph(model)
    except (ValueError, TypeError, RuntimeError):
        return  # a net the geometry reader cannot trace: no estimate
    check_training_memory(graph, cfg.train.patch, cfg.train.batch, model.bands, sum(p.numel() for p in
                                                                                    model.parameters()))


def _context_margin(model: nn.Module) -> int:
    """Context validation blocks need to match whole-image predictions: the net's tile margin (0 when the
    net mixes every position, and so cannot be cut exactly anyway)."""
    from fcnkit.nets import layer_graph

    try:
        graph = layer_graph(model)
    except (ValueError, TypeError, RuntimeError):
        return 0
    return geometry.tile_margin(graph) if geometry.is_local(graph) else 0


def _ignore_sigint(_: int) -> None:
    signal.signal(signal.SIGINT, signal.SIG_IGN)  # loader workers: Ctrl-C is the main process's to handle


def _batches(run: _Run, epoch: int, skip: int) -> DataLoader:
    """This process's share of the epoch's patches, in batches, from batch ``skip`` on."""
    t, g = run.cfg.train, run.group
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
        runstate.save_resume(run.run_dir / runstate.RESUME_FILE, {
            "config_hash": runstate.config_hash(run.meta.config), "config": json.dumps(run.meta.config),
            "model": run.model.state_dict(), "optimizer": run.opt.state_dict(), "rng": runstate.rng_states(),
            "torch_rng_by_rank": torch_by_rank, "progress": run.p})


def _interrupt(run: _Run) -> None:
    _save_resume(run)
    raise TrainingInterrupted(f"interrupted; resume point saved to {run.run_dir / runstate.RESUME_FILE}, "
                              "continue with --resume")


class _StopRequest:
    """The first Ctrl-C (SIGINT) asks the loop to stop after the current batch and write a resume point;
    a second one interrupts at once."""

    def __enter__(self) -> _StopRequest:
        self.requested = False
        self._previous = None
        if threading.current_thread() is threading.main_thread():
            self._previous = signal.signal(signal.SIGINT, self._handle)
        return self

    def _handle(self, signum: int, frame: Any) -> None:
        if self.requested:
            raise KeyboardInterrupt
        self.requested = True

    def __exit__(self, *exc: object) -> None:
        if self._previous is not None:
            signal.signal(signal.SIGINT, self._previous)
