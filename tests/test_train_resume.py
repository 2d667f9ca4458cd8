"""Resumable runs: a run killed mid-epoch (SIGKILL) or stopped with Ctrl-C (SIGINT) and resumed ends with
weights bit-identical to an uninterrupted run (single thread, torch.use_deterministic_algorithms)."""

import signal
import subprocess
import sys
import textwrap
import time

import pytest
import torch
from safetensors import safe_open

from fcnkit.data.scenes import make_scenes

CONFIG = """
[model]
bands = 4
classes = 5
widths = [8, 16]
blocks = [1, 1]
head = [16]
dropout = 0.2            # dropout draws from the torch RNG, so its state must be restored too
fusion = "sum"
min_size = 16

[train]
epochs = 3
batch = 4
patch = 32
patches_per_epoch = 24
lr = 0.005
warmup = 1
val_fraction = 0.34
threads = 1
class_weights = "median"
dice = 0.5
"""
# Runs the CLI in a child process; the loss is wrapped to slow each step a little (numerically a no-op) and to
# drop a marker file during step MARK, so the test can interrupt the run at a known point mid-epoch.
CHILD = textwrap.dedent("""
    import importlib, pathlib, sys, time
    import torch
    torch.use_deterministic_algorithms(True)
    tr = importlib.import_module("fcnkit.train")
    real, calls, marker, mark = tr.segmentation_loss, [0], pathlib.Path(sys.argv[1]), int(sys.argv[2])
    def slow(*a, **k):
        calls[0] += 1
        if calls[0] == mark:
            marker.touch()
        time.sleep(0.03)
        return real(*a, **k)
    tr.segmentation_loss = slow
    from fcnkit.cli import main
    raise SystemExit(main(sys.argv[3:]))
""")
STEPS_PER_EPOCH = 6


@pytest.fixture(scope="module")
def setup(tmp_path_factory):
    root = tmp_path_factory.mktemp("resume")
    data = make_scenes(root / "data", count=3, size=48, seed=11)
    cfg = root / "cfg.toml"
    cfg.write_text(CONFIG)
    reference = root / "reference"
    _run(root, cfg, data, reference, mark=0).wait(timeout=300)
    return root, cfg, data, _weights(reference)


def _run(root, cfg, data, out, mark, resume=False):
    args = [sys.executable, "-c", CHILD, str(root / f"marker-{out.name}"), str(mark), "train", str(cfg),
            "--data", str(data), "--out", str(out), "--quiet"] + (["--resume"] if resume else [])
    return subprocess.Popen(args, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)


def _wait_for(path, proc, timeout=120):
    end = time.monotonic() + timeout
    while not path.exists():
        assert proc.poll() is None, proc.communicate()
        assert time.monotonic() < end
        time.sleep(0.01)


def _weights(run):
    """Last weights (from the resume point) and the best model's weights."""
    last = torch.load(run / "resume.pt", weights_only=True)
    with safe_open(str(run / "model.safetensors"), framework="pt") as f:
        best = {k: f.get_tensor(k) for k in f.keys()}  # noqa: SIM118
    return last["model"], best, last["progress"]["history"]


def _same(a, b):
    assert a.keys() == b.keys() and all(torch.equal(a[k], b[k]) for k in a)


@pytest.mark.parametrize("how", ["SIGKILL", "SIGINT"])
def test_interrupted_and_resumed_run_is_bit_identical(setup, how):
    root, cfg, data, (ref_last, ref_best, ref_history) = setup
    out = root / how
    mark = STEPS_PER_EPOCH + 3  # the middle of the second epoch
    proc = _run(root, cfg, data, out, mark)
    _wait_for(root / f"marker-{out.name}", proc)
    proc.send_signal(getattr(signal, how))
    _, err = proc.communicate(timeout=120)
    state = torch.load(out / "resume.pt", weights_only=True)["progress"]
    if how == "SIGKILL":
        assert proc.returncode == -signal.SIGKILL
        assert (state["epoch"], state["batch"]) == (1, 0)  # the last resume point: end of epoch 1
    else:  # Ctrl-C: one line, exit 130, a resume point written at the batch boundary mid-epoch
        assert proc.returncode == 130
        assert err.splitlines() == [f"fcnkit train: interrupted; resume point saved to {out / 'resume.pt'}, "
                                    "continue with --resume"]
        assert state["epoch"] == 1 and 0 < state["batch"] < STEPS_PER_EPOCH
    resumed = _run(root, cfg, data, out, mark=0, resume=True)
    _, err = resumed.communicate(timeout=300)
    assert resumed.returncode == 0, err
    last, best, history = _weights(out)
    _same(last, ref_last)
    _same(best, ref_best)
    drop = ("seconds", "pixels_per_s")  # wall-clock figures differ, every score must not (repr: NaN == NaN)
    assert [{k: repr(v) for k, v in r.items() if k not in drop} for r in history] == \
        [{k: repr(v) for k, v in r.items() if k not in drop} for r in ref_history]
