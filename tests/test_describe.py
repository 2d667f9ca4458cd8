"""describe() and `fcnkit describe` on every shipped config."""

from __future__ import annotations

import json
import re
import shutil
import subprocess
import sys
import types
from pathlib import Path

import pytest
import torch

from fcnkit import build_model, describe, load_config
from fcnkit import geometry as geo
from fcnkit.cli import main
from fcnkit.config import ModelConfig
from fcnkit.describe import format_description
from fcnkit.nets import layer_graph

ROOT = Path(__file__).resolve().parents[1]
CONFIGS = sorted((ROOT / "fcnkit" / "configs").glob("*.toml"))
REQUIRED = ("output_stride", "receptive_field", "tile_margin", "params", "macs_per_megapixel")

pytestmark = pytest.mark.usefixtures("torch_one_thread")


def test_configs_are_shipped() -> None:
    names = {p.stem for p in CONFIGS}
    assert {"tiny", "demo", "fcn8s", "unet"} <= names
    fcn8s = load_config(ROOT / "fcnkit" / "configs" / "fcn8s.toml").model
    assert fcn8s.fusion == "sum" and fcn8s.skip_strides() == [16, 8]  # FCN-8s: scores from strides 16 and 8
    assert load_config(ROOT / "fcnkit" / "configs" / "unet.toml").model.fusion == "concat"


@pytest.mark.parametrize("path", CONFIGS, ids=lambda p: p.name)
def test_describe_every_shipped_config(path: Path) -> None:
    cfg = load_config(path)
    d = describe(cfg)
    for key in REQUIRED:
        assert isinstance(d[key], int) and d[key] > 0, key
    net = build_model(cfg)
    graph = layer_graph(net)
    field = geo.receptive_field(graph)
    assert d["output_stride"] == net.factor == cfg.model.stage_output_strides()[-1]
    assert (d["receptive_field"], d["tile_margin"]) == (field.size, field.radius)
    assert d["params"] == sum(p.numel() for p in net.parameters())
    assert d["exact_tiling"] is True and d["global_layers"] == []
    assert describe(cfg.model) == d == describe(net)
    # the per-part breakdown adds up and ends at the whole net's field
    assert sum(r["params"] for r in d["stages"]) == d["params"]
    assert abs(sum(r["macs_per_megapixel"] for r in d["stages"]) - d["macs_per_megapixel"]) <= len(d["stages"])
    assert max(r["receptive_field"] for r in d["stages"]) == d["receptive_field"]
    assert [r["part"] for r in d["stages"]][: len(cfg.model.widths)] == [
        f"encoder stage {i}" for i in range(len(cfg.model.widths))]
    # the numbers hold for the module that actually runs: an input of the minimum size gives a full-size output
    side = cfg.model.min_size
    with torch.no_grad():
        assert net.eval()(torch.rand(1, cfg.model.bands, side, side + 1)).shape == (
            1, cfg.model.num_classes, side, side + 1)


def test_describe_of_a_global_net_says_so() -> None:
    d = describe(ModelConfig(widths=[4, 8], norm="group", groups=2))
    assert d["exact_tiling"] is False and d["receptive_field"] is None and d["tile_margin"] is None
    assert d["global_layers"] and all("GroupNorm" in g for g in d["global_layers"])
    text = format_description(d)
    assert "whole input" in text and "GroupNorm make outputs depend on the whole input" in text


def test_cli_describe_runs_on_every_shipped_config(capsys: pytest.CaptureFixture[str]) -> None:
    paths = [str(p.relative_to(ROOT)) for p in CONFIGS]
    # the `fcnkit` console script (installed beside the interpreter); `python -m fcnkit` is run by test_config.py
    script = shutil.which("fcnkit", path=str(Path(sys.executable).parent))
    assert script, "console script 'fcnkit' is not installed"
    res = subprocess.run([script, "describe", *paths], capture_output=True, text=True, cwd=ROOT, timeout=300)
    assert res.returncode == 0, res.stderr
    assert res.stderr == ""
    for p in paths:
        assert f"== {p}\n" in res.stdout
    for label in ("output stride", "receptive field", "tile margin", "parameters", "MACs per megapixel",
                  "encoder stage 0"):
        assert res.stdout.count(label) == len(paths), label
    # --json: one object per config with the same numbers as describe()
    assert main(["describe", "--json", *[str(p) for p in CONFIGS]]) == 0
    rows = [json.loads(line) for line in capsys.readouterr().out.splitlines()]
    assert [r["config"] for r in rows] == [str(p) for p in CONFIGS]
    for row, path in zip(rows, CONFIGS, strict=True):
        assert {k: row[k] for k in REQUIRED} == {k: describe(load_config(path))[k] for k in REQUIRED}


def test_documented_figures_match_describe() -> None:
    readme = (ROOT / "docs" / "config.md").read_text(encoding="utf-8")
    row = r"^\| `(\w+)` \| (\d+) \| (\d+) \| (\d+) \| ([\d,]+) \| ([\d.]+) G \|$"
    rows = re.findall(row, readme, re.M)
    assert {r[0] for r in rows} == {p.stem for p in CONFIGS}
    for path, stride, field, margin, params, gmacs in rows:
        d = describe(load_config(path))
        assert (d["output_stride"], d["receptive_field"], d["tile_margin"]) == (int(stride), int(field), int(margin))
        assert d["params"] == int(params.replace(",", ""))
        assert f"{d['macs_per_megapixel'] / 1e9:.2f}" == gmacs


def test_public_functions_stay_functions_after_their_submodules_are_imported():
    """Regression: with the lazy public API, `import fcnkit.train` bound the module over `fcnkit.train`."""
    import importlib

    import fcnkit

    for name in ("describe", "train", "evaluate"):
        module = importlib.import_module(f"fcnkit.{name}")
        assert isinstance(module, types.ModuleType)
        assert callable(getattr(fcnkit, name)) and getattr(fcnkit, name) is getattr(module, name)
