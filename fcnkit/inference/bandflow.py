"""A graph of stateful steps run over consecutive bands by worker threads, each step as soon as it can run.

Row streaming (:mod:`fcnkit.inference.rowstream`) pushes every band of an image through the same graph of
layers, each of which keeps state from one band to the next. Step j of band b can run once the steps it reads
have run on band b and step j itself has run on band b − 1. Two (or more) workers take whichever steps are
ready, oldest band first: while one convolves band b's deep layers the other convolves band b + 1's first ones.
Each worker runs its torch operations on one thread (:func:`one_thread_per_worker`), so no operation waits at
a barrier for a thread that the operating system has paused, and small operations (narrow bands, deep layers)
cost no thread start-up. Only ``window`` bands are in flight at once, so memory stays bounded.
"""

from __future__ import annotations

import contextlib
import ctypes
import functools
import heapq
import threading
from collections.abc import Callable, Iterator, Sequence
from typing import Any

import torch

Step = Callable[[list[Any], int], Any]  # (results of the steps it reads, band index) → its result for the band


@functools.cache
def _openmp() -> Any | None:
    """The OpenMP runtime torch's CPU kernels use (torch's own copy, found among the libraries this process has
    loaded), or None where there is none to find (another platform, another threading library). Looked up once."""
    torch.get_num_threads()  # torch loads and sets up its threading library on first use
    try:
        with open("/proc/self/maps") as f:
            paths = {line.split()[-1] for line in f if "/" in line}
    except OSError:
        return None
    for name in ("libgomp", "libiomp5", "libomp"):
        for path in sorted(paths):
            if path.rsplit("/", 1)[-1].startswith(name + "."):
                try:
                    lib = ctypes.CDLL(path)
                    lib.omp_set_num_threads  # noqa: B018 - the symbol must exist
                    return lib
                except (OSError, AttributeError):
                    continue
    return None


def can_pin_threads() -> bool:
    """Whether this process can give a worker thread's torch operations one thread of their own (without
    changing the thread count of any other thread)."""
    return _openmp() is not None


@contextlib.contextmanager
def one_thread_per_worker() -> Iterator[None]:
    """In the calling (worker) thread only, run torch's CPU operations on that thread alone. OpenMP keeps the
    thread count per thread; torch.set_num_threads would change it for the whole process."""
    torch.get_num_threads()  # torch sets this thread's OpenMP count from its global one on first use: do that first
    if (runtime := _openmp()) is not None:
        runtime.omp_set_num_threads(1)
    yield


class _Run:
    """Scheduler state of one run: prerequisites left per (band, step), the ready heap, results in flight."""

    def __init__(self, deps: Sequence[Sequence[int]], bands: int, window: int) -> None:
        self.deps, self.bands, self.window = deps, bands, window
        self.steps = len(deps)
        self.users = [[k for k in range(self.steps) if j in deps[k]] for j in range(self.steps)]
        self.cond = threading.Condition()
        self.ready: list[tuple[int, int]] = []
        self.left: dict[tuple[int, int], int] = {}
        self.done: set[tuple[int, int]] = set()
        self.results: dict[tuple[int, int], Any] = {}
        self.unread: dict[tuple[int, int], int] = {}
        self.outputs: dict[int, Any] = {}  # the last step's result of each band all of whose steps have run
        self.pending: dict[int, list] = {}  # band → [steps not yet run, the last step's result]
        self.admitted = 0  # bands 0..admitted-1 have their steps counted
        self.waiting = 0  # workers waiting for a step
        self.error: BaseException | None = None
        self.closed = False

    def admit(self, upto: int) -> None:
        """Count the prerequisites of every step of bands up to ``upto`` (exclusive); queue those ready."""
        while self.admitted < min(upto, self.bands):
            b = self.admitted
            self.pending[b] = [self.steps, None]
            for j in range(self.steps):
                n = len(set(self.deps[j])) + (1 if b > 0 and (b - 1, j) not in self.done else 0)
                self.left[b, j] = n
                if n == 0:
                    heapq.heappush(self.ready, (b, j))
            self.admitted += 1

    def finish(self, b: int, j: int, value: Any) -> None:
        """Record step j of band b: free what no step reads any more, queue what became ready."""
        self.done.add((b, j))
        self.done.discard((b - 1, j))  # only the latest band of each step is asked about
        if j == self.steps - 1:
            self.pending[b][1] = value
        elif self.users[j]:
            self.results[b, j] = value
            self.unread[b, j] = len(self.users[j])
        for i in set(self.deps[j]):
            self.unread[b, i] -= 1
            if not self.unread[b, i]:
                del self.results[b, i], self.unread[b, i]
        for k in [*self.users[j], None]:
            key = (b + 1, j) if k is None else (b, k)
            if key in self.left:
                self.left[key] -= 1
                if not self.left[key]:
                    del self.left[key]
                    heapq.heappush(self.ready, key)
        self.left.pop((b, j), None)
        self.pending[b][0] -= 1
        if not self.pending[b][0]:
            self.outputs[b] = self.pending.pop(b)[1]

    def work(self, steps: Sequence[Step], setup: Callable[[], contextlib.AbstractContextManager],
             workers: int) -> None:
        """A worker: take the oldest ready step, run it, record it; until the run ends or fails. A step of the
        last bands that no other step can run beside (the others wait; every band admitted) runs on the
        threads of all ``workers``: the layers of the last band, which carry the rows every layer held back,
        otherwise run on one thread at the end of every image."""
        runtime = _openmp()
        try:
            with setup():
                while True:
                    with self.cond:
                        self.waiting += 1
                        while not self.ready and not self.closed and self.error is None:
                            self.cond.wait()
                        self.waiting -= 1
                        if self.closed or self.error is not None:
                            return
                        b, j = heapq.heappop(self.ready)
                        args = [self.results[b, i] for i in self.deps[j]]
                        alone = runtime is not None and not self.ready and self.waiting == workers - 1 and \
                            self.admitted == self.bands
                    if alone:
                        runtime.omp_set_num_threads(workers)
                        try:
                            value = steps[j](args, b)
                        finally:
                            runtime.omp_set_num_threads(1)
                    else:
                        value = steps[j](args, b)
                    with self.cond:
                        self.finish(b, j, value)
                        self.cond.notify_all()
        except BaseException as e:  # noqa: BLE001 - handed to the consumer, which re-raises it
            with self.cond:
                self.error = self.error or e
                self.cond.notify_all()


def run_bands(steps: Sequence[Step], deps: Sequence[Sequence[int]], bands: int, *, workers: int = 1,
              window: int = 3, setup: Callable[[], contextlib.AbstractContextManager] = contextlib.nullcontext
              ) -> Iterator[Any]:
    """Run ``steps`` (in an order where each step reads only earlier ones, ``deps[j]`` the steps step j reads) on
    bands 0..bands-1 and yield the last step's result of each band, in band order. Step j of band b runs after
    step j of band b − 1 and after the steps it reads have run on band b. With ``workers`` > 1 the steps run on
    that many threads, each inside ``setup()``, which must give the thread's torch operations one thread of their
    own (:func:`one_thread_per_worker`), with at most ``window`` bands not yet handed on; with one, in order on
    the calling thread (inside ``setup()`` too)."""
    if workers <= 1:
        for b in range(bands):
            results: list[Any] = []
            with setup():
                for j, step in enumerate(steps):
                    results.append(step([results[i] for i in deps[j]], b))
            yield results[-1]
        return
    run = _Run(deps, bands, window)
    with run.cond:
        run.admit(window)
    threads = [threading.Thread(target=run.work, args=(steps, setup, workers), daemon=True, name=f"fcnkit-band-{i}")
               for i in range(workers)]
    for t in threads:
        t.start()
    try:
        for b in range(bands):
            with run.cond:
                while b not in run.outputs and run.error is None:
                    run.cond.wait()
                if b not in run.outputs:  # a step failed: bands finished before it were handed on
                    raise run.error
                value = run.outputs.pop(b)
                run.admit(b + 1 + window)
                run.cond.notify_all()
            yield value
    finally:
        with run.cond:
            run.closed = True
            run.cond.notify_all()
        for t in threads:
            t.join()
