"""The thread count of train.threads = 0: the cores other programs leave free (fcnkit.cores)."""

import os
import resource
import subprocess
import sys
from pathlib import Path

import pytest
import torch
from tiny_train import fit, tiny

from fcnkit import cores
from fcnkit.cores import CoreWatch

pytestmark = pytest.mark.usefixtures("torch_one_thread")


def _fake_times(monkeypatch, readings):
    """``_cpu_times`` returning (wall s, system busy CPU s, own CPU s, cores) from a list, one per call."""
    it = iter(readings)
    monkeypatch.setattr(cores, "_cpu_times", lambda: next(it))


def test_threads_follow_the_cores_others_leave_free(monkeypatch):
    _fake_times(monkeypatch, [
        (0.0, 0.0, 0.0, 4),
        (1.0, 3.5, 0.5, 4),  # others used 3 of 4 cores: 1 free
        (2.0, 4.5, 1.0, 4),  # others 0.5: 3.5 free, and half a core is not enough for a fourth thread
        (2.1, 4.6, 1.1, 4),  # 0.1 s: too short a window to tell, the last choice stands
        (3.0, 5.9, 1.2, 4),  # (from 2.0) others 1.2 over 1 s: 2.8 free, enough for three threads
        (4.0, 10.0, 1.2, 4),  # others busy on all four cores: still one thread
    ])
    watch = CoreWatch(8)
    assert watch.choice == 1  # before anything is measured: one thread, the cheap mistake
    assert [watch.threads() for _ in range(5)] == [1, 3, 3, 3, 1]
    _fake_times(monkeypatch, [(0.0, 0.0, 0.0, 4), (1.0, 0.0, 0.0, 4)])
    assert CoreWatch(2).threads() == 2  # an idle machine: never more than asked for


def test_nothing_measurable_keeps_the_most(monkeypatch):
    monkeypatch.setattr(cores, "_cpu_times", lambda: None)
    assert CoreWatch(3).threads() == 3 and CoreWatch(0).threads() == 1


@pytest.mark.skipif(not Path("/proc/stat").exists(), reason="reads Linux /proc/stat")
def test_cpu_time_of_another_process_counts_as_others():
    """A child that spins is another program: its CPU time, as the kernel reports it to the parent
    (getrusage RUSAGE_CHILDREN, POSIX), shows in the system's busy time and not in this process's."""
    before = cores._cpu_times()
    child_before = resource.getrusage(resource.RUSAGE_CHILDREN)
    code = "import time\nt = time.process_time()\nwhile time.process_time() - t < 0.3: pass"
    subprocess.run([sys.executable, "-c", code], check=True)
    child_after = resource.getrusage(resource.RUSAGE_CHILDREN)
    after = cores._cpu_times()
    child = (child_after.ru_utime + child_after.ru_stime) - (child_before.ru_utime + child_before.ru_stime)
    others = (after[1] - before[1]) - (after[2] - before[2])
    assert child >= 0.3
    assert others >= child - 0.05  # the system's times tick every 10 ms (USER_HZ = 100, proc(5))
    assert after[3] == os.cpu_count()  # one cpuN line per CPU (proc(5)); os.cpu_count counts the same CPUs


def test_a_run_with_threads_left_to_fcnkit_restores_torchs_count(tmp_path):
    from fcnkit.data.scenes import make_scenes

    data = make_scenes(tmp_path / "scenes", count=2, size=40, seed=3)
    torch.set_num_threads(2)  # the run starts on one thread of two, so the count must really be put back
    before = torch.get_num_threads()
    result = fit(tiny(train={"threads": 0, "epochs": 1, "calibrate": False}), data, tmp_path / "run", progress=False)
    assert result.epochs == 1 and torch.get_num_threads() == before
