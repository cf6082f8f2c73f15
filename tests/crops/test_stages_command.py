"""`advisory blocks stages` and the stage check of `blocks list` on the demo farm's spring week."""

from __future__ import annotations

import argparse
import json

import pytest

from advisory.commands import blocks
from advisory.errors import InputError


def _run(func, url, **kw):
    ns = argparse.Namespace(db=url, farm=None, json=False, date="2026-04-13", all=False)
    for k, v in kw.items():
        setattr(ns, k, v)
    return func(ns)


def test_blocks_stages_flags_a_stale_stage_and_says_what_is_behind_the_sums(spring_db, capsys):
    url = spring_db.url
    assert _run(blocks.do_stages, url) == 0
    out = capsys.readouterr().out
    assert "stage recorded first bloom on 2026-04-04; heat since suggests full bloom; check the buds" in out
    assert "h of readings (lower bound: readings start after the biofix)" in out
    assert "Utah chill units" in out and "typical need" in out
    assert _run(blocks.do_stages, url, json=True) == 0
    rows = {r["block"]: r for r in json.loads(capsys.readouterr().out)}
    bing = rows["Creek Bing"]
    assert bing["expected_today"] == "full bloom" and bing["gdd_since_record_c"] > 0
    assert bing["hours_since_record_h"] > 100 and bing["gdd_since_biofix_lower_bound"] is True
    assert rows["North Honeycrisp"]["check"] is None
    assert _run(blocks.do_list, url) == 0
    assert "Creek Bing: stage recorded first bloom" in capsys.readouterr().out
    with pytest.raises(InputError) as err:
        _run(blocks.do_stages, url, date="2026-99-01")
    assert err.value.field == "--date"
