"""advisory.forking: results in order, errors raised, a dead worker's share redone here."""

from __future__ import annotations

import os
import threading

import pytest

from advisory import forking


def test_results_in_order_and_computed_in_other_processes():
    home = os.getpid()
    got = forking.fork_map(lambda x: (x * x, os.getpid() != home), list(range(50)), 3)
    assert [v for v, _ in got] == [x * x for x in range(50)]
    assert any(elsewhere for _, elsewhere in got) and not all(elsewhere for _, elsewhere in got)


def test_share_bounds_cover_everything_once():
    for n in (0, 1, 2, 7, 100):
        for workers in (1, 2, 3):
            b = forking.share_bounds(n, workers, 1.6)
            assert b[0][0] == 0 and b[-1][1] == n and all(x[1] == y[0] for x, y in zip(b, b[1:], strict=False))
    assert forking.share_bounds(100, 2, 1.5) == [(0, 60), (60, 100)]


def test_an_error_in_a_worker_is_raised_here():
    def fn(x):
        if x == 9:
            raise ValueError("item nine")
        return x

    with pytest.raises(ValueError, match="item nine"):
        forking.fork_map(fn, list(range(10)), 2)


def test_a_dead_worker_has_its_share_done_here():
    home = os.getpid()

    def fn(x):
        if os.getpid() != home:
            os._exit(3)  # the worker dies without a word
        return x + 1

    assert forking.fork_map(fn, list(range(8)), 2) == list(range(1, 9))


def test_no_fork_while_another_thread_runs():
    stop = threading.Event()
    t = threading.Thread(target=stop.wait)
    t.start()
    try:
        assert not forking.can_fork()
        home = os.getpid()
        assert forking.fork_map(lambda x: os.getpid() == home, [1, 2, 3], 3) == [True, True, True]
    finally:
        stop.set()
        t.join()
