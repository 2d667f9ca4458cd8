"""How many torch threads to use right now: as many as the CPU cores other programs leave free.

Threads of one torch operation wait for each other at its end, so a thread whose core is taken by another program
holds up all the others. On the shared 2-core development machine, with other programs keeping about two cores
busy, a training step of the demo net took 0.35-1.3 s on two threads against 0.10-0.15 s on one (a quick matrix
product on two threads could still look fast: the stall shows over whole steps, hence watching CPU time rather than
timing a probe). ``CoreWatch`` reads the system's cumulative CPU times (Linux ``/proc/stat``, proc(5): every
state but idle and I/O wait counts as busy, stolen time included) and this process's own (``os.times``); over a
window, their difference is what other programs used. Until a window has been measured the choice is one
thread: too few threads cost at most a factor of the thread count, too many can cost far more. Where
``/proc/stat`` cannot be read, nothing is measured and the thread count is the most allowed.
"""

from __future__ import annotations

import math
import os
import time

MIN_WINDOW = 0.2  # seconds: shorter windows keep the last choice (the system's CPU times tick every 10 ms)


def _cpu_times() -> tuple[float, float, float, int] | None:
    """(wall seconds, busy CPU seconds of the whole system, CPU seconds of this process, cores), or None."""
    try:
        with open("/proc/stat", encoding="ascii") as f:
            lines = f.read().splitlines()
    except OSError:
        return None
    fields = lines[0].split()
    if fields[0] != "cpu" or len(fields) < 6:
        return None
    ticks = [int(v) for v in fields[1:9]]  # user nice system idle iowait irq softirq steal
    cores = sum(1 for line in lines[1:] if line.startswith("cpu") and line[3:4].isdigit())
    own = os.times()
    hz = os.sysconf("SC_CLK_TCK")
    return time.monotonic(), (sum(ticks) - ticks[3] - ticks[4]) / hz, own.user + own.system, max(cores, 1)


class CoreWatch:
    """Chooses a thread count between 1 and ``most`` from the cores other programs left free since the last
    choice (or since the watch was made)."""

    def __init__(self, most: int) -> None:
        self.most = max(1, most)
        self._last = _cpu_times()
        self.choice = 1 if self._last is not None else self.most

    def free_cores(self) -> float | None:
        """Cores not used by other programs since the last reading (None: not measurable, or too soon)."""
        now = _cpu_times()
        last = self._last
        if now is None or last is None or now[0] - last[0] < MIN_WINDOW:
            return None
        self._last = now
        wall = now[0] - last[0]
        others = (now[1] - last[1]) - (now[2] - last[2])  # CPU seconds of everything but this process
        return now[3] - max(others, 0.0) / wall

    def threads(self) -> int:
        """The thread count for the next stretch of work: the free cores, rounded up from three quarters of a
        core (a thread on a core that others use a quarter of still holds up its siblings), at least 1 and at
        most ``most``; the last choice when nothing new was measured."""
        if self.most > 1 and (free := self.free_cores()) is not None:
            self.choice = min(self.most, max(1, math.floor(free + 0.25)))
        return self.choice
