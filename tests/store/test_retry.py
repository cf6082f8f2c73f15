"""Work the server aborts for a conflict (serialization failure, deadlock) runs again, a bounded number of times."""

from __future__ import annotations

import threading

import pytest
from sqlalchemy import text

from advisory.store import retry


class _Aborted(Exception):
    """What the driver raises: an error carrying its SQLSTATE."""

    def __init__(self, sqlstate: str):
        super().__init__(f"aborted ({sqlstate})")
        self.sqlstate = sqlstate


class _Wrapped(Exception):
    """What SQLAlchemy raises: the driver's error as ``orig``."""

    def __init__(self, orig):
        super().__init__(str(orig))
        self.orig = orig


def test_a_conflict_is_tried_again_until_it_goes_through():
    calls = []

    def work():
        calls.append(1)
        if len(calls) < 3:
            raise _Wrapped(_Aborted("40P01" if len(calls) == 1 else "40001"))
        return "done"

    pauses = []
    assert retry.with_retries(work, sleep=pauses.append) == "done"
    assert len(calls) == 3 and len(pauses) == 2


def test_other_errors_are_not_tried_again():
    calls = []

    def work():
        calls.append(1)
        raise _Wrapped(_Aborted("23505"))  # a unique key: not the server asking for a retry

    with pytest.raises(_Wrapped):
        retry.with_retries(work, sleep=lambda _s: None)
    assert len(calls) == 1


def test_after_the_last_try_a_clear_error():
    calls = []

    def work():
        calls.append(1)
        raise _Wrapped(_Aborted("40001"))

    with pytest.raises(retry.ConflictError) as err:
        retry.with_retries(work, what="advisory obs import", attempts=4, sleep=lambda _s: None)
    assert len(calls) == 4
    msg = str(err.value)
    assert msg.startswith("advisory obs import: ") and "4 times" in msg and "SQLSTATE 40001" in msg
    assert "run it again" in msg


def test_the_command_line_says_so_in_one_line(monkeypatch, capsys):
    from advisory import cli

    def always_aborted(args):
        raise _Wrapped(_Aborted("40P01"))

    monkeypatch.setattr(retry.time, "sleep", lambda _s: None)
    real_build = cli.build_parser

    def build():
        parser = real_build()
        real_parse = parser.parse_args

        def parse(argv=None):
            args = real_parse(argv)
            args.func = always_aborted
            return args

        parser.parse_args = parse
        return parser

    monkeypatch.setattr(cli, "build_parser", build)
    code = cli.main(["calc", "dew-point", "--air-temp-c", "10", "--rel-humidity-pct", "50"])
    err = capsys.readouterr().err
    assert code == 1
    assert err.count("\n") == 1 and "deadlock" in err and "run it again" in err and "Traceback" not in err


@pytest.mark.postgresql_only(reason="a real deadlock between two transactions on the server")
def test_a_real_deadlock_on_the_server_is_retried(db):
    with db.transaction() as s:
        s.execute(text("CREATE TABLE retry_probe (id int PRIMARY KEY, n int)"))
        s.execute(text("INSERT INTO retry_probe VALUES (1, 0), (2, 0)"))
    barrier = threading.Barrier(2, timeout=30)
    tries = {1: 0, 2: 0}
    errors = []

    def worker(first: int, second: int):
        def work():
            tries[first] += 1
            with db.transaction() as s:
                s.execute(text("UPDATE retry_probe SET n = n + 1 WHERE id = :i"), {"i": first})
                if tries[first] == 1:
                    barrier.wait()  # both hold their first row: each now waits for the other's
                s.execute(text("UPDATE retry_probe SET n = n + 1 WHERE id = :i"), {"i": second})

        try:
            retry.with_retries(work, what="probe")
        except Exception as exc:  # noqa: BLE001 - reported below
            errors.append(exc)

    threads = [threading.Thread(target=worker, args=(1, 2)), threading.Thread(target=worker, args=(2, 1))]
    for t in threads:
        t.start()
    for t in threads:
        t.join(timeout=60)
    assert errors == []
    assert sorted(tries.values()) == [1, 2]  # the server aborted one of them once; it went through again
    with db.transaction() as s:
        assert s.execute(text("SELECT n FROM retry_probe ORDER BY id")).scalars().all() == [2, 2]
