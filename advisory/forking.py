"""Share the CPU-bound part of a large run among forked copies of this process.

A nightly run for thousands of blocks is pure Python for most of its time
(forecast arrays, then one notice per block), so one process uses one core.
:func:`fork_map` cuts a list of work items into consecutive shares: this process
does the first, forked copies of it the others.  A fork sees this process's
memory as it was, so the items and the function are not sent anywhere; only
the results come back (pickled, through memory shared with this process: an
:class:`Arena`).  The copies never write to the database; the caller stores the
results, so a run stays one transaction.

A :class:`Spooler` is a copy that writes files while this process goes on (the
outbox files of a large run), fed by this process and by the workers forked
after it.

Forking is used only where it is safe: the platform forks, no other thread runs
in this process (a fork would copy the locks another thread holds), and this
process is not itself a worker.  Otherwise, or for a single worker, the work is
done here, in order, with the same results.
"""

from __future__ import annotations

import contextlib
import logging
import multiprocessing
import threading
from collections.abc import Callable, Sequence
from typing import Any

log = logging.getLogger(__name__)

#: (function, items, result arenas) of the fork_map now running; the forked copies read it from their memory.
_WORK: list[tuple[Callable[[Any], Any], Sequence[Any], list]] = []


def can_fork() -> bool:
    """Whether worker processes may be forked from this process now."""
    return ("fork" in multiprocessing.get_all_start_methods() and threading.active_count() == 1
            and not multiprocessing.current_process().daemon and not _WORK)


def share_bounds(n: int, workers: int, own_weight: float = 1.0) -> list[tuple[int, int]]:
    """Consecutive ``(start, stop)`` shares of ``n`` items; the first is ``own_weight`` times the others."""
    weights = [float(own_weight)] + [1.0] * (workers - 1)
    total = sum(weights)
    cuts, acc = [0], 0.0
    for w in weights[:-1]:
        acc += w
        cuts.append(round(acc / total * n))
    cuts.append(n)
    return [(a, b) for a, b in zip(cuts[:-1], cuts[1:], strict=True)]


#: Memory reserved for each copy's results [bytes] (address space, taken only as written).
RESULT_ARENA_BYTES = 512 * 1024 * 1024


def _run_share(k: int, start: int, stop: int) -> tuple[str, Any]:
    """A copy's share: its results pickled into its arena (``("arena", where)``) or, if they do
    not fit, sent back as they are (``("sent", results)``)."""
    import pickle

    fn, items, arenas = _WORK[0]
    results = [fn(x) for x in items[start:stop]]
    where = arenas[k].put(pickle.dumps(results, protocol=pickle.HIGHEST_PROTOCOL))
    return ("arena", where) if where is not None else ("sent", results)


def _share_results(arena: Arena, reply: tuple[str, Any]) -> list:
    import pickle

    kind, value = reply
    if kind == "sent":
        return value
    with arena.view(value) as data:
        return pickle.loads(data)


def fork_map(fn: Callable[[Any], Any], items: Sequence[Any], workers: int, *, own_weight: float = 1.0) -> list:
    """``[fn(x) for x in items]``, computed by ``workers`` processes (this one and forked copies).

    Parameters
    ----------
    fn : callable
        Called once per item; in a copy its side effects stay in that copy, so it
        must return everything the caller needs (results must pickle).
    items : sequence
    workers : int
        Processes in all, this one included; 1 (or a process that may not fork)
        computes everything here.
    own_weight : float
        This process's share relative to a copy's (a copy also pays for sending
        its results back).

    Returns
    -------
    list
        The results, in the order of ``items``.  An exception in a copy is raised
        here; a copy that dies has its share computed again here.
    """
    n = len(items)
    workers = min(int(workers or 1), n)
    if workers < 2 or not can_fork():
        return [fn(x) for x in items]
    from concurrent.futures import ProcessPoolExecutor
    from concurrent.futures.process import BrokenProcessPool

    bounds = share_bounds(n, workers, own_weight)
    # Each copy leaves its results in memory shared with this process: sent back through the
    # pool's pipe, they would be read by a thread of this process that gets its turn only now and
    # then while this process computes its own share.
    arenas = [Arena(RESULT_ARENA_BYTES) for _ in bounds[1:]]
    _WORK.append((fn, items, arenas))
    try:
        with ProcessPoolExecutor(max_workers=workers - 1, mp_context=multiprocessing.get_context("fork")) as pool:
            futures = [(a, b, pool.submit(_run_share, k, a, b)) for k, (a, b) in enumerate(bounds[1:])]
            a0, b0 = bounds[0]
            out = [fn(x) for x in items[a0:b0]]
            for k, (a, b, future) in enumerate(futures):
                try:
                    out += _share_results(arenas[k], future.result())
                except BrokenProcessPool:
                    log.warning("a worker process stopped; doing its share (%d items) here", b - a)
                    out += [fn(x) for x in items[a:b]]
    finally:
        _WORK.clear()
        for arena in arenas:
            arena.close()
    return out


class Arena:
    """Bytes shared with the processes forked after it was made (an anonymous shared mapping).

    This process copies bytes in (:meth:`put`) and hands over only where they are; a
    forked copy reads them in place (:meth:`view`), without their going through a pipe.
    Only the pages written take memory, and they count once for all the processes.
    Nothing is ever freed before :meth:`close`: it is for one run.

    Parameters
    ----------
    size : int
        Bytes reserved (address space; taken only as written).
    """

    def __init__(self, size: int):
        import mmap

        self.size = max(int(size), mmap.PAGESIZE)
        self._map = mmap.mmap(-1, self.size, flags=mmap.MAP_SHARED)
        self.used = 0

    def put(self, data: bytes) -> tuple[int, int] | None:
        """Copy ``data`` in: where it is, ``(start, length)``; None when it does not fit any more."""
        n = len(data)
        start = self.used
        if start + n > self.size:
            return None
        self._map[start:start + n] = data
        self.used = start + n
        return start, n

    def view(self, where: tuple[int, int]) -> memoryview:
        """The bytes :meth:`put` placed at ``where`` (read in place)."""
        start, n = where
        return memoryview(self._map)[start:start + n]

    def close(self) -> None:
        """Give the memory back (in this process; each copy holds it until it ends)."""
        with contextlib.suppress(BufferError):  # a view is still held: the mapping goes with the process
            self._map.close()


class Spooler:
    """Files written by a forked copy of this process while this one goes on working.

    The copy is forked once (best early in a run, while this process is still small:
    a page either process changes afterwards is copied), then handed its work through
    a pipe: lists of ``(path, bytes)``, or a function and arguments that make such a
    list there (so that the rendering, too, is done there).  A thread of the copy reads
    the pipe at once, so handing work over costs this process only the copying of the
    bytes.  The copy never touches the database or anything else of this process.

    Work is done in the order it was handed over.  :meth:`status` waits until all of it
    is done; :meth:`ask` has the copy run one of its ``commands`` after it (the answer
    is read with :meth:`answer`, so that this process can go on meanwhile).

    Processes forked from this one afterwards (workers) may hand work over too, each through
    an inbox of its own (:meth:`feeder`); :meth:`status` and the ``commands`` then wait
    until each has said it is done (:meth:`Feeder.done`) or this process has released it
    (:meth:`release`: it will send nothing more, e.g. it stopped).

    Parameters
    ----------
    write : callable
        ``write(files) -> int``: writes an iterable of ``(path, bytes)`` in the copy; how many.
    commands : dict of str to callable, optional
        What :meth:`ask` may run in the copy (made before the fork, so that they share the
        state of ``write``, such as what it wrote).
    feeders : int
        Inboxes for other processes.
    """

    def __init__(self, write: Callable[[Any], int], commands: dict[str, Callable[..., Any]] | None = None,
                 feeders: int = 0):
        ctx = multiprocessing.get_context("fork")
        pipes = [ctx.Pipe(duplex=False) for _ in range(1 + int(feeders))]
        for _, w in pipes:
            _widen(w)
        self._inbox = pipes[0][1]
        self._feeds = [w for _, w in pipes[1:]]
        self._report, report_w = ctx.Pipe(duplex=False)
        self._proc = ctx.Process(target=_spool, args=([r for r, _ in pipes], report_w, write, dict(commands or {}),
                                                      [w for _, w in pipes] + [self._report]),
                                 name="spooler", daemon=True)
        self._proc.start()
        for r, _ in pipes:
            r.close()
        report_w.close()
        self._broken: str | None = None
        self._closed = False

    def feeder(self, k: int) -> Feeder:
        """Inbox ``k`` (1, 2, ...) for a process forked after the copy (see the class)."""
        return Feeder(k, self._feeds[k - 1])

    def release(self, k: int) -> None:
        """Stop waiting for feeder ``k`` to say it is done (it will send nothing more)."""
        self._put(("done", k))

    def send(self, files: list[tuple[str, bytes]]) -> None:
        """Hand over files to write."""
        self._put(("files", files))

    def call(self, fn: Callable[..., Any], *args: Any) -> None:
        """Have the copy write the files that ``fn(*args)`` makes there (``fn`` and ``args`` must pickle)."""
        self._put(("call", fn, args))

    def ask(self, command: str, *args: Any) -> None:
        """Have the copy run ``commands[command](*args)`` once the work handed over before is done."""
        self._put(("ask", command, args))

    def answer(self) -> tuple[bool, Any]:
        """The answer to the oldest :meth:`ask` not yet answered: (True, value), or (False, what went wrong)."""
        if self._broken is not None:
            return False, self._broken
        try:
            return self._report.recv()
        except (EOFError, OSError) as exc:
            self._broken = f"the spooler process stopped ({type(exc).__name__})"
            return False, self._broken

    def status(self) -> tuple[int, float, str | None]:
        """Wait until everything handed over is written: (files, seconds the copy spent, error or None).

        An error in the copy (the first one; it writes nothing after it) or a copy that died is
        reported, not raised.
        """
        self.ask("status")
        ok, value = self.answer()
        return value if ok else (0, 0.0, value)

    def finish(self) -> tuple[int, float, str | None]:
        """:meth:`status`, then :meth:`close`."""
        try:
            return self.status()
        finally:
            self.close()

    def _put(self, message: tuple) -> None:
        if self._broken is None:
            try:
                self._inbox.send(message)
            except (OSError, ValueError) as exc:  # the copy is gone
                self._broken = f"{type(exc).__name__}: {exc}"

    def close(self) -> None:
        """Let the copy end (stopped at once, if it is still working) and release the pipes."""
        if self._closed:
            return
        self._closed = True
        self._put(("end",))
        self._proc.join(timeout=2.0)
        if self._proc.is_alive():
            self._proc.kill()
            self._proc.join()
        for conn in (self._inbox, self._report, *self._feeds):
            conn.close()


def _widen(conn) -> None:
    """Let a pipe hold up to 1 MiB (Linux; elsewhere, or above the system's limit, it stays as it is):
    a large message then crosses in a few steps, each of which waits for the reading thread's turn."""
    import fcntl

    with contextlib.suppress(OSError, AttributeError):
        fcntl.fcntl(conn.fileno(), getattr(fcntl, "F_SETPIPE_SZ", 1031), 1 << 20)


class Feeder:
    """A worker's inbox to a :class:`Spooler` (made by :meth:`Spooler.feeder` before the worker is
    forked): ``call`` as :meth:`Spooler.call`, then ``done`` once."""

    def __init__(self, k: int, conn):
        self.k, self._conn = k, conn

    def call(self, fn: Callable[..., Any], *args: Any) -> None:
        self._conn.send(("call", fn, args))

    def done(self) -> None:
        self._conn.send(("done", self.k))


def _spool(inboxes, report, write, commands, parent_ends) -> None:
    """The copy's side of :class:`Spooler`: a thread per inbox drains it, this one works."""
    import gc
    import queue
    import time

    gc.disable()  # short-lived; and a collection would touch (and so copy) every page of the parent's objects
    for conn in parent_ends:
        conn.close()
    messages: queue.SimpleQueue = queue.SimpleQueue()

    def drain(k: int, inbox):
        while True:
            try:
                msg = inbox.recv()
            except (EOFError, OSError):
                if k:  # a feeder's inbox: its process is gone (the parent releases it)
                    return
                msg = ("end",)  # the parent is gone: its files will be swept away as stale
            messages.put(msg)
            if msg[0] == "end":
                return

    for k, inbox in enumerate(inboxes):
        threading.Thread(target=drain, args=(k, inbox), name=f"spooler-inbox-{k}", daemon=True).start()
    count, error, busy = 0, None, 0.0
    waiting_for = set(range(1, len(inboxes)))  # feeders that have not said they are done
    asked: list[tuple] = []  # questions held until they have

    def answer(msg) -> None:
        name, args = msg[1], msg[2]
        if name == "status":
            reply = (True, (count, busy, error))
        else:
            try:
                reply = (True, commands[name](*args))
            except BaseException as exc:
                reply = (False, f"{type(exc).__name__}: {exc}")
        report.send(reply)

    while True:
        msg = messages.get()
        if msg[0] == "end":
            return
        if msg[0] == "done":
            waiting_for.discard(msg[1])
            if not waiting_for:
                for held in asked:
                    answer(held)
                asked.clear()
            continue
        if msg[0] == "ask":
            if waiting_for:
                asked.append(msg)
            else:
                answer(msg)
            continue
        if error is None:
            t0 = time.perf_counter()
            try:
                count += write(msg[1] if msg[0] == "files" else msg[1](*msg[2]))
            except BaseException as exc:  # reported to the parent, which then writes the files itself
                error = f"{type(exc).__name__}: {exc}"
            busy += time.perf_counter() - t0
