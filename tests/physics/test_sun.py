"""Unit tests for advisory.physics.sun."""

from __future__ import annotations

import datetime as dt

import numpy as np
import pandas as pd
import pytest

from advisory.physics import sun

NY = "America/New_York"


def test_batch_columns_and_utc_times():
    df = sun.sun_times_batch([36.1, -35.0], [-79.95, 142.0], dt.date(2024, 4, 1),
                             [NY, "Australia/Melbourne"])
    assert list(df.columns) == ["night", "latitude", "longitude", "tz", "status", "sunset", "sunrise",
                                "solar_noon", "civil_dusk", "civil_dawn", "night_length_h"]
    for col in ("sunset", "sunrise", "solar_noon", "civil_dusk", "civil_dawn"):
        assert str(df[col].dt.tz) == "UTC"
    assert (df["status"] == sun.NORMAL).all()
    assert (df["sunset"] < df["civil_dusk"]).all()
    assert (df["civil_dusk"] < df["civil_dawn"]).all()
    assert (df["civil_dawn"] < df["sunrise"]).all()
    assert (df["solar_noon"] < df["sunset"]).all()


def test_sunset_falls_on_the_local_evening_of_the_night():
    # places around the globe, including zones far from their meridian
    places = [(36.1, -79.95, NY), (-41.3, 174.8, "Pacific/Auckland"), (43.0, -2.0, "Europe/Madrid"),
              (40.0, 87.0, "Asia/Shanghai"), (21.3, -157.8, "Pacific/Honolulu"), (-33.9, 18.4,
                                                                                   "Africa/Johannesburg")]
    lat, lon, tz = zip(*places, strict=True)
    for night in (dt.date(2024, 1, 15), dt.date(2024, 7, 15)):
        df = sun.sun_times_batch(lat, lon, night, list(tz))
        for row in df.itertuples():
            local_set = row.sunset.tz_convert(row.tz)
            local_rise = row.sunrise.tz_convert(row.tz)
            assert local_set.date() == night
            assert local_rise.date() == night + dt.timedelta(days=1)
            assert 14 <= local_set.hour <= 22
            assert 3 <= local_rise.hour <= 10


def test_spring_forward_night_length_is_physical():
    # Night of 9 March 2024 in New York: clocks jump from 02:00 to 03:00.
    st = sun.sun_times(36.1, -79.95, dt.date(2024, 3, 9), NY)
    before = sun.sun_times(36.1, -79.95, dt.date(2024, 3, 8), NY)
    assert st.has_night
    assert abs(st.night_length_h - before.night_length_h) < 0.1  # not an hour shorter
    assert st.sunset.astimezone(dt.timezone(dt.timedelta(hours=-5))).hour == 18
    # local sunrise on daylight time reads an hour later than the night before
    assert st.sunrise.astimezone(pd.Timestamp.now(NY).tzinfo).hour == 7


def test_fall_back_night():
    st = sun.sun_times(36.1, -79.95, dt.date(2024, 11, 2), NY)
    before = sun.sun_times(36.1, -79.95, dt.date(2024, 11, 1), NY)
    assert abs(st.night_length_h - before.night_length_h) < 0.1
    assert (st.sunrise - st.sunset).total_seconds() / 3600 == pytest.approx(st.night_length_h)


def test_southern_hemisphere_seasons():
    winter = sun.sun_times(-34.2, 142.1, dt.date(2024, 6, 20), "Australia/Melbourne")
    summer = sun.sun_times(-34.2, 142.1, dt.date(2024, 12, 20), "Australia/Melbourne")
    assert winter.night_length_h > 13.5  # common practice: ~14 h nights at 34° S in June
    assert summer.night_length_h < 10.5
    # Melbourne's daylight-saving night (first Sunday in April 2024 ends DST)
    dst = sun.sun_times(-34.2, 142.1, dt.date(2024, 4, 6), "Australia/Melbourne")
    prev = sun.sun_times(-34.2, 142.1, dt.date(2024, 4, 5), "Australia/Melbourne")
    assert 0 < dst.night_length_h - prev.night_length_h < 0.1


def test_polar_day_and_night_are_explicit():
    df = sun.sun_times_batch(78.2, 15.6, ["2024-06-21", "2024-12-21", "2024-03-21"], "Arctic/Longyearbyen")
    assert list(df["status"]) == [sun.POLAR_DAY, sun.POLAR_NIGHT, sun.NORMAL]
    assert df.loc[:1, "sunset"].isna().all() and df.loc[:1, "sunrise"].isna().all()
    assert df.loc[:1, "night_length_h"].isna().all()
    st = sun.sun_times(-78.0, 166.0, dt.date(2024, 12, 21), "Antarctica/McMurdo")
    assert st.status == sun.POLAR_DAY and not st.has_night and "does not set" in st.message
    st = sun.sun_times(-78.0, 166.0, dt.date(2024, 6, 21), "Antarctica/McMurdo")
    assert st.status == sun.POLAR_NIGHT and "does not rise" in st.message


def test_white_night_has_no_civil_twilight_but_a_night():
    st = sun.sun_times(65.0, 25.0, dt.date(2024, 6, 21), "Europe/Helsinki")
    assert st.status == sun.NORMAL and 0 < st.night_length_h < 3
    assert st.civil_dusk is None and st.civil_dawn is None


@pytest.mark.parametrize("engine", ["numpy", "astral"])
def test_sunset_after_local_midnight_belongs_to_the_evening(engine):
    # 69° N, 0° E on Oslo time in mid May: the sun sets about half an hour after local midnight.
    st = sun.sun_times(69.0, 0.0, dt.date(2024, 5, 14), "Europe/Oslo", engine=engine)
    prev = sun.sun_times(69.0, 0.0, dt.date(2024, 5, 13), "Europe/Oslo", engine=engine)
    assert st.status == sun.NORMAL
    local = pd.Timestamp(st.sunset).tz_convert("Europe/Oslo")
    assert local.date() == dt.date(2024, 5, 15) and local.hour == 0
    assert st.solar_noon < st.sunset < st.sunrise
    assert 2 < st.night_length_h < 3.5
    assert 23.5 < (st.sunset - prev.sunset).total_seconds() / 3600 < 24.5


@pytest.mark.parametrize("lat,lon,tz", [(36.1, -79.95, NY), (-34.2, 142.1, "Australia/Melbourne"),
                                        (46.6, 7.5, "Europe/Zurich"), (60.2, 24.9, "Europe/Helsinki")])
def test_numpy_engine_matches_astral(lat, lon, tz):
    # reference: the astral library, whose NOAA equations the numpy engine transcribes
    for month in range(1, 13):
        night = dt.date(2023, month, 10)
        a = sun.sun_times(lat, lon, night, tz, engine="astral")
        b = sun.sun_times(lat, lon, night, tz)
        assert a.status == b.status == sun.NORMAL
        # astral puts its horizon at a 90.79° zenith against NOAA's 90.833°, adds refraction to the
        # 96° civil zenith and evaluates noon's equation of time at 0 h UTC: tens of seconds, a few
        # minutes for twilight where the sun grazes the horizon at 60° N in June
        for name, tol in (("sunset", 45), ("sunrise", 45), ("solar_noon", 30), ("civil_dusk", 180),
                          ("civil_dawn", 180)):
            assert abs((getattr(a, name) - getattr(b, name)).total_seconds()) < tol, (night, name)


def test_astral_engine_polar():
    st = sun.sun_times(78.2, 15.6, dt.date(2024, 6, 21), "Arctic/Longyearbyen", engine="astral")
    assert st.status == sun.POLAR_DAY and st.sunset is None
    st = sun.sun_times(78.2, 15.6, dt.date(2024, 12, 21), "Arctic/Longyearbyen", engine="astral")
    assert st.status == sun.POLAR_NIGHT


def test_batch_is_vectorised_over_nights_and_places():
    nights = pd.date_range("2024-01-01", periods=366, freq="D").date
    df = sun.sun_times_batch(36.1, -79.95, nights, NY)
    assert len(df) == 366 and (df["status"] == sun.NORMAL).all()
    # longest night near the December solstice, shortest near the June one
    assert df.loc[df["night_length_h"].idxmax(), "night"].month in (12, 1)
    assert df.loc[df["night_length_h"].idxmin(), "night"].month == 6
    with pytest.raises(ValueError):
        sun.sun_times_batch([1.0, 2.0], [1.0, 2.0, 3.0], nights[:3], "UTC")
    with pytest.raises(ValueError):
        sun.sun_times_batch(95.0, 0.0, nights[0], "UTC")


def test_night_of():
    t = pd.Timestamp("2024-04-02 03:00", tz="UTC")  # 23:00 on 1 April in New York
    assert sun.night_of(t, NY) == dt.date(2024, 4, 1)
    t = pd.Timestamp("2024-04-02 09:00", tz="UTC")  # 05:00 local, still the night of 1 April
    assert sun.night_of(t, NY) == dt.date(2024, 4, 1)
    t = pd.Timestamp("2024-04-02 17:00", tz="UTC")
    assert sun.night_of(t, NY) == dt.date(2024, 4, 2)
    with pytest.raises(ValueError):
        sun.night_of(dt.datetime(2024, 4, 2, 3), NY)


def test_night_must_be_a_date():
    with pytest.raises(ValueError):
        sun.sun_times(36.1, -79.95, dt.datetime(2024, 4, 1, 12, tzinfo=dt.UTC), NY)
    assert np.isfinite(sun.sun_times(36.1, -79.95, "2024-04-01", NY).night_length_h)


def test_local_midnight_utc_also_where_a_clock_change_skips_midnight():
    import datetime as _dt

    from advisory.physics.sun import local_midnight_utc

    assert str(local_midnight_utc(_dt.date(2026, 4, 8), "America/Los_Angeles")) == "2026-04-08 07:00:00+00:00"
    # Cuba springs forward at midnight (IANA tz database, America/Havana): the day still has a start
    start = local_midnight_utc(_dt.date(2026, 3, 8), "America/Havana")
    assert start.tz_convert("America/Havana").date() == _dt.date(2026, 3, 8)
