"""Outbox files written ahead while a large run stores (:class:`_Staging`), through the outbox
writer of :mod:`advisory.forking`; published only after the commit.
"""

from __future__ import annotations

import contextlib
import logging
import os
from collections.abc import Collection
from typing import Any

from sqlalchemy.orm import Session

from advisory.notices import notice_data
from advisory.runs import sizes
from advisory.store import db as db_mod

log = logging.getLogger(__name__)


#: Block notices handed over to the writer at a time.
_STAGE_CHUNK = 500
#: Memory shared with the writer for each block's JSON file [bytes] (address space, taken only as
#: used; a notice is about 10 kB; the files that do not fit go through the pipe).
_ARENA_PER_BLOCK = 32 * 1024


class _Staging:
    """A large run's outbox files, written ahead by a forked copy of the run's process.

    Started once the run knows its blocks (while the process is still small: the copy
    shares its memory, and a page either process changes afterwards is copied), the copy
    is handed each share's block notices as soon as they are composed (by this process,
    the JSON through shared memory; by each worker, through an inbox of its own) and then
    the farm summaries, and writes them while the run goes on: the block notices' JSON and
    short text, and every file of the farm summaries (rendered there), all under hidden
    names (:func:`advisory.notices.outbox_files.staged_path`).  After the commit it moves them to
    their own names (:meth:`publish`) and copies the run's SQLite log into the database
    file (:meth:`checkpoint`); the delivery records what is in place and writes whatever is
    missing.  The other formats of a block notice take templates (and a chart, which
    depends on how each notice goes out): the delivery's writers render those, in parallel.

    A copy rather than a thread: a thread of this process would share one interpreter
    lock with the inserts, and slowed them by more than it saved.  Nothing the copy
    writes is visible before the delivery publishes it; a run that fails removes its
    own hidden files, and a stopped run's are removed by the next run that writes ahead
    once they are an hour old.
    """

    def __init__(self, settings, formats: tuple[str, ...], blocks: int, feeders: int = 0):
        import secrets

        from advisory import forking
        from advisory.notices import outbox_files

        self.outbox, self.formats, self.token = str(settings.outbox), formats, secrets.token_hex(6)
        #: Outbox folders given files (for :meth:`discard`).
        self.folders: set[str] = set()
        #: Files the copy wrote and the time it spent writing [s] (known after :meth:`wait`).
        self.files, self.seconds = 0, 0.0
        #: Whether :meth:`wait` was called (by the delivery, or after a failed run).
        self.used = False
        self._token: str | None = None
        # the copy's own record of the folders it swept and of the files it wrote
        swept: set[str] = set()
        written: list[tuple[str, str]] = []
        #: The block notices' JSON files, placed where the copy reads them (not sent through the pipe).
        self._arena = forking.Arena(blocks * _ARENA_PER_BLOCK)
        arena = self._arena
        self._spooler = forking.Spooler(
            lambda files: outbox_files.stage_outbox(files, swept, written, arena),
            {"publish": lambda token: outbox_files.publish_staged(written, token), "checkpoint": db_mod.checkpoint},
            feeders=feeders)
        #: Worker inboxes not settled yet (see :meth:`settle`).
        self._feeders = set(range(1, feeders + 1))
        #: The run's database connection whose automatic checkpoints wait (see :meth:`defer_checkpoints`).
        self._deferred: tuple[Any, int] | None = None
        self._db_file: str | None = None
        self._checkpointing = False
        self._handed: set[str] = set()  # keys of the block notices handed over or written by workers

    def write_share(self, k: int, blocks: list[tuple[str, Any, tuple[bytes, bytes]]]) -> bool:
        """In worker process ``k`` (1, 2, ...): hand its own block notices to the writer through the
        worker's own inbox, as :meth:`hand_over` does for the run's process; whether all went (if not,
        the run's process hands them over)."""
        from advisory.notices import outbox_files

        if not self.formats or k not in self._feeders:
            return False
        feeder = self._spooler.feeder(k)
        try:
            self._send_blocks(feeder, [outbox_files.stage_item(key, n, self._json(parts)) for key, n, parts in blocks])
            feeder.done()
        except (OSError, ValueError) as exc:  # the writer is gone: the run's process finds out too
            log.warning("a worker could not hand its outbox files to the writer (%s)", exc)
            return False
        return True

    def _json(self, parts: tuple[bytes, bytes]) -> bytes:
        """A block notice's JSON file from its stored JSON and its payload's (empty without JSON)."""
        return notice_data.json_file(*parts) if "json" in self.formats else b""

    def _send_blocks(self, inbox, items: list) -> None:
        """Have the writer write ``items`` (stage items), a few hundred at a time, through ``inbox``
        (the spooler, or a worker's feeder)."""
        from advisory.notices import outbox_files

        for j in range(0, len(items), _STAGE_CHUNK):
            inbox.call(outbox_files.staged_block_files, self.outbox, items[j:j + _STAGE_CHUNK], self.formats,
                       self.token)

    def settle(self, fed: Collection[int]) -> None:
        """The workers are back: stop waiting for those that did not hand their files over (``fed``
        are those that did and said so)."""
        for k in sorted(self._feeders - set(fed)):
            self._spooler.release(k)
        self._feeders.clear()

    def hand_over(self, blocks: list[tuple[str, Any, tuple[bytes, bytes]]],
                  summaries: list[tuple[str, Any]] = (), fed: Collection[str] = ()) -> None:
        """Give the writer composed notices (as soon as they are composed; each once): ``blocks`` are
        each block notice's key, the notice, and its stored JSON and its payload's (joined by
        :func:`advisory.notices.notice_data.json_file`); ``summaries`` each farm summary's key and the
        summary; ``fed`` the keys of notices worker processes handed over themselves
        (:meth:`write_share`), which are left out, as are those handed over before."""
        from advisory.notices import outbox_files, words

        self._handed |= set(fed)
        nights = {n.night for _, n, _ in blocks} | {n.night for _, n in summaries}
        self.folders |= {os.path.join(self.outbox, words.slug(night, 10, "undated")) for night in nights}
        if self.formats:  # plain values, quick to send; the names are made there
            put, handed = self._arena.put, self._handed
            items = []
            for key, n, parts in blocks:
                if key in handed:
                    continue
                handed.add(key)
                data = self._json(parts)
                items.append(outbox_files.stage_item(key, n, put(data) or data))
            self._send_blocks(self._spooler, items)
        if summaries:  # rendered there
            self._spooler.call(outbox_files.staged_summary_files, self.outbox, list(summaries), self.token)

    def wait(self) -> str | None:
        """Wait for the writer; the token of its files, or None when it failed (the delivery then
        writes every file itself)."""
        if not self.used:
            self.used = True
            self.settle(())  # (after a failure before the workers were back: nothing more will come)
            self.files, self.seconds, error = self._spooler.status()
            if error is not None:
                log.warning("outbox files written ahead are not used (%s); the delivery writes them", error)
                self.discard()
            else:
                self._token = self.token
        return self._token

    def publish(self) -> None:
        """Have the writer move its files to their own names (the notices are stored); see :meth:`published`."""
        if self._token:
            self._spooler.ask("publish", self._token)

    def published(self) -> set[str]:
        """After :meth:`publish`: the keys of the notices all of whose files written ahead are published
        (none, if the writer failed: the delivery then moves or writes each file itself)."""
        if not self._token:
            return set()
        ok, keys = self._spooler.answer()
        if not ok:
            log.warning("outbox files written ahead: publishing failed (%s); the delivery does it", keys)
            return set()
        return keys

    def defer_checkpoints(self, session: Session, url: str) -> None:
        """Keep the run's SQLite connection from copying its write-ahead log into the database file
        at its commits (about as much as the run wrote: a tenth of a second on a RAM disk, more on a
        disk): the writer does it after the commit, while the delivery goes on (:meth:`checkpoint`).
        Put back by :meth:`discard`."""
        self._db_file = db_mod.sqlite_file(url)
        if self._db_file is None:
            return
        raw = session.connection().connection.dbapi_connection
        before = raw.execute("PRAGMA wal_autocheckpoint").fetchone()[0]
        raw.execute("PRAGMA wal_autocheckpoint=0")
        self._deferred = (raw, int(before))

    def checkpoint(self) -> None:
        """After the commit: have the writer copy the log into the database file (see
        :func:`advisory.store.db.checkpoint`); its answer is read by :meth:`discard`."""
        if self._deferred is not None:
            self._spooler.ask("checkpoint", self._db_file)
            self._checkpointing = True

    def discard(self) -> None:
        """Let the writer end (after its checkpoint), put the connection's checkpoints back, and
        remove whatever the delivery did not use (nothing, when every notice was delivered)."""
        from advisory.notices import outbox_files

        if self._checkpointing:
            self._checkpointing = False
            ok, answer = self._spooler.answer()
            if not ok:
                log.warning("checkpoint after the run failed (%s); the next commit does it", answer)
        if self._deferred is not None:
            raw, before = self._deferred
            self._deferred = None
            with contextlib.suppress(Exception):  # the connection may be gone with a failed run
                raw.execute(f"PRAGMA wal_autocheckpoint={int(before)}")
        self._spooler.close()
        self._arena.close()
        for folder in self.folders:
            outbox_files.discard_staged(folder, self.token)


def _start_staging(n_blocks: int, settings) -> _Staging | None:
    """A :class:`_Staging` for a run of ``n_blocks`` blocks, when it is large enough and may fork."""
    from advisory import forking
    from advisory.notices import outbox_files

    if n_blocks < sizes.STAGE_OUTBOX_FROM or not forking.can_fork():
        return None
    formats = outbox_files.stageable(tuple(getattr(settings, "outbox_formats", None) or outbox_files.OUTBOX_FORMATS))
    workers = int(getattr(settings, "workers", 1) or 1)
    return _Staging(settings, formats, n_blocks, feeders=max(0, workers - 1))
