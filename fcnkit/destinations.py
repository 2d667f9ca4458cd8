"""Where a command may write: the one guard every command that writes calls before any work.

An output is refused (one line naming it) when it is one of the run's inputs — the same file by its resolved
path, through a symbolic link or a hard link (same device and inode) —, when two outputs of the run are one file,
when it already holds weights (a safetensors file, a torch checkpoint such as a run's resume point) or a run's
metrics table beside its resume point, when it is a folder, or when its folder is missing or cannot be written
to. An earlier result (a map, scores, a report, an exported net) is replaced only when asked (``overwrite``,
the commands' ``--overwrite``): no command replaces a file silently. Weights and a run's metrics are never
replaced, even then (remove them first); a training run continues its own only with ``--resume``.
"""

from __future__ import annotations

import json
import os
import struct
import zipfile
from collections.abc import Iterable
from pathlib import Path

from fcnkit.atomic import partial_path
from fcnkit.errors import FcnkitError

# The files of a training run folder (fcnkit.runstate writes them; named here so the guard needs no torch)
MODEL_FILE, RESUME_FILE, METRICS_FILE = "model.safetensors", "resume.pt", "metrics.csv"

PathLike = str | Path


def _identity(path: Path) -> tuple[int, int] | None:
    try:
        st = path.stat()
    except OSError:
        return None
    return st.st_dev, st.st_ino


def _is_safetensors(path: Path) -> bool:
    """A safetensors file: an 8-byte little-endian header length, then a JSON object (safetensors format)."""
    try:
        with open(path, "rb") as f:
            head = f.read(8)
            if len(head) != 8:
                return False
            (n,) = struct.unpack("<Q", head)
            if not 2 <= n <= 100_000_000:
                return False
            return isinstance(json.loads(f.read(n)), dict)
    except (OSError, ValueError, RecursionError):
        return False


def _is_checkpoint(path: Path) -> bool:
    """A torch.save zip (tensors and a pickle, e.g. a state dict or a run's resume point), not a TorchScript
    export (which holds code/ and is made again from its model file)."""
    try:
        with zipfile.ZipFile(path) as z:
            names = z.namelist()
    except (OSError, zipfile.BadZipFile, ValueError):
        return False
    return any(n.endswith("/data.pkl") for n in names) and not any("/code/" in n for n in names)


def protected(path: Path) -> str | None:
    """What an existing file holds that no command may overwrite, or None."""
    if not path.is_file():
        return None
    if _is_safetensors(path):
        return "a model file (safetensors weights)"
    if _is_checkpoint(path):
        return "a torch checkpoint (weights or a run's resume point)"
    if path.name == METRICS_FILE and (path.parent / RESUME_FILE).is_file():
        return "the metrics of the training run in this folder"
    return None


def check_outputs(files: Iterable[PathLike] = (), *, inputs: Iterable[PathLike | None] = (),
                  folders: Iterable[PathLike | tuple[PathLike, str]] = (), replace_weights: bool = False,
                  overwrite: bool = False, error: type[FcnkitError] = FcnkitError) -> None:
    """Refuse, before any work, outputs that would destroy something (see module notes).

    ``files``: the files the command writes; ``inputs``: every file it reads; ``folders``: folders it writes
    into (created when missing), each alone or with a glob pattern of the names it writes there (an input in
    that folder matching the pattern is refused); ``replace_weights``: a training run replacing its own model
    and resume point; ``overwrite``: earlier results at ``files`` may be replaced."""
    seen_inputs = [Path(p) for p in inputs if p is not None]
    ids = {i for i in map(_identity, seen_inputs) if i is not None}
    real = {os.path.realpath(p) for p in seen_inputs}

    def is_input(path: Path) -> bool:
        ident = _identity(path)
        return (ident is not None and ident in ids) or os.path.realpath(path) in real

    made_folders: list[Path] = []
    writable: set[Path] = set()
    for item in folders:
        folder, pattern = (Path(item[0]), item[1]) if isinstance(item, tuple) else (Path(item), None)
        if folder.exists() and not folder.is_dir():
            raise error(f"{folder}: is a file, expected an output folder")
        if pattern is not None and folder.is_dir():
            for p in folder.glob(pattern):
                if is_input(p):
                    raise error(f"{p}: is an input of this run and a name it writes in {folder}; choose another "
                                "output folder")
                if not overwrite:
                    raise error(f"{folder}: holds earlier results ({pattern}); refusing to replace them "
                                "(--overwrite, or overwrite=True in Python, replaces them)")
        made_folders.append(folder)
    outputs: dict[tuple[int, int] | str, Path] = {}
    for out in map(Path, files):
        if is_input(out):
            raise error(f"{out}: is an input of this run; writing there would destroy it (choose another name)")
        key = _identity(out) or os.path.realpath(out)
        if key in outputs:
            raise error(f"{out}: is also where {outputs[key]} goes; give each output its own name")
        outputs[key] = out
        if out.is_dir():
            raise error(f"{out}: cannot write here, it is a folder")
        what = None if replace_weights else protected(out)
        if what is not None:
            raise error(f"{out}: already holds {what}; refusing to overwrite it (choose another name, or remove "
                        "it first)")
        if not (overwrite or replace_weights) and out.exists():
            raise error(f"{out}: exists (an earlier result); refusing to replace it (--overwrite, or overwrite=True "
                        "in Python, replaces it)")
        if out.parent in writable or (out.parent in made_folders and not out.parent.exists()):
            continue  # a folder already tried, or one the command makes
        _check_writable(out, error)
        writable.add(out.parent)


def _check_writable(out: Path, error: type[FcnkitError]) -> None:
    folder = out.parent
    if not folder.is_dir():
        raise error(f"{out}: cannot write here, folder {folder} does not exist")
    probe = partial_path(out)
    try:  # a real file, not os.access: modes do not stop root, read-only file systems stop everyone
        open(probe, "xb").close()
    except OSError as e:
        raise error(f"{out}: cannot write here, folder {folder} is not writable ({e.strerror or e})") from None
    probe.unlink()


def dataset_files(folder: PathLike) -> list[Path]:
    """Every file of a dataset folder (classes.toml, a vector label file or any other file beside it, images/,
    masks/): the inputs of a run that reads it."""
    folder = Path(folder)
    found = [folder / "classes.toml"]
    if folder.is_dir():
        found += [p for p in folder.iterdir() if p.is_file() and p.name != "classes.toml"]
    for sub in ("images", "masks"):
        if (folder / sub).is_dir():
            found += [p for p in (folder / sub).iterdir() if p.is_file()]
    return found
