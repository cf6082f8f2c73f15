"""Unit tests for advisory.risk.heat (crop and crew heat)."""

import numpy as np
import pandas as pd
import pytest

from advisory.forecast import daytime as dt
from advisory.risk import heat as rh

TZ = "America/Los_Angeles"
DAY = "2025-07-14"
SR = pd.Timestamp(f"{DAY} 05:40", tz=TZ)
SS = pd.Timestamp(f"{DAY} 20:35", tz=TZ)
NOON = pd.Timestamp(f"{DAY} 13:08", tz=TZ)


def _day(tn, tx):
    times = dt.local_day_hours(DAY, TZ)
    n = len(tn)
    temp = dt.diurnal_temperature_c(times, tn, tx, [SR] * n, [SS] * n, [NOON] * n)
    return times, temp


def test_levels_are_own_names():
    assert rh.LEVELS == ("easy", "hot", "very_hot", "scorching")
    for word in ("watch", "warning", "advisory", "excessive", "caution", "danger", "high", "extreme", "severe"):
        assert all(word not in level for level in rh.LEVELS)


def test_apple_hot_day_levels_and_hours():
    times, temp = _day([16.0, 14.0], [36.5, 27.0])
    res = rh.crop_heat(times, temp, ["apple", "apple"], sunrise=[SR] * 2, sunset=[SS] * 2)
    assert list(res.level_name) == ["very_hot", "easy"]
    assert res.hours_above_c[0, 0] >= res.hours_above_c[0, 1] > 0
    assert res.hours_above_c[0, 2] == 0
    assert res.hours_above_c[1].sum() == 0
    assert "browning" in res.what[0] and res.what[1] == ""
    assert res.peak_c[0] == pytest.approx(36.5, abs=0.6)
    assert "Schrader" in res.source[0]


def test_sunburn_hours_only_in_daylight():
    times = dt.local_day_hours(DAY, TZ)
    temp = np.full((1, len(times)), 33.0)          # hot all day and night
    res = rh.crop_heat(times, temp, ["apple"], sunrise=[SR], sunset=[SS])
    daylight = ((times >= SR) & (times <= SS)).sum()
    assert res.hours_above_c[0, 0] == daylight
    assert rh.crop_heat(times, temp, ["apple"]).hours_above_c[0, 0] == len(times)


def test_cooling_run_and_water():
    times, temp = _day([16.0, 16.0], [36.0, 36.0])
    res = rh.crop_heat(times, temp, ["apple", "apple"], sunrise=[SR] * 2, sunset=[SS] * 2,
                       dew_point_c=[10.0, 10.0], has_cooling=[True, False], cooling_rate_mm_h=[3.0, 3.0],
                       area_ha=[2.5, 2.5])
    start = pd.Timestamp(res.cooling_start[0]).tz_localize("UTC").tz_convert(TZ)
    stop = pd.Timestamp(res.cooling_stop[0]).tz_localize("UTC").tz_convert(TZ)
    assert SR < start < NOON < stop <= SS
    assert res.cooling_hours[0] == pytest.approx((stop - start).total_seconds() / 3600, abs=1e-6)
    # water = rate [mm/h] x area [ha] x hours x 10 m³ (1 mm over 1 ha is 10 m³)
    assert res.cooling_water_m3[0] == pytest.approx(3.0 * 2.5 * res.cooling_hours[0] * 10.0)
    assert np.isnat(res.cooling_start[1]) and np.isnan(res.cooling_water_m3[1])
    # Start where the curve crosses the start temperature (30 °C for apple, common practice).
    hours = (start - pd.Timestamp(DAY, tz=TZ)).total_seconds() / 3600 + 0.0
    at_start = dt.diurnal_temperature_c(np.array([dt.to_hours(start)]), 16.0, 36.0, SR, SS, NOON)
    assert at_start[0] == pytest.approx(30.0, abs=0.05), hours


def test_cooling_in_humid_air_is_flagged():
    times, temp = _day([22.0], [35.0])
    res = rh.crop_heat(times, temp, ["apple"], dew_point_c=[30.0], has_cooling=[True],
                       cooling_rate_mm_h=[3.0], area_ha=[1.0])
    assert res.cooling_wet_bulb_depression_c[0] < 4.0
    assert any("humid" in n for n in res.notes[0])


def test_crop_names_and_generic_fallback():
    times, temp = _day([15.0, 15.0, 15.0], [36.0, 36.0, 36.0])
    res = rh.crop_heat(times, temp, ["Wine grape", "Sweet cherry", "walnut"])
    assert list(res.level_name) == ["hot", "very_hot", "very_hot"]
    assert any("generic" in n for n in res.notes[2])


def test_crew_heat_levels_and_safer_hours():
    times, temp = _day([18.0, 12.0], [38.0, 24.0])
    res = rh.crew_heat(times, temp, np.array([[20.0], [5.0]]), sunrise=[SR] * 2, sunset=[SS] * 2)
    assert res.heat_index_c.shape == temp.shape
    assert list(res.day_level_name) == ["scorching", "easy"]
    windows = rh.safe_windows(times, res.heavy_work_ok, sunrise=[SR] * 2, sunset=[SS] * 2)
    first = pd.Timestamp(windows[0][0][0]).tz_localize("UTC").tz_convert(TZ)
    assert first.hour < 10                           # the cool morning is the safer time
    assert len(windows[1]) == 1                      # a mild day: all daylight is fine
    assert res.work_rest[0, int(np.argmax(res.wbgt_c[0]))] == rh.CREW_WORK_REST_HEAVY[-1][1]


def test_crew_night_is_shade():
    times, temp = _day([25.0], [35.0])
    td = np.array([[18.0]])
    day_sun = rh.crew_heat(times, temp, td, sunrise=[SR], sunset=[SS])
    always_sun = rh.crew_heat(times, temp, td)
    night = ~((times >= SR) & (times <= SS))
    assert np.all(day_sun.wbgt_c[0, night] < always_sun.wbgt_c[0, night])


def test_cautions_and_guidance():
    text = " ".join(rh.CAUTIONS).lower()
    assert "never work alone" in text
    assert "does not replace your workplace heat plan" in text
    assert "heat stroke" in text and "heat exhaustion" in text
    times, temp = _day([20.0], [34.0])
    res = rh.crew_heat(times, temp, np.array([[15.0]]))
    assert any("water" in g.lower() for g in res.guidance)


def test_work_rest_never_offers_continuous_heavy_work_and_covers_both_groups():
    # ACGIH TLV screening table (from memory): no value for continuous (75-100 %) heavy work.
    assert rh.WBGT_TLV_C["heavy"][0] is None and rh.WBGT_ACTION_LIMIT_C["heavy"][0] is None
    for wbgt in np.arange(15.0, 35.0, 0.25):
        assert rh.most_work_allowed(wbgt, "heavy", True) != "75-100 %"
        assert rh.most_work_allowed(wbgt, "heavy", False) != "75-100 %"
    for _, text in rh.CREW_WORK_REST_HEAVY:
        assert "continuous" not in text
        assert "acclimatised" in text
    # the action limit (not acclimatised) sits 2-3.5 °C below the TLV for each heavy-work regimen
    for tlv, al in zip(rh.WBGT_TLV_C["heavy"][1:], rh.WBGT_ACTION_LIMIT_C["heavy"][1:], strict=True):
        assert 2.0 <= tlv - al <= 3.5
    times, temp = _day([20.0], [24.0])               # a mild day: WBGT well below every limit
    res = rh.crew_heat(times, temp, np.array([[8.0]]), sunrise=[SR], sunset=[SS])
    assert res.wbgt_c.max() < 24.0
    assert all("continuous" not in str(t) for t in res.work_rest[0])
    assert all(str(t).startswith("heavy work up to 45 min an hour") for t in res.work_rest[0])
    # 26.5 °C: 45 min for acclimatised workers, 15 min for the others
    at = rh.CREW_WORK_REST_HEAVY[[e for e, _ in rh.CREW_WORK_REST_HEAVY].index(27.5)][1]
    assert "acclimatised (TLV) up to 45 min" in at and "not acclimatised (action limit) up to 15 min" in at
    assert any("ACGIH TLV" in g and "from memory" in g for g in res.guidance)
