"""Classifier → fully convolutional net: dense layers become convolutions, with a certificate of equivalence.

A classifier is read with ``torch.fx`` as *trunk → [adaptive pool] → flatten → dense head*. The trunk is
kept as it is (cut out of the traced graph); the head is rewritten:

* the first dense layer after the flatten becomes a k×k convolution whose kernel is its weight matrix
  reshaped to (out, channels, k, k), k being the feature map's side at the native input size; later dense
  layers become 1×1 convolutions; activations and dropout stay (Long et al. 2015, section 3.1);
* an adaptive pool before the head is replaced by what it means on a larger input. A global average pool
  followed only by affine layers commutes with them, so the 1×1 convolutions run first and their map is
  the class-activation map whose spatial mean is the classifier's output (Zhou et al. 2016). Otherwise the
  pool becomes a sliding pool of the native feature size with stride 1, so every output location is the
  classifier applied to one window of the input (Sermanet et al. 2014, OverFeat).

Every conversion checks itself on a random input at the native size (:class:`Certificate`).
"""

from __future__ import annotations

import copy
from dataclasses import asdict, dataclass, field
from typing import Any

import torch
from torch import fx, nn
from torch.fx.passes.shape_prop import ShapeProp, TensorMetadata
from torch.nn import functional as F

from fcnkit import geometry
from fcnkit.errors import FcnkitError
from fcnkit.geometry import PadPlan
from fcnkit.nets.graph import layer_graph
from fcnkit.nets.padded import PaddedNet

TOLERANCE = 1e-4  # float32 agreement required between the converted net and the classifier


class ConvertError(FcnkitError):
    """A classifier cannot be converted (unsupported head, wrong native size, untraceable module)."""


# Layers allowed in the dense head, applied position by position once the head is convolutional.
_POINTWISE = (nn.ReLU, nn.ReLU6, nn.LeakyReLU, nn.GELU, nn.SiLU, nn.Hardswish, nn.Hardsigmoid, nn.Sigmoid,
              nn.Tanh, nn.ELU, nn.Dropout, nn.Identity)
_AFFINE = (nn.Linear, nn.BatchNorm1d, nn.Dropout, nn.Identity)  # commute with spatial averaging (eval mode)
_FUNCTIONS: dict[Any, type[nn.Module]] = {F.relu: nn.ReLU, torch.relu: nn.ReLU, F.relu6: nn.ReLU6,
                                          F.hardswish: nn.Hardswish, F.gelu: nn.GELU, F.silu: nn.SiLU,
                                          torch.sigmoid: nn.Sigmoid, torch.tanh: nn.Tanh}
_FLATTEN_METHODS = ("flatten", "view", "reshape")


@dataclass
class _Head:
    """The classifier read as trunk → pool → flatten → layers."""

    trunk: fx.Node
    pool: str  # "", "avg" or "max"
    pool_out: int  # side of the adaptive pool's output (1 = global)
    pool_name: str
    layers: list[tuple[str, nn.Module]]


def _int_side(v: Any) -> int | None:
    if isinstance(v, (tuple, list)):
        return int(v[0]) if len(set(v)) == 1 and v[0] is not None else None
    return int(v) if v is not None else None


def _as_flatten(node: fx.Node, modules: dict[str, nn.Module]) -> tuple[bool, bool]:
    """(is a flatten to N×D, is also a global average over space) for one traced node."""
    if node.op == "call_module" and isinstance(modules[node.target], nn.Flatten):
        m = modules[node.target]
        return (m.start_dim == 1 and m.end_dim == -1), False
    if node.op == "call_function" and node.target is torch.flatten:
        start = node.args[1] if len(node.args) > 1 else node.kwargs.get("start_dim", 0)
        return start == 1 and len(node.args) < 3, False
    if node.op == "call_method" and node.target in _FLATTEN_METHODS:
        args = node.args[1:]
        if node.target == "flatten":
            start = args[0] if args else node.kwargs.get("start_dim", 0)
            return (start == 1 and len(args) <= 1 and "end_dim" not in node.kwargs), False
        return (len(args) == 2 and args[1] == -1), False
    is_mean = (node.op == "call_method" and node.target == "mean") or \
        (node.op == "call_function" and node.target is torch.mean)
    if is_mean:
        dims = node.args[1] if len(node.args) > 1 else node.kwargs.get("dim")
        dims = tuple(dims) if isinstance(dims, (tuple, list)) else (dims,)
        keep = node.kwargs.get("keepdim", node.args[2] if len(node.args) > 2 else False)
        return (sorted(d % 4 for d in dims) == [2, 3] and not keep), True
    return False, False


def _pool_of(node: fx.Node, modules: dict[str, nn.Module]) -> tuple[str, int] | None:
    """("avg" | "max", output side) when ``node`` is an adaptive pooling."""
    if node.op == "call_module":
        m = modules[node.target]
        if isinstance(m, (nn.AdaptiveAvgPool2d, nn.AdaptiveMaxPool2d)):
            side = _int_side(m.output_size)
            return ("avg" if isinstance(m, nn.AdaptiveAvgPool2d) else "max", side) if side else None
    if node.op == "call_function" and node.target in (F.adaptive_avg_pool2d, F.adaptive_max_pool2d):
        side = _int_side(node.args[1] if len(node.args) > 1 else node.kwargs.get("output_size"))
        return ("avg" if node.target is F.adaptive_avg_pool2d else "max", side) if side else None
    return None


def _node_name(node: fx.Node) -> str:
    return str(node.target) if node.op == "call_module" else node.name


def _head_module(node: fx.Node, modules: dict[str, nn.Module]) -> nn.Module | None:
    """The module a head node applies (functional activations mapped to their modules)."""
    if node.op == "call_module":
        m = modules[node.target]
        ok = isinstance(m, (nn.Linear, nn.BatchNorm1d, *_POINTWISE)) or \
            (isinstance(m, (nn.Softmax, nn.LogSoftmax)) and m.dim == 1)
        return m if ok else None
    if node.op == "call_function" and node.target in _FUNCTIONS:
        return _FUNCTIONS[node.target]()
    if node.op == "call_function" and node.target is F.dropout:
        return nn.Dropout(node.kwargs.get("p", node.args[1] if len(node.args) > 1 else 0.5))
    return None


def _describe_node(node: fx.Node, modules: dict[str, nn.Module]) -> str:
    if node.op == "call_module":
        return f"{node.target} ({type(modules[node.target]).__name__})"
    return f"{node.name} ({getattr(node.target, '__name__', node.target)})"


def _read_head(gm: fx.GraphModule) -> _Head:
    """Split the traced classifier into trunk, pool, flatten and dense head (or say why not)."""
    modules = dict(gm.named_modules())
    out = next(n for n in gm.graph.nodes if n.op == "output")
    node = out.args[0]
    if not isinstance(node, fx.Node):
        raise ConvertError("the classifier returns several values; expected one tensor of class scores")
    layers: list[tuple[str, nn.Module]] = []
    while True:
        flat, is_mean = _as_flatten(node, modules)
        if flat:
            break
        m = _head_module(node, modules)
        if m is None:
            raise ConvertError(f"unsupported layer {_describe_node(node, modules)} in the classifier's head: "
                               f"expected Linear, activation or dropout layers after a flatten")
        if len(node.all_input_nodes) != 1:
            raise ConvertError(f"head layer {_describe_node(node, modules)} has several inputs")
        layers.insert(0, (_node_name(node), m))
        node = node.all_input_nodes[0]
    if not any(isinstance(m, nn.Linear) for _, m in layers):
        raise ConvertError("no dense (Linear) layer after the flatten: nothing to convert")
    src = node.all_input_nodes[0]
    if is_mean:
        return _Head(src, "avg", 1, _node_name(node), layers)
    pool = _pool_of(src, modules)
    if pool is not None:
        return _Head(src.all_input_nodes[0], pool[0], pool[1], _node_name(src), layers)
    return _Head(src, "", 0, "", layers)


def cut_graph(gm: fx.GraphModule, outputs: list[fx.Node]) -> fx.GraphModule:
    """A module computing the given nodes of a traced module (a tuple when several), nothing after them."""
    graph = fx.Graph()
    env: dict[fx.Node, fx.Node] = {}
    for node in gm.graph.nodes:
        if node.op == "output":
            break
        env[node] = graph.node_copy(node, lambda n: env[n])
    graph.output(env[outputs[0]] if len(outputs) == 1 else tuple(env[o] for o in outputs))
    cut = fx.GraphModule(gm, graph)
    cut.graph.eliminate_dead_code()
    cut.recompile()
    return fx.GraphModule(cut, cut.graph)  # keeps only the submodules the cut graph still uses


def trace(module: nn.Module) -> fx.GraphModule:
    """``torch.fx`` trace of a classifier, with a one-line error when its forward cannot be traced."""
    try:
        return fx.symbolic_trace(module)
    except Exception as e:  # noqa: BLE001 - fx raises many kinds; all mean "cannot read this module"
        msg = str(e).splitlines()[0] if str(e) else type(e).__name__
        raise ConvertError(f"cannot trace {type(module).__name__} with torch.fx: {msg}") from e


class _ShapeRun(nn.Module):
    """Runs shape propagation as a forward pass, so ``functional_call`` can swap in meta-device weights."""

    def __init__(self, gm: fx.GraphModule) -> None:
        super().__init__()
        self.gm = gm

    def forward(self, x: torch.Tensor) -> Any:
        return ShapeProp(self.gm).propagate(x)


def node_shapes(gm: fx.GraphModule, upto: fx.Node, bands: int, side: int) -> dict[str, tuple[int, ...]]:
    """Output shape of every node up to ``upto`` (by node name) for a 1×bands×side×side input, computed on
    the meta device (shapes only, no arithmetic). Layers after ``upto`` are left out: a dense head only
    takes the native size."""
    run = _ShapeRun(cut_graph(gm, [upto]))
    try:
        meta_run(run, bands, side)
    except Exception as e:  # noqa: BLE001 - a size the net cannot take
        msg = str(e).splitlines()[0] if str(e) else type(e).__name__
        raise ConvertError(f"the classifier cannot run on a {side}x{side} input: {msg}") from e
    return {n.name: tuple(n.meta["tensor_meta"].shape) for n in run.gm.graph.nodes
            if isinstance(n.meta.get("tensor_meta"), TensorMetadata)}


def meta_run(module: nn.Module, bands: int, side: int) -> Any:
    """``module`` run on a 1×bands×side×side input on the meta device (shapes only, no arithmetic); raises
    what the module raises for a size it cannot take."""
    meta = {k: torch.empty_like(v, device="meta") for k, v in module.state_dict(keep_vars=True).items()}
    return torch.func.functional_call(module, meta, (torch.empty(1, bands, side, side, device="meta"),))


def padding_plan(body: nn.Module, bands: int, stride: int, offset: int, native_size: int) -> PadPlan:
    """The padding plan of a converted body: its grid (stride, offset) and the fewest whole cells a padded
    input needs for every layer to give an output. One cell, unless a layer without padding reads more input
    than one cell's window gives (e.g. a padding-free 3×3 convolution after the last pooling when a padded layer
    follows); the native size always runs, so no more cells than reach it are ever needed."""
    most = max(1, -(-(native_size - offset) // stride))
    for cells in range(1, most):
        try:
            meta_run(body, bands, offset + cells * stride)
            return PadPlan(stride, offset, cells)
        except Exception:  # noqa: BLE001 - too small for some layer: one more cell
            continue
    return PadPlan(stride, offset, most)


def first_conv(gm: fx.GraphModule) -> tuple[str, nn.Conv2d]:
    """Name and module of the first convolution a traced classifier applies (its input bands)."""
    for node in gm.graph.nodes:
        if node.op == "call_module" and isinstance(gm.get_submodule(node.target), nn.Conv2d):
            return str(node.target), gm.get_submodule(node.target)
    raise ConvertError("the classifier has no Conv2d layer: cannot tell its input bands")


@dataclass
class Plan:
    """How one classifier is converted (everything :func:`build_dense` and the segmenter grower need)."""

    gm: fx.GraphModule
    head: _Head
    native_size: int
    bands: int
    channels: int  # trunk output channels
    feature_side: int  # trunk output side at the native size
    form: str  # "kxk" (dense layer reads a k×k window), "window" (sliding pool) or "cam" (pool commutes)
    kernel: int  # first converted conv's kernel (feature cells)
    dilation: int  # its dilation (> 1 when an adaptive pool averaged cells of this size)
    pool_kernel: int  # sliding pool's side (0 = none)
    small: dict[str, tuple[int, ...]]  # trunk node shapes at the native size
    large: dict[str, tuple[int, ...]]  # and at twice the native size


def plan(module: nn.Module, native_size: int, *, global_pool: str = "auto") -> Plan:
    """Read the classifier and decide the conversion; ``global_pool`` is ``auto`` (commute a global
    average pool when only affine layers follow), ``cam`` (require that) or ``window`` (sliding pool)."""
    if global_pool not in ("auto", "cam", "window"):
        raise ConvertError(f"global_pool: {global_pool!r} is not one of: auto, cam, window")
    if not isinstance(native_size, int) or native_size < 1:
        raise ConvertError(f"native_size: expected a positive whole number of pixels, got {native_size!r}")
    gm = trace(module)
    head = _read_head(gm)
    bands = first_conv(gm)[1].in_channels
    small = node_shapes(gm, head.trunk, bands, native_size)
    large = node_shapes(gm, head.trunk, bands, 2 * native_size)
    shape = small.get(head.trunk.name)
    if shape is None or len(shape) != 4:
        raise ConvertError(f"the input of the flatten/pool ({_node_name(head.trunk)}) is not an N×C×H×W feature map")
    _, channels, fh, fw = shape
    if fh != fw:
        raise ConvertError(f"native size {native_size} gives a non-square {fh}x{fw} feature map at "
                           f"{_node_name(head.trunk)}")
    big = large[head.trunk.name]
    if big[-1] <= fw:
        raise ConvertError(f"the feature map at {_node_name(head.trunk)} does not grow with the input "
                           f"({fw} at {native_size} px, {big[-1]} at {2 * native_size} px): nothing to slide")
    first = next(i for i, (_, m) in enumerate(head.layers) if isinstance(m, nn.Linear))
    linear = head.layers[first][1]
    for name, m in head.layers[:first]:
        if isinstance(m, nn.BatchNorm1d) and not (head.pool and head.pool_out == 1):
            raise ConvertError(f"unsupported layer {name} (BatchNorm1d) before the first dense layer")
    affine = all(isinstance(m, _AFFINE) for _, m in head.layers)
    pool_kernel, dilation, kernel = 0, 1, fw
    if head.pool and head.pool_out == 1:
        form = "cam" if head.pool == "avg" and affine and global_pool != "window" else "window"
        if global_pool == "cam" and form != "cam":
            raise ConvertError(f"{head.pool_name}: only a global average pool followed by affine layers commutes "
                               f"with them; this head needs global_pool='window'")
        kernel, pool_kernel = 1, (0 if form == "cam" else fw)
    elif head.pool:
        o = head.pool_out
        if fw < o or fw % o:
            raise ConvertError(f"native size {native_size} gives {fw}x{fw} features at {_node_name(head.trunk)}, which "
                               f"{head.pool_name} cannot split into {o}x{o} equal windows; choose a native size "
                               f"giving a multiple of {o}")
        form, kernel, dilation = "kxk", o, fw // o
        pool_kernel = dilation if dilation > 1 else 0
    else:
        form = "kxk"
    expected = channels * kernel * kernel
    if linear.in_features != expected:
        raise ConvertError(f"native size {native_size} gives {channels}x{kernel}x{kernel} = {expected} features but "
                           f"{head.layers[first][0]} expects {linear.in_features} inputs; give the size the "
                           f"classifier was trained at")
    return Plan(gm, head, native_size, bands, channels, fw, form, kernel, dilation, pool_kernel, small, large)


def conv_head(p: Plan, same: bool = False) -> list[nn.Module]:
    """The head's layers as convolutions (``same``: pad the first one so the map keeps its size)."""
    layers: list[nn.Module] = []
    first = True
    for _, m in p.head.layers:
        if isinstance(m, nn.Linear):
            k = p.kernel if first else 1
            w = m.weight.detach().reshape(m.out_features, -1, k, k)
            if same and k % 2 == 0:  # an even kernel shifted half a cell into an odd one: same values
                w, k = F.pad(w, (0, 1, 0, 1)), k + 1
            dil = p.dilation if first else 1
            conv = nn.Conv2d(w.shape[1], m.out_features, k, dilation=dil, bias=m.bias is not None,
                             padding=dil * (k // 2) if same else 0)
            with torch.no_grad():
                conv.weight.copy_(w)
                if m.bias is not None:
                    conv.bias.copy_(m.bias.detach())
            layers.append(conv)
            first = False
        elif isinstance(m, nn.BatchNorm1d):
            bn = nn.BatchNorm2d(m.num_features, m.eps, m.momentum, m.affine, m.track_running_stats)
            bn.load_state_dict(m.state_dict())
            layers.append(bn)
        else:
            layers.append(copy.deepcopy(m))
    return layers


def sliding_pool(p: Plan, same: bool = False) -> nn.Module:
    """The stride-1 pool standing for the adaptive pool (identity when there is none)."""
    k = p.pool_kernel
    if not k:
        return nn.Identity()
    if same:  # odd window centred on each cell, borders averaged over real cells only
        k += 1 - k % 2
        if p.head.pool == "max":
            return nn.MaxPool2d(k, 1, k // 2)
        return nn.AvgPool2d(k, 1, k // 2, count_include_pad=False)
    return nn.MaxPool2d(k, 1) if p.head.pool == "max" else nn.AvgPool2d(k, 1)


class DenseClassifier(nn.Module):
    """A classifier made fully convolutional: N×B×H×W → N×C×h×w class scores, one per window.

    At the native size the map is 1×1 and equals the classifier's output, except in the class-activation
    form (``cam``), where the map's spatial mean equals it.
    """

    def __init__(self, trunk: nn.Module, pool: nn.Module, head: nn.Sequential, form: str) -> None:
        super().__init__()
        self.trunk, self.pool, self.head, self.form = trunk, pool, head, form

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return self.head(self.pool(self.trunk(x)))


def build_dense(p: Plan) -> DenseClassifier:
    return DenseClassifier(cut_graph(p.gm, [p.head.trunk]), sliding_pool(p), nn.Sequential(*conv_head(p)),
                           p.form).eval()


@dataclass(frozen=True)
class Recipe:
    """How a net is made from a classifier. ``keep``: classifier outputs kept as classes (their score
    rows reused); ``classes``: number of new classes (grown segmenters only, when ``keep`` is None);
    ``skips``: strides of trunk stages fused into a grown segmenter, deepest first; ``bands``: input bands
    (more than the classifier's widens its first convolution)."""

    native_size: int
    grow: bool = False
    global_pool: str = "auto"
    keep: tuple[int, ...] | None = None
    classes: int | None = None
    skips: tuple[int, ...] = ()
    bands: int | None = None

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)

    @classmethod
    def from_dict(cls, d: dict[str, Any]) -> Recipe:
        d = dict(d)
        d["keep"] = tuple(d["keep"]) if d.get("keep") is not None else None
        d["skips"] = tuple(d.get("skips", ()))
        return cls(**d)


def output_side(graph: list[geometry.Layer], n: int) -> int:
    """Side of the net's output for an n×n input, by convolution arithmetic along the graph."""
    side = {geometry.INPUT: n}
    for layer in graph:
        side[layer.name] = geometry.layer_output_size(layer, side[layer.inputs[0]])
    return side[graph[-1].name]


@dataclass(frozen=True)
class Certificate:
    """Evidence that a conversion computes what the classifier computed, and what the dense net sees."""

    native_size: int
    form: str
    compared: str  # what of the dense output was compared with the logits
    max_abs_diff: float
    max_abs_logit: float
    tolerance: float
    stride: int
    receptive_field: int | None  # None: the output depends on the whole input
    global_layers: list[str]
    output_sides: dict[int, int] = field(default_factory=dict)  # input side → output side

    @property
    def passed(self) -> bool:
        return self.max_abs_diff <= self.tolerance

    def to_dict(self) -> dict[str, Any]:
        return {**asdict(self), "output_sides": {str(k): v for k, v in self.output_sides.items()},
                "passed": self.passed}

    def format(self) -> str:
        rf = f"{self.receptive_field} px" if self.receptive_field is not None else \
            "whole input (global layers: " + ", ".join(self.global_layers[:3]) + \
            (f" and {len(self.global_layers) - 3} more" if len(self.global_layers) > 3 else "") + ")"
        sizes = ", ".join(f"{k} px -> {v}x{v}" for k, v in self.output_sides.items())
        return "\n".join([
            f"form                  {_FORMS[self.form]}",
            f"equivalence at {self.native_size} px: max |difference| {self.max_abs_diff:.3g} "
            f"({self.compared}; largest |logit| {self.max_abs_logit:.3g}, relative "
            f"{self.max_abs_diff / max(self.max_abs_logit, 1e-30):.2g}; tolerance {self.tolerance:g}): "
            + ("PASSED" if self.passed else "FAILED"),
            f"output stride         {self.stride}",
            f"receptive field       {rf}",
            f"output size           {sizes}",
        ])


_FORMS = {
    "kxk": "first dense layer as a kxk convolution, later ones 1x1 (one score per native-size window)",
    "window": "adaptive pool as a sliding pool of the native feature size, dense layers as 1x1 convolutions",
    "cam": "global average pool commuted with the affine head: class-activation map (its mean = the logits)",
}


def certify(module: nn.Module, dense: DenseClassifier, p: Plan, sizes: tuple[int, ...] = (),
            batch: int = 2, seed: int = 0) -> Certificate:
    """Compare ``dense`` with ``module`` on random inputs at the native size; add its stride, receptive
    field and output side for the native size and each of ``sizes``."""
    x = torch.randn(batch, p.bands, p.native_size, p.native_size, generator=torch.Generator().manual_seed(seed))
    with torch.no_grad():
        ref = module(x)
        out = dense(x)
    if p.form == "cam":
        got, compared = out.mean(dim=(2, 3)), f"spatial mean of the {out.shape[-2]}x{out.shape[-1]} map"
    else:
        if out.shape[-2:] != (1, 1):
            raise ConvertError(f"the converted net gives a {out.shape[-2]}x{out.shape[-1]} map at the native size, "
                               f"expected 1x1")
        got, compared = out[..., 0, 0], "the 1x1 map"
    try:
        graph = layer_graph(dense)
    except ValueError as e:  # a layer the geometry reader does not model (e.g. ceil-mode pooling)
        raise ConvertError(f"cannot read the converted net's geometry: {e}") from None
    local = geometry.is_local(graph)
    return Certificate(
        native_size=p.native_size, form=p.form, compared=compared,
        max_abs_diff=float((got - ref).abs().max()), max_abs_logit=float(ref.abs().max()), tolerance=TOLERANCE,
        stride=int(geometry.output_jump(graph)),
        receptive_field=geometry.receptive_field(graph).size if local else None,
        global_layers=[f"{g.name} ({g.note})" for g in geometry.global_layers(graph)],
        output_sides={n: output_side(graph, n) for n in (p.native_size, *sizes)},
    )


def offset(p: Plan, stride: int, same: bool = False) -> int:
    """Pixels by which the dense net's coarse cells sit off the stride grid (window − stride)."""
    feature_window = p.native_size - (p.feature_side - 1) * stride  # input pixels one feature cell spans
    if same or p.form == "cam":
        return feature_window - stride
    return p.native_size - stride


def trunk_stride(p: Plan) -> int:
    """The trunk's output stride: its feature side grows by native/stride when the input side doubles."""
    grow = p.large[p.head.trunk.name][-1] - p.feature_side
    if p.native_size % grow:
        raise ConvertError(f"native size {p.native_size} is not a multiple of the trunk's stride")
    return p.native_size // grow


def keep_rows(conv: nn.Conv2d, keep: tuple[int, ...]) -> nn.Conv2d:
    """A copy of the score layer ``conv`` with only the output rows (classes) ``keep``."""
    bad = [k for k in keep if not 0 <= k < conv.out_channels]
    if bad or not keep or len(set(keep)) != len(keep):
        raise ConvertError(f"keep: {bad or list(keep)} - expected distinct class indices in 0..{conv.out_channels - 1}")
    new = nn.Conv2d(conv.in_channels, len(keep), conv.kernel_size, padding=conv.padding, dilation=conv.dilation)
    idx = torch.tensor(keep)
    with torch.no_grad():
        new.weight.copy_(conv.weight[idx])
        new.bias.copy_(conv.bias[idx] if conv.bias is not None else torch.zeros(len(keep)))
    return new


def score_map(p: Plan, dense: DenseClassifier, stride: int, recipe: Recipe) -> PaddedNet:
    """Full-resolution score maps from the dense net: coarse scores up-sampled bilinearly, the input padded so
    each lands on the centre of the window it saw (the padding plan's offset); ``recipe.keep`` restricts the
    classes (the dense net's last score layer is cut down in place)."""
    convs = [i for i, m in enumerate(dense.head) if isinstance(m, nn.Conv2d)]
    if recipe.keep is not None:
        dense.head[convs[-1]] = keep_rows(dense.head[convs[-1]], recipe.keep)
    body = nn.Sequential(dense, nn.Upsample(scale_factor=stride, mode="bilinear"))
    classes = dense.head[convs[-1]].out_channels
    return PaddedNet(body, padding_plan(body, p.bands, stride, offset(p, stride), p.native_size), p.bands,
                     classes).eval()
