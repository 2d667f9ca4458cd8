"""Killed runs: SIGKILL at random points of training and of tiled inference, and Ctrl-C (SIGINT) in both.

Training killed anywhere and continued with ``--resume`` must end bit-identical to an uninterrupted run
(single thread, torch.use_deterministic_algorithms, fixed seeds); tiled inference killed anywhere must leave
no output under a final name that differs from a complete run's, and a rerun must succeed. The kill points
are drawn from a seeded generator, as fractions of the uninterrupted run's duration, so the test is
reproducible in what it asks even though timing on a shared machine decides where each kill lands.

Each run is a process forked from a multiprocessing fork server that has imported torch and fcnkit once
(no parallel region has run in it, so forking is safe), so a trial costs the run itself, not interpreter
and torch start-up.
"""

from __future__ import annotations

import multiprocessing
import os
import signal
import sys
import time
from pathlib import Path

import numpy as np
import pytest
import torch
from bad_inputs import scene, write_dataset, write_model, write_png, write_tiff
from safetensors.torch import load_file

TRIALS = 5
CONFIG = """\
[model]
bands = 3
classes = 3
widths = [8, 16]
blocks = [1, 1]
head = [16]
dropout = 0.1
fusion = "sum"
min_size = 8

[train]
epochs = 3
batch = 2
patch = 32
patches_per_epoch = 12
val_fraction = 0.34
threads = 1
lr = 0.01
warmup = 1
"""


def _context() -> multiprocessing.context.BaseContext:
    ctx = multiprocessing.get_context("forkserver")
    ctx.set_forkserver_preload(["torch", "fcnkit.cli", "fcnkit.train", "fcnkit.tiling", "fcnkit.outputs"])
    return ctx


def _child(argv: list[str], log: str) -> None:
    """Run the CLI with stderr going to ``log`` (stdout to ``log``.out); exit with its status."""
    os.dup2(os.open(log + ".out", os.O_WRONLY | os.O_CREAT | os.O_TRUNC), 1)
    os.dup2(os.open(log, os.O_WRONLY | os.O_CREAT | os.O_TRUNC), 2)
    sys.stdout = open(1, "w", closefd=False)  # noqa: SIM115
    sys.stderr = open(2, "w", closefd=False)  # noqa: SIM115
    signal.signal(signal.SIGINT, signal.default_int_handler)
    torch.set_num_threads(1)
    torch.use_deterministic_algorithms(True)
    from fcnkit.cli import main

    code = main(argv)
    sys.stdout.flush()
    sys.stderr.flush()
    os._exit(code)


class Runner:
    def __init__(self, root: Path) -> None:
        self.ctx, self.root, self.count = _context(), root, 0

    def start(self, argv: list) -> tuple[multiprocessing.Process, Path]:
        self.count += 1
        log = self.root / f"log-{self.count}.txt"
        p = self.ctx.Process(target=_child, args=([str(a) for a in argv], str(log)))
        p.start()
        return p, log

    def run(self, argv: list, timeout: float = 300) -> tuple[int, str, float]:
        tic = time.perf_counter()
        p, log = self.start(argv)
        p.join(timeout)
        assert p.exitcode is not None, f"{argv} did not finish"
        return p.exitcode, log.read_text(), time.perf_counter() - tic


@pytest.fixture(scope="module")
def runner(tmp_path_factory) -> Runner:
    r = Runner(tmp_path_factory.mktemp("kills"))
    code, log, _ = r.run(["--version"])  # starts the fork server, so later timings are of the runs alone
    assert code == 0, log
    return r


def _kill_after(runner: Runner, argv: list, delay: float, sig: int, started: Path | None = None) -> tuple[int, str]:
    """Run ``argv`` and send ``sig`` ``delay`` seconds after it starts (or after ``started`` exists)."""
    p, log = runner.start(argv)
    while started is not None and p.exitcode is None and not list(started.parent.glob(started.name)):
        time.sleep(0.01)
    p.join(delay)
    if p.exitcode is None:
        os.kill(p.pid, sig)
    p.join(120)
    assert p.exitcode is not None
    return p.exitcode, log.read_text() if log.exists() else ""  # killed before it opened its log


# --- training ----------------------------------------------------------------------------------------------------

def _train_argv(root: Path, out: Path, resume: bool = False) -> list:
    return ["train", root / "cfg.toml", "--data", root / "data", "--out", out, "--quiet"] + (
        ["--resume"] if resume else [])


def _state(run: Path) -> tuple[dict, dict, list]:
    """Last weights and optimiser state (resume point), the best model's tensors, the metric history without
    the wall-clock columns."""
    last = torch.load(run / "resume.pt", map_location="cpu", weights_only=True)
    history = [{k: v for k, v in row.items() if k not in ("seconds", "pixels_per_s")}
               for row in last["progress"]["history"]]
    return last["model"], load_file(str(run / "model.safetensors")), history


def _assert_same(a: dict, b: dict) -> None:
    assert a.keys() == b.keys()
    for k in a:
        assert torch.equal(a[k], b[k]), k  # bit-identical, not merely close


@pytest.fixture(scope="module")
def training(runner):
    root = runner.root / "train"
    write_dataset(root / "data", count=3, size=40)
    (root / "cfg.toml").write_text(CONFIG)
    code, log, seconds = runner.run(_train_argv(root, root / "reference"))
    assert code == 0, log
    return root, _state(root / "reference"), seconds


def test_training_killed_at_random_points_resumes_bit_identical(runner, training):
    root, (ref_last, ref_best, ref_history), seconds = training
    rng = np.random.default_rng(2026)
    resumed = killed = 0
    for trial in range(TRIALS):
        out = root / f"kill-{trial}"
        code, log = _kill_after(runner, _train_argv(root, out), float(rng.uniform(0.1, 0.9)) * seconds,
                                signal.SIGKILL)
        assert code in (-signal.SIGKILL, 0), log
        killed += code == -signal.SIGKILL
        finals = {p.name for p in out.iterdir() if not p.name.startswith(".")} if out.exists() else set()
        assert finals <= {"resume.pt", "model.safetensors", "metrics.csv"}
        has_point = (out / "resume.pt").is_file()
        resumed += has_point
        code, log, _ = runner.run(_train_argv(root, out, resume=has_point))
        assert code == 0, log
        last, best, history = _state(out)
        _assert_same(last, ref_last)
        _assert_same(best, ref_best)
        assert history == ref_history
        assert not [p for p in out.iterdir() if ".partial" in p.name]
    assert killed >= TRIALS - 1, f"only {killed} of {TRIALS} kills landed before the run ended"
    assert resumed >= killed - 1  # the run folder holds a resume point from its first moment


def test_ctrl_c_in_training_writes_a_resume_point_and_exits_130(runner, training):
    root, (ref_last, ref_best, _), seconds = training
    out = root / "sigint"
    code, log = _kill_after(runner, _train_argv(root, out), 0.1 * seconds, signal.SIGINT, out / "resume.pt")
    if code == 0:
        pytest.skip("the run finished before the signal arrived (machine much faster than the estimate)")
    assert code == 130, log
    lines = log.strip().splitlines()
    assert len(lines) == 1 and "Traceback" not in log, log
    assert "resume point saved to" in lines[0] and str(out / "resume.pt") in lines[0]
    code, log, _ = runner.run(_train_argv(root, out, resume=True))
    assert code == 0, log
    last, best, _ = _state(out)
    _assert_same(last, ref_last)
    _assert_same(best, ref_best)


# --- tiled inference ----------------------------------------------------------------------------------------

@pytest.fixture(scope="module")
def mapping(runner):
    root = runner.root / "segment"
    root.mkdir()
    model = write_model(root / "model.safetensors")
    rng = np.random.default_rng(7)
    image = np.concatenate([np.concatenate([scene(int(rng.integers(1000)), 128)[0] for _ in range(3)], 1)
                            for _ in range(3)], 0)  # 384×384 RGB
    write_tiff(root / "inputs" / "field.tif", image)
    write_png(root / "inputs" / "plot.png", image[:200, :300])
    argv = ["segment", model, root / "inputs", "--tile", 48, "--batch", 2, "--quiet"]
    code, log, seconds = runner.run([*argv, "--out", root / "reference"])
    assert code == 0, log
    reference = {p.name: p.read_bytes() for p in (root / "reference").iterdir()}
    assert len(reference) >= 10
    return root, argv, reference, seconds


def _finals(out: Path) -> dict[str, bytes]:
    return {p.name: p.read_bytes() for p in out.iterdir() if p.is_file() and not p.name.startswith(".")} \
        if out.exists() else {}


def test_tiled_inference_killed_at_random_points_leaves_no_half_written_output(runner, mapping):
    root, argv, reference, seconds = mapping
    rng = np.random.default_rng(4)
    killed = 0
    for trial in range(TRIALS):
        out = root / f"kill-{trial}"
        code, log = _kill_after(runner, [*argv, "--out", out], float(rng.uniform(0.05, 0.95)) * seconds,
                                signal.SIGKILL)
        assert code in (-signal.SIGKILL, 0), log
        killed += code == -signal.SIGKILL
        for name, data in _finals(out).items():  # whatever has a final name is complete
            assert data == reference[name], name
        code, log, _ = runner.run([*argv, "--out", out])
        assert code == 0, log
        assert _finals(out) == reference
    assert killed >= TRIALS - 1, f"only {killed} of {TRIALS} kills landed before the run ended"


def test_ctrl_c_in_tiled_inference_exits_130_leaving_nothing_partial(runner, mapping):
    root, argv, reference, seconds = mapping
    out = root / "sigint"
    code, log = _kill_after(runner, [*argv, "--out", out], 0.05 * seconds, signal.SIGINT, out / ".fcnkit-work-*")
    if code == 0:
        pytest.skip("the run finished before the signal arrived (machine much faster than the estimate)")
    assert code == 130, log
    lines = log.strip().splitlines()
    assert len(lines) == 1 and "Traceback" not in log, log
    for name, data in _finals(out).items():
        assert data == reference[name], name
    hidden = [p.name for p in out.iterdir() if p.name.startswith(".")]
    assert not hidden, f"temporary files left after Ctrl-C: {hidden}"
