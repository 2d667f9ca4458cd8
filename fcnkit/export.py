"""Export a model to ONNX or TorchScript, so it runs where fcnkit is not installed.

The exported graph is the model's own forward pass: raw pixel values in (float32, N×bands×H×W, any N, H and
W), class scores out (N×classes×H×W, before softmax), with the model's normalisation and padding plan built
in (:class:`fcnkit.nets.PaddedNet` is written without branches on sizes, so the traced graph keeps the rule for
every size). Every export is checked before it gets its final name: the written file is run (ONNX with
onnxruntime, TorchScript with ``torch.jit.load``) on random inputs of two sizes that are no multiples of the
net's stride, and must match the model's forward pass within the tolerance.
"""

from __future__ import annotations

import io
import json
import warnings
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import torch
from torch import nn

from fcnkit.atomic import atomic_output
from fcnkit.destinations import check_outputs
from fcnkit.errors import FcnkitError, ModelFileError

if TYPE_CHECKING:
    from fcnkit.model import Model

FORMATS = ("onnx", "torchscript")
TOLERANCE = 1e-4
ONNX_OPSET = 17


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
        return (f"{self.path} ({self.format}) checked with {self.runtime} against the model's forward pass; "
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


def write_onnx(net: nn.Module, example: torch.Tensor, target: str | Path | io.BytesIO,
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


def _write_torchscript(net: nn.Module, example: torch.Tensor, target: Path, metadata: dict[str, str]) -> None:
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


def export_model(model: Model, out: str | Path, format: str = "onnx", *, tolerance: float = TOLERANCE,
                 overwrite: bool = False) -> ExportCheck:
    """Export ``model`` to ``out`` as ONNX or TorchScript, checked against its own forward pass; ModelFileError,
    leaving nothing at ``out``, when the written file does not match. An existing ``out`` is replaced only
    with ``overwrite``."""
    if format not in FORMATS:
        raise ModelFileError(f"export format {format!r} is not one of: {', '.join(FORMATS)}")
    out = Path(out)
    check_outputs([out], inputs=[model.path], overwrite=overwrite, error=ModelFileError)
    model = model.eval()
    values = model.metadata()
    mean, std, bands = values["mean"], values["std"], model.bands
    props = {"fcnkit": json.dumps({**values, "input": "raw pixel values, float32, N x bands x H x W",
                                   "output": "class scores before softmax, N x classes x H x W"})}
    shapes = check_shapes(model.plan.factor, bands)
    example = _example_input((1, bands, shapes[0][2] - 1, shapes[0][3] - 3), mean, std, seed=0)
    with atomic_output(out) as tmp:
        if format == "onnx":
            write_onnx(model, example, tmp, props)
        else:
            _write_torchscript(model, example, tmp, props)
        run, runtime = _runner(format, tmp)
        diffs = []
        for i, shape in enumerate(shapes):
            x = _example_input(shape, mean, std, seed=i + 1)
            with torch.no_grad():
                ref = model(x).numpy()
            got = run(x)
            diffs.append(float(np.abs(got - ref).max()) if got.shape == ref.shape else float("inf"))
        check = ExportCheck(format, out, runtime, shapes, tuple(diffs), tolerance)
        if not check.passed:
            raise ModelFileError(f"{out}: export check failed, {check.summary()}")
    return check
