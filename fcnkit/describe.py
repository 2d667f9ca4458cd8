"""What a net will cost and see, before any training: ``describe(cfg)`` and its printable table."""

from __future__ import annotations

import dataclasses
import re
from collections import Counter
from collections.abc import Sequence
from fractions import Fraction
from typing import Any

from torch import nn

from fcnkit import geometry
from fcnkit.config import Config, ModelConfig
from fcnkit.geometry import Layer
from fcnkit.units import si

# What a config that leaves bands and classes to the data is described with.
DEFAULT_BANDS, DEFAULT_CLASSES = 3, 2


def _part_of(name: str) -> str:
    """Which row of the breakdown a traced layer belongs to."""
    m = re.match(r"encoder\.stages\.(\d+)\.", name)
    if m:
        return f"encoder stage {m.group(1)}"
    m = re.match(r"decoder\.(ups|scores|convs)\.(\d+)", name)
    if m:
        return f"decoder fusion {m.group(2)}"
    if name.startswith("decoder.head"):
        return "head (1x1 convs)"
    if name.startswith("decoder.final_up"):
        return "final up-sampling"
    return ""


def describe_graph(graph: Sequence[Layer], parts: bool = True) -> dict[str, Any]:
    """Geometry summary of a traced net (see :func:`describe`)."""
    local = geometry.is_local(graph)
    field = geometry.receptive_field(graph) if local else None
    out: dict[str, Any] = {
        "output_stride": geometry.downsampling_factor(graph),
        "receptive_field": field.size if field else None,
        "tile_margin": field.radius if field else None,
        "params": geometry.param_count(graph),
        "macs_per_megapixel": geometry.macs_per_megapixel(graph),
        "exact_tiling": local,
        "global_layers": [f"{g.name} ({g.note})" for g in geometry.global_layers(graph)],
    }
    if parts:
        out["stages"] = _breakdown(graph, local)
    return out


def _breakdown(graph: Sequence[Layer], local: bool) -> list[dict[str, Any]]:
    jumps = geometry.jumps(graph)
    rows: dict[str, dict[str, Any]] = {}
    owner: dict[str, str] = {geometry.INPUT: ""}
    for layer in graph:
        part = _part_of(layer.name) or owner.get(layer.inputs[0], "") or "other"
        owner[layer.name] = part
        row = rows.setdefault(part, {"part": part, "params": 0, "macs": Fraction(0), "channels": 0, "last": ""})
        row["params"] += geometry.layer_params(layer)
        row["macs"] += geometry.layer_macs_per_pixel(layer, jumps)
        row["channels"] = layer.cout or row["channels"]
        row["last"] = layer.name
    result = []
    for row in rows.values():
        last = row.pop("last")
        row["stride"] = str(jumps[last])
        row["receptive_field"] = geometry.receptive_field(graph, last).size if local else None
        row["macs_per_megapixel"] = round(row.pop("macs") * 1_000_000)
        result.append(row)
    return result


def describe(cfg: Config | ModelConfig | nn.Module) -> dict[str, Any]:
    """Geometry and cost of the net a config (or an already built module) describes.

    Keys: ``output_stride`` (total down-sampling factor), ``receptive_field`` (pixels an output pixel can
    see, exact over every path), ``tile_margin`` (context exact tiled inference needs on each side),
    ``params``, ``macs_per_megapixel``, ``exact_tiling`` and ``global_layers`` (what prevents it), and
    ``stages`` (the same per encoder stage and decoder part); ``assumed`` lists the band and class counts
    taken for a config that leaves them to the training data (they change parameters and MACs a little).
    """
    from fcnkit.nets import build_model, layer_graph

    if isinstance(cfg, (Config, ModelConfig)):
        m = cfg.model if isinstance(cfg, Config) else cfg
        defaults = (("bands", DEFAULT_BANDS), ("num_classes", DEFAULT_CLASSES))
        assumed = {k: v for k, v in defaults if getattr(m, k) is None}
        d = describe_graph(layer_graph(build_model(dataclasses.replace(m, **assumed))))
        return {**d, "assumed": {f"model.{k}": v for k, v in assumed.items()}} if assumed else d
    return describe_graph(layer_graph(cfg))


def _global_summary(d: dict[str, Any]) -> str:
    kinds = Counter(item.rsplit("(", 1)[-1].rstrip(")") for item in d["global_layers"])
    return ", ".join(f"{n} x {k}" for k, n in kinds.items()) + " make outputs depend on the whole input"


def format_description(d: dict[str, Any]) -> str:
    """A readable table of :func:`describe`'s result."""
    def field_text(v: Any) -> str:
        return "whole input" if v is None else f"{v} px"

    lines = [
        f"output stride (down-sampling)  {d['output_stride']}",
        f"receptive field                {field_text(d['receptive_field'])}",
        f"tile margin for exact tiling   {field_text(d['tile_margin'])}",
        f"parameters                     {d['params']:,}",
        f"MACs per megapixel             {si(d['macs_per_megapixel'])}",
        f"exact tiling possible          {'yes' if d['exact_tiling'] else 'no: ' + _global_summary(d)}",
    ]
    if d.get("assumed"):
        lines.append("counted with                   " + ", ".join(f"{k} = {v}" for k, v in d["assumed"].items())
                     + " (the config leaves them to the training data)")
    if d.get("stages"):
        lines += ["", f"{'part':<22}{'stride':>7}{'channels':>10}{'field':>8}{'params':>12}{'MACs/MP':>12}"]
        for r in d["stages"]:
            rf = "-" if r["receptive_field"] is None else str(r["receptive_field"])
            lines.append(f"{r['part']:<22}{r['stride']:>7}{r['channels']:>10}{rf:>8}{r['params']:>12,}"
                         f"{si(r['macs_per_megapixel']):>12}")
    return "\n".join(lines)
