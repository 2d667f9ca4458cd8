"""The model: one object behind training, mapping, evaluation and export.

A :class:`Model` is a net that takes images of any size (:class:`~fcnkit.nets.PaddedNet`: body and padding
plan) together with everything needed to use it on raw pixels: the per-band normalisation, the class table,
the calibration temperature, the config it was built from, and its geometry. Called on raw pixels (N×B×H×W
float) it returns class scores (logits, N×C×H×W); :meth:`Model.predict` and :meth:`Model.predict_proba` map
whole images of any size (arrays or files) by the same inference as ``fcnkit segment``; :meth:`Model.fit`
trains it; :meth:`Model.save` / :meth:`Model.load` keep it in one model file (:mod:`fcnkit.modelfile`);
:meth:`Model.export` writes ONNX or TorchScript.

The band and class counts may come from the data: a model built from a config that leaves them out is made at
its first :meth:`fit`.
"""

from __future__ import annotations

import copy
import dataclasses
import math
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import torch
from torch import nn

from fcnkit.config import Config, ModelConfig, config_from_dict, config_to_dict, load_config
from fcnkit.convert import DENSE_KIND, GROWN_KIND, Conversion, default_normalisation, rebuild
from fcnkit.data.classes import ClassTable, load_classes
from fcnkit.errors import ConfigError, FcnkitError, ModelFileError
from fcnkit.geometry import PadPlan
from fcnkit.inputrange import check_stats
from fcnkit.modelfile import read_model_file, write_model_file
from fcnkit.nets import PaddedNet, build_model
from fcnkit.nets.graph import NetGeometry, net_geometry

if TYPE_CHECKING:
    from fcnkit.export import ExportCheck

ENCODER_DECODER = "encoder-decoder"  # model-file kind of config-built nets
RENAMED_KINDS = {"segnet": ENCODER_DECODER}  # kind names older model files use


def _encoder_decoder(values: dict[str, Any], where: str, classifier: nn.Module | None) -> PaddedNet:
    try:
        return build_model(config_from_dict(values["config"]))
    except FcnkitError as e:
        raise ModelFileError(f"{where}: metadata 'config': {e}") from None


def _converted(values: dict[str, Any], where: str, classifier: nn.Module | None) -> PaddedNet:
    return rebuild(values["extra"], where, classifier)


# model-file kind → the builder of an untrained net of that architecture
BUILDERS: dict[str, Callable[[dict[str, Any], str, nn.Module | None], PaddedNet]] = {
    ENCODER_DECODER: _encoder_decoder, DENSE_KIND: _converted, GROWN_KIND: _converted,
}


def resolve_classes(classes: int | Sequence[str] | ClassTable | str | Path) -> ClassTable:
    """A class table from a count, a list of names, a table or a classes.toml path."""
    if isinstance(classes, ClassTable):
        return classes
    if isinstance(classes, (str, Path)):
        return load_classes(classes)
    if isinstance(classes, int) or (isinstance(classes, Sequence) and all(isinstance(n, str) for n in classes)):
        return ClassTable.generic(classes)
    raise ConfigError(f"classes: {classes!r} is not a count, a list of names, a ClassTable or a classes.toml path")


def _as_config(config: Config | ModelConfig | str | Path | dict[str, Any]) -> Config:
    if isinstance(config, Config):
        return config
    if isinstance(config, ModelConfig):
        return Config(model=config)
    if isinstance(config, dict):
        return config_from_dict(config)
    return load_config(config)


class Model(nn.Module):
    """A segmentation net with its normalisation, classes, calibration and geometry (see module notes).

    Build one with :meth:`build` (from a config), :meth:`load` (from a model file) or :meth:`from_conversion`
    (from a converted classifier)."""

    def __init__(self, net: PaddedNet | None, *, classes: ClassTable | None, mean: Sequence[float] | None = None,
                 std: Sequence[float] | None = None, kind: str = ENCODER_DECODER,
                 config: dict[str, Any] | None = None, extra: dict[str, Any] | None = None,
                 temperature: float = 1.0, input_stats: dict[str, Any] | None = None) -> None:
        super().__init__()
        self.net = net
        self.classes = classes
        self.kind = kind
        self.config = dict(config or {})
        self.extra = dict(extra or {})
        self.temperature = float(temperature)
        self.input_stats = input_stats  # per-band pixel statistics of the training data (fcnkit.inputrange)
        self.register_buffer("mean", None, persistent=False)
        self.register_buffer("std", None, persistent=False)
        if mean is not None and std is not None:
            self.set_normalisation(mean, std)
        self._geometry: NetGeometry | None = None
        self.path: Path | None = None

    # --- making one ---------------------------------------------------------------------------------------

    @classmethod
    def build(cls, config: Config | ModelConfig | str | Path | dict[str, Any], *, bands: int | None = None,
              classes: int | Sequence[str] | ClassTable | str | Path | None = None) -> Model:
        """An untrained model from a config (a Config, a TOML path or a shipped config's name such as "demo").
        ``bands`` and ``classes`` (a count, names, a ClassTable or a classes.toml) fill or check the config's;
        left unknown, they come from the data at the first :meth:`fit`."""
        cfg = _as_config(config)
        m = cfg.model
        table = resolve_classes(classes) if classes is not None else None
        for key, value in (("bands", bands), ("num_classes", table.num_classes if table else None)):
            set_in_config = getattr(m, key)
            if value is not None and set_in_config is not None and value != set_in_config:
                raise ConfigError(f"model.{key}: the config says {set_in_config} but {value} were given")
        m = dataclasses.replace(m, bands=bands or m.bands, num_classes=table.num_classes if table else m.num_classes)
        cfg = dataclasses.replace(cfg, model=m)
        model = cls(None, classes=table, config=config_to_dict(cfg))
        if m.bands is not None and m.num_classes is not None:
            model._make_net(m.bands, m.num_classes)
        return model

    def _make_net(self, bands: int, classes: int) -> None:
        """Build the net of this (encoder–decoder) model once its band and class counts are known."""
        cfg = config_from_dict(self.config)
        m = dataclasses.replace(cfg.model, bands=bands, num_classes=classes)
        self.config = config_to_dict(dataclasses.replace(cfg, model=m))
        with torch.random.fork_rng():  # initial weights from the config's seed: the same config, the same net
            torch.manual_seed(cfg.train.seed)
            self.net = build_model(m)

    @classmethod
    def from_conversion(cls, conversion: Conversion, *, source: dict[str, Any] | None = None,
                        classes: int | Sequence[str] | ClassTable | str | Path | None = None,
                        mean: Sequence[float] | None = None, std: Sequence[float] | None = None) -> Model:
        """A model of a converted classifier or grown segmenter (:mod:`fcnkit.convert`). ``source`` says how to
        rebuild the classifier's architecture (what :func:`fcnkit.convert.load_classifier` gives; without it
        the saved file needs the classifier again to load). Classes default to "class I" (I = the classifier's
        output), normalisation to torchvision's ImageNet statistics for torchvision sources, else none."""
        net, recipe = conversion.net, conversion.recipe
        source = source or {"source": "factory", "factory": "(given when converted)"}
        if classes is None:
            idx = recipe.keep if recipe.keep is not None else range(net.classes)
            table = ClassTable.generic([f"class {i}" for i in idx])
        else:
            table = resolve_classes(classes)
        if table.num_classes != net.classes:
            raise ConfigError(f"classes: the table lists {table.num_classes} classes but the net has {net.classes}")
        if mean is None or std is None:
            mean, std = default_normalisation(source, net.bands)
        extra = {"recipe": recipe.to_dict(), "source": source}
        if conversion.certificate is not None:
            extra["certificate"] = conversion.certificate.to_dict()
        return cls(net, classes=table, mean=mean, std=std, kind=conversion.kind,
                   config={"model": {"bands": net.bands, "num_classes": net.classes}}, extra=extra)

    # --- what it is ---------------------------------------------------------------------------------------

    @property
    def built(self) -> bool:
        return self.net is not None

    def _need_net(self) -> PaddedNet:
        if self.net is None:
            raise ConfigError("model: its net is not built yet (the band and class counts come from the data: fit "
                              "it first, or build it with bands= and classes=)")
        return self.net

    @property
    def bands(self) -> int:
        return self._need_net().bands

    @property
    def num_classes(self) -> int:
        return self._need_net().classes

    @property
    def plan(self) -> PadPlan:
        """The padding plan every path feeds the net by."""
        return self._need_net().plan

    @property
    def geometry(self) -> NetGeometry:
        """Down-sampling factor, tile margin and global layers of the net (read off it once)."""
        if self._geometry is None:
            self._geometry = net_geometry(self._need_net())
        return self._geometry

    @property
    def normalisation(self) -> tuple[list[float], list[float]] | None:
        """Per-band (mean, std) in raw pixel units, or None before training has measured them."""
        if self.mean is None or self.std is None:
            return None
        return self.mean.flatten().tolist(), self.std.flatten().tolist()

    def set_normalisation(self, mean: Sequence[float], std: Sequence[float]) -> None:
        """Set the per-band mean and std the net's inputs are normalised by (std ≤ 0 counts as 1)."""
        if len(mean) != len(std):
            raise ConfigError(f"mean/std: {len(mean)} means but {len(std)} standard deviations")
        if not all(math.isfinite(v) for v in (*mean, *std)):
            raise ConfigError(f"mean/std: expected finite numbers, got {list(mean)} and {list(std)}")
        self.mean = torch.tensor([float(v) for v in mean], dtype=torch.float32).view(1, -1, 1, 1)
        self.std = torch.tensor([float(v) if v > 0 else 1.0 for v in std], dtype=torch.float32).view(1, -1, 1, 1)

    # --- running it ---------------------------------------------------------------------------------------

    def normalise(self, x: torch.Tensor) -> torch.Tensor:
        """Raw pixels (N×B×H×W, float) → the net's input units."""
        if self.mean is None or self.std is None:
            raise ConfigError("model: has no normalisation yet (fit it, or set_normalisation(mean, std))")
        return (x - self.mean) / self.std

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        """Class scores (logits, N×C×H×W) of raw pixels (N×B×H×W float), for any H and W."""
        return self._need_net()(self.normalise(x))

    def probabilities(self, logits: torch.Tensor, dim: int = 1) -> torch.Tensor:
        """Calibrated class probabilities of logits: softmax(logits / temperature)."""
        return torch.softmax(logits / self.temperature if self.temperature != 1.0 else logits, dim=dim)

    def predict_proba(self, image: np.ndarray | str | Path, **options: Any) -> np.ndarray:
        """Class probabilities (C×H×W float32) of one image (an H×W×B array or an image file), by the same
        inference as ``fcnkit segment``; ``options`` are :func:`fcnkit.inference.scan.predict_scores`'s."""
        from fcnkit.inference.scan import predict_scores

        return predict_scores(self, image, **options)

    def predict(self, image: np.ndarray | str | Path, **options: Any) -> np.ndarray:
        """The class id of every pixel (H×W uint8) of one image (an H×W×B array or an image file)."""
        from fcnkit.inference.scan import predict_scores

        return predict_scores(self, image, logits=True, **options).argmax(0).astype(np.uint8)

    # --- training, files, export ----------------------------------------------------------------------------

    def fit(self, data: str | Path | Sequence[np.ndarray], masks: Sequence[np.ndarray] | None = None, *,
            out_dir: str | Path | None = None, resume: bool = False, progress: bool = True,
            max_pixels: int | None = None, note: Callable[[str], None] | None = None, **settings: Any) -> Model:
        """Train on a dataset folder, or on H×W×B image arrays with H×W mask arrays of class ids (255 or the
        class table's ignore value = unlabelled). ``settings`` override the config's [train] table (e.g.
        ``epochs=5``). The run (best model, resume point, metrics.csv) goes to ``out_dir``, or to a temporary
        folder that is removed afterwards. The model ends holding the weights of its best epoch; the run's
        result is in ``self.last_run``. ``note`` receives one-line remarks on the data (e.g. nodata met)."""
        from fcnkit.train import train

        self.last_run = train(self, data, masks, out_dir=out_dir, resume=resume, progress=progress,
                              max_pixels=max_pixels, note=note, **settings)
        return self

    def metadata(self) -> dict[str, Any]:
        """The values a model file stores beside the weights."""
        from fcnkit import __version__

        norm = self.normalisation
        if norm is None:
            raise ConfigError("model: cannot be saved before it has a normalisation (fit it, or set_normalisation)")
        classes = self.classes or ClassTable.generic(self.num_classes)
        return {"kind": self.kind, "version": __version__, "config": self.config, "classes": classes.to_dict(),
                "mean": norm[0], "std": norm[1], "padding": self.plan.to_dict(), "temperature": self.temperature,
                "extra": self.extra, **({"input_stats": self.input_stats} if self.input_stats is not None else {})}

    def save(self, path: str | Path) -> Path:
        """Write the model to one safetensors file (atomically)."""
        values = self.metadata()
        write_model_file(path, self._need_net().state_dict(), values)
        return Path(path)

    @classmethod
    def load(cls, path: str | Path, *, classifier: nn.Module | None = None) -> Model:
        """Read a model file. ``classifier``: the classifier a converted model was made from, for files whose
        source is a user's own code (which fcnkit never imports)."""
        tensors, values = read_model_file(path)
        where = str(path)
        kind, classes, mean, std, padding, temperature = _check_values(values, where)
        net = BUILDERS[kind](values, where, classifier)
        own = {"cells": 1, **net.plan.to_dict()}  # files from before cells were stored: their net's own
        if padding is not None and any(own[k] != v for k, v in padding.items()):
            raise ModelFileError(f"{where}: metadata padding {padding} differs from its net's {net.plan.to_dict()}")
        if len(mean) != net.bands or classes.num_classes != net.classes:
            raise ModelFileError(f"{where}: metadata gives {len(mean)} bands and {classes.num_classes} classes but "
                                 f"the net has {net.bands} bands and {net.classes} classes")
        _load_weights(net, tensors, where)
        stats = values.get("input_stats")
        model = cls(net.eval(), classes=classes, mean=mean, std=std, kind=kind, config=values["config"],
                    extra=values["extra"], temperature=temperature,
                    input_stats=None if stats is None else check_stats(stats, net.bands, where)).eval()
        model.path = Path(path)  # where it came from (training records it as the run's starting point)
        return model

    def export(self, out: str | Path, format: str = "onnx", *, overwrite: bool = False) -> ExportCheck:
        """Write the model as ONNX or TorchScript (raw pixels in, class scores out, any size), checked against
        this model's own forward pass at sizes that are no multiple of its stride."""
        from fcnkit.export import export_model

        return export_model(self, out, format, overwrite=overwrite)

    def copy(self) -> Model:
        return copy.deepcopy(self)


def _check_values(values: dict[str, Any], where: str) -> tuple[str, ClassTable, list[float], list[float],
                                                                 dict[str, int] | None, float]:
    """The model-file values, checked; ModelFileError naming the file and key otherwise."""
    for key in ("kind", "version", "config", "classes", "mean", "std", "extra"):
        if key not in values:
            raise ModelFileError(f"{where}: metadata key 'fcnkit.{key}' is missing (not an fcnkit model file?)")
    kind = RENAMED_KINDS.get(values["kind"], values["kind"])
    if kind not in BUILDERS:
        raise ModelFileError(f"{where}: unknown model kind {values['kind']!r}; expected one of: {', '.join(BUILDERS)}")
    if not isinstance(values["config"], dict) or not isinstance(values["extra"], dict):
        raise ModelFileError(f"{where}: metadata 'config' and 'extra' must be JSON objects")
    try:
        classes = ClassTable.from_dict(values["classes"])
    except (FcnkitError, ValueError, TypeError, KeyError) as e:
        raise ModelFileError(f"{where}: metadata 'fcnkit.classes': {e}") from None
    for key in ("mean", "std"):
        v = values[key]
        ok = isinstance(v, list) and v and all(isinstance(x, (int, float)) and not isinstance(x, bool)
                                               and math.isfinite(x) for x in v)
        if not ok or (key == "std" and min(v) <= 0):
            want = "positive numbers" if key == "std" else "finite numbers"
            raise ModelFileError(f"{where}: metadata 'fcnkit.{key}' must be a list of {want}, got {v!r}")
    if len(values["mean"]) != len(values["std"]):
        raise ModelFileError(f"{where}: metadata mean has {len(values['mean'])} bands but std has "
                             f"{len(values['std'])}")
    temperature = values.get("temperature", 1.0)
    if not (isinstance(temperature, (int, float)) and not isinstance(temperature, bool)
            and math.isfinite(temperature) and temperature > 0):
        raise ModelFileError(f"{where}: metadata 'fcnkit.temperature' must be a positive number, got {temperature!r}")
    padding = values.get("padding")  # None in files from before the padding plan was stored: their net's own
    if padding is not None:
        ok = isinstance(padding, dict) and {"factor", "offset"} <= set(padding) <= {"factor", "offset", "cells"} \
            and all(isinstance(v, int) and not isinstance(v, bool) for v in padding.values()) \
            and padding["factor"] >= 1 and padding.get("cells", 1) >= 1
        if not ok:
            raise ModelFileError(f"{where}: metadata 'fcnkit.padding' must be {{\"factor\": n >= 1, \"offset\": n}} "
                                 f"(and optionally \"cells\": n >= 1), got {padding!r}")
    return kind, classes, values["mean"], values["std"], padding, float(temperature)


def _load_weights(net: nn.Module, tensors: dict[str, torch.Tensor], where: str) -> None:
    want = net.state_dict()
    missing = [k for k in want if k not in tensors]
    extra = [k for k in tensors if k not in want]
    wrong = [f"{k} {tuple(tensors[k].shape)} vs {tuple(v.shape)}" for k, v in want.items()
             if k in tensors and tensors[k].shape != v.shape]
    for what, names in (("missing", missing), ("unexpected", extra), ("wrong shape", wrong)):
        if names:
            more = f" (+{len(names) - 1} more)" if len(names) > 1 else ""
            raise ModelFileError(f"{where}: weights do not match the net its metadata describes: {what} "
                                 f"{names[0]}{more}")
    net.load_state_dict(tensors, strict=True)
