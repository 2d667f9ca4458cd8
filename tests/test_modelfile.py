"""Model files: safetensors round trip, metadata read back by the safetensors library itself, errors."""

import json
import pickle
from pathlib import Path

import pytest
import torch
from safetensors import safe_open
from safetensors.torch import save_file

from fcnkit import Model, ModelFileError, load_config
from fcnkit.config import config_to_dict, replace_section
from fcnkit.data.classes import ClassInfo, ClassTable
from fcnkit.modelfile import write_model_file
from fcnkit.nets import build_model

ROOT = Path(__file__).resolve().parents[1]
CLASSES = ClassTable((ClassInfo(0, "ground", (10, 20, 30)), ClassInfo(1, "water", (0, 0, 200)),
                      ClassInfo(2, "roof", (200, 0, 0))))


MEAN, STD = [100.0, 110.5, 90.0], [30.0, 31.0, 29.5]


def _model():
    cfg = load_config(ROOT / "fcnkit" / "configs" / "tiny.toml")
    torch.manual_seed(1)
    net = build_model(cfg)
    with torch.no_grad():  # non-default batch-norm statistics, so buffers are checked too
        for m in net.modules():
            if isinstance(m, torch.nn.BatchNorm2d):
                m.running_mean.uniform_(-1, 1)
                m.running_var.uniform_(0.5, 2)
    model = Model(net, classes=CLASSES, mean=MEAN, std=STD, config=config_to_dict(cfg), extra={"epoch": 3},
                  temperature=1.5)
    return cfg, model.eval()


def test_round_trip_weights_metadata_and_outputs(tmp_path):
    cfg, model = _model()
    path = tmp_path / "m.safetensors"
    model.save(path)
    assert [p.name for p in tmp_path.iterdir()] == ["m.safetensors"]  # no temporary file left behind
    loaded = Model.load(path)
    assert not loaded.training
    assert loaded.metadata() == model.metadata() and loaded.classes == CLASSES and loaded.temperature == 1.5
    want = model.net.state_dict()
    got = loaded.net.state_dict()
    assert want.keys() == got.keys() and all(torch.equal(want[k], got[k]) for k in want)
    x = 100 + 30 * torch.randn(1, 3, 37, 29)
    with torch.no_grad():
        assert torch.equal(model(x), loaded(x))
    # read with the safetensors library directly: metadata are JSON strings (safetensors format docs)
    with safe_open(str(path), framework="pt") as f:
        raw = f.metadata()
        assert set(f.keys()) == set(want)
    assert json.loads(raw["fcnkit.config"]) == config_to_dict(cfg)
    assert json.loads(raw["fcnkit.classes"])["classes"][1]["name"] == "water"
    assert raw["fcnkit.kind"] == "encoder-decoder" and json.loads(raw["fcnkit.std"]) == STD
    assert json.loads(raw["fcnkit.padding"]) == {"factor": 2, "offset": 0}


def test_model_normalises_raw_pixels_per_band():
    """The model's forward pass equals the net run on (pixel − mean) / std per band."""
    _, model = _model()
    x = torch.arange(2 * 3 * 4 * 4, dtype=torch.float32).reshape(2, 3, 4, 4) * 40
    by_hand = (x - torch.tensor(MEAN).view(1, 3, 1, 1)) / torch.tensor(STD).view(1, 3, 1, 1)
    with torch.no_grad():
        torch.testing.assert_close(model(x), model.net(by_hand))


def test_files_of_the_older_kind_name_still_load(tmp_path):
    """Files written before the padding plan was stored, under the old kind name, load unchanged."""
    _, model = _model()
    values = {k: v for k, v in model.metadata().items() if k not in ("padding", "temperature")}
    path = tmp_path / "old.safetensors"
    write_model_file(path, model.net.state_dict(), {**values, "kind": "segnet"})
    loaded = Model.load(path)
    assert loaded.kind == "encoder-decoder" and loaded.plan == model.plan and loaded.temperature == 1.0
    x = 100 + 30 * torch.randn(1, 3, 21, 19)
    with torch.no_grad():
        assert torch.equal(model(x), loaded(x))


def _expect(path, match):
    with pytest.raises(ModelFileError, match=match) as e:
        Model.load(path)
    assert str(path) in str(e.value) and "\n" not in str(e.value)


def test_missing_and_not_safetensors(tmp_path):
    _expect(tmp_path / "none.safetensors", "no such model file")
    junk = tmp_path / "junk.safetensors"
    junk.write_bytes(b"\x00\x01 this is not a model")
    _expect(junk, "not a safetensors model file")


def test_pickle_is_never_unpickled(tmp_path):
    marker = tmp_path / "ran"

    class Payload:
        def __reduce__(self):
            return (Path.touch, (marker,))

    bad = tmp_path / "model.safetensors"
    bad.write_bytes(pickle.dumps(Payload()))
    _expect(bad, "not a safetensors model file")
    assert not marker.exists()


def _strings(model):
    return {f"fcnkit.{k}": v if k in ("kind", "version") else json.dumps(v) for k, v in model.metadata().items()}


def test_missing_or_bad_metadata(tmp_path):
    _, model = _model()
    tensors = {k: v.contiguous() for k, v in model.net.state_dict().items()}
    strings = _strings(model)
    cases = {
        "nometa": ({}, "metadata key 'fcnkit.kind' is missing"),
        "nojson": ({**strings, "fcnkit.config": "{not json"}, "'fcnkit.config' is not valid JSON"),
        "badcfg": ({**strings, "fcnkit.config": json.dumps({"model": {"widths": "wide"}})}, "model.widths"),
        "badstd": ({**strings, "fcnkit.std": "[1.0, 0.0, 2.0]"}, "positive numbers"),
        "kind": ({**strings, "fcnkit.kind": "mystery"}, "unknown model kind 'mystery'"),
        "classes": ({**strings, "fcnkit.classes": json.dumps({"classes": []})}, "fcnkit.classes"),
        "bands": ({**strings, "fcnkit.mean": "[1.0]", "fcnkit.std": "[1.0]"}, "1 bands"),
        "padding": ({**strings, "fcnkit.padding": json.dumps({"factor": 4, "offset": 0})}, "padding"),
        "temperature": ({**strings, "fcnkit.temperature": "-1"}, "fcnkit.temperature"),
        "nested": ({**strings, "fcnkit.extra": "[" * 100000 + "]" * 100000}, "not valid JSON"),
    }
    for name, (metadata, match) in cases.items():
        path = tmp_path / f"{name}.safetensors"
        save_file(tensors, str(path), metadata=metadata or None)
        _expect(path, match)


def test_weights_not_matching_config(tmp_path):
    cfg, model = _model()
    wider = replace_section(cfg, "model", widths=[8, 24])
    path = tmp_path / "m.safetensors"
    write_model_file(path, model.net.state_dict(), {**model.metadata(), "config": config_to_dict(wider)})
    _expect(path, "weights do not match the net its metadata describes: wrong shape")
    sd = {k: v.contiguous() for k, v in model.net.state_dict().items()}
    sd.pop(next(iter(sd)))
    save_file(sd, str(path), metadata=_strings(model))
    _expect(path, "missing")


def test_weights_must_be_finite_floats(tmp_path):
    """A NaN or infinite weight, or weights stored as integers, are refused when the file is read."""
    _, model = _model()
    for name, edit in (("nan", lambda t: t.fill_(float("nan"))), ("inf", lambda t: t.fill_(float("inf"))),
                       ("int8", lambda t: t.to(torch.int8))):
        sd = {k: v.clone() for k, v in model.net.state_dict().items()}
        key = "body.decoder.head.0.weight" if "body.decoder.head.0.weight" in sd else next(iter(sd))
        sd[key] = edit(sd[key])
        path = tmp_path / f"{name}.safetensors"
        save_file({k: v.contiguous() for k, v in sd.items()}, str(path), metadata=_strings(model))
        _expect(path, "int8" if name == "int8" else "NaN or infinite")


def test_failed_write_leaves_nothing(tmp_path, monkeypatch):
    _, model = _model()
    path = tmp_path / "m.safetensors"
    model.save(path)
    before = path.read_bytes()

    def half_written(tensors, filename, metadata=None):
        Path(filename).write_bytes(b"partial")
        raise OSError("disk full")

    monkeypatch.setattr("fcnkit.modelfile.save_file", half_written)
    with pytest.raises(OSError, match="disk full"):
        model.save(path)
    assert path.read_bytes() == before and [p.name for p in tmp_path.iterdir()] == ["m.safetensors"]
