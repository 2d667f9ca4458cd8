"""A training run's folder: the resume point, the per-epoch metrics table, and the guard against mixing runs.

RUN_DIR holds ``model.safetensors`` (best model, see :mod:`fcnkit.modelfile`), ``resume.pt`` (everything
needed to continue exactly: weights, optimiser state, RNG states, epoch and batch, history, config) and
``metrics.csv``. The resume point is written with ``torch.save`` and read back with
``torch.load(weights_only=True)``, which accepts only tensors and plain containers, so nothing is unpickled.
"""

from __future__ import annotations

import contextlib
import csv
import hashlib
import io
import json
import math
import os
import random
import warnings
from pathlib import Path
from typing import Any

import numpy as np
import torch

from fcnkit.atomic import write_bytes_atomic, write_text_atomic
from fcnkit.destinations import METRICS_FILE, MODEL_FILE, RESUME_FILE
from fcnkit.errors import ModelFileError

try:
    import fcntl
except ImportError:  # not POSIX
    fcntl = None  # type: ignore[assignment]

FORMAT = "fcnkit-resume/1"
# settings that change speed but not the numbers a run produces, so a run may resume with other values
_FREE_KEYS = ("threads", "workers")


def config_hash(config: dict[str, Any]) -> str:
    """Short hash of a resolved config (ignoring speed-only settings): a resume point fits only its own."""
    train = {k: v for k, v in config.get("train", {}).items() if k not in _FREE_KEYS}
    text = json.dumps({**config, "train": train}, sort_keys=True)
    return hashlib.sha256(text.encode()).hexdigest()[:16]


def claim_run_dir(run_dir: Path, resume: bool) -> None:
    """Refuse to start a fresh run over another one, or to resume where there is nothing to resume (checks
    only; the folder is created when the first resume point is written)."""
    held = [name for name in (RESUME_FILE, MODEL_FILE, METRICS_FILE) if (run_dir / name).exists()]
    if run_dir.exists() and not run_dir.is_dir():
        raise ModelFileError(f"{run_dir}: is a file, expected a run folder")
    if resume and not (run_dir / RESUME_FILE).is_file():
        raise ModelFileError(f"{run_dir / RESUME_FILE}: no resume point to continue from")
    if not resume and held:
        raise ModelFileError(f"{run_dir}: already holds a run ({held[0]}); continue it with --resume "
                             "or choose another output folder")


def _first_difference(old: dict[str, Any], new: dict[str, Any], prefix: str = "") -> str:
    for key in sorted(set(old) | set(new)):
        a, b = old.get(key), new.get(key)
        if isinstance(a, dict) and isinstance(b, dict):
            found = _first_difference(a, b, f"{prefix}{key}.")
            if found:
                return found
        elif a != b and key not in _FREE_KEYS:
            return f"{prefix}{key} was {a!r}, now {b!r}"
    return ""


def array_digest(images: list[np.ndarray], masks: list[np.ndarray]) -> str:
    """A short hash of in-memory training data (shapes, types and bytes), so a resume point knows its data."""
    h = hashlib.sha256()
    for a in (*images, *masks):
        h.update(f"{a.shape}{a.dtype}".encode())
        h.update(np.ascontiguousarray(a).tobytes())
    return h.hexdigest()[:16]


def load_resume(path: Path, config: dict[str, Any], data: str) -> dict[str, Any]:
    """Read a resume point and check it belongs to ``config`` and to the training ``data`` (its identity: the
    dataset folder's files and sizes, or a digest of arrays)."""
    try:
        with warnings.catch_warnings():  # torch remarks on the pickle protocol of files it then refuses
            warnings.simplefilter("ignore")
            state = torch.load(path, map_location="cpu", weights_only=True)
    except Exception as e:  # noqa: BLE001 (any unreadable or foreign file gives the same one-line error)
        raise ModelFileError(f"{path}: not a readable resume point ({str(e).splitlines()[0][:120]})") from None
    if not isinstance(state, dict) or state.get("format") != FORMAT:
        raise ModelFileError(f"{path}: not an fcnkit resume point (format {FORMAT} expected)")
    if state.get("config_hash") != config_hash(config):
        try:
            diff = _first_difference(json.loads(state.get("config", "")), config) or "config differs"
        except (TypeError, ValueError, AttributeError, RecursionError):
            diff = "config differs"
        raise ModelFileError(f"{path}: resume point belongs to a different config ({diff}); "
                             "use the run's own config or another output folder")
    if state.get("data") != data:
        was, now = str(state.get("data", "?")).split("|")[0], data.split("|")[0]
        what = f"it was {was}, now {now}" if was != now else f"the files of {now} changed since"
        raise ModelFileError(f"{path}: resume point belongs to other training data ({what}); resume with the same "
                             "data or start a new run in another output folder")
    progress = state.get("progress")
    if isinstance(progress, dict) and "best_miou" in progress and "best_mean_iou" not in progress:
        progress["best_mean_iou"] = progress.pop("best_miou")  # the key's spelling before the metric rename
    return state


def save_resume(path: Path, state: dict[str, Any]) -> None:
    buf = io.BytesIO()
    torch.save({"format": FORMAT, **state}, buf)
    write_bytes_atomic(path, buf.getvalue())


def rng_states() -> dict[str, Any]:
    """torch, numpy and python RNG states, as tensors and plain values (loadable with weights_only)."""
    _, keys, pos, has_gauss, cached = np.random.get_state()
    return {"torch": torch.get_rng_state(),
            "numpy": {"keys": torch.from_numpy(keys.astype(np.int64)), "pos": int(pos),
                      "has_gauss": int(has_gauss), "cached": float(cached)},
            "python": random.getstate()}


def set_rng_states(s: dict[str, Any]) -> None:
    torch.set_rng_state(s["torch"])
    n = s["numpy"]
    np.random.set_state(("MT19937", n["keys"].numpy().astype(np.uint32), n["pos"], n["has_gauss"], n["cached"]))
    random.setstate(s["python"])


def write_metrics(path: Path, history: list[dict[str, Any]]) -> None:
    """The whole per-epoch table as CSV (rewritten from the history each epoch, so a rerun epoch after a
    crash replaces its row instead of adding a second one). Written by the csv module with RFC 4180's quoting
    and CRLF line ends, so a class name holding a comma, quote or line break (CR or LF) stays in its own column
    (with LF line ends the csv module leaves a lone CR unquoted, and readers take it for a line end)."""
    if not history:
        return
    columns = list(history[0])

    def cell(v: Any) -> str:
        if isinstance(v, float):
            return "nan" if math.isnan(v) else f"{v:.6g}"
        return str(v)

    buf = io.StringIO()
    writer = csv.writer(buf, lineterminator="\r\n")
    writer.writerow(columns)
    writer.writerows([cell(row.get(c, "")) for c in columns] for row in history)
    write_text_atomic(path, buf.getvalue())


# --- the resume point's contents --------------------------------------------------------------------------------

_REQUIRED = {"model": dict, "mean": torch.Tensor, "std": torch.Tensor, "optimizer": dict, "rng": dict,
             "progress": dict}
_PROGRESS = ("epoch", "batch", "step", "seconds", "epoch_seconds", "loss_sum", "loss_batches", "pixels",
             "best_mean_iou", "best_epoch", "bad_epochs", "stopped_early", "history")


def check_resume(path: Path, state: dict[str, Any], weights: dict[str, torch.Tensor]) -> None:
    """ModelFileError naming the resume point and the key unless ``state`` holds everything a run continues
    from, with weights of the names and shapes of ``weights`` (the net's own state dict)."""
    for key, kind in _REQUIRED.items():
        if not isinstance(state.get(key), kind):
            raise ModelFileError(f"{path}: resume point lacks '{key}' (or it is not a {kind.__name__}); it cannot "
                                 "be continued, start a new run in another output folder")
    missing = [k for k in _PROGRESS if k not in state["progress"]]
    if missing:
        raise ModelFileError(f"{path}: resume point lacks 'progress.{missing[0]}'; it cannot be continued, start a "
                             "new run in another output folder")
    for key in ("model", "best"):
        got = state.get(key, state["model"])
        for name, want in weights.items():
            have = got.get(name) if isinstance(got, dict) else None
            if not isinstance(have, torch.Tensor) or have.shape != want.shape:
                shape = tuple(have.shape) if isinstance(have, torch.Tensor) else "missing"
                raise ModelFileError(f"{path}: resume point's '{key}' weight {name} is {shape}, the net's is "
                                     f"{tuple(want.shape)}; it cannot be continued with this net")
    bands = len(state["mean"].flatten())
    if len(state["std"].flatten()) != bands or not bool(torch.isfinite(torch.cat(
            [state["mean"].flatten(), state["std"].flatten()])).all()):
        raise ModelFileError(f"{path}: resume point's 'mean' and 'std' are not finite values of one length")


# --- the run folder's lock ------------------------------------------------------------------------------------

LOCK_FILE = ".lock"


class RunLock:
    """An exclusive lock on a run folder, so two training runs never write one folder: ``flock`` on
    RUN_DIR/.lock, which holds the owner's process id. The kernel releases the lock when its process ends,
    however it ends, so the lock file a killed run leaves behind is simply taken over. (Without ``fcntl``,
    as on Windows, runs are not locked.) The folder is made here; on release a folder this lock made and that
    stayed empty is removed again."""

    def __init__(self, run_dir: Path) -> None:
        self.run_dir, self.path = Path(run_dir), Path(run_dir) / LOCK_FILE
        self.fd: int | None = None
        self.made = False

    def __enter__(self) -> RunLock:
        if fcntl is None:
            return self
        if self.run_dir.exists() and not self.run_dir.is_dir():
            raise ModelFileError(f"{self.run_dir}: is a file, expected a run folder")
        self.made = not self.run_dir.exists()
        self.run_dir.mkdir(parents=True, exist_ok=True)
        while self.fd is None:
            fd = os.open(self.path, os.O_RDWR | os.O_CREAT, 0o644)
            try:
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
            except BlockingIOError:
                owner = os.pread(fd, 32, 0).decode("ascii", "replace").strip() or "?"
                os.close(fd)
                raise ModelFileError(f"{self.run_dir}: another training run (process {owner}) is using this run "
                                     "folder; wait for it to end, or choose another output folder") from None
            try:  # the owner before us may have removed the file between our open and our lock: lock anew
                same = os.stat(self.path).st_ino == os.fstat(fd).st_ino
            except FileNotFoundError:
                same = False
            if same:
                os.ftruncate(fd, 0)
                os.pwrite(fd, f"{os.getpid()}\n".encode(), 0)
                self.fd = fd
            else:
                os.close(fd)
        return self

    def __exit__(self, *exc: object) -> None:
        if self.fd is None:
            return
        with contextlib.suppress(FileNotFoundError):
            self.path.unlink()  # before unlocking: a waiting run then finds no file and makes its own
        os.close(self.fd)
        self.fd = None
        if self.made:
            with contextlib.suppress(OSError):
                self.run_dir.rmdir()  # only when empty
