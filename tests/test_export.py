"""ONNX and TorchScript export: the written files reproduce the model's own forward pass at sizes it was not
traced at."""

from __future__ import annotations

import warnings

import numpy as np
import onnx
import onnxruntime as ort
import pytest
import torch
from torch import nn

from fcnkit import Model, build_model
from fcnkit.config import config_from_dict
from fcnkit.errors import ModelFileError
from fcnkit.export import check_shapes, export_model
from fcnkit.geometry import PadPlan
from fcnkit.inference.engines import OnnxEngine
from fcnkit.nets import PaddedNet

MEAN, STD = [110.0, 95.0, 80.0], [40.0, 35.0, 30.0]


def _net(fusion: str = "sum") -> Model:
    cfg = config_from_dict({"model": {"bands": 3, "num_classes": 4, "widths": [8, 12, 16], "blocks": [1, 1, 1],
                                      "fusion": fusion, "min_size": 16}})
    torch.manual_seed(0)
    net = build_model(cfg)
    for m in net.modules():  # non-trivial batch-norm statistics, so normalisation errors would show
        if isinstance(m, nn.BatchNorm2d):
            m.running_mean.uniform_(-0.5, 0.5)
            m.running_var.uniform_(0.5, 2.0)
    return Model(net, classes=None, mean=MEAN, std=STD).eval()


def _reference(model: Model, raw: np.ndarray) -> np.ndarray:
    """PyTorch's own forward of the net on inputs normalised here, independently of the exported graph."""
    x = (torch.from_numpy(raw) - torch.tensor(MEAN).view(1, -1, 1, 1)) / torch.tensor(STD).view(1, -1, 1, 1)
    with torch.no_grad():
        return model.net(x).numpy()


def _raw(shape: tuple[int, ...], seed: int) -> np.ndarray:
    return np.random.default_rng(seed).uniform(0, 255, size=shape).astype(np.float32)


# Sides deliberately not multiples of the down-sampling factor (4 here), one of them batch 2.
SHAPES = [(1, 3, 37, 50), (2, 3, 61, 29)]


@pytest.mark.parametrize("fusion", ["sum", "concat"])
def test_onnx_matches_pytorch_at_two_sizes(tmp_path, fusion):
    net = _net(fusion)
    out = tmp_path / "net.onnx"
    check = export_model(net, out, "onnx")
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
    export_model(net, out, "torchscript")
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


def test_a_net_with_an_offset_plan_exports_at_any_size(tmp_path):
    """A body whose coarse grid sits off the origin (as a converted classifier's does): the export keeps the
    padding plan for every size, down to inputs smaller than one cell."""
    torch.manual_seed(1)
    body = nn.Sequential(nn.Conv2d(2, 5, 5), nn.ReLU(), nn.MaxPool2d(2), nn.Conv2d(5, 3, 3), nn.MaxPool2d(2),
                         nn.Upsample(scale_factor=4, mode="bilinear"))
    model = Model(PaddedNet(body, PadPlan(4, 8), 2, 3), classes=None, mean=[0.0, 0.0], std=[1.0, 1.0]).eval()
    check = export_model(model, tmp_path / "offset.onnx", "onnx")
    assert check.passed
    session = ort.InferenceSession(str(tmp_path / "offset.onnx"))
    for shape in ((1, 2, 23, 31), (1, 2, 3, 2), (2, 2, 41, 9)):
        raw = _raw(shape, 3)
        got = session.run(None, {"image": raw})[0]
        with torch.no_grad():
            ref = model(torch.from_numpy(raw)).numpy()
        assert got.shape == ref.shape == (shape[0], 3, *shape[2:]) and np.abs(got - ref).max() <= 1e-4


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

    cfg = config_from_dict({"model": {"bands": 3, "num_classes": 2, "widths": [8, 16], "min_size": 8}})
    classes = ClassTable((ClassInfo(0, "bare", (90, 80, 70)), ClassInfo(1, "crack", (250, 20, 20))))
    path = tmp_path / "model.safetensors"
    Model(build_model(cfg), classes=classes, mean=MEAN, std=STD, config=config_to_dict(cfg)).save(path)
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
