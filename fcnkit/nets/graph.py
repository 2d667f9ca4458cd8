"""Read a net's geometry graph (a list of :class:`fcnkit.geometry.Layer`) off a real module.

The module is traced symbolically with ``torch.fx`` (no forward pass on data); each convolution, pooling,
up-sampling, addition and concatenation becomes one Layer with its kernel, stride, padding and channel
counts. Point-wise operations (activations, dropout, batch norm) keep positions; anything that mixes
every position — global or adaptive pooling, group/instance/layer norm, attention, flatten — is recorded as
a ``global`` layer, which rules out exact tiling.
"""

from __future__ import annotations

import operator
from dataclasses import dataclass

import torch
from torch import fx, nn
from torch.nn import functional as F

from fcnkit import geometry
from fcnkit.geometry import GLOBAL_OP, INPUT, Layer

_POINTWISE_MODULES = (
    nn.ReLU, nn.ReLU6, nn.LeakyReLU, nn.GELU, nn.SiLU, nn.Hardswish, nn.Hardsigmoid, nn.Sigmoid, nn.Tanh,
    nn.ELU, nn.PReLU, nn.Dropout, nn.Dropout2d, nn.Identity,
)
_POINTWISE_FUNCTIONS = {
    F.relu, F.relu6, F.leaky_relu, F.gelu, F.silu, F.hardswish, F.hardsigmoid, F.dropout, F.dropout2d,
    torch.relu, torch.sigmoid, torch.tanh, operator.mul, operator.truediv, operator.sub, torch.mul,
}
# positional parameters after the input, as in torch.nn.functional
_POOL_FUNCTIONS = {
    F.max_pool2d: ("kernel_size", "stride", "padding", "dilation", "ceil_mode"),
    F.avg_pool2d: ("kernel_size", "stride", "padding", "ceil_mode"),
}
_GLOBAL_MODULES = (
    nn.AdaptiveAvgPool2d, nn.AdaptiveMaxPool2d, nn.GroupNorm, nn.InstanceNorm2d, nn.LayerNorm,
    nn.MultiheadAttention, nn.Flatten, nn.Linear,
)


def _pair(v: int | tuple[int, ...], what: str, name: str) -> int:
    if isinstance(v, tuple):
        if len(set(v)) != 1:
            raise ValueError(f"{name}: non-square {what} {v} is not supported")
        return int(v[0])
    return int(v)


def module_layer(m: nn.Module, name: str, inputs: tuple[str, ...]) -> Layer:
    """The Layer describing one leaf module."""
    def sq(v: int | tuple[int, ...], what: str) -> int:
        return _pair(v, what, name)

    if isinstance(m, nn.Conv2d):
        if m.padding == "valid":
            pad = 0
        elif m.padding == "same":
            pad = (sq(m.kernel_size, "kernel") - 1) * sq(m.dilation, "dilation") // 2
        else:
            pad = sq(m.padding, "padding")
        return Layer(name, "conv", inputs, sq(m.kernel_size, "kernel"), sq(m.stride, "stride"), pad,
                     sq(m.dilation, "dilation"), cin=m.in_channels, cout=m.out_channels, groups=m.groups,
                     bias=m.bias is not None)
    if isinstance(m, nn.ConvTranspose2d):
        return Layer(name, "deconv", inputs, sq(m.kernel_size, "kernel"), sq(m.stride, "stride"),
                     sq(m.padding, "padding"), sq(m.dilation, "dilation"), sq(m.output_padding, "output padding"),
                     cin=m.in_channels, cout=m.out_channels, groups=m.groups, bias=m.bias is not None)
    if isinstance(m, (nn.MaxPool2d, nn.AvgPool2d)):
        if getattr(m, "ceil_mode", False):
            raise ValueError(f"{name}: pooling with ceil_mode=True is not supported")
        dil = sq(m.dilation, "dilation") if isinstance(m, nn.MaxPool2d) else 1
        return Layer(name, "pool", inputs, sq(m.kernel_size, "kernel"), sq(m.stride, "stride"),
                     sq(m.padding, "padding"), dil)
    if isinstance(m, nn.BatchNorm2d):
        return Layer(name, "norm", inputs, cin=m.num_features, cout=m.num_features, bias=m.affine)
    if isinstance(m, nn.Upsample):
        if m.mode != "bilinear" or m.align_corners or m.scale_factor is None:
            raise ValueError(f"{name}: only bilinear Upsample with an integer scale_factor is supported")
        return Layer(name, "interp", inputs, factor=_pair(_int_factor(m.scale_factor, name), "factor", name))
    if isinstance(m, _POINTWISE_MODULES):
        return Layer(name, "identity", inputs)
    if isinstance(m, (nn.GroupNorm, nn.InstanceNorm2d)):
        c = m.num_channels if isinstance(m, nn.GroupNorm) else m.num_features
        return Layer(name, GLOBAL_OP, inputs, cin=c, cout=c, bias=m.affine, note=type(m).__name__)
    if isinstance(m, _GLOBAL_MODULES):
        return Layer(name, GLOBAL_OP, inputs, note=type(m).__name__)
    raise ValueError(f"{name}: layer type {type(m).__name__} is not understood by the geometry reader")


def _int_factor(f: float | tuple[float, ...], name: str) -> int | tuple[int, ...]:
    fs = f if isinstance(f, tuple) else (f,)
    if any(float(x) != int(x) for x in fs):
        raise ValueError(f"{name}: non-integer scale factor {f}")
    return tuple(int(x) for x in fs) if isinstance(f, tuple) else int(f)


def layer_graph(module: nn.Module) -> list[Layer]:
    """Trace ``module`` into Layers (a :class:`~fcnkit.nets.padded.PaddedNet` is traced through its body)."""
    from fcnkit.nets.padded import PaddedNet

    if isinstance(module, PaddedNet):
        module = module.body
    gm = fx.symbolic_trace(module)
    modules = dict(gm.named_modules())
    names: dict[fx.Node, str] = {}
    out: list[Layer] = []
    for node in gm.graph.nodes:
        if node.op == "placeholder":
            if names:
                raise ValueError("only single-input modules are supported")
            names[node] = INPUT
            continue
        if node.op == "output":
            continue
        tensor_inputs = _tensor_args(node, names)
        if not tensor_inputs:  # constants, shapes, getattr of parameters
            continue
        layer = _node_layer(node, modules, tensor_inputs)
        out.append(layer)
        names[node] = layer.name
    return _drop_identities(out)


def _tensor_args(node: fx.Node, names: dict[fx.Node, str]) -> tuple[str, ...]:
    found: list[str] = []

    def visit(a: object) -> None:
        if isinstance(a, fx.Node) and a in names and names[a] not in found:
            found.append(names[a])
        elif isinstance(a, (list, tuple)):
            for b in a:
                visit(b)

    visit(node.args)
    visit(tuple(node.kwargs.values()))
    return tuple(found)


def _node_layer(node: fx.Node, modules: dict[str, nn.Module], inputs: tuple[str, ...]) -> Layer:
    if node.op == "call_module":
        name = str(node.target)
    else:  # functions are named after the module they are called in, e.g. "decoder.ups.0.interpolate"
        stack = list(node.meta.get("nn_module_stack", {}))
        name = f"{stack[-1]}.{node.name}" if stack else node.name
    if node.op == "call_module":
        return module_layer(modules[node.target], name, inputs)
    target = node.target
    if target in (operator.add, torch.add) and len(inputs) > 1:
        return Layer(name, "add", inputs)
    if target is torch.cat:
        dim = node.kwargs.get("dim", node.args[1] if len(node.args) > 1 else 0)
        if dim not in (1, -3):
            raise ValueError(f"{name}: concatenation along dim {dim} is not supported")
        return Layer(name, "concat", inputs)
    if target in _POOL_FUNCTIONS:  # F.max_pool2d / F.avg_pool2d, read like their modules
        names = _POOL_FUNCTIONS[target]

        def arg(key: str, default: object) -> object:
            i = names.index(key) + 1 if key in names else len(node.args)
            return node.args[i] if len(node.args) > i else node.kwargs.get(key, default)

        if arg("ceil_mode", False):
            raise ValueError(f"{name}: pooling with ceil_mode=True is not supported")
        kernel = arg("kernel_size", 1)
        stride = arg("stride", None) or kernel
        return Layer(name, "pool", inputs, _pair(kernel, "kernel", name), _pair(stride, "stride", name),
                     _pair(arg("padding", 0), "padding", name), _pair(arg("dilation", 1), "dilation", name))
    if target is F.interpolate:
        mode = node.kwargs.get("mode", "nearest")
        sf = node.kwargs.get("scale_factor")
        if mode != "bilinear" or node.kwargs.get("align_corners") or sf is None:
            raise ValueError(f"{name}: only bilinear interpolate with a scale_factor is supported")
        return Layer(name, "interp", inputs, factor=_pair(_int_factor(sf, name), "factor", name))
    if target in _POINTWISE_FUNCTIONS or target in (operator.add, torch.add) or node.op == "call_method" and \
            target in ("relu", "relu_", "sigmoid", "clone", "contiguous", "mul", "add", "mul_", "add_"):
        return Layer(name, "identity", inputs)
    return Layer(name, GLOBAL_OP, inputs, note=getattr(target, "__name__", str(target)))


def _drop_identities(graph: list[Layer]) -> list[Layer]:
    """Remove identity layers, rewiring their consumers to their input (the last layer is kept)."""
    alias: dict[str, str] = {}
    kept: list[Layer] = []
    for i, layer in enumerate(graph):
        ins = tuple(alias.get(n, n) for n in layer.inputs)
        if layer.op == "identity" and i < len(graph) - 1:
            alias[layer.name] = ins[0]
            continue
        kept.append(Layer(**{**layer.__dict__, "inputs": ins}))
    return kept


@dataclass(frozen=True)
class NetGeometry:
    """What inference needs to know about a net: the grid its padding plan aligns inputs to (``factor``), the
    context exact tiles need on each side (``margin``; None when global layers make outputs depend on the whole
    input) and those layers."""

    factor: int
    margin: int | None
    global_layers: tuple[str, ...] = ()


def net_geometry(net: nn.Module) -> NetGeometry:
    """The geometry of a net with a padding plan (a :class:`~fcnkit.nets.padded.PaddedNet`); ValueError when
    its graph cannot be read."""
    try:
        graph = layer_graph(net)
    except Exception as e:  # tracing errors come in many types; all mean the graph cannot be read
        raise ValueError(f"cannot read the net's geometry ({' '.join(str(e).split())})") from None
    local = geometry.is_local(graph)
    return NetGeometry(int(getattr(net, "factor", geometry.downsampling_factor(graph))),
                       geometry.tile_margin(graph) if local else None,
                       tuple(f"{g.name} ({g.note})" for g in geometry.global_layers(graph)))
