"""Export a segmenter to ONNX or TorchScript, so it runs where fcnkit is not installed.

The exported graph takes raw pixel values (float32, N×bands×H×W, any N, H and W) and returns class scores
(N×classes×H×W, before softmax): the model file's per-band normalisation is built in, and so is the
pad-to-a-multiple-of-the-down-sampling-factor and crop-back of :class:`fcnkit.nets.SegNet`, written without
Python branches so the traced graph keeps it for every size. Every export is checked before it gets its
final name: the written file is run (ONNX with onnxruntime, TorchScript with ``torch.jit.load``) on random
inputs of two sizes that are not multiples of the factor, and must match PyTorch within the tolerance.
"""

from __future__ import annotations

import io
import json
import warnings
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import torch
from torch import nn
from torch.nn import functional as F

from fcnkit.atomic import atomic_output, partial_path
from fcnkit.errors import ConfigError, FcnkitError, ModelFileError
from fcnkit.nets import SegNet

FORMATS = ("onnx", "torchscript")
ENGINES = ("torch", "onnxruntime")
TOLERANCE = 1e-4
ONNX_OPSET = 17


class ExportNet(nn.Module):
    """Normalise (optional), pad to a multiple of ``factor`` with edge pixels, run the body, crop back.

    The padding amount is computed as ``(factor - size % factor) % factor`` and always applied (a zero pad is
    a no-op), so a tracer records shape arithmetic instead of freezing the example input's branch.
    """

    def __init__(self, model: nn.Module, mean: Sequence[float] | None = None, std: Sequence[float] | None = None):
        super().__init__()
        is_segnet = isinstance(model, SegNet)
        self.body = model.body if is_segnet else model
        self.factor = model.factor if is_segnet else 1
        self.normalise = mean is not None
        if mean is not None:
            if std is None or len(mean) != len(std):
                raise ValueError("mean and std must both be given, one value per band")
            self.register_buffer("mean", torch.tensor(mean, dtype=torch.float32).view(1, -1, 1, 1))
            self.register_buffer("std", torch.tensor(std, dtype=torch.float32).view(1, -1, 1, 1))

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        if self.normalise:
            x = (x - self.mean) / self.std
        if self.factor == 1:
            return self.body(x)
        h, w = x.shape[-2], x.shape[-1]
        ph = (self.factor - h % self.factor) % self.factor
        pw = (self.factor - w % self.factor) % self.factor
        return self.body(F.pad(x, (0, pw, 0, ph), mode="replicate"))[..., :h, :w]


@dataclass(frozen=True)
class ExportCheck:
    """What an export wrote and how closely the written file reproduced PyTorch."""

    format: str
    path: Path
    runtime: str
    shapes: tuple[tuple[int, int, int, int], ...]
    max_abs_diff: tuple[float, ...]
    tolerance: float

    @property
    def passed(self) -> bool:
        return max(self.max_abs_diff) <= self.tolerance

    def summary(self) -> str:
        parts = ", ".join(f"{n}x{b}x{h}x{w}: {d:.1e}" for (n, b, h, w), d in zip(self.shapes, self.max_abs_diff,
                                                                               strict=True))
        return (f"{self.path} ({self.format}) checked with {self.runtime} against PyTorch; "
                f"max |difference| of class scores {parts} (tolerance {self.tolerance:g})")


def check_shapes(factor: int, bands: int) -> tuple[tuple[int, int, int, int], ...]:
    """Two input shapes whose sides are not multiples of ``factor`` (when it exceeds 1), batch 1 and 2."""
    base = -(-max(48, 4 * factor) // factor) * factor
    return (1, bands, base + 1, base + factor + 3), (2, bands, base + 2 * factor + 5, base - factor + 1)


def _example_input(shape: Sequence[int], mean: Sequence[float] | None, std: Sequence[float] | None,
                   seed: int) -> torch.Tensor:
    """Random input in the units the exported net expects (raw pixel values when it normalises)."""
    g = torch.Generator().manual_seed(seed)
    x = torch.randn(*shape, generator=g)
    if mean is not None and std is not None:
        x = x * torch.tensor(std).view(1, -1, 1, 1) + torch.tensor(mean).view(1, -1, 1, 1)
    return x.float()


def _bands_of(model: nn.Module) -> int:
    if isinstance(model, SegNet):
        return model.bands
    first = next((m for m in model.modules() if isinstance(m, nn.Conv2d)), None)
    if first is None:
        raise ModelFileError("cannot export: the model has no convolution to read its band count from")
    return first.in_channels


def _write_onnx(net: ExportNet, example: torch.Tensor, target: str | Path | io.BytesIO,
                metadata: dict[str, str]) -> None:
    axes = {"image": {0: "batch", 2: "height", 3: "width"}, "scores": {0: "batch", 2: "height", 3: "width"}}
    buffer = io.BytesIO()
    with warnings.catch_warnings():  # the TorchScript-based exporter is deprecated upstream but needs no extras
        warnings.simplefilter("ignore")
        torch.onnx.export(net, (example,), buffer, dynamo=False, input_names=["image"], output_names=["scores"],
                          dynamic_axes=axes, opset_version=ONNX_OPSET)
    import onnx

    proto = onnx.load_from_string(buffer.getvalue())
    onnx.helper.set_model_props(proto, metadata)
    data = proto.SerializeToString()
    if isinstance(target, io.BytesIO):
        target.write(data)
    else:
        Path(target).write_bytes(data)


def _write_torchscript(net: ExportNet, example: torch.Tensor, target: Path, metadata: dict[str, str]) -> None:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        traced = torch.jit.trace(net, example, check_trace=False)
        torch.jit.save(traced, str(target), _extra_files={"fcnkit.json": json.dumps(metadata)})


def onnx_session(source: str | Path | bytes, threads: int | None = None) -> Any:
    """An onnxruntime CPU session (onnxruntime is an optional extra: ``pip install fcnkit[onnx]``)."""
    try:
        import onnxruntime as ort
    except ImportError:
        raise FcnkitError("onnxruntime is not installed; install it with: pip install 'fcnkit[onnx]'") from None
    opts = ort.SessionOptions()
    opts.intra_op_num_threads = threads or torch.get_num_threads()
    opts.log_severity_level = 3
    opts.add_session_config_entry("session.intra_op.allow_spinning", "0")  # idle threads sleep, not spin
    src = source if isinstance(source, bytes) else str(source)
    return ort.InferenceSession(src, sess_options=opts, providers=["CPUExecutionProvider"])


def _runner(fmt: str, path: Path) -> tuple[Callable[[torch.Tensor], np.ndarray], str]:
    """Run the written file outside PyTorch's eager path; returns (run, runtime name)."""
    if fmt == "onnx":
        import onnxruntime as ort

        session = onnx_session(path)
        return (lambda x: session.run(None, {"image": x.numpy()})[0]), f"onnxruntime {ort.__version__}"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        loaded = torch.jit.load(str(path), map_location="cpu")
    return (lambda x: loaded(x).detach().numpy()), f"torch.jit {torch.__version__}"


def check_destination(out: str | Path, error: type[FcnkitError] = ModelFileError) -> None:
    """Refuse, before any work, an output path whose folder is missing or not writable, or that is a folder."""
    out = Path(out)
    folder = out.parent
    if not folder.is_dir():
        raise error(f"{out}: cannot write here, folder {folder} does not exist")
    if out.is_dir():
        raise error(f"{out}: cannot write here, it is a folder")
    probe = partial_path(out)
    try:  # a real file, not os.access: modes do not stop root, read-only file systems stop everyone
        open(probe, "xb").close()
    except OSError as e:
        raise error(f"{out}: cannot write here, folder {folder} is not writable ({e.strerror or e})") from None
    probe.unlink()


def export_model(model: nn.Module | str | Path, out: str | Path, format: str = "onnx", *,
                 mean: Sequence[float] | None = None, std: Sequence[float] | None = None,
                 metadata: dict[str, Any] | None = None, tolerance: float = TOLERANCE) -> ExportCheck:
    """Export ``model`` (a module, or a model file path) to ``out`` as ONNX or TorchScript, checked.

    With a model file path, normalisation and metadata (classes, config, version) come from the file;
    with a module, pass ``mean``/``std`` to build normalisation in (omit both for normalised inputs).
    Raises ModelFileError, leaving nothing at ``out``, when the written file does not match PyTorch.
    """
    if format not in FORMATS:
        raise ModelFileError(f"export format {format!r} is not one of: {', '.join(FORMATS)}")
    out = Path(out)
    check_destination(out)
    if isinstance(model, (str, Path)):
        from fcnkit.modelfile import load_model

        loaded = load_model(model)
        model, mean, std = loaded.model, loaded.meta.mean, loaded.meta.std
        metadata = {"classes": loaded.meta.classes.to_dict(), "config": loaded.meta.config,
                    "kind": loaded.meta.kind, "fcnkit_version": loaded.meta.version, **(metadata or {})}
    net = ExportNet(model, mean, std).eval()
    bands = _bands_of(model)
    props = {"fcnkit": json.dumps({**(metadata or {}), "mean": list(mean or []), "std": list(std or []),
                                   "input": "raw pixel values, float32, N x bands x H x W",
                                   "output": "class scores before softmax, N x classes x H x W"})}
    shapes = check_shapes(net.factor, bands)
    example = _example_input((1, bands, shapes[0][2] - 1, shapes[0][3] - 3), mean, std, seed=0)
    with atomic_output(out) as tmp:
        if format == "onnx":
            _write_onnx(net, example, tmp, props)
        else:
            _write_torchscript(net, example, tmp, props)
        run, runtime = _runner(format, tmp)
        diffs = []
        for i, shape in enumerate(shapes):
            x = _example_input(shape, mean, std, seed=i + 1)
            with torch.no_grad():
                ref = net(x).numpy()
            got = run(x)
            diffs.append(float(np.abs(got - ref).max()) if got.shape == ref.shape else float("inf"))
        check = ExportCheck(format, out, runtime, shapes, tuple(diffs), tolerance)
        if not check.passed:
            raise ModelFileError(f"{out}: export check failed, {check.summary()}")
    return check


class OnnxEngine:
    """Runs a module's forward pass through onnxruntime: a drop-in for ``model(x)`` on normalised tensors.

    Used by ``segment --engine onnxruntime``; the module itself stays available for its geometry.
    """

    def __init__(self, model: nn.Module, threads: int | None = None) -> None:
        net = ExportNet(model).eval()
        example = torch.zeros(1, _bands_of(model), 2 * max(net.factor, 8), 2 * max(net.factor, 8))
        buffer = io.BytesIO()
        _write_onnx(net, example, buffer, {})
        self.session = onnx_session(buffer.getvalue(), threads)

    def __call__(self, x: torch.Tensor) -> torch.Tensor:
        x = x.contiguous(memory_format=torch.contiguous_format).float()
        return torch.from_numpy(self.session.run(None, {"image": x.numpy()})[0])


def make_engine(name: str, model: nn.Module) -> Callable[[torch.Tensor], torch.Tensor]:
    """The per-batch forward pass of tiled inference by runtime name (built once, reused for every image)."""
    if name == "torch":
        from fcnkit.tiling import TorchEngine

        return TorchEngine(model)
    if name == "onnxruntime":
        return OnnxEngine(model)
    raise ConfigError(f"engine: {name!r} is not one of: {', '.join(ENGINES)}")
