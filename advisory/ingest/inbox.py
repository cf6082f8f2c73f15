"""Station inboxes: import every new file a logger drops, then file it away.

A station with an ``inbox`` folder gets its files imported by :func:`sweep`
(``advisory obs sweep``, and the scheduler before each run).  Each file is
imported in its own transaction through
:func:`advisory.ingest.observations.import_file`, then moved:

* to ``<inbox>/done/`` when it was imported (or held nothing new);
* to ``<inbox>/rejected/`` when it is malformed, with ``<name>.reason.txt``
  beside it saying why (the message names the bad lines).

A file is left where it is, to be taken by a later sweep, when

* it was modified less than ``settle_seconds`` ago (default
  :data:`SETTLE_SECONDS`, 60 s): a logger or a copy may still be writing it;
* its size or modification time changed while it was being read;
* its name marks it as unfinished or private: it starts with ``.`` or ends in
  one of :data:`PARTIAL_SUFFIXES` (``.tmp``, ``.part`` ...);
* an internal fault (say, the database is locked) stopped the import; the
  result says so.

Files are taken oldest first, so where two files disagree about a reading the
earlier one wins (the later gets a conflict in its summary).
"""

from __future__ import annotations

import datetime as dt
import os
import time
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import Any

from sqlalchemy import select

from advisory.errors import InputError
from advisory.ingest.observations import import_file
from advisory.store.schema import Station

#: A file must be this many seconds old (since its last modification) to be taken.
SETTLE_SECONDS = 60.0
#: Names ending in these are files still being written or copied.
PARTIAL_SUFFIXES = (".tmp", ".temp", ".part", ".partial", ".crdownload", ".filepart", ".lock", "~")
DONE = "done"
REJECTED = "rejected"


@dataclass
class SweepResult:
    """What happened to one file (or to a station's inbox as a whole).

    ``status`` is ``imported`` (moved to done/), ``rejected`` (moved to
    rejected/ with a reason file), ``waiting`` (left for a later sweep: still
    being written), ``error`` (left in place: an internal fault) or
    ``no_inbox`` (the station's folder does not exist).
    """

    station_code: str
    file: str
    status: str
    reason: str = ""
    moved_to: str | None = None
    summary: dict[str, Any] | None = None

    def as_dict(self) -> dict[str, Any]:
        return asdict(self)

    def text(self) -> str:
        name = self.file if self.status == "no_inbox" else (Path(self.file).name or self.file)
        head = f"{self.station_code}: {name}: {self.status}"
        if self.status == "imported" and self.summary:
            s = self.summary
            detail = ("nothing new" if s.get("already_imported") else
                      f"{s['rows_added']} added, {s['rows_filled']} filled in, {s['conflicts']} conflicts")
            return f"{head} ({detail})"
        return f"{head}: {self.reason}" if self.reason else head


def _now_ts(now: Any) -> float:
    if now is None:
        return time.time()
    if isinstance(now, int | float):
        return float(now)
    if isinstance(now, dt.datetime):
        if now.tzinfo is None:
            raise ValueError("now must be timezone-aware")
        return now.timestamp()
    raise TypeError(f"now must be a datetime or a POSIX timestamp, not {type(now).__name__}")


def _free_name(folder: Path, name: str) -> Path:
    """``folder/name``, or ``folder/stem-2.ext`` ... when that is taken."""
    target = folder / name
    if not target.exists() and not (folder / f"{name}.reason.txt").exists():
        return target
    stem, dot, ext = name.partition(".")
    k = 2
    while True:
        candidate = folder / (f"{stem}-{k}{dot}{ext}")
        if not candidate.exists():
            return candidate
        k += 1


def _candidates(inbox: Path) -> list[tuple[Path, os.stat_result]]:
    out = []
    for entry in inbox.iterdir():
        name = entry.name
        if name.startswith(".") or name.lower().endswith(PARTIAL_SUFFIXES):
            continue
        try:
            st = entry.stat()
        except OSError:
            continue
        if entry.is_file():
            out.append((entry, st))
    out.sort(key=lambda e: (e[1].st_mtime_ns, e[0].name))
    return out


def sweep(db: Any, now: Any = None, *, settle_seconds: float = SETTLE_SECONDS,
          stations: list[str] | None = None) -> list[SweepResult]:
    """Import every settled file in every station inbox, and file it away.

    Parameters
    ----------
    db : Database
        The store (each file is imported in its own transaction).
    now : datetime (aware) or float, optional
        The current time, for the settle test (default: the clock).
    settle_seconds : float
        A file modified less than this long before ``now`` is left for later.
    stations : list of str, optional
        Only these station codes (default: every station with an inbox).

    Returns
    -------
    list of SweepResult
        One per file looked at (and one per missing inbox folder), in the
        order handled.
    """
    now_s = _now_ts(now)
    with db.transaction() as session:
        q = select(Station.code, Station.inbox).where(Station.inbox.is_not(None)).order_by(Station.code)
        rows = [(c, i) for c, i in session.execute(q).all() if i and (stations is None or c in stations)]
    results: list[SweepResult] = []
    for code, inbox_text in rows:
        inbox = Path(inbox_text).expanduser()
        if not inbox.is_dir():
            results.append(SweepResult(code, str(inbox), "no_inbox", "the inbox folder does not exist"))
            continue
        for path, st in _candidates(inbox):
            results.append(_take(db, code, path, st, now_s, settle_seconds))
    return results


def _take(db: Any, code: str, path: Path, st: os.stat_result, now_s: float, settle_seconds: float) -> SweepResult:
    age = now_s - st.st_mtime
    if age < settle_seconds:
        return SweepResult(code, str(path), "waiting",
                           f"modified {max(age, 0):.0f} s ago; taken once unchanged for {settle_seconds:.0f} s")
    try:
        data = path.read_bytes()
        after = path.stat()
    except OSError as exc:
        return SweepResult(code, str(path), "error", f"cannot read: {exc.strerror or exc}")
    if (after.st_size, after.st_mtime_ns) != (st.st_size, st.st_mtime_ns) or len(data) != st.st_size:
        return SweepResult(code, str(path), "waiting", "changed while being read; taken by a later sweep")
    try:
        summary = import_file(db, code, path, data=data)
    except InputError as exc:
        return _reject(code, path, str(exc), now_s)
    except Exception as exc:  # an internal fault: leave the file for the next sweep
        return SweepResult(code, str(path), "error", f"{type(exc).__name__}: {exc}")
    done = path.parent / DONE
    done.mkdir(exist_ok=True)
    target = _free_name(done, path.name)
    try:
        path.replace(target)
    except OSError as exc:  # imported all the same; a later sweep finds nothing new in it
        return SweepResult(code, str(path), "imported", f"imported, but not moved: {exc.strerror or exc}",
                           None, summary.as_dict())
    return SweepResult(code, str(path), "imported", "", str(target), summary.as_dict())


def _reject(code: str, path: Path, message: str, now_s: float) -> SweepResult:
    folder = path.parent / REJECTED
    folder.mkdir(exist_ok=True)
    target = _free_name(folder, path.name)
    when = dt.datetime.fromtimestamp(now_s, dt.UTC).strftime("%Y-%m-%d %H:%M:%SZ")
    reason = (f"Rejected {when} for station {code}; nothing from this file was stored.\n{message}\n"
              "Fix the file and put it back in the inbox (or import it with `advisory obs import`).\n")
    try:
        path.replace(target)
        Path(f"{target}.reason.txt").write_text(reason, encoding="utf-8")
    except OSError as exc:
        return SweepResult(code, str(path), "error", f"{message} (and it could not be moved: {exc.strerror or exc})")
    return SweepResult(code, str(path), "rejected", message, str(target))
