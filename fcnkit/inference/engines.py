"""The forward pass of a batch of raw tiles: by torch (batch norms folded, channels-last, optional bf16) or by
another runtime (ONNX Runtime), and the cache that prepares each model once per set of weights."""

from __future__ import annotations

import copy
import io
import weakref
from collections.abc import Callable
from typing import TYPE_CHECKING

import torch
from torch import nn

from fcnkit.errors import ConfigError

if TYPE_CHECKING:
    from fcnkit.model import Model

Engine = Callable[[torch.Tensor], torch.Tensor]  # raw pixels N×B×h×w float32 → logits N×C×h×w float32
ENGINES = ("torch", "onnxruntime")

_PREPARED: weakref.WeakKeyDictionary[nn.Module, dict[str, tuple[tuple, object]]] = weakref.WeakKeyDictionary()


def prepared(model: nn.Module, what: str, build: Callable[[nn.Module], object]) -> object:
    """``build(model)`` (a BN-folded copy, a traced graph…), remembered for ``model`` as long as its weights
    are the same tensors, unchanged (their storage and in-place version counters), so mapping many images or
    bands with one model prepares it once; any change to the weights prepares it afresh."""
    try:
        state = tuple((t.data_ptr(), t._version) for t in (*model.parameters(), *model.buffers()))
    except RuntimeError:  # tensors made under inference mode carry no version counter: do not remember
        return build(model)
    entry = _PREPARED.setdefault(model, {})
    if what in entry and entry[what][0] == state:
        return entry[what][1]
    value = build(model)
    entry[what] = (state, value)
    return value


def fuse_conv_bn(model: nn.Module) -> nn.Module:
    """A copy of ``model`` for inference in which each BatchNorm directly after a Conv2d in a Sequential is
    folded into the convolution's weights (same function, one pass less over memory)."""
    model = copy.deepcopy(model).eval()
    for seq in [m for m in model.modules() if isinstance(m, nn.Sequential)]:
        for i in range(len(seq) - 1):
            conv, bn = seq[i], seq[i + 1]
            if isinstance(conv, nn.Conv2d) and isinstance(bn, nn.BatchNorm2d) and bn.track_running_stats:
                seq[i] = torch.nn.utils.fusion.fuse_conv_bn_eval(conv, bn)
                seq[i + 1] = nn.Identity()
    return model


class Float32(nn.Module):
    """Runs the wrapped module in float32 even under bf16 autocast."""

    def __init__(self, module: nn.Module) -> None:
        super().__init__()
        self.module = module

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        with torch.autocast("cpu", enabled=False):
            return self.module(x.float())


def keep_float32(model: nn.Module, kinds: tuple[type[nn.Module], ...]) -> nn.Module:
    """Wrap every submodule of the given kinds in :class:`Float32` (in place)."""
    for parent in list(model.modules()):
        for name, child in parent.named_children():
            if isinstance(child, kinds):
                setattr(parent, name, Float32(child))
    return model


class TorchEngine:
    """The model's forward pass on a batch, prepared for inference: batch norms folded, channels-last. With
    ``bf16`` the net runs under bfloat16 autocast, except transposed convolutions, whose bf16 CPU kernels are
    many times slower than float32 ones for the large up-sampling kernels of FCNs (measured: 20x for kernel 16,
    stride 8)."""

    def __init__(self, model: Model, bf16: bool = False) -> None:
        model = fuse_conv_bn(model)
        if bf16:
            model = keep_float32(model, (nn.ConvTranspose2d,))
        self.model = model.to(memory_format=torch.channels_last)
        self.bf16 = bf16

    def __call__(self, x: torch.Tensor) -> torch.Tensor:
        with torch.inference_mode(), torch.autocast("cpu", torch.bfloat16, enabled=self.bf16):
            return self.model(x).float()


class OnnxEngine:
    """The model's forward pass run by ONNX Runtime (the model exported in memory, raw pixels in)."""

    def __init__(self, model: Model, threads: int | None = None) -> None:
        from fcnkit.export import onnx_session, write_onnx

        side = 2 * max(model.plan.factor, 8)
        buffer = io.BytesIO()
        write_onnx(model, torch.zeros(1, model.bands, side, side), buffer, {})
        self.session = onnx_session(buffer.getvalue(), threads)

    def __call__(self, x: torch.Tensor) -> torch.Tensor:
        x = x.contiguous(memory_format=torch.contiguous_format).float()
        return torch.from_numpy(self.session.run(None, {"image": x.numpy()})[0])


def make_engine(name: str, model: Model, bf16: bool = False) -> Engine:
    """The forward pass by runtime name (prepared once per model and set of weights)."""
    if name == "torch":
        return prepared(model, f"engine-bf16={bf16}", lambda m: TorchEngine(m, bf16))  # type: ignore[return-value]
    if name == "onnxruntime":
        if bf16:
            raise ConfigError("bf16: only the torch engine runs in bfloat16")
        return prepared(model, "engine-onnxruntime", OnnxEngine)  # type: ignore[return-value]
    raise ConfigError(f"engine: {name!r} is not one of: {', '.join(ENGINES)}")
