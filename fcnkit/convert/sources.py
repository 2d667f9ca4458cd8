"""Where a classifier to convert comes from: a torchvision architecture, a TorchScript file or a user factory.

Nothing is downloaded: torchvision architectures are built with ``weights=None`` and filled from a local
weights file (safetensors, or a torch file read with ``weights_only=True``), or left random for trying
things out. A TorchScript file is turned back into an ordinary module (a torchvision architecture matched
by its parameter names and shapes, or an ``nn.Sequential`` of standard layers) because the conversion
reads the module's structure with ``torch.fx``, which cannot trace scripted code.
"""

from __future__ import annotations

import contextlib
import importlib
import warnings
from dataclasses import dataclass
from pathlib import Path

import torch
from torch import nn

from fcnkit.errors import ModelFileError


@dataclass(frozen=True)
class Classifier:
    """A classifier ready to convert, and how to rebuild its architecture (``extra`` for model files)."""

    module: nn.Module
    source: dict


def torchvision_architectures() -> list[str]:
    """Names of torchvision's image-classification architectures (the only code a model file may name)."""
    import torchvision  # on first use: importing it takes seconds (it pulls in torch's compiler)

    return torchvision.models.list_models(module=torchvision.models)


def load_state_dict(path: str | Path) -> dict[str, torch.Tensor]:
    """Tensors of a weights file: safetensors, or a torch file loaded with ``weights_only=True``."""
    path = Path(path)
    if not path.is_file():
        raise ModelFileError(f"{path}: weights file not found")
    try:
        if path.suffix == ".safetensors":
            from safetensors.torch import load_file

            sd = load_file(str(path))
        else:
            with warnings.catch_warnings():  # torch remarks on the pickle protocol of files it then refuses
                warnings.simplefilter("ignore")
                sd = torch.load(path, map_location="cpu", weights_only=True)
    except Exception as e:  # noqa: BLE001 - any decoding failure is the file's fault
        raise ModelFileError(f"{path}: not a readable safetensors or torch weights file ({type(e).__name__})") from e
    if isinstance(sd, dict) and isinstance(sd.get("state_dict"), dict):
        sd = sd["state_dict"]
    if not isinstance(sd, dict) or not all(isinstance(v, torch.Tensor) for v in sd.values()):
        raise ModelFileError(f"{path}: expected a state dict (parameter name -> tensor)")
    return sd


def fill(module: nn.Module, sd: dict[str, torch.Tensor], where: str) -> None:
    """Load ``sd`` into ``module``, naming the first missing, unexpected or mis-shaped parameter."""
    own = module.state_dict()
    missing = [k for k in own if k not in sd]
    extra = [k for k in sd if k not in own]
    if missing or extra:
        what = f"missing parameter {missing[0]!r}" if missing else f"unexpected parameter {extra[0]!r}"
        raise ModelFileError(f"{where}: {what} ({len(missing)} missing, {len(extra)} unexpected)")
    for k, v in own.items():
        if tuple(sd[k].shape) != tuple(v.shape):
            raise ModelFileError(f"{where}: parameter {k!r} has shape {tuple(sd[k].shape)}, "
                                 f"the module expects {tuple(v.shape)}")
    module.load_state_dict(sd)


def _last_linear_rows(module: nn.Module, sd: dict[str, torch.Tensor]) -> int | None:
    """Output count of the module's last Linear layer as stored in ``sd`` (the weights' class count)."""
    names = [n for n, m in module.named_modules() if isinstance(m, nn.Linear)]
    w = sd.get(f"{names[-1]}.weight") if names else None
    return int(w.shape[0]) if w is not None and w.ndim == 2 else None


def build_torchvision(arch: str, num_classes: int = 1000) -> nn.Module:
    """A torchvision classifier with random weights (no download), in eval mode."""
    if arch not in torchvision_architectures():
        raise ModelFileError(f"architecture {arch!r} is not one of torchvision's classifiers "
                             f"(e.g. alexnet, vgg11, resnet18, mobilenet_v3_small)")
    import torchvision

    return torchvision.models.get_model(arch, weights=None, num_classes=num_classes).eval()


def from_torchvision(arch: str, weights: str | Path | None) -> Classifier:
    """A torchvision architecture filled from a local weights file, or random when ``weights`` is None."""
    if weights is None:
        with torch.random.fork_rng():  # the same random weights every time, so results can be compared
            torch.manual_seed(0)
            module = build_torchvision(arch)
    else:
        sd = load_state_dict(weights)
        with torch.device("meta"):
            probe = build_torchvision(arch)
        module = build_torchvision(arch, _last_linear_rows(probe, sd) or 1000)
        fill(module, sd, str(weights))
    return Classifier(module, {"source": "torchvision", "arch": arch, "num_classes": _num_outputs(module)})


def _num_outputs(module: nn.Module) -> int:
    return [m for m in module.modules() if isinstance(m, nn.Linear)][-1].out_features


def from_factory(spec: str, weights: str | Path) -> Classifier:
    """A user's module: ``package.module:factory`` called without arguments, filled from a state dict."""
    mod_name, _, attr = spec.partition(":")
    if not mod_name or not attr:
        raise ModelFileError(f"{spec!r}: expected package.module:factory")
    try:
        factory = getattr(importlib.import_module(mod_name), attr)
    except (ImportError, AttributeError) as e:
        raise ModelFileError(f"{spec}: cannot import the factory ({type(e).__name__}: {e})") from e
    module = factory()
    if not isinstance(module, nn.Module):
        raise ModelFileError(f"{spec}: the factory returned {type(module).__name__}, not a torch nn.Module")
    fill(module, load_state_dict(weights), str(weights))
    if type(module) is nn.Sequential:  # standard layers only: rebuilt later without importing the factory
        with contextlib.suppress(ModelFileError):
            return Classifier(module.eval(), {"source": "sequential", "layers": sequential_spec(module, spec)})
    return Classifier(module.eval(), {"source": "factory", "factory": spec})


def from_torchscript(path: str | Path) -> Classifier:
    """A TorchScript classifier rebuilt as an ordinary module with the same weights."""
    path = Path(path)
    if not path.is_file():
        raise ModelFileError(f"{path}: TorchScript file not found")
    try:
        with warnings.catch_warnings():  # torch.jit.load's deprecation notice is not the user's concern
            warnings.simplefilter("ignore")
            scripted = torch.jit.load(str(path), map_location="cpu")
    except Exception as e:  # noqa: BLE001 - any decoding failure is the file's fault
        raise ModelFileError(f"{path}: not a readable TorchScript file ({type(e).__name__})") from e
    sd = {k: v.detach() for k, v in scripted.state_dict().items()}
    kind = scripted.original_name
    if kind == "Sequential":
        spec = sequential_spec(scripted, str(path))
        module = sequential_from_spec(spec, str(path))
        fill(module, sd, str(path))
        return Classifier(module.eval(), {"source": "sequential", "layers": spec})
    for arch in torchvision_architectures():
        try:  # parameter shapes only, on the meta device (a few builders cannot initialise there)
            with torch.device("meta"), warnings.catch_warnings():
                warnings.simplefilter("ignore")
                probe = build_torchvision(arch)
        except (NotImplementedError, RuntimeError):
            continue
        if type(probe).__name__ != kind:
            continue
        rows = _last_linear_rows(probe, sd) or 1000
        with torch.device("meta"):
            probe = build_torchvision(arch, rows)
        shapes = {k: tuple(v.shape) for k, v in probe.state_dict().items()}
        if shapes == {k: tuple(v.shape) for k, v in sd.items()}:
            module = build_torchvision(arch, rows)
            fill(module, sd, str(path))
            return Classifier(module, {"source": "torchvision", "arch": arch, "num_classes": rows})
    raise ModelFileError(f"{path}: holds a scripted {kind!r}; fcnkit reads scripted torchvision classifiers and "
                         f"scripted nn.Sequential nets (otherwise give package.module:factory and a state dict)")


def sequential_spec(module: nn.Module, where: str) -> list:
    """A JSON-able description of an ``nn.Sequential`` of standard layers (scripted or not), from which
    :func:`sequential_from_spec` rebuilds it without importing any user code."""
    spec: list = []
    for name, child in module.named_children():
        kind = getattr(child, "original_name", type(child).__name__)
        if kind == "Sequential":
            spec.append(sequential_spec(child, where))
        elif kind in _ARGS:
            args = {a: _plain(getattr(child, a)) for a in _ARGS[kind]}
            if kind in ("Conv2d", "Linear"):
                args["bias"] = child.bias is not None
            if kind == "Linear":
                args["in_features"], args["out_features"] = int(child.weight.shape[1]), int(child.weight.shape[0])
            if kind.startswith("BatchNorm"):
                args["affine"], args["track_running_stats"] = child.weight is not None, child.running_mean is not None
            spec.append({"type": kind, **args})
        else:
            raise ModelFileError(f"{where}: layer {name} ({kind}) is not a standard layer fcnkit can rebuild")
    return spec


def sequential_from_spec(spec: list, where: str) -> nn.Sequential:
    """The ``nn.Sequential`` a :func:`sequential_spec` describes (only the layer types listed in it)."""
    layers = []
    for item in spec:
        if isinstance(item, list):
            layers.append(sequential_from_spec(item, where))
            continue
        kind = item.get("type") if isinstance(item, dict) else None
        if kind not in _ARGS:
            raise ModelFileError(f"{where}: layer type {kind!r} is not one fcnkit rebuilds")
        try:
            layers.append(getattr(nn, kind)(**{k: v for k, v in item.items() if k != "type"}))
        except (TypeError, ValueError) as e:
            raise ModelFileError(f"{where}: bad {kind} layer description: {e}") from None
    return nn.Sequential(*layers)


def _plain(v: object) -> object:
    return list(v) if isinstance(v, tuple) else v


# Standard layers a Sequential may hold, with the constructor arguments read back from each layer.
_ARGS: dict[str, tuple[str, ...]] = {
    "Conv2d": ("in_channels", "out_channels", "kernel_size", "stride", "padding", "dilation", "groups",
               "padding_mode"),
    "Linear": (),
    "BatchNorm2d": ("num_features", "eps", "momentum"),
    "BatchNorm1d": ("num_features", "eps", "momentum"),
    "MaxPool2d": ("kernel_size", "stride", "padding", "dilation", "ceil_mode"),
    "AvgPool2d": ("kernel_size", "stride", "padding", "ceil_mode", "count_include_pad"),
    "AdaptiveAvgPool2d": ("output_size",),
    "AdaptiveMaxPool2d": ("output_size",),
    "Flatten": ("start_dim", "end_dim"),
    "ReLU": (), "ReLU6": (), "SiLU": (), "Hardswish": (), "Sigmoid": (), "Tanh": (), "Identity": (),
    "LeakyReLU": ("negative_slope",),
    "GELU": ("approximate",),
    "Dropout": ("p",),
}


def load_classifier(source: str, weights: str | Path | None = None, *, random_weights: bool = False) -> Classifier:
    """Resolve a ``source`` string: a torchvision architecture name, a TorchScript file or
    ``package.module:factory``. Torchvision and factory sources need ``weights`` (a torchvision
    architecture may use ``random_weights`` instead)."""
    if ":" not in source and (Path(source).suffix or "/" in source):
        if weights is not None or random_weights:
            raise ModelFileError(f"{source}: a TorchScript file carries its own weights; drop the weights option")
        return from_torchscript(source)
    if ":" in source:
        if weights is None:
            raise ModelFileError(f"{source}: a factory needs a state-dict weights file")
        return from_factory(source, weights)
    if weights is None and not random_weights:
        raise ModelFileError(f"{source}: give a local weights file, or ask for random weights to try it out")
    if weights is not None and random_weights:
        raise ModelFileError(f"{source}: give either a weights file or random weights, not both")
    return from_torchvision(source, weights)


IMAGENET_MEAN = (0.485 * 255, 0.456 * 255, 0.406 * 255)  # torchvision's ImageNet statistics in 8-bit units
IMAGENET_STD = (0.229 * 255, 0.224 * 255, 0.225 * 255)  # (torchvision model docs; common practice)


def default_normalisation(source: dict, bands: int) -> tuple[list[float], list[float]]:
    """Per-band mean and std for a converted net when none is given: torchvision's ImageNet statistics for
    torchvision classifiers (extra bands get their average), else none (0 and 1)."""
    if source.get("source") == "torchvision" and bands >= 3:
        extra = bands - 3
        return ([*IMAGENET_MEAN, *[sum(IMAGENET_MEAN) / 3] * extra],
                [*IMAGENET_STD, *[sum(IMAGENET_STD) / 3] * extra])
    return [0.0] * bands, [1.0] * bands
