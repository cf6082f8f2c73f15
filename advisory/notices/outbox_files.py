"""Outbox files: their names, whole-or-nothing writes, and files written ahead of delivery.

A large run writes some outbox files ahead under hidden ("staged") names while it stores its
notices (:func:`staged_path`, :func:`stage_outbox`), publishes them after the commit
(:func:`publish_staged`) and removes what a stopped run left (:func:`discard_staged`).  The
delivery itself (:mod:`advisory.notices.channels`) writes the rest with the helpers here.
"""

from __future__ import annotations

import contextlib
import hashlib
import logging
import os
import threading
import time
from collections.abc import Callable, Iterable, Iterator, Sequence
from pathlib import Path
from typing import Any

from advisory.notices import words as w
from advisory.notices.notice_data import BlockNotice, FarmSummary
from advisory.notices.render import EXTENSIONS, render

#: The delivery's one logger, whichever of its modules writes (the demo quiets it by this name).
log = logging.getLogger("advisory.notices.deliver")

#: Formats written to the outbox by default.
OUTBOX_FORMATS = ("text", "markdown", "html", "json")


#: Outbox folders this process has made (or found) already.
_FOLDERS: set[str] = set()


def _folder(path: str | Path) -> None:
    """Make ``path`` (and its parents) unless this process did so already."""
    key = str(path)
    if key not in _FOLDERS:
        os.makedirs(key, exist_ok=True)
        if len(_FOLDERS) > 4096:
            _FOLDERS.clear()
        _FOLDERS.add(key)


def outbox_base(outbox: Path, n: BlockNotice | FarmSummary, key: str | None = None) -> Path:
    """Folder and file stem of a notice in the outbox (add ``.txt``, ``.html`` ...).

    ``key`` is the stored notice's key (``Notice.key``; default the composed
    notice's own key): its hash keeps every stored notice in its own files.
    """
    return Path(_base(str(outbox), n, key))


def _base(outbox: str, n: BlockNotice | FarmSummary, key: str | None = None) -> str:
    """:func:`outbox_base` as a string."""
    return _stem(outbox, key or n.key, n.farm, n.block if isinstance(n, BlockNotice) else None, n.kind,
                 n.revision, n.night)


def _stem(outbox: str, key: str, farm: str, block: str | None, kind: str, revision: int, night: str) -> str:
    """:func:`_base` from the notice's parts (``block`` None for a farm summary)."""
    h = hashlib.sha256(key.encode("utf-8")).hexdigest()[:8]
    who = "farm-summary" if block is None else w.slug(block, 40, "block")
    stem = f"{w.slug(farm, 24, 'farm')}_{who}_{w.slug(kind, 8)}_r{revision}_{h}"
    return os.path.join(_night_folder(outbox, night), stem)


def _night_folder(outbox: str, night: str) -> str:
    """The outbox folder of a night's notices (the address of an outbox delivery)."""
    return os.path.join(outbox, w.slug(night, 10, "undated"))


def _put(path: str | Path, data: bytes) -> None:
    with open(path, "wb") as fh:
        fh.write(data)


def _write(path: str | Path, data: bytes) -> None:
    """Write a file whole or not at all (a temporary name, then an atomic rename); the folder must exist."""
    head, name = os.path.split(str(path))
    tmp = os.path.join(head, f".{name}.{os.getpid()}-{threading.get_ident()}.tmp")
    try:
        try:
            _put(tmp, data)
        except FileNotFoundError:  # the folder was removed since this process made it
            _FOLDERS.discard(head)
            _folder(head)
            _put(tmp, data)
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        raise



# --------------------------------------------------------------------------------------------------
# Outbox files written ahead of delivery ("staged")
# --------------------------------------------------------------------------------------------------

#: Ending of a staged outbox file's hidden name.
STAGED_SUFFIX = ".staged"
#: A staged file older than this [s] was left by a run that stopped; the next staging removes it.
STALE_STAGED_S = 3600.0


def staged_path(path: str, token: str) -> str:
    """The hidden name under which ``path`` is staged by the run with ``token``."""
    head, name = os.path.split(path)
    return os.path.join(head, f".{name}.{token}{STAGED_SUFFIX}")


#: Outbox formats of a block notice written ahead: those at hand without rendering (the JSON
#: joined from bytes, the short text); the others take templates (and the HTML the chart, which
#: depends on how each notice goes out), rendered by the delivery's writers in parallel.
STAGED_FORMATS = ("json", "sms")
STAGED_EXTENSIONS = frozenset(EXTENSIONS[f] for f in STAGED_FORMATS)


def stageable(formats: Sequence[str]) -> tuple[str, ...]:
    """The outbox formats of a block notice that are written ahead (see :data:`STAGED_FORMATS`)."""
    return tuple(f for f in formats if f in STAGED_FORMATS)


#: A block notice as handed to the writer of files written ahead (:func:`stage_item`): plain values,
#: quick to send to another process.
StageItem = tuple  # (key, farm, block, kind, revision, night, short text, JSON file or where it is)


def stage_item(key: str, n: BlockNotice, json_file: Any) -> StageItem:
    """What :func:`staged_block_files` needs of a block notice: its stored key (``Notice.key``),
    the parts of its file names, its short text, and its JSON file (the bytes, or where they are
    in memory shared with the writer: see :func:`stage_outbox`)."""
    return (key, n.farm, n.block, n.kind, n.revision, n.night, n.sms, json_file)


def staged_block_files(outbox: str | Path, items: Iterable[StageItem], formats: Sequence[str], token: str
                       ) -> Iterator[tuple[str, Any, str]]:
    """The hidden names and contents of block notices' outbox files written ahead, and whose they are
    (the notice's key).

    A large run has another process write these while it stores the notices: the files
    may not be published before the notices are stored (a stop in between would leave files
    for notices that were never stored, and the next run would store and send them again), so
    they wait under hidden names (:func:`staged_path`) until the writer moves them to their own
    names after the commit (:func:`publish_staged`); the delivery moves or writes whatever is
    left (:func:`~advisory.notices.channels._send_outbox` with ``staged``).

    Parameters
    ----------
    outbox : path
    items : iterable of StageItem
        Each block notice (:func:`stage_item`).
    formats : sequence of str
        The outbox formats (only those of :func:`stageable` are written ahead).
    token : str
        The run's own mark in the hidden names, so that a run only ever publishes its own files.
    """
    outbox = str(outbox)
    formats = stageable(formats)
    for key, farm, block, kind, revision, night, sms, json_data in items:
        base = _stem(outbox, key, farm, block, kind, revision, night)
        for fmt in formats:
            data = json_data if fmt == "json" else sms.encode("utf-8")
            yield staged_path(f"{base}.{EXTENSIONS[fmt]}", token), data, key


def _summary_parts(n: FarmSummary, formats: Sequence[str], render_fmt: Callable[[str], str]
                   ) -> list[tuple[str, Callable[[], str]]]:
    """A farm summary's outbox files: (ending of the name, its text when asked), each format
    and the run sheet."""
    parts: list[tuple[str, Callable[[], str]]] = [
        (f".{EXTENSIONS[fmt]}", lambda fmt=fmt: render_fmt(fmt)) for fmt in formats]
    if n.runsheet.get("csv"):
        parts.append((".runsheet.csv", lambda: n.runsheet["csv"]))
    return parts


def staged_summary_files(outbox: str | Path, summaries: Sequence[tuple[str, FarmSummary]], token: str
                         ) -> list[tuple[str, bytes, str]]:
    """The hidden names and contents of farm summaries' outbox files written ahead (all of them,
    rendered: see :func:`staged_block_files`), and whose they are; ``summaries`` are (stored key, summary)."""
    out = []
    for key, n in summaries:
        base = _base(str(outbox), n, key)
        out += [(staged_path(base + end, token), text().encode("utf-8"), key)
                for end, text in _summary_parts(n, OUTBOX_FORMATS, lambda fmt, n=n: render(n, fmt))]
    return out


def stage_outbox(files: Iterable[tuple[str, Any, str]], swept: set[str] | None = None,
                 written: list[tuple[str, str]] | None = None, arena=None) -> int:
    """Write outbox files ahead under their hidden names (:func:`staged_block_files`); how many.

    Folders are made as needed; in each folder met for the first time (``swept`` keeps
    them across calls) the staged files a stopped run left behind are removed first
    (:data:`STALE_STAGED_S`).  ``files`` are (hidden name, contents, notice key); the
    contents are bytes, or where they are in ``arena`` (:class:`advisory.forking.Arena`).
    ``written`` gets (notice key, hidden name) of each file (for :func:`publish_staged`).
    """
    swept = set() if swept is None else swept
    count = 0
    for path, data, key in files:
        head = os.path.dirname(path)
        if head not in swept:
            swept.add(head)
            _folder(head)
            discard_staged(head, older_than_s=STALE_STAGED_S)
        _put(path, arena.view(data) if isinstance(data, tuple) else data)
        if written is not None:
            written.append((key, path))
        count += 1
    return count


def publish_staged(written: list[tuple[str, str]], token: str) -> set[str]:
    """Move files written ahead (``written``: notice key and hidden name) to their own names, once
    their notices are stored; the keys of the notices all of whose files are now published.

    A file that cannot be moved leaves its notice out (the delivery then writes that notice's files
    itself).
    """
    mark = f".{token}{STAGED_SUFFIX}"
    done: set[str] = set()
    failed: set[str] = set()
    for key, path in written:
        head, hidden = os.path.split(path)
        try:
            os.replace(path, os.path.join(head, hidden[1:-len(mark)]))
            done.add(key)
        except OSError as exc:
            log.warning("outbox file written ahead not published (%s): %s", exc, path)
            failed.add(key)
    return done - failed


def discard_staged(folder: str | Path, token: str | None = None, *, older_than_s: float | None = None) -> int:
    """Remove staged files from an outbox folder: a run's own (``token``) or any older than ``older_than_s``."""
    now = time.time()
    removed = 0
    mark = None if token is None else f".{token}{STAGED_SUFFIX}"
    try:
        entries = list(os.scandir(folder))
    except FileNotFoundError:
        return 0
    for e in entries:
        if not e.name.endswith(STAGED_SUFFIX) or (mark is not None and not e.name.endswith(mark)):
            continue
        with contextlib.suppress(OSError):
            if older_than_s is None or now - e.stat().st_mtime > older_than_s:
                os.unlink(e.path)
                removed += 1
    return removed


def _publish(path: str, token: str | None) -> bool:
    """Move the run's staged file for ``path`` to its own name; False when none was staged."""
    if not token:
        return False
    try:
        os.replace(staged_path(path, token), path)
        return True
    except FileNotFoundError:
        return False
