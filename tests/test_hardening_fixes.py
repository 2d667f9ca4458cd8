"""Regression tests for the faults the hardening battery found in other modules, and for the memory check
(fcnkit.memory) that refuses tile and batch settings which would not fit."""

from __future__ import annotations

import warnings

import numpy as np
import pytest
import tifffile
import torch

from fcnkit.atomic import write_text_atomic
from fcnkit.config import config_from_dict
from fcnkit.data.imageio import read_image
from fcnkit.data.raster import open_raster
from fcnkit.errors import ConfigError, DataError, FcnkitError
from fcnkit.inference.segment import find_images, segment_image
from fcnkit.memory import (
    available_memory,
    check_forward_memory,
    check_training_memory,
    forward_bytes,
    parse_size,
    peak_bytes,
    training_bytes,
)
from fcnkit.nets import build_model, layer_graph


def _tiff(path, array, **kw):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        tifffile.imwrite(path, array, **kw)
    return path


def test_readers_refuse_an_image_without_pixels(tmp_path):
    path = _tiff(tmp_path / "empty.tif", np.zeros((0, 0, 3), np.uint8), photometric="minisblack",
                 planarconfig="contig")
    with pytest.raises(DataError, match="empty.tif: .*(no pixels|not a readable TIFF)"):  # was ZeroDivisionError
        read_image(path)
    with pytest.raises(DataError, match="empty.tif: .*(no pixels|not a readable TIFF)"):
        open_raster(path, None)


@pytest.mark.parametrize("value", [np.nan, np.inf, -np.inf])
def test_readers_refuse_nan_and_infinite_pixels(tmp_path, value):
    image = np.ones((20, 30, 2), np.float32)
    image[7, 11, 1] = value
    path = _tiff(tmp_path / "f.tif", image, photometric="minisblack", planarconfig="contig")
    with pytest.raises(DataError, match="f.tif: 1 NaN or infinite"):  # training used to blame train.lr
        read_image(path)
    raster = open_raster(path, None)
    try:
        raster.read(0, 5, 0, 30)  # rows without the bad pixel read fine
        with pytest.raises(DataError, match="f.tif: 1 NaN or infinite pixel values in rows 0..19"):
            raster.read(0, 20, 0, 30)  # segment/evaluate used to map it silently
    finally:
        raster.close()


def test_region_reader_refuses_complex_pixels(tmp_path):
    path = _tiff(tmp_path / "c.tif", np.ones((8, 8), np.complex64))
    with pytest.raises(DataError, match="c.tif: pixel type complex64"):
        open_raster(path, None)


def test_a_damaged_tiff_gives_one_error_and_no_log_line(tmp_path, capfd):
    path = tmp_path / "g.tif"
    path.write_bytes(b"II*\x00" + bytes(range(256)) * 2)
    with warnings.catch_warnings():
        warnings.simplefilter("error", ResourceWarning)  # the reader used to leave the file open
        with pytest.raises(DataError, match="g.tif"):
            open_raster(path, None)
        with pytest.raises(DataError, match="g.tif"):
            read_image(path)
    assert capfd.readouterr().err == ""  # tifffile's own log line used to reach stderr


def test_segment_refuses_a_folder_without_images_and_a_negative_pixel_size(tmp_path):
    (tmp_path / "empty").mkdir()
    with pytest.raises(DataError, match="empty: no image files"):  # used to do nothing and exit 0
        find_images([tmp_path / "empty"])
    from model_strategies import as_model

    net = as_model(build_model(config_from_dict({"model": {"widths": [4], "blocks": [1], "bands": 3, "num_classes": 2,
                                                           "min_size": 1}})))
    image = _tiff(tmp_path / "i.tif", np.zeros((16, 16, 3), np.uint8))
    with pytest.raises(ConfigError, match="pixel_size: -0.5 is not a positive"):  # used to write negative areas
        segment_image(net, image, tmp_path / "out", pixel_size=-0.5, progress=False)
    assert not (tmp_path / "out").exists()


def test_atomic_output_names_the_final_file_when_its_folder_is_missing(tmp_path):
    with pytest.raises(FcnkitError, match=r"x/y.txt: cannot write here, folder .*x does not exist"):
        write_text_atomic(tmp_path / "x" / "y.txt", "z")  # used to name the hidden .partial file


# --- the memory check --------------------------------------------------------------------------------------------

NETS = {
    "chain": {"bands": 3, "num_classes": 2, "widths": [8, 16, 32], "blocks": [1, 1, 1], "min_size": 4},
    "sum": {"bands": 3, "num_classes": 2, "widths": [8, 16, 32], "fusion": "sum", "min_size": 4},
    "unet": {"bands": 3, "num_classes": 2, "widths": [8, 16, 32], "fusion": "concat", "min_size": 4},
}


@pytest.mark.parametrize("name", NETS)
def test_forward_estimate_lies_between_the_largest_activation_and_all_of_them(name):
    """Bracket the estimate with sizes measured on the real module by forward hooks: the peak is at least
    the largest single activation (plus its input) and at most every activation kept at once."""
    net = build_model(config_from_dict({"model": {**NETS[name], "num_classes": 3}})).eval()
    graph = layer_graph(net)
    sizes = []
    for m in net.modules():
        if not list(m.children()):
            m.register_forward_hook(lambda mod, i, o: sizes.append(o.numel() * o.element_size()))
    batch, h, w = 2, 40, 56
    with torch.no_grad():
        net(torch.zeros(batch, 3, h, w))
    est = forward_bytes(graph, h, w, batch, 3)
    assert max(sizes) <= est <= sum(sizes) + batch * 3 * h * w * 4


def test_forward_estimate_scales_with_batch_and_tile_area():
    graph = layer_graph(build_model(config_from_dict({"model": NETS["unet"]})))
    one = forward_bytes(graph, 64, 64, 1, 3)
    assert forward_bytes(graph, 64, 64, 4, 3) == 4 * one
    assert forward_bytes(graph, 128, 128, 1, 3) == 4 * one  # sides are multiples of every stride here


def test_a_setting_beyond_memory_is_refused_with_a_batch_or_tile_that_fits():
    graph = layer_graph(build_model(config_from_dict({"model": NETS["sum"]})))
    one = peak_bytes(graph, 256, 256, 1, 3)
    with pytest.raises(ConfigError, match=r"tile/batch: 8 tiles of 256x256 px .* use batch 3 \(--batch 3\)"):
        check_forward_memory(graph, 256, 256, 8, 3, factor=4, available=3 * one + 1)
    with pytest.raises(ConfigError, match=r"use tile 128 with batch 1 \(--tile 128 --batch 1\)"):
        check_forward_memory(graph, 256, 256, 8, 3, factor=4, available=one // 2)
    assert check_forward_memory(graph, 256, 256, 8, 3, available=8 * one) == peak_bytes(graph, 256, 256, 8, 3)


@pytest.mark.parametrize("name", NETS)
def test_training_estimate_covers_the_tensors_autograd_keeps(name):
    """Reference: the distinct tensors the real module's layers output in a training-mode forward pass (forward
    hooks, deduplicated by storage, as in-place ReLU reuses its input's): all of them stay alive for the
    backward pass, so the estimate's activation part must cover them, within the factor its rule allows."""
    net = build_model(config_from_dict({"model": {**NETS[name], "num_classes": 3}})).train()
    graph = layer_graph(net)
    seen: dict[int, int] = {}

    def keep(mod: torch.nn.Module, inputs: object, out: torch.Tensor) -> None:
        seen.setdefault(out.data_ptr(), out.numel() * out.element_size())

    for m in net.modules():
        if not list(m.children()):
            m.register_forward_hook(keep)
    batch, patch = 2, 48
    net(torch.zeros(batch, 3, patch, patch))
    kept = sum(seen.values()) + batch * 3 * patch * patch * 4  # the input too
    activations = training_bytes(graph, patch, batch, 3, 0)
    assert kept <= activations <= 3 * kept
    params = sum(p.numel() for p in net.parameters())
    assert training_bytes(graph, patch, batch, 3, params) == activations + 16 * params  # weights, grads, 2 moments
    assert training_bytes(graph, patch, 2 * batch, 3, 0) == 2 * activations


def test_a_training_batch_beyond_memory_is_refused_with_one_that_fits():
    graph = layer_graph(build_model(config_from_dict({"model": NETS["sum"]})))
    one = training_bytes(graph, 128, 1, 3, 1000)
    with pytest.raises(ConfigError, match=r"train.batch: 8 patches of 128x128 px .* use train.batch = 2"):
        check_training_memory(graph, 128, 8, 3, 1000, available=2 * one + 1)
    with pytest.raises(ConfigError, match=r"use a smaller train.patch"):
        check_training_memory(graph, 128, 8, 3, 1000, available=one // 2)
    assert check_training_memory(graph, 128, 8, 3, 1000, available=10 * one) == training_bytes(graph, 128, 8, 3, 1000)
    with pytest.raises(ConfigError, match=r"need about \d+ KiB of memory .* more than the 16 KiB available"):
        check_training_memory(graph, 16, 2, 3, 1000, available=16 * 2**10)  # regression: said "0 MiB"


def test_available_memory_reads_meminfo_and_honours_the_cap(monkeypatch):
    monkeypatch.delenv("FCNKIT_MAX_MEMORY", raising=False)
    free = available_memory()
    with open("/proc/meminfo") as f:  # the kernel's own figure (proc(5): MemAvailable, in kB)
        kb = next(int(line.split()[1]) for line in f if line.startswith("MemAvailable:"))
    assert abs(free - kb * 1024) < 0.2 * kb * 1024
    monkeypatch.setenv("FCNKIT_MAX_MEMORY", "64M")
    assert available_memory() <= 64 * 2**20
    assert parse_size("1.5G") == 3 * 2**29 and parse_size("512k") == 512 * 1024 and parse_size("100") == 100
    with pytest.raises(ConfigError, match="FCNKIT_MAX_MEMORY: 'lots' is not a size"):
        parse_size("lots")


def test_tiled_inference_refuses_before_reading_any_tile(monkeypatch):
    from model_strategies import as_model

    from fcnkit.inference.scan import predict_scores

    net = as_model(build_model(config_from_dict({"model": NETS["chain"]})))
    monkeypatch.setenv("FCNKIT_MAX_MEMORY", "1M")
    with pytest.raises(ConfigError, match="more than the 1 MiB available"):
        predict_scores(net, np.zeros((300, 300, 3), np.float32), tile=256, batch=4)


def test_decoded_images_are_writable_so_torch_does_not_warn(tmp_path):
    from PIL import Image

    Image.fromarray(np.zeros((4, 5, 3), np.uint8)).save(tmp_path / "a.png")
    image = read_image(tmp_path / "a.png")
    assert image.flags.writeable  # a read-only array made every training run print a torch UserWarning
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        torch.from_numpy(image)


def test_ctrl_c_without_a_message_still_says_interrupted(monkeypatch, capsys):
    import fcnkit.cli as cli

    def stop(args):
        raise KeyboardInterrupt

    monkeypatch.setattr(cli, "_describe", stop)
    assert cli.main(["describe", "x.toml"]) == 130
    assert capsys.readouterr().err == "fcnkit describe: interrupted\n"  # was "fcnkit describe: " (empty)


def test_a_resume_point_without_its_config_entries_is_refused_in_one_line(tmp_path):
    from fcnkit import runstate

    runstate.save_resume(tmp_path / "resume.pt", {"model": {}})  # right format tag, nothing else
    with pytest.raises(FcnkitError, match="resume.pt: resume point belongs to a different config"):
        runstate.load_resume(tmp_path / "resume.pt", {"model": {}, "train": {}}, "")  # was KeyError


def test_convert_checks_the_save_path_before_converting(tmp_path, monkeypatch):
    from bad_inputs import run_cli

    import fcnkit.convert as convert

    def never(*args, **kwargs):
        raise AssertionError("the classifier was loaded before the output path was checked")

    monkeypatch.setattr(convert, "load_classifier", never)
    code, _, err = run_cli(["convert", "mobilenet_v3_small", "--native", 64, "--random-weights", "--out",
                            tmp_path / "nowhere" / "m.safetensors"])
    assert code == 2 and "cannot write here" in err and "nowhere" in err, err  # was after the conversion


def test_a_read_only_folder_is_refused_before_any_work_even_for_root(tmp_path):
    """os.access says yes to root on any folder; the destination check now creates a probe file instead."""
    from bad_inputs import Workspace

    from fcnkit.destinations import check_outputs

    folder = Workspace.read_only(Workspace.__new__(Workspace), tmp_path)  # only uses its folder argument
    with pytest.raises(FcnkitError, match="m.onnx: cannot write here"):
        check_outputs([folder / "m.onnx"])
    with pytest.raises(FcnkitError, match="y.txt: cannot write here"):  # atomic output names the final file
        write_text_atomic(folder / "y.txt", "z")
    check_outputs([tmp_path / "fine.onnx"])
    assert not [p for p in tmp_path.iterdir() if ".partial" in p.name]  # the probe is removed


def test_cli_commands_work_after_their_submodules_were_imported(tmp_path):
    """`from fcnkit import evaluate` returns the submodule once fcnkit.evaluate has been imported (lazy API,
    PEP 562): the CLI imports each function from its own module, so commands run in any order in one process."""
    from bad_inputs import ROOT, run_cli

    import fcnkit.describe  # noqa: F401 - the imports that used to shadow the functions
    import fcnkit.evaluate  # noqa: F401
    import fcnkit.train  # noqa: F401

    code, out, err = run_cli(["describe", ROOT / "fcnkit" / "configs" / "tiny.toml"])
    assert code == 0 and "receptive field" in out, err
    code, _, err = run_cli(["evaluate", tmp_path / "none.safetensors", "--data", tmp_path, "--quiet"])
    assert code == 2 and "no such model file" in err, err  # was TypeError: 'module' object is not callable
