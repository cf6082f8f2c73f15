"""Work the database server asks to be done again: a serialization failure or a deadlock.

PostgreSQL aborts a transaction that lost a conflict with another one at the same time
(SQLSTATE ``40001``, could not serialize; ``40P01``, deadlock detected) and expects the
client to run it again.  :func:`with_retries` does so a bounded number of times, with short
random pauses, then gives up with :class:`ConflictError`, one line that says what happened and
what to do.  Only work that is one transaction, or safe to repeat (an import, a keyed run), is
handed to it.  SQLite never reports these (its writers wait for each other).
"""

from __future__ import annotations

import logging
import random
import time
from collections.abc import Callable
from typing import TypeVar

from advisory.errors import AdvisoryError

log = logging.getLogger("advisory.store.retry")

T = TypeVar("T")

#: SQLSTATE codes the server asks the client to retry, and what they are called.
RETRYABLE = {"40001": "could not serialize with other work at the same time",
             "40P01": "deadlock with other work at the same time"}
#: Tries in all (the first and the retries).
ATTEMPTS = 5


class ConflictError(AdvisoryError):
    """The server kept aborting the work for conflicts with other work at the same time."""


def retryable(exc: BaseException) -> str | None:
    """The SQLSTATE of an error the server asks to retry (``40001`` or ``40P01``), else None."""
    seen = set()
    while exc is not None and id(exc) not in seen:
        seen.add(id(exc))
        code = getattr(exc, "sqlstate", None) or getattr(getattr(exc, "orig", None), "sqlstate", None)
        if code in RETRYABLE:
            return code
        exc = getattr(exc, "orig", None) or exc.__cause__ or exc.__context__
    return None


def with_retries(fn: Callable[[], T], *, what: str = "the work", attempts: int = ATTEMPTS,
                 pause_s: float = 0.05, sleep: Callable[[float], None] = time.sleep) -> T:
    """``fn()``, tried again while the server aborts it with a retryable error, at most ``attempts`` times.

    Raises
    ------
    ConflictError
        After ``attempts`` tries that all ended so (the last error is its cause).
    """
    for k in range(1, attempts + 1):
        try:
            return fn()
        except Exception as exc:
            code = retryable(exc)
            if code is None:
                raise
            if k == attempts:
                raise ConflictError(
                    f"{what}: the database server aborted it {attempts} times ({RETRYABLE[code]}, "
                    f"SQLSTATE {code}); nothing of the last try was kept: run it again") from exc
            log.info("%s: %s (SQLSTATE %s), try %d of %d", what, RETRYABLE[code], code, k + 1, attempts)
            sleep(pause_s * (2 ** (k - 1)) * (0.5 + random.random()))
    raise AssertionError("unreachable")
