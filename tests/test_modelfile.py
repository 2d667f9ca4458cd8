"""Model files: safetensors round trip, metadata read back by the safetensors library itself, errors."""

import json
import pickle
from pathlib import Path

import numpy as np
import pytest
import torch
from safetensors import safe_open
from safetensors.torch import save_file

from fcnkit import ModelFileError, load_config, load_model, save_model
from fcnkit.config import config_to_dict, replace_section
from fcnkit.data.classes import ClassInfo, ClassTable
from fcnkit.modelfile import ModelMeta, normalise
from fcnkit.nets import build_model

ROOT = Path(__file__).resolve().parents[1]
CLASSES = ClassTable((ClassInfo(0, "ground", (10, 20, 30)), ClassInfo(1, "water", (0, 0, 200)),
                      ClassInfo(2, "roof", (200, 0, 0))))


def _model_and_meta():
    cfg = load_config(ROOT / "configs" / "tiny.toml")
    torch.manual_seed(1)
    model = build_model(cfg)
    with torch.no_grad():  # non-default batch-norm statistics, so buffers are checked too
        for m in model.modules():
            if isinstance(m, torch.nn.BatchNorm2d):
                m.running_mean.uniform_(-1, 1)
                m.running_var.uniform_(0.5, 2)
    meta = ModelMeta("segnet", config_to_dict(cfg), CLASSES, [100.0, 110.5, 90.0], [30.0, 31.0, 29.5], "0.1.0",
                     {"epoch": 3})
    return cfg, model, meta


def test_round_trip_weights_metadata_and_outputs(tmp_path):
    cfg, model, meta = _model_and_meta()
    path = tmp_path / "m.safetensors"
    save_model(path, model, meta)
    assert [p.name for p in tmp_path.iterdir()] == ["m.safetensors"]  # no temporary file left behind
    loaded = load_model(path)
    assert not loaded.model.training
    assert loaded.meta == meta
    want = model.state_dict()
    got = loaded.model.state_dict()
    assert want.keys() == got.keys() and all(torch.equal(want[k], got[k]) for k in want)
    x = torch.randn(1, 3, 37, 29)
    model.eval()
    with torch.no_grad():
        assert torch.equal(model(x), loaded.model(x))
    # read with the safetensors library directly: metadata are JSON strings (safetensors format docs)
    with safe_open(str(path), framework="pt") as f:
        raw = f.metadata()
        assert set(f.keys()) == set(want)
    assert json.loads(raw["fcnkit.config"]) == config_to_dict(cfg)
    assert json.loads(raw["fcnkit.classes"])["classes"][1]["name"] == "water"
    assert raw["fcnkit.kind"] == "segnet" and json.loads(raw["fcnkit.std"]) == [30.0, 31.0, 29.5]


def test_normalise_per_band():
    _, _, meta = _model_and_meta()
    image = np.arange(2 * 3 * 3, dtype=np.uint16).reshape(2, 3, 3) * 40
    out = normalise(image, meta)
    assert out.dtype == np.float32
    np.testing.assert_allclose(out[..., 1], (image[..., 1] - 110.5) / 31.0, rtol=1e-6)


def _expect(path, match):
    with pytest.raises(ModelFileError, match=match) as e:
        load_model(path)
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


def test_missing_or_bad_metadata(tmp_path):
    _, model, meta = _model_and_meta()
    tensors = {k: v.contiguous() for k, v in model.state_dict().items()}
    strings = meta.to_strings()
    cases = {
        "nometa": ({}, "metadata key 'fcnkit.kind' is missing"),
        "nojson": ({**strings, "fcnkit.config": "{not json"}, "'fcnkit.config' is not valid JSON"),
        "badcfg": ({**strings, "fcnkit.config": json.dumps({"model": {"widths": "wide"}})}, "model.widths"),
        "badstd": ({**strings, "fcnkit.std": "[1.0, 0.0, 2.0]"}, "positive numbers"),
        "kind": ({**strings, "fcnkit.kind": "mystery"}, "unknown model kind 'mystery'"),
        "classes": ({**strings, "fcnkit.classes": json.dumps({"classes": []})}, "fcnkit.classes"),
        "bands": ({**strings, "fcnkit.mean": "[1.0]", "fcnkit.std": "[1.0]"}, "1 bands"),
    }
    for name, (metadata, match) in cases.items():
        path = tmp_path / f"{name}.safetensors"
        save_file(tensors, str(path), metadata=metadata or None)
        _expect(path, match)


def test_weights_not_matching_config(tmp_path):
    cfg, model, meta = _model_and_meta()
    wider = replace_section(cfg, "model", widths=[8, 24])
    path = tmp_path / "m.safetensors"
    save_model(path, model, ModelMeta("segnet", config_to_dict(wider), CLASSES, meta.mean, meta.std, "0.1.0"))
    _expect(path, "weights do not match the config in its metadata: wrong shape")
    sd = {k: v.contiguous() for k, v in model.state_dict().items()}
    sd.pop(next(iter(sd)))
    save_file(sd, str(path), metadata=meta.to_strings())
    _expect(path, "missing")


def test_failed_write_leaves_nothing(tmp_path, monkeypatch):
    _, model, meta = _model_and_meta()
    path = tmp_path / "m.safetensors"
    save_model(path, model, meta)
    before = path.read_bytes()

    def half_written(tensors, filename, metadata=None):
        Path(filename).write_bytes(b"partial")
        raise OSError("disk full")

    monkeypatch.setattr("fcnkit.modelfile.save_file", half_written)
    with pytest.raises(OSError, match="disk full"):
        save_model(path, model, meta)
    assert path.read_bytes() == before and [p.name for p in tmp_path.iterdir()] == ["m.safetensors"]
