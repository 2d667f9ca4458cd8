"""Property-based fuzzing of everything that reads user files: on random bytes, and on valid files with bytes
flipped, inserted or cut off, the readers either succeed or raise an FcnkitError subclass — never another
exception (which the CLI would show as a traceback)."""

from __future__ import annotations

import io
import json
import warnings
from pathlib import Path

import numpy as np
import pytest
import tifffile
from bad_inputs import CLASSES_TOML, TINY_CONFIG, scene, write_model
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from PIL import Image

from fcnkit.config import config_from_dict, load_config
from fcnkit.data.classes import ClassTable, load_classes
from fcnkit.data.imageio import image_shape, read_image, read_mask
from fcnkit.data.raster import open_raster
from fcnkit.errors import FcnkitError
from fcnkit.model import Model

FUZZ = settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
LIMIT = 1 << 20  # pixel limit for fuzzed images: a flipped header byte must not make the test allocate gigabytes


def _bytes_of(save) -> bytes:
    buf = io.BytesIO()
    save(buf)
    return buf.getvalue()


IMAGE, MASK = scene(1, 32)
TABLE = ClassTable.from_dict(__import__("tomllib").loads(CLASSES_TOML))
SEEDS = {
    ".png": _bytes_of(lambda b: Image.fromarray(IMAGE).save(b, format="PNG")),
    ".jpg": _bytes_of(lambda b: Image.fromarray(IMAGE).save(b, format="JPEG")),
    ".tif": _bytes_of(lambda b: tifffile.imwrite(b, IMAGE, tile=(16, 16))),
    "-strips.tif": _bytes_of(lambda b: tifffile.imwrite(b, np.dstack([IMAGE, IMAGE[..., :1]]).astype(np.uint16),
                                                          photometric="minisblack", planarconfig="separate",
                                                          rowsperstrip=8)),
    "-mask.png": _bytes_of(lambda b: Image.fromarray(MASK).save(b, format="PNG")),
}


@st.composite
def mutated(draw, seed: bytes) -> bytes:
    """``seed`` with a few bytes overwritten, a run inserted or deleted, and maybe cut short."""
    data = bytearray(seed)
    for _ in range(draw(st.integers(0, 6))):
        i = draw(st.integers(0, len(data) - 1))
        data[i] = draw(st.integers(0, 255))
    if draw(st.booleans()):
        i = draw(st.integers(0, len(data)))
        data[i:i] = draw(st.binary(min_size=1, max_size=16))
    if draw(st.booleans()):
        i = draw(st.integers(0, len(data) - 1))
        del data[i:i + draw(st.integers(1, 64))]
    if draw(st.booleans()):
        data = data[:draw(st.integers(0, len(data)))]
    return bytes(data)


def _only_fcnkit_errors(fn, *args, **kwargs) -> None:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # warnings are not failures here; the battery checks stderr
        try:
            result = fn(*args, **kwargs)
        except FcnkitError:
            return
    if hasattr(result, "close"):
        result.close()


def _read_all(path: Path) -> None:
    """Every way a command reads an image: header only, whole decode, mask decode, region reader."""
    _only_fcnkit_errors(image_shape, path)
    _only_fcnkit_errors(read_image, path, max_pixels=LIMIT)
    _only_fcnkit_errors(read_mask, path, TABLE, max_pixels=LIMIT)
    try:
        raster = open_raster(path, LIMIT)
    except FcnkitError:
        return
    try:
        h, w, _ = raster.shape
        _only_fcnkit_errors(raster.read, 0, h, 0, w)
    finally:
        raster.close()


@pytest.mark.parametrize("suffix", [".png", ".jpg", ".tif"])
@FUZZ
@given(data=st.binary(max_size=2048))
def test_image_readers_on_random_bytes(tmp_path, suffix, data):
    path = tmp_path / f"x{suffix}"
    path.write_bytes(data)
    _read_all(path)


@pytest.mark.parametrize("kind", list(SEEDS))
@FUZZ
@given(st.data())
def test_image_readers_on_damaged_files(tmp_path, kind, data):
    path = tmp_path / f"x{Path(kind).suffix}"
    path.write_bytes(data.draw(mutated(SEEDS[kind])))
    _read_all(path)


CONFIG_SEED = TINY_CONFIG.encode()


@FUZZ
@given(st.one_of(st.binary(max_size=512), mutated(CONFIG_SEED), mutated(CLASSES_TOML.encode())))
def test_config_and_class_table_loaders_on_bad_bytes(tmp_path, data):
    path = tmp_path / "x.toml"
    path.write_bytes(data)
    _only_fcnkit_errors(load_config, path)
    _only_fcnkit_errors(load_classes, path)


SCALARS = st.none() | st.booleans() | st.integers(-300, 300) | st.floats(allow_nan=True) | st.text(max_size=8)
JSON = st.recursive(SCALARS, lambda inner: st.lists(inner, max_size=4) | st.dictionaries(
                        st.sampled_from(["model", "train", "widths", "bands", "classes", "id", "name", "color",
                                         "ignore", "skips", "fusion", "x"]), inner, max_size=4), max_leaves=12)


@FUZZ
@given(JSON)
def test_config_and_class_table_validators_on_any_json(value):
    """Model-file metadata arrives as JSON: any shape of it must give a one-line error, not a crash."""
    _only_fcnkit_errors(config_from_dict, value)
    _only_fcnkit_errors(config_from_dict, {"model": value})
    _only_fcnkit_errors(ClassTable.from_dict, value)


@pytest.fixture(scope="module")
def model_bytes(tmp_path_factory) -> bytes:
    return write_model(tmp_path_factory.mktemp("fuzz") / "m.safetensors").read_bytes()


@FUZZ
@given(st.data())
def test_model_loader_on_damaged_model_files(tmp_path, model_bytes, data):
    path = tmp_path / "m.safetensors"
    if data.draw(st.booleans()):  # damage the JSON header (metadata, tensor names, shapes, offsets)
        n = int.from_bytes(model_bytes[:8], "little")
        header = data.draw(mutated(model_bytes[8:8 + n]))
        blob = len(header).to_bytes(8, "little") + header + model_bytes[8 + n:]
    else:
        blob = data.draw(st.one_of(st.binary(max_size=256), mutated(model_bytes)))
    path.write_bytes(blob)
    _only_fcnkit_errors(Model.load, path)


@FUZZ
@given(key=st.sampled_from(["kind", "config", "classes", "mean", "std", "version", "extra"]), value=JSON)
def test_model_loader_on_any_metadata_value(tmp_path, model_bytes, key, value):
    """A well-formed file whose metadata entry holds any JSON value."""
    from safetensors import safe_open
    from safetensors.torch import save_file

    src = tmp_path / "src.safetensors"
    src.write_bytes(model_bytes)
    with safe_open(str(src), framework="pt") as f:
        meta = dict(f.metadata())
        tensors = {k: f.get_tensor(k) for k in f.keys()}  # noqa: SIM118
    meta["fcnkit." + key] = json.dumps(value) if key != "kind" else str(value)
    save_file(tensors, str(tmp_path / "m.safetensors"), metadata=meta)
    _only_fcnkit_errors(Model.load, tmp_path / "m.safetensors")
