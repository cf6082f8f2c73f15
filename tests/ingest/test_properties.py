"""Property-based tests: random and broken files never give a traceback nor a half-written database,
and how readings are split into files does not change what is stored."""

from __future__ import annotations

import shutil
import tempfile

import numpy as np
import pandas as pd
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from advisory.errors import InputError
from advisory.ingest.observations import StationInfo, import_file, load_observations, parse_observation_bytes
from advisory.store.db import Database
from tests.ingest.conftest import db_state, station_id

NY = StationInfo(id=1, code="ST1", timezone="America/New_York")
HEADERS = ["time", "time_utc", "air_temp_c", "air_temp_f", "dew_point_c", "rel_humidity_pct", "wind_speed_ms",
           "wind_speed_mph", "cloud_cover_pct", "upper_air_temp_c", "battery_v", "", "Time", "air temp"]

times = st.one_of(
    st.datetimes(min_value=pd.Timestamp("1990-01-01").to_pydatetime(),
                 max_value=pd.Timestamp("2035-12-31").to_pydatetime()).map(lambda d: d.isoformat()),
    st.datetimes(min_value=pd.Timestamp("2024-03-10").to_pydatetime(),
                 max_value=pd.Timestamp("2024-11-04").to_pydatetime()).map(lambda d: d.strftime("%Y-%m-%d %H:%M")),
    st.sampled_from(["2024-11-03 01:30", "2024-03-10 02:30", "2024-04-01T00:00:00Z", "2024-04-01T00:00:00+05:30",
                     "24:00", "2024-02-30T00:00:00Z", "9999-01-01T00:00:00Z", "0001-01-01T00:00Z", "", " ", "NaN",
                     "1e12", "2024-04-01T00:00:00+25:00", "2024-04-01T00:00:00.5-04:00"]),
    st.text(max_size=12),
)
numbers = st.one_of(
    st.floats(allow_nan=True, allow_infinity=True).map(repr),
    st.integers(-10**20, 10**20).map(str),
    st.sampled_from(["", "NA", "nan", "-9999", "1,5", "1e400", "−3", "0x10", "   ", "\"4\"", "TRUE"]),
    st.text(max_size=6),
)


@st.composite
def csv_text(draw) -> str:
    cols = draw(st.lists(st.sampled_from(HEADERS), min_size=1, max_size=6))
    sep = draw(st.sampled_from([",", ",", ";", "\t"]))
    lines = []
    if draw(st.booleans()):
        lines.append(draw(st.sampled_from(["# ambiguous=infer", "# nonexistent=before", "# utc_offset=-05:00",
                                           "# encoding=latin-1", "# missing=-9999", "# comment", "#bogus=1"])))
    lines.append(sep.join(cols))
    for _ in range(draw(st.integers(0, 12))):
        row = [draw(times) if c.lower().startswith("time") else draw(numbers) for c in cols]
        extra = draw(st.integers(-1, 1))
        if extra > 0:
            row.append("x")
        elif extra < 0 and row:
            row.pop()
        lines.append(sep.join(row))
    return draw(st.sampled_from(["\n", "\r\n"])).join(lines) + draw(st.sampled_from(["", "\n", "\n\n"]))


@settings(max_examples=150, deadline=None)
@given(st.one_of(csv_text().map(lambda s: s.encode("utf-8", "surrogatepass")), st.binary(max_size=200)))
def test_random_input_is_read_or_refused_cleanly(raw):
    try:
        p = parse_observation_bytes(raw, NY, file_name="random.csv")
    except InputError as exc:
        assert "random.csv" in str(exc)
        return
    f = p.frame
    assert f.index.is_monotonic_increasing and not f.index.has_duplicates
    assert str(f.index.tz) == "UTC" and len(f) > 0


def _valid_series(n: int, seed: int) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    t = pd.date_range("2024-04-01", periods=n, freq="10min", tz="UTC")
    air = np.round(8 + np.cumsum(rng.normal(0, 0.3, n)), 1)
    air[rng.integers(0, n, 2)] += 12  # spikes
    k = int(rng.integers(0, max(1, n - 40)))
    air[k:k + 40] = air[k]  # a stuck stretch of 6 h 30 min
    rh = np.clip(np.round(70 + np.cumsum(rng.normal(0, 1, n))), 5, 100)
    return pd.DataFrame({"time": [x.isoformat() for x in t], "air_temp_c": air, "rel_humidity_pct": rh})


class _Db:
    """A fresh copy of the template database in a private folder."""

    def __init__(self, template):
        self.template = template
        self.dir = tempfile.mkdtemp(prefix="prop-db-")
        self.url = template.copy(self.dir)
        self.db = Database(self.url, check=False)  # a copy of a migrated template

    def close(self):
        self.db.dispose()
        self.template.drop(self.url)
        shutil.rmtree(self.dir, ignore_errors=True)


def _mutate(text: str, data) -> bytes:
    raw = text.encode()
    kind = data.draw(st.sampled_from(["truncate", "insert", "delete_line", "dup_line", "bad_byte", "swap_header",
                                      "garbage_cell", "extra_field"]))
    lines = raw.split(b"\n")
    i = data.draw(st.integers(0, max(0, len(lines) - 1)))
    if kind == "truncate":
        return raw[: data.draw(st.integers(0, len(raw)))]
    if kind == "insert":
        pos = data.draw(st.integers(0, len(raw)))
        return raw[:pos] + data.draw(st.binary(min_size=1, max_size=5)) + raw[pos:]
    if kind == "delete_line":
        del lines[i]
    elif kind == "dup_line":
        lines.insert(i, lines[i].replace(b".", b"5", 1))
    elif kind == "bad_byte":
        lines[i] += b"\xff"
    elif kind == "swap_header":
        lines[0] = b"when,temp"
    elif kind == "garbage_cell":
        lines[i] = lines[i].replace(b",", b",zz", 1)
    else:
        lines[i] += b",1"
    return b"\n".join(lines)


@settings(max_examples=30, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(data=st.data())
def test_broken_files_never_half_write(obs_template, tmp_path, data):
    fresh = _Db(obs_template)
    try:
        db = fresh.db
        base = _valid_series(data.draw(st.integers(5, 60)), data.draw(st.integers(0, 2**16)))
        import_file(db, "ST1", "first.csv", data=base.iloc[: len(base) // 2].to_csv(index=False).encode())
        raw = _mutate(base.to_csv(index=False), data)
        before = db_state(db)
        try:
            import_file(db, "ST1", "broken.csv", data=raw, replace=data.draw(st.booleans()))
        except InputError as exc:
            assert "broken.csv" in str(exc)
            assert db_state(db) == before
    finally:
        fresh.close()


@settings(max_examples=15, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(n=st.integers(20, 240), seed=st.integers(0, 2**16), cuts=st.lists(st.floats(0, 1), min_size=1, max_size=3),
       overlap=st.integers(0, 30), reverse=st.booleans())
def test_split_files_store_the_same_as_one_file(obs_template, n, seed, cuts, overlap, reverse):
    series = _valid_series(n, seed)
    edges = sorted({0, n, *(int(c * n) for c in cuts)})
    parts = [series.iloc[max(0, a - overlap): b] for a, b in zip(edges[:-1], edges[1:], strict=True) if b > a]
    if reverse:
        parts = parts[::-1]
    whole, split = _Db(obs_template), _Db(obs_template)
    try:
        import_file(whole.db, "ST1", "whole.csv", data=series.to_csv(index=False).encode())
        for k, part in enumerate(parts):
            s = import_file(split.db, "ST1", f"part{k}.csv", data=part.to_csv(index=False).encode())
            assert s.conflicts == 0
        t0, t1 = pd.Timestamp("2024-03-31", tz="UTC"), pd.Timestamp("2024-04-05", tz="UTC")
        sid = station_id(whole.db, "ST1")
        with whole.db.transaction() as a, split.db.transaction() as b:
            fa = load_observations(a, sid, t0, t1, qc_passed_only=False, include_qc=True)
            fb = load_observations(b, sid, t0, t1, qc_passed_only=False, include_qc=True)
        pd.testing.assert_frame_equal(fa, fb)
        assert len(fa) == n
    finally:
        whole.close()
        split.close()
