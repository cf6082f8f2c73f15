"""Unit tests for advisory.risk.frost: damage curve, distribution, levels, plans."""

import math
from datetime import UTC, datetime, timedelta

import numpy as np
import pandas as pd
import pytest

from advisory.assessment import Assessment
from advisory.crops import thresholds as th
from advisory.errors import InputError
from advisory.fieldcalc import start_air_temp_c
from advisory.physics import moisture
from advisory.risk import damage, frost_assessment, frost_data, levels, night_curve
from advisory.risk import frost as fr
from advisory.risk.protection import sprinklers, wind_machine

TABLE = th.table()


# ------------------------------------------------------------------------------------------------
# Damage curve
# ------------------------------------------------------------------------------------------------

@pytest.mark.parametrize("crop,stage,t10,t90", list(TABLE[["crop", "stage", "t10_c", "t90_c"]].itertuples(
    index=False, name=None)))
def test_curve_passes_through_t10_and_t90_for_every_row(crop, stage, t10, t90):
    assert damage.kill_fraction(t10, t10, t90) == pytest.approx(0.10, abs=1e-12)
    assert damage.kill_fraction(t90, t10, t90) == pytest.approx(0.90, abs=1e-12)
    assert damage.kill_fraction(0.5 * (t10 + t90), t10, t90) == pytest.approx(0.5)
    assert damage.temp_for_kill_c(0.1, t10, t90) == pytest.approx(t10)


def test_curve_is_monotone_and_bounded():
    t = np.linspace(-30, 10, 401)
    k = damage.kill_fraction(t, -2.2, -3.9)
    assert np.all(np.diff(k) <= 0) and k.min() >= 0 and k.max() <= 1
    assert damage.kill_fraction(-200.0, -2.2, -3.9) == pytest.approx(1.0)
    assert damage.kill_fraction(50.0, -2.2, -3.9) == pytest.approx(0.0, abs=1e-12)


def test_curve_vectorises_over_blocks():
    t10 = TABLE["t10_c"].to_numpy()
    t90 = TABLE["t90_c"].to_numpy()
    np.testing.assert_allclose(damage.kill_fraction(t10, t10, t90), 0.1)
    np.testing.assert_allclose(damage.kill_fraction(t90, t10, t90), 0.9)


# ------------------------------------------------------------------------------------------------
# Minimum-temperature distribution
# ------------------------------------------------------------------------------------------------

def test_two_piece_normal_honours_quantiles():
    f = damage.MinTempForecast(p10_c=[-4.0, -1.0], p50_c=[-2.0, -0.5], p90_c=[-1.0, 1.5])
    np.testing.assert_allclose(f.cdf_at(np.array([-4.0, -1.0])), 0.1, atol=1e-9)
    np.testing.assert_allclose(f.cdf_at(np.array([-2.0, -0.5])), 0.5, atol=1e-9)
    np.testing.assert_allclose(f.cdf_at(np.array([-1.0, 1.5])), 0.9, atol=1e-9)
    q = f.quantiles([0.1, 0.5, 0.9])
    np.testing.assert_allclose(q, [[-4, -2, -1], [-1, -0.5, 1.5]], atol=1e-9)


def test_zero_spread_is_a_point_mass():
    f = damage.MinTempForecast(p10_c=[-2.0], p50_c=[-2.0], p90_c=[-2.0])
    assert f.cdf_at(np.array([-2.0001]))[0] == 0.0
    assert f.cdf_at(np.array([-2.0]))[0] == 1.0
    np.testing.assert_allclose(f.quantiles([0.01, 0.99]), [[-2.0, -2.0]])


def test_callable_cdf_gives_same_answers_as_builtin():
    base = damage.MinTempForecast(p10_c=[-4.0, -1.0], p50_c=[-2.0, -0.5], p90_c=[-1.0, 1.5])
    custom = damage.MinTempForecast(base.p10_c, base.p50_c, base.p90_c, cdf=base.cdf_at)
    q = np.array([0.05, 0.3, 0.5, 0.8, 0.97])
    np.testing.assert_allclose(custom.quantiles(q), base.quantiles(q), atol=0.03)
    x = np.array([[-3.0, -2.0], [0.0, 1.0]])
    np.testing.assert_allclose(custom.cdf_at(x), base.cdf_at(x))


def test_bad_quantiles_rejected():
    with pytest.raises(ValueError):
        damage.MinTempForecast(p10_c=[0.0], p50_c=[-1.0], p90_c=[1.0])


# ------------------------------------------------------------------------------------------------
# Helpers: an invented radiation-night curve on an hourly UTC grid
# ------------------------------------------------------------------------------------------------

T0 = pd.Timestamp("2024-04-10 02:00", tz="UTC")  # 20:00 MDT evening of 9 April


def night(n_blocks=1, hours=14, t_eve=6.0, t_min=-2.0, min_hour=10, dew=-5.0, wind=1.0, sunrise_hour=10.2,
          polar_day=False):
    h = np.arange(hours, dtype=float)
    cool = t_eve - (t_eve - t_min) * np.sqrt(np.minimum(h, min_hour) / min_hour)
    warm = np.where(h > min_hour, (h - min_hour) * 2.5, 0.0)
    air = np.tile(cool + warm, (n_blocks, 1))
    times = pd.date_range(T0, periods=hours, freq="h")
    if sunrise_hour is None:
        sunrise = np.array([np.datetime64("NaT", "ns")] * n_blocks)
    else:
        sr = (T0 + pd.Timedelta(hours=sunrise_hour)).tz_localize(None)
        sunrise = np.array([np.datetime64(sr, "ns")] * n_blocks)
    return frost_data.NightCurves(times, air, np.full_like(air, dew), np.full_like(air, wind), sunrise,
                          polar_day=polar_day)


def block(name="B1", crop="apple", stage="full bloom", equipment=(), **kw):
    ct = th.critical_temps(crop, stage)
    return frost_data.BlockSetup(name, crop, stage, ct.t10_c, ct.t90_c, kw.pop("area_ha", 4.0), equipment=equipment, **kw)


def fc(p10, p50, p90):
    return damage.MinTempForecast(np.atleast_1d(p10), np.atleast_1d(p50), np.atleast_1d(p90))


# ------------------------------------------------------------------------------------------------
# Damage over the night
# ------------------------------------------------------------------------------------------------

def test_sustained_minimum_discounts_a_short_dip():
    times = pd.date_range(T0, periods=5, freq="h")
    spike = np.array([[2.0, 1.0, -3.0, 1.0, 2.0]])  # 1-hour V: colder than -2 for under 30 min
    flat = np.array([[2.0, -3.0, -3.0, -3.0, 2.0]])
    s_spike = night_curve.sustained_minimum_c(times, spike)[0]
    s_flat = night_curve.sustained_minimum_c(times, flat)[0]
    assert s_flat == pytest.approx(-3.0)
    # Linear V between hourly points: the 30-minute window straddling the bottom peaks 1 K above it.
    assert s_spike == pytest.approx(-2.0, abs=1e-9)


def test_point_forecast_flat_curve_matches_table():
    # A flat curve at T10 for exactly 30 min exposure equivalent and no duration adjustment: 10 % kill.
    c = night(t_min=-2.0)
    b = block()
    ct = th.critical_temps("apple", "full bloom")
    d = damage.damage(c, fc(ct.t10_c, ct.t10_c, ct.t10_c), ct.t10_c, ct.t90_c, duration_shift_c_per_doubling=0.0)
    off = d.sustained_offset_c[0]
    # Effective temperature is T10 + offset; kill matches the curve there.
    assert d.expected_kill[0] == pytest.approx(damage.kill_fraction(ct.t10_c + off, ct.t10_c, ct.t90_c), abs=1e-6)
    assert b.t10_c == ct.t10_c


def test_probabilities_consistent_with_cdf_and_expected_kill():
    c = night(n_blocks=3)
    t10, t90 = -2.2, -3.9
    f = fc([-4.0, -2.5, 1.0], [-2.5, -1.0, 3.0], [-1.0, 0.5, 5.0])
    d = damage.damage(c, f, t10, t90)
    off = d.sustained_offset_c - d.duration_shift_c
    np.testing.assert_allclose(d.p_kill_10, f.cdf_at(t10 - off))
    np.testing.assert_allclose(d.p_kill_90, f.cdf_at(t90 - off))
    assert d.expected_kill[0] > d.expected_kill[1] > d.expected_kill[2]
    assert d.p_kill_10[2] < 0.01 and d.level_index[2] == 0
    assert np.all(d.p_kill_90 <= d.p_kill_10)


def test_expected_kill_by_quadrature_matches_monte_carlo():
    c = night()
    f = fc(-4.0, -2.5, -1.5)
    d = damage.damage(c, f, -2.2, -3.9)
    rng = np.random.default_rng(1)
    u = rng.random(200_000)
    mins = f.quantiles(u)[0]
    off = d.sustained_offset_c[0] - d.duration_shift_c[0]
    mc = damage.kill_fraction(mins + off, -2.2, -3.9).mean()
    assert d.expected_kill[0] == pytest.approx(mc, abs=0.003)


def test_longer_cold_spell_means_more_damage():
    # Same minimum, but a long flat bottom instead of a quick dip: duration matters.
    times = pd.date_range(T0, periods=10, freq="h")
    short = np.array([[3, 2, 1, 0, -1, -2.5, -1, 0, 1, 2]], float)
    long_ = np.array([[3, 1, -2.3, -2.4, -2.5, -2.5, -2.4, -2.3, 1, 2]], float)
    sr = np.array([np.datetime64("2024-04-10T12:00", "ns")])
    out = []
    for air in (short, long_):
        c = frost_data.NightCurves(times, air, air - 3, np.ones_like(air), sr)
        out.append(damage.damage(c, fc(-2.5, -2.5, -2.5), -2.2, -3.9))
    assert out[1].near_min_hours[0] > out[0].near_min_hours[0]
    assert out[1].duration_shift_c[0] > out[0].duration_shift_c[0]
    assert out[1].expected_kill[0] > out[0].expected_kill[0]
    # Switching the duration adjustment off leaves only the sustained-minimum effect.
    c = frost_data.NightCurves(times, long_, long_ - 3, np.ones_like(long_), sr)
    d0 = damage.damage(c, fc(-2.5, -2.5, -2.5), -2.2, -3.9, duration_shift_c_per_doubling=0.0)
    assert d0.duration_shift_c[0] == 0.0 and d0.expected_kill[0] < out[1].expected_kill[0]


def test_duration_shift_is_capped():
    times = pd.date_range(T0, periods=24, freq="h")
    air = np.full((1, 24), -2.5)
    c = frost_data.NightCurves(times, air, air - 3, np.ones_like(air), np.array([np.datetime64("NaT", "ns")]))
    d = damage.damage(c, fc(-2.5, -2.5, -2.5), -2.2, -3.9, duration_shift_c_per_doubling=0.2,
                  duration_max_doublings=3.0)
    assert d.duration_shift_c[0] == pytest.approx(0.6)


def test_levels_follow_settable_thresholds():
    c = night(n_blocks=1)
    f = fc(-3.0, -2.0, -1.0)
    d = damage.damage(c, f, -2.2, -3.9)
    assert levels.LEVELS[d.level_index[0]] in ("marked", "serious")
    strict = damage.damage(c, f, -2.2, -3.9, level_thresholds={"level_slight_p": 0.9, "level_marked_p": 0.95,
                                                            "level_serious_p": 0.99, "level_serious_kill": 0.99,
                                                            "level_grave_kill": 1.0, "level_grave_p90": 1.0})
    assert strict.level_index[0] == 0


def test_level_names_are_our_own():
    banned = {"watch", "warning", "advisory", "alert", "statement", "emergency"}
    assert not any(any(b in name for b in banned) for name in levels.LEVELS)


# ------------------------------------------------------------------------------------------------
# Settings
# ------------------------------------------------------------------------------------------------

def test_settings_merge_and_validate():
    s = frost_data.FrostSettings.from_mappings({"start_margin_c": 1.5, "heat_season": "x"},
                                       {"frost": {"start_margin_c": 2.0}, "protect_from_level": "serious"})
    assert s.start_margin_c == 2.0 and s.protect_from_level == "serious" and s.sprinkler_margin_c == 2.0
    with pytest.raises(InputError) as e:
        frost_data.FrostSettings.from_mappings({"start_margin_c": "lots"})
    assert e.value.field == "start_margin_c"
    with pytest.raises(InputError):
        frost_data.FrostSettings.from_mappings({"level_slight_p": 0.5, "level_marked_p": 0.2})
    with pytest.raises(InputError):
        frost_data.FrostSettings.from_mappings({"protect_from_level": "red"})


# ------------------------------------------------------------------------------------------------
# Plans
# ------------------------------------------------------------------------------------------------

def _only(risk, method):
    return next(p for p in risk.plans if p.method == method)


def test_sprinkler_starts_on_wet_bulb_and_stops_after_sunrise_when_melting():
    c = night(dew=-6.0)
    b = block(equipment=[{"kind": "overtree_sprinkler", "params": {"rate_mm_h": 5.0}}])
    r = fr.plan_night([b], c, fc(-3.0, -2.0, -1.0))[0]
    p = _only(r, "overtree_sprinkler")
    assert p.usable and p.recommended and r.needs_protection
    target = r.critical_c + b.settings.sprinkler_margin_c
    assert p.start_wet_bulb_c == pytest.approx(target)
    # At the (unrounded) start the wet bulb of the central curve is at the target: check by
    # interpolating the curve at the rounded start time, which lies at most 15 min earlier.
    t_h = (pd.Timestamp(p.start_utc) - T0) / pd.Timedelta(hours=1)
    shift = r.min_p50_c - np.nanmin(c.air_temp_c)
    air = np.interp(t_h, np.arange(c.air_temp_c.shape[1]), c.air_temp_c[0]) + shift
    wb = moisture.wet_bulb_c(air, -6.0)
    assert wb >= target - 1e-6
    assert wb - target < 0.6  # 15 minutes of cooling at most
    # The thermometer reading to start at is the air temperature whose wet bulb is the target.
    assert p.start_air_temp_c == pytest.approx(start_air_temp_c(r.critical_c, -6.0, 1.0), abs=0.01)
    assert p.start_air_temp_c > target  # dry air: start well above the critical temperature
    # Stop: after sunrise, air above 0 and wet bulb above critical.
    sunrise = T0 + pd.Timedelta(hours=10.2)
    assert pd.Timestamp(p.stop_utc) >= sunrise
    t_h = (pd.Timestamp(p.stop_utc) - T0) / pd.Timedelta(hours=1)
    air_stop = np.interp(t_h, np.arange(c.air_temp_c.shape[1]), c.air_temp_c[0]) + shift
    assert air_stop > 0.0 and moisture.wet_bulb_c(air_stop, -6.0) > r.critical_c
    assert p.ready_by_utc <= p.start_utc and not p.stop_open


def test_sprinkler_water_volume_and_rate_check():
    c = night(dew=-6.0)
    eq = [{"kind": "overtree_sprinkler", "rate_mm_h": 4.0}]
    r = fr.plan_night([block(equipment=eq, area_ha=2.5)], c, fc(-3.0, -2.0, -1.0))[0]
    p = _only(r, "overtree_sprinkler")
    assert p.water_m3 == pytest.approx(4.0 * 2.5 * 10.0 * p.run_hours)
    assert p.water_l_per_ha == pytest.approx(4.0 * 1e4 * p.run_hours)
    assert p.water_m3_cold >= p.water_m3
    assert p.required_rate_mm_h == pytest.approx(sprinklers.required_sprinkler_rate_mm_h(-3.0, 1.0))
    # Too little water for tonight: not usable, the sheet gets a "none" line and a caution.
    low = [{"kind": "overtree_sprinkler", "rate_mm_h": 1.0}]
    r2 = fr.plan_night([block(equipment=low)], c, fc(-3.0, -2.0, -1.0))[0]
    p2 = _only(r2, "overtree_sprinkler")
    assert not p2.usable and "sprinkler_rate_short" in p2.caution_keys
    assert [x.method for x in r2.recommended] == ["none"]


def test_sprinkler_supply_too_small_is_not_usable():
    c = night(dew=-6.0)
    eq = [{"kind": "overtree_sprinkler", "params": {"rate_mm_h": 5.0, "water_supply_m3": 50}}]
    p = _only(fr.plan_night([block(equipment=eq)], c, fc(-3.0, -2.0, -1.0))[0], "overtree_sprinkler")
    assert not p.usable and any("lasts about" in n for n in p.notes)


def test_required_rate_table_lookup():
    r = sprinklers.required_sprinkler_rate_mm_h
    # Table row 24 F / class 2-4 mph: 0.16 in/h at the class's upper bound (a node of the table);
    # at 3 mph it lies between the 1 mph (0.10) and 4 mph (0.16) columns.
    assert r((24 - 32) / 1.8, 4 * 0.44704) == pytest.approx(0.16 * 25.4)
    assert r((24 - 32) / 1.8, 3 * 0.44704) == pytest.approx((0.10 + 2.0 / 3.0 * 0.06) * 25.4)
    # Warmer than the warmest row uses that row; calm air uses the first class.
    assert r(0.0, 0.0) == pytest.approx(0.10 * 25.4)
    # Between nodes the table is interpolated (it used to jump to the colder row and the windier class,
    # which made cliffs: -4.44 °C needed 4.1 mm/h and -4.5 °C 6.1 mm/h at 0.9 m/s).
    assert r(-3.0, 0.3) == pytest.approx(0.10 * 25.4)  # -3.0 C lies between 27 F and 26 F rows, both 0.10
    f, mph = -4.0 * 1.8 + 32.0, 2.0 / 0.44704       # 24.8 F, 4.47 mph
    col_4 = 0.16 + (f - 24.0) / 2.0 * (0.10 - 0.16)   # 2-4 mph class, between the 24 F and 26 F rows
    col_8 = 0.30 + (f - 24.0) / 2.0 * (0.14 - 0.30)   # 5-8 mph class
    assert r(-4.0, 2.0) == pytest.approx((col_4 + (mph - 4.0) / 4.0 * (col_8 - col_4)) * 25.4)
    assert abs(r(-4.44, 0.9) - r(-4.5, 0.9)) < 0.1    # no cliff
    assert math.isnan(r(-15.0, 1.0)) and math.isnan(r(-2.0, 12.0))
    grid = r(np.linspace(-11, 0, 23)[:, None], np.linspace(0, 9, 19)[None, :])
    finite = np.nan_to_num(grid, nan=1e9)
    assert np.all(np.diff(finite, axis=0) <= 0) and np.all(np.diff(finite, axis=1) >= 0)


def test_wind_machine_needs_inversion_and_light_wind():
    c = night()
    f = fc(-3.0, -2.0, -1.0)
    wm = [{"kind": "wind_machine"}]
    strong = fr.plan_night([block(equipment=wm, upper_inversion_c=2.5)], c, f)[0]
    weak = fr.plan_night([block(equipment=wm, upper_inversion_c=1.0)], c, f)[0]
    windy = fr.plan_night([block(equipment=wm, upper_inversion_c=3.0)], night(wind=4.0), f)[0]
    est = fr.plan_night([block(equipment=wm, cloud_cover_pct=0.0)], c, f)[0]
    unknown = fr.plan_night([block(equipment=wm)], c, f)[0]
    p = _only(strong, "wind_machine")
    assert p.usable and p.recommended and not p.inversion_estimated and p.inversion_c == 2.5
    assert p.start_air_temp_c == pytest.approx(strong.critical_c + 1.0)
    assert not _only(weak, "wind_machine").usable
    assert not _only(windy, "wind_machine").usable
    pe = _only(est, "wind_machine")
    assert pe.inversion_estimated and "inversion_estimated" in pe.caution_keys and pe.usable
    assert not _only(unknown, "wind_machine").usable


def test_inversion_estimate_behaves():
    e = wind_machine.estimate_inversion_c
    assert e(0, 0.5) == pytest.approx(3.0)
    assert e(100, 0.5) == pytest.approx(0.0)
    assert e(0, 4.0) == pytest.approx(0.0)
    assert e(0, 0.5) > e(50, 0.5) > e(90, 0.5)
    assert math.isnan(e(np.nan, 1.0))


def test_wind_machine_joined_by_heaters_when_gain_too_small():
    c = night()
    eq = [{"kind": "wind_machine"}, {"kind": "heater", "params": {"heaters_per_ha": 40,
                                                                    "fuel_l_per_h_per_heater": 2.0}}]
    r = fr.plan_night([block(equipment=eq, upper_inversion_c=1.6, area_ha=3.0)], c, fc(-5.5, -4.5, -3.5))[0]
    assert {p.method for p in r.recommended} == {"wind_machine", "heater"}
    h = _only(r, "heater")
    assert h.fuel_l == pytest.approx(40 * 2.0 * 3.0 * h.run_hours)


def test_heater_plan_times():
    c = night()
    r = fr.plan_night([block(equipment=[{"kind": "heater", "fuel_l_per_h_per_ha": 100}])], c,
                      fc(-3.0, -2.0, -1.0))[0]
    h = _only(r, "heater")
    assert h.recommended and h.start_air_temp_c == pytest.approx(r.critical_c + 1.0)
    assert h.start_utc < h.stop_utc and h.run_hours == pytest.approx(
        (h.stop_utc - h.start_utc).total_seconds() / 3600)
    assert h.start_utc.minute % 15 == 0 and h.stop_utc.minute % 15 == 0
    assert "heater_fire_co" in h.caution_keys


def test_no_equipment_states_the_risk():
    r = fr.plan_night([block()], night(), fc(-4.0, -3.0, -2.0))[0]
    assert r.needs_protection and r.plans[0].method == "none" and r.plans[0].recommended
    note = r.plans[0].notes[0]
    # the loss figures, not the level's internal key (the notice names the level in its own words)
    # one name for the figure everywhere: "expected bud loss" (it was also called "% of buds killed")
    assert f"expected bud loss tonight {100 * r.expected_kill:.0f} %" in note and r.level not in note


def test_quiet_night_needs_nothing():
    r = fr.plan_night([block(equipment=[{"kind": "heater"}])], night(t_min=4.0), fc(3.0, 4.0, 5.0))[0]
    assert r.level == "nil" and not r.needs_protection and not r.recommended
    assert r.plans[0].start_utc is None and r.plans[0].ready_by_utc is None


def test_unknown_equipment_kind():
    with pytest.raises(InputError):
        fr.plan_night([block(equipment=[{"kind": "smudge pot"}])], night(), fc(-3, -2, -1))


def test_blocks_with_different_windows_share_a_grid():
    c = night(n_blocks=2, hours=16)
    c.air_temp_c[1, :2] = np.nan  # second block's night starts two hours later
    c.air_temp_c[1, -1] = np.nan
    eq = [{"kind": "heater"}]
    rs = fr.plan_night([block("A", equipment=eq), block("B", equipment=eq)], c, fc([-3, -3], [-2, -2], [-1, -1]))
    a, b = (_only(r, "heater") for r in rs)
    assert a.start_utc == b.start_utc  # the same curve where both are defined
    assert rs[0].expected_kill == pytest.approx(rs[1].expected_kill, abs=1e-9)


def test_polar_day_and_polar_night():
    eq = [{"kind": "heater"}]
    f = fc(-3.0, -2.0, -1.0)
    day = fr.plan_night([block(equipment=eq)], night(sunrise_hour=None, polar_day=True), f)[0]
    p = _only(day, "heater")
    assert p.stop_utc is not None and not p.stop_open
    dark = fr.plan_night([block(equipment=eq)], night(sunrise_hour=None), f)[0]
    p = _only(dark, "heater")
    assert any("does not rise" in n for n in p.notes)
    assert p.stop_utc is not None


def test_stop_open_when_curve_ends_cold():
    eq = [{"kind": "overtree_sprinkler", "rate_mm_h": 5.0}]
    c = night(hours=11)  # ends at the minimum
    p = _only(fr.plan_night([block(equipment=eq)], c, fc(-3.0, -2.0, -1.0))[0], "overtree_sprinkler")
    assert p.stop_open and any("keep running" in n for n in p.notes)


def test_vectorised_over_many_blocks_matches_single_runs():
    n = 30
    rng = np.random.default_rng(3)
    c = night(n_blocks=n)
    c.air_temp_c += rng.normal(0, 0.5, size=(n, 1))
    p50 = rng.uniform(-4, 1, n)
    f = fc(p50 - 1.5, p50, p50 + 1.0)
    stages = th.stages_for("apple")
    bl = [block(f"B{i}", stage=stages[i % len(stages)], equipment=[{"kind": "heater"}]) for i in range(n)]
    many = fr.plan_night(bl, c, f)
    for i in (0, 7, 29):
        ci = frost_data.NightCurves(c.times_utc, c.air_temp_c[i:i + 1], c.dew_point_c[i:i + 1],
                            c.wind_speed_ms[i:i + 1], c.sunrise_utc[i:i + 1])
        one = fr.plan_night([bl[i]], ci, fc(f.p10_c[i], f.p50_c[i], f.p90_c[i]))[0]
        assert one.expected_kill == pytest.approx(many[i].expected_kill)
        assert one.plans[0].start_utc == many[i].plans[0].start_utc


def test_assessment_bridge_round_trip():
    eq = [{"kind": "overtree_sprinkler", "rate_mm_h": 5.0}, {"kind": "wind_machine"}]
    r = fr.plan_night([block(equipment=eq, cloud_cover_pct=10.0)], night(), fc(-3.0, -2.0, -1.0))[0]
    fields = frost_assessment.assessment_fields(r)
    a = Assessment(kind="frost", farm="F", farm_tz="UTC", units="metric", block_id=1, block=r.block,
                   station="S", crop=r.crop, variety=None, stage=r.stage, area_ha=4.0,
                   night=datetime(2024, 4, 9).date(), **fields)
    back = frost_assessment.risk_from_assessment(a)
    assert back.level == r.level and back.needs_protection == r.needs_protection
    assert back.expected_kill == pytest.approx(r.expected_kill)
    for p, q in zip(r.plans, back.plans, strict=True):
        assert (p.method, p.start_utc, p.stop_utc, p.recommended) == (q.method, q.start_utc, q.stop_utc,
                                                                       q.recommended)
        assert p.water_m3 == q.water_m3 and p.start_wet_bulb_c == q.start_wet_bulb_c
    steps = fields["plan"]
    assert steps[0].start_rule.startswith("when the wet bulb falls to")
    assert r.critical_time_utc is None  # the central low (-2.0 °C) stays above T10 (-2.2 °C)
    assert 0 <= r.p_min_below_t10 <= 1


def test_times_are_utc_aware():
    r = fr.plan_night([block(equipment=[{"kind": "heater"}])], night(), fc(-3, -2, -1))[0]
    p = r.plans[0]
    assert p.start_utc.tzinfo is not None and p.start_utc.utcoffset() == timedelta(0)
    assert r.time_of_min_utc == datetime(2024, 4, 10, 12, 0, tzinfo=UTC)


def test_already_cold_at_start_of_curve():
    c = night(t_eve=-2.0, t_min=-3.0)
    r = fr.plan_night([block(equipment=[{"kind": "heater"}])], c, fc(-4.0, -3.0, -2.0))[0]
    p = r.plans[0]
    assert p.start_utc == T0.to_pydatetime() and any("start now" in n for n in p.notes)


# ------------------------------------------------------------------------------------------------
# Critical time, the cold case, sprinkler need
# ------------------------------------------------------------------------------------------------

def _hour_of(t):
    return (pd.Timestamp(t) - T0) / pd.Timedelta(hours=1)


def test_critical_time_is_when_the_air_reaches_t10_not_the_start_time():
    c = night(t_eve=6.0, t_min=-3.5, min_hour=10)
    r = fr.plan_night([block(stage="full bloom", equipment=[{"kind": "heater"}])], c, fc(-6.0, -3.5, -1.0))[0]
    air = c.air_temp_c[0]
    h = np.arange(len(air), dtype=float)
    cross_t10 = np.interp(-r.t10_c, -air[:11], h[:11])             # falling branch, inverted
    cross_start = np.interp(-(r.t10_c + 1.0), -air[:11], h[:11])   # T10 + the 1 °C start margin
    assert _hour_of(r.critical_time_utc) == pytest.approx(cross_t10, abs=0.02)
    heater = _only(r, "heater")
    assert _hour_of(heater.start_utc) <= cross_start + 1e-9 < cross_t10
    assert _hour_of(r.critical_time_utc) - _hour_of(heater.start_utc) > 0.5


def test_critical_time_none_when_the_central_curve_stays_above_t10():
    r = fr.plan_night([block(equipment=[{"kind": "heater"}])], night(t_min=-1.9), fc(-4.0, -1.9, -0.5))[0]
    assert r.critical_time_utc is None
    assert _only(r, "heater").start_utc is not None  # -1.9 is below T10 + margin: the start still comes


def test_cold_case_leaves_the_observed_evening_alone_and_matches_the_band():
    c = night(t_eve=6.0, t_min=-2.0, min_hour=10)
    w = fr.cold_fan_weight(c.air_temp_c)
    assert w[0, 0] == 0.0 and np.all(w[0, 10:] == 1.0) and np.all(np.diff(w[0, :11]) >= 0)
    # the chart's lower band edge (the forecast's 10th-percentile curve) runs from the evening reading
    # to the p10 minimum along the same square-root shape
    p10, p50 = -5.0, -2.0
    h = np.arange(11, dtype=float)
    band = 6.0 - (6.0 - p10) * np.sqrt(h / 10)
    np.testing.assert_allclose(c.air_temp_c[0, :11] + (p10 - p50) * w[0, :11], band, atol=1e-9)
    r = fr.plan_night([block(equipment=[{"kind": "heater"}])], c, fc(p10, p50, 0.0))[0]
    ready = _hour_of(_only(r, "heater").ready_by_utc)
    start_c = r.critical_c + 1.0
    cross = np.interp(-start_c, -band, h)
    assert cross - 0.25 - 1e-9 <= ready <= cross + 1e-9  # rounded down to 15 min


def test_sprinkler_note_says_how_close_the_system_is_and_where_the_table_comes_from():
    c = night(dew=-6.0, wind=0.9)
    eq = [{"kind": "overtree_sprinkler", "rate_mm_h": 3.0}]
    r = fr.plan_night([block(equipment=eq)], c, fc(-7.0, -4.5, -2.0))[0]
    p = _only(r, "overtree_sprinkler")
    need = sprinklers.required_sprinkler_rate_mm_h(-4.5, 0.9)
    assert p.required_rate_mm_h == pytest.approx(need)
    note = next(n for n in p.notes if n.startswith("System 3 mm/h, needs"))
    assert f"needs {need:.1f} mm/h: {math.floor(100 * 3.0 / need):.0f} % of the need" in note
    assert "built for citrus" in note


def test_reasons_after_a_colon_continue_the_sentence():
    from advisory.risk.frost import _lower_first

    assert _lower_first("Inversion unknown (no upper sensor)") == "inversion unknown (no upper sensor)"
    assert _lower_first("T10 not reached") == "T10 not reached"  # a symbol keeps its case
    assert _lower_first("RH sensor stuck") == "RH sensor stuck"
