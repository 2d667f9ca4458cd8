"""Outputs that never destroy inputs: the output guard (resolved paths, symbolic and hard links), the run-folder
lock between two real processes, a full disk named by its file, the mode of written files, and file names that
are not UTF-8. (The battery, tests/bad_inputs.py, has a refused overwrite for every command that writes.)"""

from __future__ import annotations

import errno
import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest
from bad_inputs import ROOT, TINY_CONFIG, run_cli, write_dataset, write_model
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from fcnkit import atomic
from fcnkit.atomic import write_text_atomic
from fcnkit.destinations import check_outputs
from fcnkit.errors import DiskFullError, FcnkitError
from fcnkit.outputs import output_names
from fcnkit.runstate import RunLock

pytestmark = pytest.mark.usefixtures("torch_one_thread")


# --- the guard ----------------------------------------------------------------------------------------------------

LINKS = ("same", "symlink", "symlink to symlink", "hard link", "dotted path", "other file", "new file")


def _make(folder: Path, kind: str, target: Path) -> Path:
    out = folder / f"out-{LINKS.index(kind)}"
    if kind == "same":
        return target
    if kind == "symlink":
        out.symlink_to(target)
    elif kind == "symlink to symlink":
        (folder / "hop").symlink_to(target)
        out.symlink_to(folder / "hop")
    elif kind == "hard link":
        os.link(target, out)
    elif kind == "dotted path":
        (folder / "sub").mkdir()
        return folder / "sub" / ".." / target.name
    elif kind == "other file":
        out.write_text("an earlier result\n")
    return out


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(kind=st.sampled_from(LINKS), which=st.integers(0, 1), inputs=st.sets(st.integers(0, 1), min_size=1))
def test_the_guard_refuses_exactly_the_outputs_that_are_an_input(tmp_path_factory, kind, which, inputs):
    # Reference: os.path.samefile (same device and inode, after symbolic links) — the output is refused iff it
    # is the same file as one of the inputs.
    folder = tmp_path_factory.mktemp("guard")
    files = [folder / "a.png", folder / "b.png"]
    for f in files:
        f.write_bytes(b"pixels")
    out = _make(folder, kind, files[which])
    same = out.exists() and any(os.path.samefile(out, files[i]) for i in inputs)
    if same:
        with pytest.raises(FcnkitError, match="is an input of this run"):
            check_outputs([out], inputs=[files[i] for i in inputs], overwrite=True)
    else:
        check_outputs([out], inputs=[files[i] for i in inputs], overwrite=True)
    assert all(f.read_bytes() == b"pixels" for f in files)


@pytest.mark.filterwarnings("ignore::FutureWarning")  # torch.jit's deprecation notes
def test_the_guard_protects_weights_but_lets_exports_and_results_be_made_again(tmp_path):
    import torch

    write_model(tmp_path / "m.safetensors")
    torch.save({"w": torch.zeros(2)}, tmp_path / "state.pt")
    scripted = torch.jit.script(torch.nn.Linear(2, 2))
    torch.jit.save(scripted, str(tmp_path / "net.pt"))
    (tmp_path / "scores.json").write_text("{}\n")
    for name, what in (("m.safetensors", "a model file"), ("state.pt", "a torch checkpoint")):
        for overwrite in (False, True):  # weights are never replaced, even when asked
            with pytest.raises(FcnkitError, match=f"{name}: already holds {what}"):
                check_outputs([tmp_path / name], overwrite=overwrite)
    for name in ("net.pt", "scores.json"):  # a TorchScript export, an earlier result: replaced only when asked
        with pytest.raises(FcnkitError, match=f"{name}: exists .*--overwrite"):
            check_outputs([tmp_path / name])
    check_outputs([tmp_path / "net.pt", tmp_path / "scores.json"], overwrite=True)


def test_demo_refuses_a_run_folder_and_a_model_file_as_its_output(tmp_path):
    run = tmp_path / "run"
    write_dataset(tmp_path / "data")
    (tmp_path / "c.toml").write_text(TINY_CONFIG)
    code, _, err = run_cli(["train", tmp_path / "c.toml", "--data", tmp_path / "data", "--out", run, "--quiet"])
    assert code == 0, err
    before = {p.name: p.read_bytes() for p in run.iterdir()}
    for out in (run, run / "model.safetensors"):
        code, _, err = run_cli(["demo", "--quick", "--quiet", "--out", out])
        assert code == 2 and str(out) in err and len(err.splitlines()) == 1, err
    assert {p.name: p.read_bytes() for p in run.iterdir()} == before


# --- the run-folder lock -----------------------------------------------------------------------------------------

def _fcnkit(*args: object) -> list[str]:
    return [sys.executable, "-m", "fcnkit", *map(str, args)]


ENV = {**os.environ, "PYTHONPATH": str(ROOT)}


def _wait_for(predicate, proc: subprocess.Popen, timeout: float = 120) -> None:
    end = time.monotonic() + timeout
    while not predicate():
        assert proc.poll() is None, proc.communicate()
        assert time.monotonic() < end, "timed out"
        time.sleep(0.05)


def test_two_training_runs_on_one_folder_cannot_both_proceed(tmp_path):
    data = write_dataset(tmp_path / "data")
    cfg = tmp_path / "c.toml"
    cfg.write_text(TINY_CONFIG.replace("epochs = 1", "epochs = 500"))
    run = tmp_path / "run"
    first = subprocess.Popen(_fcnkit("train", cfg, "--data", data, "--out", run, "--quiet"), env=ENV,
                             stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        _wait_for(lambda: (run / "metrics.csv").exists(), first)  # a run in progress, past its first epoch
        # the second run in this process (a process of its own would only add an interpreter's start-up)
        code, _, err = run_cli(["train", cfg, "--data", data, "--out", run, "--quiet"])
        assert code == 2, err
        assert err.splitlines() == [f"fcnkit train: error: {run}: another training run (process {first.pid}) is "
                                    "using this run folder; wait for it to end, or choose another output folder"]
        code, _, err = run_cli(["train", cfg, "--data", data, "--out", run, "--quiet", "--resume"])
        assert code == 2 and "another training run" in err, err
        first.send_signal(signal.SIGTERM)  # stopped as by Ctrl-C: a resume point at the signal
        _, err = first.communicate(timeout=120)
    finally:
        if first.poll() is None:
            first.kill()
    assert first.returncode == 143, err
    assert err.splitlines() == [f"fcnkit train: terminated; resume point saved to {run / 'resume.pt'}, continue "
                                "with --resume"]
    assert not (run / ".lock").exists()


def test_a_lock_left_by_a_killed_run_is_taken_over(tmp_path):
    data = write_dataset(tmp_path / "data")
    (tmp_path / "c.toml").write_text(TINY_CONFIG)
    run = tmp_path / "run"
    code = (f"import os, signal; from fcnkit.runstate import RunLock; RunLock({str(run)!r}).__enter__(); "
            "os.kill(os.getpid(), signal.SIGKILL)")
    dead = subprocess.Popen([sys.executable, "-c", code], env=ENV)
    assert dead.wait(timeout=120) == -signal.SIGKILL
    assert (run / ".lock").read_text() == f"{dead.pid}\n"  # left behind, its owner gone
    code, _, err = run_cli(["train", tmp_path / "c.toml", "--data", data, "--out", run, "--quiet"])
    assert code == 0, err
    assert (run / "model.safetensors").is_file() and not (run / ".lock").exists()


def test_the_lock_of_this_process_is_released_and_its_empty_folder_removed(tmp_path):
    with RunLock(tmp_path / "new") as lock:
        assert (tmp_path / "new" / ".lock").read_text() == f"{os.getpid()}\n"
        with pytest.raises(FcnkitError, match="another training run"), RunLock(tmp_path / "new"):
            pass
    assert lock.fd is None and not (tmp_path / "new").exists()


# --- a full disk, file modes -------------------------------------------------------------------------------------

def test_a_full_disk_is_reported_naming_the_file(tmp_path, monkeypatch):
    def full(fd: int) -> None:
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    (tmp_path / "model").mkdir()
    model = write_model(tmp_path / "model" / "m.safetensors")
    monkeypatch.setattr(atomic.os, "fsync", full)
    with pytest.raises(DiskFullError, match=r"scores\.json: No space left on device while writing it") as e:
        write_text_atomic(tmp_path / "scores.json", "{}")
    assert e.value.path == tmp_path / "scores.json"
    assert [p.name for p in tmp_path.iterdir()] == ["model"]
    code, _, err = run_cli(["export", model, "--out", tmp_path / "m.onnx"])
    assert code == 2 and err.splitlines() == [f"fcnkit export: error: {tmp_path / 'm.onnx'}: No space left on "
                                             "device while writing it (nothing was written under this name; free "
                                             "some space or write elsewhere)"]


def test_a_full_disk_while_writing_a_report_names_the_report(tmp_path, monkeypatch):
    # Bug fix: evaluate wrote the report atomically inside its own atomic write, so a full disk named the
    # hidden temporary file instead of the report.
    def full(fd: int) -> None:
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    model = write_model(tmp_path / "m.safetensors")
    data = write_dataset(tmp_path / "data")
    monkeypatch.setattr(atomic.os, "fsync", full)
    code, _, err = run_cli(["evaluate", model, "--data", data, "--report", tmp_path / "r.html", "--quiet"])
    assert code == 2 and len(err.splitlines()) == 1, err
    assert f"{tmp_path / 'r.html'}: No space left on device" in err and ".partial" not in err
    assert not (tmp_path / "r.html").exists()


@pytest.mark.parametrize("umask", [0o022, 0o077, 0o002])
def test_written_files_get_the_umask_s_mode(tmp_path, umask):
    # Reference: POSIX open(2) creates files with mode 0666 & ~umask.
    old = os.umask(umask)
    try:
        model = write_model(tmp_path / "m.safetensors")  # safetensors alone would make it 0600
        data = write_dataset(tmp_path / "data")
        code, _, err = run_cli(["evaluate", model, "--data", data, "--out", tmp_path / "e.json", "--quiet"])
        assert code == 0, err
        code, _, err = run_cli(["segment", model, data / "images" / "s0.png", "--out", tmp_path / "maps", "--quiet"])
        assert code == 0, err
    finally:
        os.umask(old)
    written = [model, tmp_path / "e.json", *(tmp_path / "maps").iterdir()]
    assert {oct(p.stat().st_mode & 0o777) for p in written} == {oct(0o666 & ~umask)}


# --- file names that are not UTF-8 -------------------------------------------------------------------------------

def test_file_names_that_are_not_utf8_are_processed_and_shown_escaped(tmp_path):
    data = write_dataset(tmp_path / "data")
    odd = os.fsdecode(b"caf\xe9")
    for sub in ("images", "masks"):
        (data / sub / "s0.png").rename(data / sub / f"{odd}.png")
    model = write_model(tmp_path / "m.safetensors")
    report, maps = tmp_path / "r.html", tmp_path / "maps"
    calls = [["check", data], ["evaluate", model, "--data", data, "--out", tmp_path / "e.json", "--report", report,
                               "--quiet"], ["segment", model, data / "images", "--out", maps, "--quiet"]]
    code = ("import sys, io\n"
            "sys.stdout = io.TextIOWrapper(sys.stdout.buffer, encoding='utf-8', errors='strict')\n"  # a UTF-8 terminal
            "from fcnkit.cli import main\n"
            f"print([main([str(a) for a in c]) for c in {[[str(a) for a in c] for c in calls]!r}])\n")
    p = subprocess.run([sys.executable, "-c", code], env=ENV, capture_output=True, timeout=600)
    assert p.returncode == 0 and b"Traceback" not in p.stderr, p.stderr.decode(errors="replace")
    assert p.stdout.decode("utf-8").splitlines()[-1] == "[0, 0, 0]"
    assert "caf\\xe9" in p.stdout.decode("utf-8")
    assert "caf\\xe9" in report.read_text(encoding="utf-8")
    assert json.loads((tmp_path / "e.json").read_text())["images"][0]["stem"] == odd
    assert (maps / f"{odd}.labels.png").is_file()
    assert sorted(p.name for p in maps.iterdir() if p.name.startswith(odd)) == sorted(output_names(odd, False).values())
