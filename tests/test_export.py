"""ONNX and TorchScript export: the written files reproduce the PyTorch module at sizes it was not traced at."""

from __future__ import annotations

import warnings

import numpy as np
import onnx
import onnxruntime as ort
import pytest
import torch
from torch import nn

from fcnkit import build_model
from fcnkit.config import config_from_dict
from fcnkit.errors import ModelFileError
from fcnkit.export import OnnxEngine, check_shapes, export_model

MEAN, STD = [110.0, 95.0, 80.0], [40.0, 35.0, 30.0]


def _net(fusion: str = "sum") -> nn.Module:
    cfg = config_from_dict({"model": {"bands": 3, "classes": 4, "widths": [8, 12, 16], "blocks": [1, 1, 1],
                                      "fusion": fusion, "min_size": 16}})
    torch.manual_seed(0)
    net = build_model(cfg)
    for m in net.modules():  # non-trivial batch-norm statistics, so normalisation errors would show
        if isinstance(m, nn.BatchNorm2d):
            m.running_mean.uniform_(-0.5, 0.5)
            m.running_var.uniform_(0.5, 2.0)
    return net.eval()


def _reference(net: nn.Module, raw: np.ndarray) -> np.ndarray:
    """PyTorch's own forward on inputs normalised here, independently of the exported graph."""
    x = (torch.from_numpy(raw) - torch.tensor(MEAN).view(1, -1, 1, 1)) / torch.tensor(STD).view(1, -1, 1, 1)
    with torch.no_grad():
        return net(x).numpy()


def _raw(shape: tuple[int, ...], seed: int) -> np.ndarray:
    return np.random.default_rng(seed).uniform(0, 255, size=shape).astype(np.float32)


# Sides deliberately not multiples of the down-sampling factor (4 here), one of them batch 2.
SHAPES = [(1, 3, 37, 50), (2, 3, 61, 29)]


@pytest.mark.parametrize("fusion", ["sum", "concat"])
def test_onnx_matches_pytorch_at_two_sizes(tmp_path, fusion):
    net = _net(fusion)
    out = tmp_path / "net.onnx"
    check = export_model(net, out, "onnx", mean=MEAN, std=STD)
    assert check.passed and len(check.shapes) == 2
    proto = onnx.load(str(out))
    onnx.checker.check_model(proto)  # onnx's own validator
    dims = proto.graph.input[0].type.tensor_type.shape.dim
    assert [d.dim_param for d in dims[2:]] == ["height", "width"]  # dynamic, not frozen to the trace size
    session = ort.InferenceSession(str(out), providers=["CPUExecutionProvider"])  # reference runtime
    for i, shape in enumerate(SHAPES):
        raw = _raw(shape, i)
        got = session.run(None, {"image": raw})[0]
        ref = _reference(net, raw)
        assert got.shape == ref.shape == (shape[0], 4, shape[2], shape[3])
        assert np.abs(got - ref).max() <= 1e-4  # the tolerance


def test_torchscript_matches_pytorch_at_two_sizes(tmp_path):
    net = _net()
    out = tmp_path / "net.pt"
    export_model(net, out, "torchscript", mean=MEAN, std=STD)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        loaded = torch.jit.load(str(out))
    for i, shape in enumerate(SHAPES):
        raw = _raw(shape, 10 + i)
        with torch.no_grad():
            got = loaded(torch.from_numpy(raw)).numpy()
        assert np.abs(got - _reference(net, raw)).max() <= 1e-4


def test_check_shapes_avoid_multiples_of_the_factor():
    for factor in (2, 4, 8, 16, 32):
        for _, _, h, w in check_shapes(factor, 3):
            assert h % factor and w % factor


def test_plain_module_without_pad_wrapper_exports(tmp_path):
    torch.manual_seed(1)
    net = nn.Sequential(nn.Conv2d(2, 5, 3, padding=1), nn.ReLU(), nn.Conv2d(5, 3, 1)).eval()
    check = export_model(net, tmp_path / "plain.onnx", "onnx")
    assert check.passed
    raw = _raw((1, 2, 23, 31), 3)
    got = ort.InferenceSession(str(tmp_path / "plain.onnx")).run(None, {"image": raw})[0]
    with torch.no_grad():
        assert np.abs(got - net(torch.from_numpy(raw)).numpy()).max() <= 1e-4


def test_onnx_engine_is_a_drop_in_forward():
    net = _net()
    engine = OnnxEngine(net, threads=1)
    x = torch.randn(3, 3, 45, 38)
    with torch.no_grad():
        assert (engine(x) - net(x)).abs().max().item() <= 1e-4


def test_failed_check_leaves_nothing(tmp_path):
    with pytest.raises(ModelFileError, match="export check failed"):
        export_model(_net(), tmp_path / "net.onnx", "onnx", tolerance=-1.0)
    assert list(tmp_path.iterdir()) == []


@pytest.mark.parametrize("where", ["missing/net.onnx", "afolder"])
def test_unwritable_destination_is_refused(tmp_path, where):
    (tmp_path / "afolder").mkdir()
    with pytest.raises(ModelFileError, match="cannot write here"):
        export_model(_net(), tmp_path / where, "onnx")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["afolder"]
    assert list((tmp_path / "afolder").iterdir()) == []


def test_unknown_format_is_refused(tmp_path):
    with pytest.raises(ModelFileError, match="not one of: onnx, torchscript"):
        export_model(_net(), tmp_path / "x", "tflite")


def test_cli_exports_a_model_file_with_its_metadata(tmp_path, capsys):
    import json

    from fcnkit.cli import main
    from fcnkit.config import config_to_dict
    from fcnkit.data.classes import ClassInfo, ClassTable
    from fcnkit.modelfile import ModelMeta, save_model

    cfg = config_from_dict({"model": {"bands": 3, "classes": 2, "widths": [8, 16], "min_size": 8}})
    classes = ClassTable((ClassInfo(0, "bare", (90, 80, 70)), ClassInfo(1, "crack", (250, 20, 20))))
    path = tmp_path / "model.safetensors"
    save_model(path, build_model(cfg), ModelMeta("segnet", config_to_dict(cfg), classes, MEAN, STD, "t", {}))
    assert main(["export", str(path), "--out", str(tmp_path / "m.onnx")]) == 0
    assert "checked with onnxruntime" in capsys.readouterr().out
    props = {p.key: p.value for p in onnx.load(str(tmp_path / "m.onnx")).metadata_props}
    meta = json.loads(props["fcnkit"])
    assert meta["mean"] == MEAN and [c["name"] for c in meta["classes"]["classes"]] == ["bare", "crack"]
    # an unwritable destination: one line, exit 2, nothing written
    assert main(["export", str(path), "--format", "torchscript", "--out", str(tmp_path / "no" / "m.pt")]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "does not exist" in err
    assert sorted(p.name for p in tmp_path.iterdir()) == ["m.onnx", "model.safetensors"]
