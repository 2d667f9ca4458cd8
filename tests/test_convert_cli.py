"""`fcnkit convert` and the classifier sources: torchvision with a local weights file, TorchScript, a user
factory with a state dict; every bad input gives one line and exit status 2.

Outside references: torchvision's model builders and torch.jit (the scripted module is the reference its
rebuilt copy must match); safetensors and torch.save/torch.load(weights_only=True) for weights files.
"""

from __future__ import annotations

import json
import textwrap

import pytest
import torch
import torchvision
from safetensors.torch import save_file
from torch import nn

from fcnkit.cli import main
from fcnkit.convert import convert_classifier, load_classifier
from fcnkit.model import Model
from tests.test_convert import lively, user_cnn


@pytest.fixture()
def user_package(tmp_path, monkeypatch):
    """A user's module file with two factories, and state-dict files for them."""
    (tmp_path / "fieldnets.py").write_text(textwrap.dedent("""
        from torch import nn
        from tests.test_convert import user_cnn

        def small():
            return user_cnn()

        def odd_head():
            return nn.Sequential(*user_cnn(), nn.LayerNorm(4))
    """))
    monkeypatch.syspath_prepend(str(tmp_path))
    weights = tmp_path / "small.safetensors"
    save_file(lively(user_cnn()).state_dict(), str(weights))
    odd = tmp_path / "odd.pt"
    torch.save(nn.Sequential(*lively(user_cnn()), nn.LayerNorm(4)).state_dict(), odd)
    return tmp_path, weights, odd


def _run(argv: list[str], capsys) -> tuple[int, str, str]:
    rc = main(argv)
    out, err = capsys.readouterr()
    return rc, out, err


def test_factory_source_certificate_and_model_file(user_package, capsys) -> None:
    tmp, weights, _ = user_package
    model = tmp / "dense.safetensors"
    rc, out, err = _run(["convert", "fieldnets:small", "--weights", str(weights), "--native", "28", "--json",
                         "--sizes", "44", "--keep", "0,2", "--save", str(model)], capsys)
    assert rc == 0, err
    cert = json.loads(out)
    assert cert["passed"] and cert["max_abs_diff"] <= 1e-4
    assert cert["stride"] == 4 and cert["receptive_field"] == 28 and cert["output_sides"]["44"] == 5
    loaded = Model.load(model)  # a plain Sequential: rebuilt from its layer list, no import of fieldnets
    assert loaded.kind == "dense-classifier" and loaded.num_classes == 2
    assert loaded.extra["source"]["source"] == "sequential"


def test_text_certificate(user_package, capsys) -> None:
    _, weights, _ = user_package
    rc, out, _ = _run(["convert", "fieldnets:small", "--weights", str(weights), "--native", "28"], capsys)
    assert rc == 0
    assert "PASSED" in out and "output stride         4" in out and "receptive field       28 px" in out


def test_torchscript_source_matches_the_scripted_module(tmp_path, capsys) -> None:
    scripted = torch.jit.script(lively(user_cnn()))
    path = tmp_path / "clf.pt"
    scripted.save(str(path))
    module = load_classifier(str(path)).module
    x = torch.randn(3, 3, 28, 28)
    with torch.no_grad():
        torch.testing.assert_close(module(x), scripted(x))  # the rebuilt module is the scripted one
        dense = convert_classifier(module, 28).dense
        torch.testing.assert_close(dense(x)[..., 0, 0], scripted(x), atol=1e-4, rtol=0)
    rc, out, err = _run(["convert", str(path), "--native", "28", "--json"], capsys)
    assert rc == 0 and json.loads(out)["passed"], err


def test_scripted_torchvision_classifier_is_recognised(tmp_path) -> None:
    torch.manual_seed(0)
    net = lively(torchvision.models.resnet18(weights=None, num_classes=5))
    path = tmp_path / "r18.pt"
    torch.jit.script(net).save(str(path))
    src = load_classifier(str(path))
    assert src.source == {"source": "torchvision", "arch": "resnet18", "num_classes": 5}
    x = torch.randn(1, 3, 64, 64)
    with torch.no_grad():
        torch.testing.assert_close(src.module(x), net(x))


def test_torchvision_with_local_torch_weights(tmp_path, capsys) -> None:
    torch.manual_seed(0)
    net = lively(torchvision.models.mobilenet_v3_small(weights=None, num_classes=7))
    weights = tmp_path / "mnv3.pt"
    torch.save(net.state_dict(), weights)
    model = tmp_path / "grown.safetensors"
    rc, out, err = _run(["convert", "mobilenet_v3_small", "--weights", str(weights), "--native", "64", "--json",
                         "--grow", "--keep", "1,4", "--skips", "16", "--save", str(model)], capsys)
    assert rc == 0, err
    cert = json.loads(out)
    assert cert["passed"] and cert["receptive_field"] is None and cert["max_abs_logit"] > 0.05
    loaded = Model.load(model)  # rebuilt from the torchvision architecture name only
    assert loaded.kind == "grown-segmenter" and loaded.num_classes == 2
    assert loaded.extra["source"] == {"source": "torchvision", "arch": "mobilenet_v3_small", "num_classes": 7}


def _one_line_error(argv: list[str], capsys, needle: str) -> None:
    rc, _, err = _run(argv, capsys)
    assert rc == 2
    assert err.count("\n") == 1 and err.startswith("fcnkit convert: error: ") and "Traceback" not in err
    assert needle in err


def test_bad_inputs_give_one_line(user_package, tmp_path, capsys) -> None:
    tmp, weights, odd = user_package
    garbage = tmp / "garbage.safetensors"
    garbage.write_bytes(b"not a weights file")
    cases = [
        (["resnet18", "--weights", str(tmp / "missing.safetensors")], "missing.safetensors: weights file not found"),
        (["resnet18", "--weights", str(weights)], "missing parameter 'conv1.weight'"),
        (["resnet18", "--weights", str(garbage)], "not a readable safetensors or torch weights file"),
        (["no_such_package.nets:make", "--weights", str(weights)], "cannot import the factory"),
        (["fieldnets:missing", "--weights", str(weights)], "cannot import the factory"),
        (["fieldnets:odd_head", "--weights", str(odd)], "unsupported layer 12 (LayerNorm)"),
        (["fieldnets:small", "--weights", str(weights), "--native", "32"], "native size 32 gives 16x6x6"),
        (["notanet", "--random-weights"], "'notanet' is not one of torchvision's classifiers"),
        (["resnet18"], "give a local weights file, or ask for random weights"),
        ([str(tmp / "nothing.pt")], "TorchScript file not found"),
    ]
    for args, needle in cases:
        argv = ["convert", *args] + ([] if "--native" in args else ["--native", "28"])
        _one_line_error(argv, capsys, needle)
