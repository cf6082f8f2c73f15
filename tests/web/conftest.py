"""A database with the demo farm and a second invented farm, one stored night for each block, a
notice with a delivery, a verified night, readings with a flagged value; users of each role."""

from __future__ import annotations

import datetime as dt
import re
from pathlib import Path

import pytest

from advisory.ingest.farm_file import import_farm_file
from advisory.store.schema import (
    Block,
    Delivery,
    Forecast,
    Notice,
    Observation,
    Station,
    Verification,
)
from advisory.web.auth import add_user

HERE = Path(__file__).resolve().parent
PASSWORD = "a-long-test-password"
NIGHT = dt.date(2026, 4, 8)
LEVELS = ["grave", "serious", "marked", "slight", "nil", "nil", "nil"]


def _payload(b: Block, i: int, level: str, ref: dt.datetime) -> dict:
    curve = []
    for h in range(12):
        t = ref + dt.timedelta(hours=h)
        p50 = 4.0 - 0.6 * h - i * 0.3
        curve.append({"time_utc": t.isoformat(), "p50_c": p50, "p10_c": p50 - 1.5, "p90_c": p50 + 1.5,
                      "wet_bulb_c": p50 - 1.0, "heat_index_c": None, "wbgt_c": None})
    start = (ref + dt.timedelta(hours=6)).isoformat()
    return {"kind": "frost", "block": b.name, "stage": b.stage, "curve": curve, "p_below_t10": 0.4,
            "critical_time_utc": start,
            "plan": [{"method": "wind_machine", "advised": level in ("grave", "serious", "marked"),
                      "start_utc": start if level in ("grave", "serious", "marked") else None, "stop_utc": None,
                      "start_rule": "when the air reaches -1.2 °C", "stop_rule": "after sunrise",
                      "quantities": {"hours": 4.5}, "notes": ["invented plan line"]}],
            "data_quality": {"obs_age_min": 200 if i == 1 else 5, "flags": []}}


@pytest.fixture
def web_db(db, db_url, demo_farm, quiet_channels):
    import_farm_file(db, demo_farm / "farm.toml")
    import_farm_file(db, HERE / "other_farm.toml")
    ref = dt.datetime(2026, 4, 9, 3, 0, tzinfo=dt.UTC)
    with db.transaction() as s:
        blocks = list(s.query(Block).order_by(Block.id))
        for i, b in enumerate(blocks):
            level = LEVELS[i % len(LEVELS)]
            fc = Forecast(block_id=b.id, kind="frost", night=NIGHT, revision=0, status="ok", reference_time=ref,
                          min_p10_c=-4.0 + i, min_p50_c=-2.5 + i, min_p90_c=-1.0 + i, level=level,
                          payload=_payload(b, i, level, ref))
            s.add(fc)
            s.flush()
            n = Notice(key=f"frost/{b.farm_id}/{b.id}/{NIGHT}/0", farm_id=b.farm_id, block_id=b.id,
                       forecast_id=fc.id, kind="frost", night=NIGHT, revision=0, level=level,
                       subject=f"{b.name}: invented notice", content={"type": "block", "subject": b.name})
            s.add(n)
            s.flush()
            s.add(Delivery(notice_id=n.id, channel="outbox", address="/tmp/outbox", status="sent"))
            s.add(Verification(forecast_id=fc.id, block_id=b.id, kind="frost", night=NIGHT, observed_c=-3.0 + i,
                               forecast_c=-2.5 + i, error_c=0.5,
                               detail={"warned": level != "nil", "event": i % 2 == 0, "p_below_t10": 0.1 * i}))
        for st in s.query(Station):
            for h in range(48):
                s.add(Observation(station_id=st.id, time_utc=ref - dt.timedelta(hours=h), air_temp_c=3.0 - h * 0.05,
                                  dew_point_c=-1.0, air_temp_qc=4 if h == 3 else 0))
        add_user(s, "agent-all", PASSWORD, "agent", [], True)
        add_user(s, "agent-q", PASSWORD, "agent", ["Quillback Ridge Orchards"], False)
        add_user(s, "grower-q", PASSWORD, "grower", ["Quillback Ridge Orchards"], False)
        add_user(s, "grower-l", PASSWORD, "grower", ["Larkspur Flat Vineyard"], False)
    return db


@pytest.fixture
def app(web_db, db_url):
    from advisory.web.app import create_app

    return create_app(db_url, secret="test-secret-" + "x" * 32)


def csrf_of(html: str) -> str:
    return re.search(r'name="csrf" value="([^"]+)"', html).group(1)


@pytest.fixture
def client_for(app):
    from starlette.testclient import TestClient

    def make(username: str | None):
        c = TestClient(app, raise_server_exceptions=False)
        if username:
            r = c.get("/login")
            r = c.post("/login", data={"csrf": csrf_of(r.text), "username": username, "password": PASSWORD,
                                       "next": "/"})
            assert r.status_code == 200, r.text
        return c

    return make


def ids(db):
    with db.transaction() as s:
        out = {}
        for b in s.query(Block):
            out[b.name] = b.id
        for st in s.query(Station):
            out[st.code] = st.id
        for n in s.query(Notice):
            out[f"notice:{n.block_id}"] = n.id
        return out
