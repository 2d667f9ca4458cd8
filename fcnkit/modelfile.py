"""The model file format: one safetensors file of named tensors, with its descriptive values as JSON strings in
the metadata under ``fcnkit.`` keys.

Pure format: :func:`read_model_file` returns the tensors and the decoded values and checks only what the format
promises (a readable safetensors file, JSON values, finite floating-point tensors); what the values mean is
:mod:`fcnkit.model`'s business. Nothing is unpickled or executed.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import torch
from safetensors import safe_open
from safetensors.torch import save_file

from fcnkit.atomic import atomic_output
from fcnkit.errors import ModelFileError
from fcnkit.inputfiles import require_regular

PREFIX = "fcnkit."
PLAIN_KEYS = ("kind", "version")  # stored as plain strings; every other value is JSON


def write_model_file(path: str | Path, tensors: dict[str, torch.Tensor], values: dict[str, Any]) -> None:
    """Write ``tensors`` and ``values`` (JSON-able; ``kind`` and ``version`` strings) to ``path``, atomically."""
    meta = {PREFIX + k: str(v) if k in PLAIN_KEYS else json.dumps(v) for k, v in values.items()}
    tensors = {k: v.detach().cpu().contiguous() for k, v in tensors.items()}
    with atomic_output(path) as tmp:
        save_file(tensors, str(tmp), metadata=meta)


def read_model_file(path: str | Path) -> tuple[dict[str, torch.Tensor], dict[str, Any]]:
    """The tensors and decoded ``fcnkit.`` values of a model file; ModelFileError naming the file for anything
    unreadable, malformed or not finite."""
    path = Path(path)
    require_regular(path, ModelFileError)
    if not path.is_file():
        raise ModelFileError(f"{path}: no such model file")
    try:
        with safe_open(str(path), framework="pt") as f:
            raw = f.metadata() or {}
            tensors = {k: f.get_tensor(k) for k in f.keys()}  # noqa: SIM118 (safe_open has no __iter__)
    except Exception as e:  # safetensors raises its own error type for any malformed header or body
        raise ModelFileError(f"{path}: not a safetensors model file ({str(e).splitlines()[0]})") from None
    values: dict[str, Any] = {}
    for key, text in raw.items():
        if not key.startswith(PREFIX):
            continue
        name = key[len(PREFIX):]
        try:
            values[name] = text if name in PLAIN_KEYS else json.loads(text)
        except (json.JSONDecodeError, RecursionError):
            raise ModelFileError(f"{path}: metadata '{key}' is not valid JSON (or nested too deeply)") from None
    for name, t in tensors.items():
        if not (t.is_floating_point() or name.endswith("num_batches_tracked")):
            raise ModelFileError(f"{path}: tensor {name} is stored as {str(t.dtype).removeprefix('torch.')} "
                                 "(expected floating-point weights)")
        if t.is_floating_point() and not torch.isfinite(t).all():
            bad = int((~torch.isfinite(t)).sum())
            raise ModelFileError(f"{path}: tensor {name} holds {bad} NaN or infinite values (expected finite weights)")
    return tensors, values
