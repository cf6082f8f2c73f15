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


def _write_all(files) -> int:
    n = 0
    for path, data in files:
        with open(path, "wb") as fh:
            fh.write(data)
        n += 1
    return n


def _numbered(folder, prefix: str, n: int):
    return [(os.path.join(folder, f"{prefix}{k}"), f"{prefix} {k}".encode()) for k in range(n)]


def test_spooler_writes_what_it_is_handed_also_by_a_worker(tmp_path):
    """The writer waits for a worker's inbox before it answers; a released inbox is not waited for."""
    import time

    spooler = forking.Spooler(_write_all, {"listing": lambda: sorted(os.listdir(tmp_path))}, feeders=2)
    feeder = spooler.feeder(1)
    pid = os.fork()
    if pid == 0:  # a worker, a little late
        time.sleep(0.2)
        feeder.call(_numbered, str(tmp_path), "w", 3)
        feeder.done()
        os._exit(0)
    spooler.send(_numbered(str(tmp_path), "m", 2))
    spooler.release(2)  # no second worker
    spooler.ask("listing")
    assert spooler.answer() == (True, ["m0", "m1", "w0", "w1", "w2"])   # after the worker's files
    os.waitpid(pid, 0)
    assert spooler.finish()[0::2] == (5, None)
    assert (tmp_path / "w2").read_bytes() == b"w 2"


def test_spooler_reports_a_failure_instead_of_raising(tmp_path):
    def broken(files):
        raise OSError("disk full")

    spooler = forking.Spooler(broken)
    spooler.send(_numbered(str(tmp_path), "x", 1))
    assert spooler.finish() == (0, pytest.approx(0.0, abs=1.0), "OSError: disk full")
    gone = forking.Spooler(_write_all)
    gone._proc.kill()
    gone._proc.join()
    gone.send(_numbered(str(tmp_path), "y", 1))
    files, _, error = gone.finish()
    assert files == 0 and error


def test_arena_hands_bytes_over_in_place():
    arena = forking.Arena(8192)
    where = arena.put(b"abc")
    assert bytes(arena.view(where)) == b"abc" and arena.put(b"x" * 9000) is None
    arena.close()
