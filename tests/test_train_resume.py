"""Resumable runs: a run killed mid-epoch (SIGKILL) or stopped with Ctrl-C (SIGINT) and resumed ends with
weights bit-identical to an uninterrupted run (single thread, torch.use_deterministic_algorithms)."""

import signal
import subprocess
import sys
import textwrap
import time

import torch
from safetensors import safe_open
from tiny_train import tiny, write_toml

from fcnkit.data.scenes import make_scenes

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


def _run(root, cfg, data, out, mark, resume=False):
    args = [sys.executable, "-c", CHILD, str(root / "marker"), str(mark), "train", str(cfg),
            "--data", str(data), "--out", str(out), "--quiet"] + (["--resume"] if resume else [])
    return subprocess.Popen(args, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)


def _interrupt_at(root, proc, sig, timeout=300):
    """Wait for the child's marker (it is inside step MARK), send ``sig``, return stderr."""
    marker, end = root / "marker", time.monotonic() + timeout
    while not marker.exists():
        assert proc.poll() is None, proc.communicate()
        assert time.monotonic() < end
        time.sleep(0.01)
    marker.unlink()
    proc.send_signal(sig)
    return proc.communicate(timeout=timeout)[1]


def _progress(run):
    return torch.load(run / "resume.pt", weights_only=True)["progress"]


def _weights(run):
    """Last weights (from the resume point), the best model's weights, and the history."""
    last = torch.load(run / "resume.pt", weights_only=True)
    with safe_open(str(run / "model.safetensors"), framework="pt") as f:
        best = {k: f.get_tensor(k) for k in f.keys()}  # noqa: SIM118
    return last["model"], best, last["progress"]["history"]


def test_interrupted_and_resumed_run_is_bit_identical(tmp_path):
    data = make_scenes(tmp_path / "data", count=3, size=48, seed=11)
    cfg = tmp_path / "cfg.toml"
    # dropout draws from the torch RNG, so its state must be restored too
    write_toml(cfg, tiny(model={"dropout": 0.2}, train={"epochs": 3, "patches_per_epoch": 24}))
    reference, out = tmp_path / "reference", tmp_path / "run"
    assert _run(tmp_path, cfg, data, reference, mark=0).wait(timeout=300) == 0

    # Ctrl-C in the middle of epoch 2: one line, exit 130, a resume point at the batch boundary
    proc = _run(tmp_path, cfg, data, out, mark=STEPS_PER_EPOCH + 3)
    err = _interrupt_at(tmp_path, proc, signal.SIGINT)
    assert proc.returncode == 130
    assert err.splitlines() == [f"fcnkit train: interrupted; resume point saved to {out / 'resume.pt'}, "
                                "continue with --resume"]
    state = _progress(out)
    assert state["epoch"] == 1 and 0 < state["batch"] < STEPS_PER_EPOCH

    # resumed, then killed outright (SIGKILL) in the middle of epoch 3: the last resume point is epoch 2's end
    proc = _run(tmp_path, cfg, data, out, mark=STEPS_PER_EPOCH - state["batch"] + 3, resume=True)
    _interrupt_at(tmp_path, proc, signal.SIGKILL)
    assert proc.returncode == -signal.SIGKILL
    state = _progress(out)
    assert (state["epoch"], state["batch"]) == (2, 0)

    # resumed to the end: the same weights, bit for bit, and the same scores as the uninterrupted run
    proc = _run(tmp_path, cfg, data, out, mark=0, resume=True)
    assert proc.wait(timeout=300) == 0, proc.communicate()
    (last, best, history), (ref_last, ref_best, ref_history) = _weights(out), _weights(reference)
    for a, b in ((last, ref_last), (best, ref_best)):
        assert a.keys() == b.keys() and all(torch.equal(a[k], b[k]) for k in a)
    drop = ("seconds", "pixels_per_second")  # wall-clock figures differ, every score must not (repr: NaN == NaN)
    assert [{k: repr(v) for k, v in r.items() if k not in drop} for r in history] == \
        [{k: repr(v) for k, v in r.items() if k not in drop} for r in ref_history]
