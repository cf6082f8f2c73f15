"""The stored JSON form: encoded once, joined without encoding again, parsed only when read."""

from __future__ import annotations

import copy
import dataclasses
import datetime as dt
import json
import pickle

from advisory.notices import render
from advisory.notices.compose import compose_block
from advisory.notices.notice_data import BlockNotice, EncodedBlockNotice, stored_json, whole_json
from advisory.store import jsoncodec
from tests.notices import samples


def test_encoded_mapping_reads_pickles_and_writes_as_it_is():
    raw = jsoncodec.encode({"p50_c": -2.5, "curve": [{"time_utc": dt.datetime(2026, 4, 8, 9, tzinfo=dt.UTC)}]})
    e = jsoncodec.Encoded(raw)
    assert jsoncodec.encode({"data": e}) == b'{"data":' + raw + b"}"   # written as the bytes it is
    assert e["p50_c"] == -2.5 and e.get("missing") is None and len(e) == 2
    assert e["curve"][0]["time_utc"] == "2026-04-08T09:00:00+00:00"   # instants stored in UTC
    for again in (pickle.loads(pickle.dumps(e)), copy.deepcopy(e)):
        assert again == e and again.raw == raw
    assert e == json.loads(raw)


def test_whole_json_is_the_notice_with_its_data():
    n = compose_block(samples.frost_assessment())
    stored = json.loads(stored_json(n))
    assert "data" not in stored and stored["key"] == n.key
    whole = json.loads(whole_json(stored_json(n), jsoncodec.encode(n.data)))
    assert whole == json.loads(json.dumps(n.to_dict()))
    # a notice carrying its data still encoded renders to the same bytes
    lazy = compose_block(samples.frost_assessment(), data=jsoncodec.Encoded(jsoncodec.encode(n.data)))
    assert render.render(lazy, "json") == render.render(n, "json")
    assert render.render(lazy, "text") == render.render(n, "text")


def test_a_notice_carried_encoded_reads_and_renders_as_composed():
    n = compose_block(samples.frost_assessment())
    data = jsoncodec.encode(n.data)
    carried = EncodedBlockNotice.of(n, stored_json(n), data)
    back = pickle.loads(pickle.dumps(carried))
    assert isinstance(back, BlockNotice) and back.level == n.level and "_encoded" in back.__dict__  # not read yet
    assert back.chart == n.chart and back.footer == n.footer   # fields with class defaults are read too
    for f in dataclasses.fields(BlockNotice):
        assert getattr(back, f.name) == getattr(n, f.name), f.name
    again = pickle.loads(pickle.dumps(back))   # a notice read once still pickles as its bytes
    for fmt in render.FORMATS:
        assert render.render(again, fmt) == render.render(n, fmt), fmt


def test_an_assessment_handed_back_by_a_worker_is_the_same():
    """Curve points and plan steps pickle by their field values (see advisory.assessment)."""
    a = samples.frost_assessment()
    back = pickle.loads(pickle.dumps(a, protocol=pickle.HIGHEST_PROTOCOL))
    assert back == a and jsoncodec.encode(back) == jsoncodec.encode(a)
    assert back.curve and back.plan and type(back.curve[0]) is type(a.curve[0])
