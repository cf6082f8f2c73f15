"""HTTP tests of every page, form and access rule of the web console (Starlette's test client)."""

from __future__ import annotations

import re

import pytest
from sqlalchemy import select

from advisory.store.schema import AuditEntry, Block, Delivery, Recipient, StageRecord
from tests.web.conftest import PASSWORD, csrf_of, ids


def text_of(html: str) -> str:
    return re.sub(r"\s+", " ", re.sub(r"<[^>]+>", " ", html))


# ----------------------------------------------------------------------------- sign in

def test_every_page_needs_sign_in(client_for, web_db):
    c = client_for(None)
    i = ids(web_db)
    for path in ("/", "/heat", "/skill", f"/blocks/{i['Bench Gala']}", f"/stations/{i['QR-BENCH']}",
                 f"/notices/{i['notice:' + str(i['Bench Gala'])]}", "/recipients/1"):
        r = c.get(path, follow_redirects=False)
        assert r.status_code == 303 and r.headers["location"].startswith("/login?next="), path


def test_wrong_password_and_cookie_flags(client_for, app):
    from starlette.testclient import TestClient

    c = TestClient(app)
    r = c.get("/login")
    r = c.post("/login", data={"csrf": csrf_of(r.text), "username": "agent-all", "password": "wrong-password!"})
    assert r.status_code == 400 and "Wrong user name or password." in r.text
    r = c.post("/login", data={"csrf": csrf_of(r.text), "username": "agent-all", "password": PASSWORD},
               follow_redirects=False)
    assert r.status_code == 303
    cookie = r.headers["set-cookie"].lower()
    assert "httponly" in cookie and "samesite=lax" in cookie
    assert PASSWORD not in r.headers["set-cookie"]


def test_login_refuses_a_missing_csrf_token(client_for, app):
    from starlette.testclient import TestClient

    c = TestClient(app)
    c.get("/login")
    r = c.post("/login", data={"username": "agent-all", "password": PASSWORD})
    assert r.status_code == 403 and "security token" in r.text


def test_sign_out(client_for):
    c = client_for("agent-all")
    page = c.get("/")
    r = c.post("/logout", data={"csrf": csrf_of(page.text)}, follow_redirects=False)
    assert r.status_code == 303
    assert c.get("/", follow_redirects=False).status_code == 303


def test_password_is_stored_hashed(web_db):
    from advisory.store.schema import WebUser

    with web_db.transaction() as s:
        h = s.scalar(select(WebUser.password_hash).where(WebUser.username == "agent-all"))
    assert h.startswith("$argon2") and PASSWORD not in h


# ----------------------------------------------------------------------------- tonight

def test_tonight_worst_first_with_words_and_caution(client_for):
    r = client_for("agent-all").get("/")
    assert r.status_code == 200
    t = text_of(r.text)
    assert "Decision support only" in t
    rows = re.findall(r'<td><span class="level"[^>]*>([^<]+)</span></td>', r.text)
    assert rows[0] == "Protect: grave" and rows[1] == "Protect"
    assert "Quillback Ridge Orchards" in t and "Larkspur Flat Vineyard" in t
    assert "T10 / T90" in t and "wind machines" in t
    assert "silent 3 h" in t and "flagged" in t  # the payload's age and a QC flag in the 24 h before the run


def test_tonight_filters_sort_and_pages(client_for, web_db):
    c = client_for("agent-all")
    r = c.get("/?crop=pear")
    assert "Lower Bartlett" in r.text and "Bench Gala" not in r.text
    r = c.get("/?level=grave")
    assert text_of(r.text).count("Protect: grave") >= 2 and "Keep an eye</span></td>" not in r.text
    with web_db.transaction() as s:
        farm_id = s.scalar(select(Block.farm_id).where(Block.name == "Flat Riesling"))
    r = c.get(f"/?farm={farm_id}")
    assert "Flat Riesling" in r.text and "Bench Gala" not in r.text
    r = c.get("/?sort=farm")
    names = re.findall(r'<a href="/blocks/\d+[^"]*">([^<]+)</a>', r.text)
    assert names[0] == "Flat Riesling"  # Larkspur before Quillback
    r = c.get("/?page=99")
    assert "Page 1 of 1" in r.text


def test_overview_pages_in_the_database(web_db):
    from advisory.web import queries
    from advisory.web.auth import Viewer
    from tests.web.conftest import NIGHT

    v = Viewer(id=0, username="x", role="agent", farm_ids=None)
    with web_db.transaction() as s:
        first = queries.overview(s, v, "frost", NIGHT, per_page=3, page=1)
        second = queries.overview(s, v, "frost", NIGHT, per_page=3, page=2)
    assert first.total == 7 and first.pages == 3 and len(first.rows) == 3
    assert not {r.block_id for r in first.rows} & {r.block_id for r in second.rows}
    assert first.rows[0].level == "grave"


def test_heat_day_page(client_for):
    r = client_for("agent-all").get("/heat")
    assert r.status_code == 200 and "Heat day" in r.text and "No forecast" in r.text


# ----------------------------------------------------------------------------- a block's night

def test_block_page(client_for, web_db):
    i = ids(web_db)
    r = client_for("agent-all").get(f"/blocks/{i['Bench Gala']}")
    t = text_of(r.text)
    assert r.status_code == 200
    assert "<svg" in r.text and "T10 -2.2 °C" in t
    assert "Plan and run sheet lines" in t and "invented plan line" in t
    assert "invented notice" in t and "outbox" in t
    assert "Stage history" in t and "Skill to date" in t and "1 nights checked" in t
    assert "Decision support only" in t and "Save stage" in t


def test_block_page_in_the_farms_units(client_for, web_db):
    i = ids(web_db)
    r = client_for("agent-all").get(f"/blocks/{i['Flat Riesling']}")
    assert "°F" in r.text


def test_missing_block_is_a_404_page(client_for):
    r = client_for("agent-all").get("/blocks/99999")
    assert r.status_code == 404 and "Not found" in r.text
    assert "Sign out" in r.text  # the signed-in user keeps the menu


def test_user_text_is_escaped(client_for, web_db):
    i = ids(web_db)
    r = client_for("agent-all").get(f"/blocks/{i['Flat Riesling']}")
    assert "owner &lt;b&gt;&amp;&lt;/b&gt;" in r.text and "owner <b>&</b>" not in r.text


# ----------------------------------------------------------------------------- the stage form

def _stage(c, block_id, stage, date):
    page = c.get(f"/blocks/{block_id}")
    return c.post(f"/blocks/{block_id}/stage", data={"csrf": csrf_of(page.text), "stage": stage,
                                                     "stage_date": date})


def test_set_stage_records_history_audit_and_new_critical_temperatures(client_for, web_db):
    i = ids(web_db)
    c = client_for("agent-q")
    r = _stage(c, i["Bench Gala"], "tight cluster", "2026-04-09")  # a correction: the buds were behind
    assert r.status_code == 200 and "Stage saved." in r.text
    t = text_of(r.text)
    assert "T10 -2.8 °C, T90 -6.1 °C" in t
    with web_db.transaction() as s:
        b = s.get(Block, i["Bench Gala"])
        assert (b.stage, b.stage_date.isoformat()) == ("tight cluster", "2026-04-09")
        rec = s.scalar(select(StageRecord).where(StageRecord.block_id == b.id, StageRecord.stage == "tight cluster"))
        assert rec.source == "web console"
        a = s.scalar(select(AuditEntry).where(AuditEntry.block_id == b.id))
        assert a.username == "agent-q" and a.action == "stage" and "tight cluster" in a.summary
    assert "agent-q" in text_of(r.text.split('id="audit"')[1])


def test_set_stage_accepts_the_farm_files_synonyms(client_for, web_db):
    i = ids(web_db)
    r = _stage(client_for("agent-all"), i["Bench Gala"], "Petal Fall", "2026-04-09")
    assert r.status_code == 200 and "Stage saved." in r.text


@pytest.mark.parametrize("stage,date,field,words", [
    ("purple haze", "2026-04-09", "stage", "for apple; stages in order"),
    ("full bloom", "9 April", "stage_date", "is not a date like"),
    ("full bloom", "2099-04-09", "stage_date", "is in the future"),
])
def test_set_stage_bad_values_are_shown_next_to_the_field(client_for, web_db, stage, date, field, words):
    i = ids(web_db)
    r = _stage(client_for("agent-all"), i["Bench Gala"], stage, date)
    assert r.status_code == 400
    assert re.search(rf'<span class="field-error" id="{field}-error">[^<]*{re.escape(words)}', r.text)
    with web_db.transaction() as s:
        assert s.get(Block, i["Bench Gala"]).stage == "full pink"
        assert s.scalar(select(AuditEntry.id)) is None


def test_set_stage_needs_the_csrf_token(client_for, web_db):
    i = ids(web_db)
    r = client_for("agent-all").post(f"/blocks/{i['Bench Gala']}/stage",
                                     data={"stage": "full bloom", "stage_date": "2026-04-09"})
    assert r.status_code == 403
    with web_db.transaction() as s:
        assert s.get(Block, i["Bench Gala"]).stage == "full pink"


def test_grower_cannot_set_a_stage(client_for, web_db):
    i = ids(web_db)
    c = client_for("grower-q")
    page = c.get(f"/blocks/{i['Bench Gala']}")
    assert page.status_code == 200 and "Save stage" not in page.text and "Resend" not in page.text
    r = c.post(f"/blocks/{i['Bench Gala']}/stage", data={"csrf": csrf_of(page.text), "stage": "full bloom",
                                                         "stage_date": "2026-04-09"})
    assert r.status_code == 403


# ----------------------------------------------------------------------------- who sees what

def test_grower_sees_only_their_farm(client_for, web_db):
    i = ids(web_db)
    c = client_for("grower-l")
    t = text_of(c.get("/").text)
    assert "Flat Riesling" in t and "Bench Gala" not in t and "Quillback" not in t
    for path in (f"/blocks/{i['Bench Gala']}", f"/stations/{i['QR-BENCH']}",
                 f"/notices/{i['notice:' + str(i['Bench Gala'])]}"):
        r = c.get(path)
        assert r.status_code == 404, path
        assert "Bench Gala" not in r.text and "QR-BENCH" not in r.text
    page = c.get(f"/blocks/{i['Flat Riesling']}")
    r = c.post(f"/blocks/{i['Bench Gala']}/stage", data={"csrf": csrf_of(page.text), "stage": "full bloom",
                                                         "stage_date": "2026-04-09"})
    assert r.status_code == 404
    r = c.post(f"/notices/{i['notice:' + str(i['Bench Gala'])]}/resend", data={"csrf": csrf_of(page.text)})
    assert r.status_code == 404
    assert "Bench Gala" not in c.get("/skill").text
    with web_db.transaction() as s:
        other = s.scalar(select(Recipient.id).where(Recipient.name == "Tobiah Marchetti"))
    assert c.get(f"/recipients/{other}").status_code == 404


def test_agent_of_given_farms_sees_only_those(client_for, web_db):
    i = ids(web_db)
    c = client_for("agent-q")
    assert "Flat Riesling" not in c.get("/").text
    assert c.get(f"/blocks/{i['Flat Riesling']}").status_code == 404
    assert c.get(f"/stations/{i['LF-MAST']}").status_code == 404
    assert c.get(f"/blocks/{i['Bench Gala']}").status_code == 200


def test_a_filter_for_a_farm_not_given_shows_nothing(client_for, web_db):
    with web_db.transaction() as s:
        other = s.scalar(select(Block.farm_id).where(Block.name == "Flat Riesling"))
    r = client_for("grower-q").get(f"/?farm={other}")
    assert "Flat Riesling" not in r.text and "No blocks match." in r.text


# ----------------------------------------------------------------------------- station, skill, notice

def test_station_page(client_for, web_db):
    i = ids(web_db)
    r = client_for("agent-all").get(f"/stations/{i['QR-BENCH']}")
    t = text_of(r.text)
    assert r.status_code == 200 and "<svg" in r.text
    assert "air temp: 1 reading flagged" in t and "Latest readings" in t and "Bench Gala" in t


def test_skill_page(client_for):
    r = client_for("agent-all").get("/skill")
    t = text_of(r.text)
    assert r.status_code == 200 and "By station" in t and "By block" in t
    assert "Reliability of the frost probability" in t and "<svg" in r.text
    assert "7 checked in all" in t and "QR-BENCH" in t
    assert client_for("agent-all").get("/skill?kind=heat").status_code == 200


def test_notice_page(client_for, web_db):
    i = ids(web_db)
    r = client_for("agent-all").get(f"/notices/{i['notice:' + str(i['Bench Gala'])]}")
    assert r.status_code == 200 and "Bench Gala: invented notice" in r.text and "outbox" in r.text


# ----------------------------------------------------------------------------- resend

def test_resend_delivers_again_and_is_audited(client_for, web_db, monkeypatch):
    """The console calls the delivery the command line's resend calls, forced, on the channel asked."""
    from advisory.notices import deliver

    calls = []

    def fake(session, notice_row, recipients, settings, **kw):
        calls.append((notice_row.id, sorted(r.name for r in recipients), kw))
        d = Delivery(notice_id=notice_row.id, channel="outbox", address="/tmp/outbox", status="sent", attempt=2)
        session.add(d)
        session.flush()
        return [d]

    monkeypatch.setattr(deliver, "deliver_notice", fake)
    i = ids(web_db)
    nid = i["notice:" + str(i["Bench Gala"])]
    c = client_for("agent-all")
    with web_db.transaction() as s:
        before = len(list(s.scalars(select(Delivery).where(Delivery.notice_id == nid))))
    page = c.get(f"/blocks/{i['Bench Gala']}")
    r = c.post(f"/notices/{nid}/resend", data={"csrf": csrf_of(page.text), "channel": "outbox"})
    assert r.status_code == 200 and "Notice resent" in r.text
    with web_db.transaction() as s:
        after = list(s.scalars(select(Delivery).where(Delivery.notice_id == nid)))
        a = s.scalar(select(AuditEntry).where(AuditEntry.action == "resend"))
    assert len(after) > before and a.username == "agent-all" and f"notice {nid}" in a.summary
    assert calls[0][0] == nid and calls[0][2]["force"] is True and calls[0][2]["channels"] == ["outbox"]
    assert calls[0][1] == ["Odalys Brenneman", "Tobiah Marchetti", "Wren Okonkwo-Hale"]
    assert "resent notice" in r.text.split('id="audit"')[1]


def test_grower_cannot_resend(client_for, web_db):
    i = ids(web_db)
    c = client_for("grower-q")
    page = c.get(f"/blocks/{i['Bench Gala']}")
    r = c.post(f"/notices/{i['notice:' + str(i['Bench Gala'])]}/resend", data={"csrf": csrf_of(page.text)})
    assert r.status_code == 403


# ----------------------------------------------------------------------------- recipients

def _recipient(web_db, name):
    with web_db.transaction() as s:
        return s.scalar(select(Recipient.id).where(Recipient.name == name))


def test_grower_edits_their_own_recipient(client_for, web_db):
    rid = _recipient(web_db, "Ines Farrowgate")
    c = client_for("grower-l")
    page = c.get(f"/recipients/{rid}")
    assert page.status_code == 200
    r = c.post(f"/recipients/{rid}", data={"csrf": csrf_of(page.text), "email": "ines.new@larkspur.example",
                                           "sms": "+1-555-0199", "webhook": ""})
    assert r.status_code == 200 and "Channels saved." in r.text
    with web_db.transaction() as s:
        assert s.get(Recipient, rid).channels == {"email": "ines.new@larkspur.example", "sms": "+1-555-0199"}
        audit = list(s.scalars(select(AuditEntry).where(AuditEntry.action == "recipient")))
    assert audit and all(a.username == "grower-l" for a in audit)
    assert any(a.block_id is not None for a in audit)  # shown on the recipient's block's page


@pytest.mark.parametrize("field,value,words", [
    ("email", "not-an-address", "is not an e-mail address"),
    ("webhook", "ftp://x.example/hook", "is not an http(s) URL"),
])
def test_bad_channel_is_shown_next_to_the_field(client_for, web_db, field, value, words):
    rid = _recipient(web_db, "Ines Farrowgate")
    c = client_for("agent-all")
    page = c.get(f"/recipients/{rid}")
    r = c.post(f"/recipients/{rid}", data={"csrf": csrf_of(page.text), field: value})
    assert r.status_code == 400
    assert re.search(rf'<span class="field-error" id="{field}-error">[^<]*{re.escape(words)}', r.text)
    with web_db.transaction() as s:
        assert s.get(Recipient, rid).channels == {"email": "ines@larkspur.example"}


# ----------------------------------------------------------------------------- faults

def test_a_fault_is_a_500_page_without_traceback(client_for, web_db, monkeypatch, caplog):
    from advisory.web import queries

    def broken(*a, **k):
        raise RuntimeError("secret internals")

    monkeypatch.setattr(queries, "skill", broken)
    r = client_for("agent-all").get("/skill")
    assert r.status_code == 500 and "Something went wrong" in r.text
    assert "Traceback" not in r.text and "secret internals" not in r.text
    assert any("internal error" in rec.message for rec in caplog.records)


def test_unknown_route_is_a_404_page(client_for):
    r = client_for("agent-all").get("/no/such/page")
    assert r.status_code == 404 and "Not found" in r.text
