"""Band scheduler: the same results, in the same order, as running every step of every band in turn; its
ordering rules, bounded look-ahead, errors and early stops; worker threads pinned to one torch thread."""

import threading
import time

import pytest
import torch
from hypothesis import given, settings
from hypothesis import strategies as st

from fcnkit.inference.bandflow import can_pin_threads, one_thread_per_worker, run_bands


def _sequential(deps, bands):
    """The definition run_bands must follow: band after band, step after step, each step reading the values of
    the steps it depends on (this band) and its own value for the band before."""
    prev, out = {}, []
    for b in range(bands):
        vals = []
        for j, d in enumerate(deps):
            vals.append(_value(j, b, [vals[i] for i in d], prev.get(j, 0)))
            prev[j] = vals[-1]
        out.append(vals[-1])
    return out


def _value(j, b, args, prev):
    return (sum(args) * 31 + prev * 7 + 13 * b + j) % 1_000_003


graphs = st.integers(1, 7).flatmap(lambda n: st.tuples(*[
    st.lists(st.integers(0, j - 1), max_size=3) if j else st.just([]) for j in range(n)]))


@settings(max_examples=40, deadline=None)
@given(deps=graphs, bands=st.integers(1, 9), workers=st.integers(1, 3), window=st.integers(1, 4))
def test_results_and_order_follow_the_sequential_definition(deps, bands, workers, window):
    lock, log, prev = threading.Lock(), [], {}

    def make(j):
        def step(args, b):
            with lock:
                p = prev.get(j, 0)
                log.append((b, j))
            time.sleep(0.0005 * ((b + j) % 3))  # uneven steps, so workers overtake each other
            v = _value(j, b, args, p)
            with lock:
                prev[j] = v
            return v
        return step

    deps = [list(d) for d in deps]
    got = list(run_bands([make(j) for j in range(len(deps))], deps, bands, workers=workers, window=window))
    assert got == _sequential(deps, bands)
    position = {task: i for i, task in enumerate(log)}
    assert len(position) == len(log) == bands * len(deps)  # every step of every band, once
    for b, j in log:
        assert all(position[b, i] < position[b, j] for i in deps[j])
        assert b == 0 or position[b - 1, j] < position[b, j]


def test_bands_in_flight_stay_within_the_window():
    started, handed = [], []

    def first(args, b):
        started.append(b)
        return b

    def last(args, b):
        return args[0]

    for b in run_bands([first, last], [[], [0]], 30, workers=2, window=3):
        handed.append(b)
        time.sleep(0.002)  # a slow consumer: workers must wait rather than run ahead
        assert max(started) <= len(handed) - 1 + 3


def test_an_error_in_a_worker_reaches_the_consumer_and_workers_stop():
    before = threading.active_count()

    def boom(args, b):
        if b == 4:
            raise ValueError("band 4 failed")
        return b

    seen = []
    with pytest.raises(ValueError, match="band 4 failed"):
        for v in run_bands([boom, lambda a, b: a[0]], [[], [0]], 10, workers=2):
            seen.append(v)
    assert seen == list(range(len(seen))) and len(seen) <= 4  # bands finished before the failure, in order
    assert threading.active_count() == before


def test_a_consumer_that_stops_early_stops_the_workers():
    before = threading.active_count()
    gen = run_bands([lambda a, b: b], [[]], 1000, workers=3)
    assert [next(gen) for _ in range(3)] == [0, 1, 2]
    gen.close()
    assert threading.active_count() == before


def test_worker_threads_run_torch_on_one_thread_without_changing_others():
    if not can_pin_threads():
        pytest.skip("this process's OpenMP runtime cannot be reached")
    before = torch.get_num_threads()
    seen = []

    def worker():
        with one_thread_per_worker():
            seen.append(torch.get_num_threads())

    t = threading.Thread(target=worker)
    t.start()
    t.join()
    assert seen == [1]
    assert torch.get_num_threads() == before


def test_a_last_step_nothing_can_run_beside_gets_every_workers_thread():
    # The last band's final step, with every band admitted and the other worker waiting, runs on both workers'
    # threads; a step run while the other worker is busy, or while another step is ready, keeps one.
    if not can_pin_threads():
        pytest.skip("this process's OpenMP runtime cannot be reached")
    seen = {}

    def step(j):
        def run(args, b):
            if (b, j) == (0, 1):
                time.sleep(0.2)  # band 1's first step runs meanwhile on the other worker, which then waits
            seen[b, j] = torch.get_num_threads()
            return b
        return run

    out = list(run_bands([step(0), step(1)], [[], [0]], 2, workers=2, window=2, setup=one_thread_per_worker))
    assert out == [0, 1]
    assert seen[0, 1] == 1 and seen[1, 0] == 1
    assert seen[1, 1] == 2
