"""Killed runs: SIGKILL at random points of training and of mapping (tiles and row streaming), and Ctrl-C
(SIGINT) and SIGTERM in training and mapping.

Training killed anywhere and continued with ``--resume`` must end bit-identical to an uninterrupted run
(single thread, torch.use_deterministic_algorithms, fixed seeds); tiled inference killed anywhere must leave
no output under a final name that differs from a complete run's, and a rerun must succeed.

The kill points are reproducible and independent of the machine's load: a seeded generator picks a step of the
run (a training batch's loss, a tile batch's forward pass) and a delay of up to a few tens of milliseconds
after it; when the run reaches that step it starts a timer that sends the signal to its own process, so the
signal lands mid-step, between steps, during validation or while files are written.

Each run is a process forked from a multiprocessing fork server that has imported torch and fcnkit once
(no parallel region has run in it, so forking is safe), so a trial costs the run itself, not interpreter
and torch start-up.
"""

from __future__ import annotations

import importlib
import multiprocessing
import os
import signal
import sys
import threading
from pathlib import Path

import numpy as np
import pytest
import torch
from bad_inputs import scene, tiny_config, write_dataset, write_model, write_png, write_tiff
from safetensors.torch import load_file

TRIALS = 5
CONFIG = tiny_config(model="widths = [8, 16]\nhead = [16]\ndropout = 0.1",
                     train="epochs = 3\npatch = 32\npatches_per_epoch = 12\nlr = 0.01\nwarmup = 1\naugment = true")


def _context() -> multiprocessing.context.BaseContext:
    ctx = multiprocessing.get_context("forkserver")
    ctx.set_forkserver_preload(["torch", "fcnkit.cli", "fcnkit.train", "fcnkit.inference.segment", "fcnkit.outputs"])
    return ctx


def _child(argv: list[str], log: str, hook: tuple | None) -> None:
    """Run the CLI with stderr going to ``log`` (stdout to ``log``.out); exit with its status.

    ``hook`` = (function path, n, delay, signal): the n-th call of that function starts a timer that sends
    ``signal`` to this process after ``delay`` seconds (waited for if the run ends sooner, so the signal always
    lands: on a fast machine the last steps can finish within the delay); n = 0 counts the calls into
    ``log``.calls instead."""
    os.dup2(os.open(log + ".out", os.O_WRONLY | os.O_CREAT | os.O_TRUNC), 1)
    os.dup2(os.open(log, os.O_WRONLY | os.O_CREAT | os.O_TRUNC), 2)
    sys.stdout = open(1, "w", closefd=False)  # noqa: SIM115
    sys.stderr = open(2, "w", closefd=False)  # noqa: SIM115
    signal.signal(signal.SIGINT, signal.default_int_handler)
    torch.set_num_threads(1)
    torch.use_deterministic_algorithms(True)
    calls = [0]
    timers: list[threading.Timer] = []
    if hook is not None:
        target, at, delay, sig = hook
        module_name, name = target.rsplit(".", 1)
        module = importlib.import_module(module_name)
        real = getattr(module, name)

        def counted(*args, **kwargs):
            calls[0] += 1
            if calls[0] == at:
                timers.append(threading.Timer(delay, os.kill, (os.getpid(), sig)))
                timers[-1].start()
            return real(*args, **kwargs)

        setattr(module, name, counted)
    from fcnkit.cli import main

    code = main(argv)
    for timer in timers:  # a run that ends before its signal is due still gets it: a kill after the last write
        timer.join()
    Path(log + ".calls").write_text(str(calls[0]))
    sys.stdout.flush()
    sys.stderr.flush()
    os._exit(code)


class Runner:
    def __init__(self, root: Path) -> None:
        self.ctx, self.root, self.count = _context(), root, 0

    def run(self, argv: list, hook: tuple | None = None, timeout: float = 300) -> tuple[int, str]:
        """Run ``fcnkit argv`` in a forked process; (exit status, stderr)."""
        self.count += 1
        log = self.root / f"log-{self.count}.txt"
        p = self.ctx.Process(target=_child, args=([str(a) for a in argv], str(log), hook))
        p.start()
        p.join(timeout)
        assert p.exitcode is not None, f"{argv} did not finish"
        self.last_calls = int(Path(f"{log}.calls").read_text()) if Path(f"{log}.calls").exists() else None
        return p.exitcode, log.read_text() if log.exists() else ""


@pytest.fixture(scope="module")
def runner(tmp_path_factory) -> Runner:
    return Runner(tmp_path_factory.mktemp("kills"))


# --- training ----------------------------------------------------------------------------------------------------

def _train_argv(root: Path, out: Path, resume: bool = False) -> list:
    return ["train", root / "cfg.toml", "--data", root / "data", "--out", out, "--quiet"] + (
        ["--resume"] if resume else [])


def _state(run: Path) -> tuple[dict, dict, list]:
    """Last weights and optimiser state (resume point), the best model's tensors, the metric history without
    the wall-clock columns."""
    last = torch.load(run / "resume.pt", map_location="cpu", weights_only=True)
    history = [{k: v for k, v in row.items() if k not in ("seconds", "pixels_per_second")}
               for row in last["progress"]["history"]]
    return last["model"], load_file(str(run / "model.safetensors")), history


def _assert_same(a: dict, b: dict) -> None:
    assert a.keys() == b.keys()
    for k in a:
        assert torch.equal(a[k], b[k]), k  # bit-identical, not merely close


STEP = "fcnkit.train.segmentation_loss"  # called once per training batch
TILES = "fcnkit.inference.tiles._scores"  # called once per batch of tiles
ROWS = "fcnkit.inference.rowstream.block_max"  # called by each max pooling, once per band of rows
WRITES = "fcnkit.atomic.partial_path"  # called as each output file starts being written


@pytest.fixture(scope="module")
def training(runner):
    root = runner.root / "train"
    write_dataset(root / "data", count=3, size=40)
    (root / "cfg.toml").write_text(CONFIG)
    code, log = runner.run(_train_argv(root, root / "reference"), (STEP, 0, 0.0, 0))
    assert code == 0, log
    return root, _state(root / "reference"), runner.last_calls


def test_training_killed_at_random_points_resumes_bit_identical(runner, training):
    root, (ref_last, ref_best, ref_history), steps = training
    rng = np.random.default_rng(2026)
    for trial in range(TRIALS):
        out = root / f"kill-{trial}"
        hook = (STEP, int(rng.integers(1, steps + 1)), float(rng.uniform(0, 0.05)), signal.SIGKILL)
        code, log = runner.run(_train_argv(root, out), hook)
        print(f"training kill {trial}: batch {hook[1]} of {steps} + {hook[2]:.3f} s -> status {code}")
        assert code == -signal.SIGKILL, (hook, log)
        finals = {p.name for p in out.iterdir() if not p.name.startswith(".")}
        assert finals <= {"resume.pt", "model.safetensors", "metrics.csv"}
        assert "resume.pt" in finals  # the run folder holds a resume point from its first moment
        code, log = runner.run(_train_argv(root, out, resume=True))
        assert code == 0, log
        last, best, history = _state(out)
        _assert_same(last, ref_last)
        _assert_same(best, ref_best)
        assert history == ref_history
        # a kill during a write leaves its hidden temp file (nothing can remove it at SIGKILL); never a final name
        assert all(p.name.startswith(".") for p in out.iterdir() if ".partial" in p.name)


def test_ctrl_c_in_training_writes_a_resume_point_and_exits_130(runner, training):
    root, (ref_last, ref_best, _), steps = training
    out = root / "sigint"
    code, log = runner.run(_train_argv(root, out), (STEP, steps // 2, 0.0, signal.SIGINT))
    assert code == 130, log
    lines = log.strip().splitlines()
    assert len(lines) == 1 and "Traceback" not in log, log
    assert "resume point saved to" in lines[0] and str(out / "resume.pt") in lines[0]
    code, log = runner.run(_train_argv(root, out, resume=True))
    assert code == 0, log
    last, best, _ = _state(out)
    _assert_same(last, ref_last)
    _assert_same(best, ref_best)


def test_sigterm_in_training_writes_a_resume_point_and_exits_143(runner, training):
    # SIGTERM (a scheduler's or a container's stop) is handled as Ctrl-C: a resume point at the signal, one
    # line, 128 + 15; resumed, the run ends bit-identical to an uninterrupted one.
    root, (ref_last, ref_best, _), steps = training
    out = root / "sigterm"
    code, log = runner.run(_train_argv(root, out), (STEP, steps // 2 + 1, 0.0, signal.SIGTERM))
    assert code == 143, log
    assert log.strip().splitlines() == [f"fcnkit train: terminated; resume point saved to {out / 'resume.pt'}, "
                                        "continue with --resume"]
    code, log = runner.run(_train_argv(root, out, resume=True))
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
    code, log = runner.run([*argv, "--out", root / "reference"], (TILES, 0, 0.0, 0))
    assert code == 0, log
    batches = runner.last_calls
    code, log = runner.run([*argv, "--out", root / "reference-2"], (WRITES, 0, 0.0, 0))
    assert code == 0, log
    reference = {p.name: p.read_bytes() for p in (root / "reference").iterdir()}
    assert len(reference) >= 10 and _finals(root / "reference-2") == reference  # the outputs are reproducible
    return root, argv, reference, {TILES: batches, WRITES: runner.last_calls}


def _finals(out: Path) -> dict[str, bytes]:
    return {p.name: p.read_bytes() for p in out.iterdir() if p.is_file() and not p.name.startswith(".")} \
        if out.exists() else {}


def _kill_then_rerun(runner: Runner, argv: list, out: Path, hook: tuple, reference: dict[str, bytes]) -> None:
    """Map with ``hook`` killing the run: whatever has a final name must be complete; a rerun completes the rest."""
    code, log = runner.run([*argv, "--out", out], hook)
    print(f"mapping kill: {hook[0]} call {hook[1]} + {hook[2]:.4f} s -> status {code}, {len(_finals(out))} of "
          f"{len(reference)} outputs final")
    assert code == -signal.SIGKILL, (hook, log)
    for name, data in _finals(out).items():  # whatever has a final name is complete
        assert data == reference[name], name
    code, log = runner.run([*argv, "--out", out, "--overwrite"])  # replaces what the killed run finished
    assert code == 0, log
    assert _finals(out) == reference


def test_tiled_inference_killed_at_random_points_leaves_no_half_written_output(runner, mapping):
    root, argv, reference, counts = mapping
    rng = np.random.default_rng(4)
    for trial in range(TRIALS):
        out = root / f"kill-{trial}"
        target, delay = (TILES, 0.01) if trial % 2 == 0 else (WRITES, 0.002)  # mid-inference or mid-writing
        hook = (target, int(rng.integers(1, counts[target])), float(rng.uniform(0, delay)), signal.SIGKILL)
        _kill_then_rerun(runner, argv, out, hook, reference)


def test_row_streaming_killed_at_random_points_leaves_no_half_written_output(runner, mapping):
    # The default scan (rows) writes through the same path; kill it mid-band and compare with its own complete run.
    root, argv, _, _ = mapping
    rows_argv = [a for a in argv if a not in ("--tile", 48, "--batch", 2)]
    code, log = runner.run([*rows_argv, "--out", root / "rows-reference"], (ROWS, 0, 0.0, 0))
    assert code == 0, log
    calls, reference = runner.last_calls, _finals(root / "rows-reference")
    assert calls > 2 and len(reference) >= 10
    rng = np.random.default_rng(5)
    for trial in range(3):
        out = root / f"rows-kill-{trial}"
        hook = (ROWS, int(rng.integers(1, calls)), float(rng.uniform(0, 0.01)), signal.SIGKILL)
        _kill_then_rerun(runner, rows_argv, out, hook, reference)


def test_ctrl_c_in_tiled_inference_exits_130_leaving_nothing_partial(runner, mapping):
    root, argv, reference, counts = mapping
    out = root / "sigint"
    code, log = runner.run([*argv, "--out", out], (TILES, counts[TILES] - 2, 0.0, signal.SIGINT))
    assert code == 130, log
    lines = [line for line in log.strip().splitlines() if not line.startswith("fcnkit: note: ")]  # the scan's note
    assert len(lines) == 1 and "Traceback" not in log, log
    first = {n for n in reference if n.startswith("field.")}  # images are mapped in name order
    assert set(_finals(out)) == first  # the first image's outputs are complete, the second has none
    for name, data in _finals(out).items():
        assert data == reference[name], name
    hidden = [p.name for p in out.iterdir() if p.name.startswith(".")]
    assert not hidden, f"temporary files left after Ctrl-C: {hidden}"


@pytest.mark.parametrize("scan", ["tiles", "rows"])
def test_sigterm_in_mapping_exits_143_leaving_nothing_partial(runner, mapping, scan):
    root, argv, reference, counts = mapping
    out = root / f"sigterm-{scan}"
    if scan == "rows":
        argv = [a for a in argv if a not in ("--tile", 48, "--batch", 2)]
        hook = (ROWS, 2, 0.0, signal.SIGTERM)
    else:
        hook = (TILES, counts[TILES] - 2, 0.0, signal.SIGTERM)
    code, log = runner.run([*argv, "--out", out], hook)
    assert code == 143, log
    lines = [line for line in log.strip().splitlines() if not line.startswith("fcnkit: note: ")]
    assert lines == ["fcnkit segment: terminated"], log
    finals = _finals(out)
    if scan == "tiles":  # the first image's outputs are complete, the second has none
        assert set(finals) == {n for n in reference if n.startswith("field.")}
        for name, data in finals.items():
            assert data == reference[name], name
    else:  # stopped while streaming the first image: no output at all
        assert not finals
    hidden = [p.name for p in out.iterdir() if p.name.startswith(".")] if out.exists() else []
    assert not hidden, f"temporary files left after SIGTERM: {hidden}"
