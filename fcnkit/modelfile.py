"""The model file: one safetensors file holding the weights and, as JSON strings in its metadata, everything
needed to rebuild and use the net — the resolved config, the class table, the per-band normalisation, the
fcnkit version and the model kind.

Loading reads tensors and JSON only: nothing is unpickled or executed.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import torch
from safetensors import safe_open
from safetensors.torch import save_file
from torch import nn

from fcnkit.atomic import atomic_output
from fcnkit.config import config_from_dict
from fcnkit.data.classes import ClassTable
from fcnkit.errors import DataError, FcnkitError, ModelFileError

PREFIX = "fcnkit."
_KEYS = ("kind", "config", "classes", "mean", "std", "version", "extra")
_JSON_KEYS = ("config", "classes", "mean", "std", "extra")


@dataclass(frozen=True)
class ModelMeta:
    """What a model file says about its net. ``config`` is the resolved config as a plain dict
    (:func:`fcnkit.config.config_to_dict`); ``mean``/``std`` are per-band, in raw pixel units."""

    kind: str
    config: dict[str, Any]
    classes: ClassTable
    mean: list[float]
    std: list[float]
    version: str
    extra: dict[str, Any] = field(default_factory=dict)

    def to_strings(self) -> dict[str, str]:
        values = {"kind": self.kind, "config": self.config, "classes": self.classes.to_dict(),
                  "mean": list(self.mean), "std": list(self.std), "version": self.version, "extra": self.extra}
        return {PREFIX + k: json.dumps(v) if k in _JSON_KEYS else str(v) for k, v in values.items()}


@dataclass
class LoadedModel:
    """A rebuilt net (in eval mode) and its metadata."""

    model: nn.Module
    meta: ModelMeta


def save_model(path: str | Path, model: nn.Module, meta: ModelMeta) -> None:
    """Write ``model``'s weights and ``meta`` to ``path`` as one safetensors file (atomically)."""
    tensors = {k: v.detach().cpu().contiguous() for k, v in model.state_dict().items()}
    with atomic_output(path) as tmp:
        save_file(tensors, str(tmp), metadata=meta.to_strings())


def load_model(path: str | Path) -> LoadedModel:
    """Read a model file written by :func:`save_model` and rebuild its net; ModelFileError naming the file
    for anything missing, malformed or inconsistent."""
    path = Path(path)
    if not path.is_file():
        raise ModelFileError(f"{path}: no such model file")
    try:
        with safe_open(str(path), framework="pt") as f:
            raw = f.metadata() or {}
            tensors = {k: f.get_tensor(k) for k in f.keys()}  # noqa: SIM118 (safe_open has no __iter__)
    except Exception as e:  # safetensors raises its own error type for any malformed header or body
        raise ModelFileError(f"{path}: not a safetensors model file ({str(e).splitlines()[0]})") from None
    meta = _meta_from_strings(raw, path)
    model = build_from_meta(meta, path)
    bands, classes = getattr(model, "bands", len(meta.mean)), getattr(model, "classes", meta.classes.num_classes)
    if len(meta.mean) != bands or meta.classes.num_classes != classes:
        raise ModelFileError(f"{path}: metadata gives {len(meta.mean)} bands and {meta.classes.num_classes} "
                             f"classes but the net has {bands} bands and {classes} classes")
    _load_weights(model, tensors, path)
    return LoadedModel(model.eval(), meta)


def build_from_meta(meta: ModelMeta, path: str | Path) -> nn.Module:
    """An untrained net of the architecture ``meta`` describes."""
    if meta.kind == "segnet":
        from fcnkit.nets import build_model

        try:
            return build_model(config_from_dict(meta.config))
        except FcnkitError as e:
            raise ModelFileError(f"{path}: metadata 'config': {e}") from None
    if meta.kind in ("dense-classifier", "grown-segmenter"):  # converted classifiers (fcnkit.convert)
        from fcnkit.convert.grow import rebuild

        return rebuild(meta.extra, path)
    raise ModelFileError(f"{path}: unknown model kind {meta.kind!r}; expected one of: segnet, dense-classifier, "
                         f"grown-segmenter")


def normalise(image: np.ndarray, meta: ModelMeta) -> np.ndarray:
    """H×W×B raw pixels → float32 (pixel − mean) / std per band, as the net was trained."""
    if image.ndim != 3 or image.shape[-1] != len(meta.mean):
        raise DataError(f"image of shape {image.shape} does not have the model's {len(meta.mean)} bands")
    mean = np.asarray(meta.mean, np.float32)
    std = np.asarray(meta.std, np.float32)
    return (image.astype(np.float32) - mean) / std


def _meta_from_strings(raw: dict[str, str], path: Path) -> ModelMeta:
    values: dict[str, Any] = {}
    for key in _KEYS:
        if PREFIX + key not in raw:
            raise ModelFileError(f"{path}: metadata key '{PREFIX}{key}' is missing (not an fcnkit model file?)")
        text = raw[PREFIX + key]
        try:
            values[key] = json.loads(text) if key in _JSON_KEYS else text
        except json.JSONDecodeError:
            raise ModelFileError(f"{path}: metadata '{PREFIX}{key}' is not valid JSON") from None
    if not isinstance(values["config"], dict) or not isinstance(values["extra"], dict):
        raise ModelFileError(f"{path}: metadata 'config' and 'extra' must be JSON objects")
    try:
        values["classes"] = ClassTable.from_dict(values["classes"])
    except (FcnkitError, ValueError, TypeError, KeyError) as e:
        raise ModelFileError(f"{path}: metadata '{PREFIX}classes': {e}") from None
    for key in ("mean", "std"):
        v = values[key]
        ok = isinstance(v, list) and v and all(isinstance(x, (int, float)) and math.isfinite(x) for x in v)
        if not ok or (key == "std" and min(v) <= 0):
            want = "positive numbers" if key == "std" else "finite numbers"
            raise ModelFileError(f"{path}: metadata '{PREFIX}{key}' must be a list of {want}, got {v!r}")
    if len(values["mean"]) != len(values["std"]):
        raise ModelFileError(f"{path}: metadata mean has {len(values['mean'])} bands but std has "
                             f"{len(values['std'])}")
    return ModelMeta(**values)


def _load_weights(model: nn.Module, tensors: dict[str, torch.Tensor], path: Path) -> None:
    want = model.state_dict()
    missing = [k for k in want if k not in tensors]
    extra = [k for k in tensors if k not in want]
    wrong = [f"{k} {tuple(tensors[k].shape)} vs {tuple(v.shape)}" for k, v in want.items()
             if k in tensors and tensors[k].shape != v.shape]
    for what, names in (("missing", missing), ("unexpected", extra), ("wrong shape", wrong)):
        if names:
            more = f" (+{len(names) - 1} more)" if len(names) > 1 else ""
            raise ModelFileError(f"{path}: weights do not match the config in its metadata: {what} {names[0]}{more}")
    model.load_state_dict(tensors, strict=True)
