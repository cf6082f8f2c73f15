"""Hand-built assessments for the notice tests (they test the words, not the physics)."""

from __future__ import annotations

import datetime as dt

from advisory.assessment import Assessment, CurvePoint, ProtectionStep

UTC = dt.UTC
NIGHT = dt.date(2026, 4, 6)
# 2026-04-06 evening in America/Los_Angeles (PDT, UTC-7): sunset about 19:40, sunrise 06:25.
SUNSET = dt.datetime(2026, 4, 7, 2, 40, tzinfo=UTC)
SUNRISE = dt.datetime(2026, 4, 7, 13, 25, tzinfo=UTC)
REFERENCE = dt.datetime(2026, 4, 7, 4, 40, tzinfo=UTC)


def night_curve(min_c: float = -2.8, spread_c: float = 1.3, wet_bulb: bool = True) -> list[CurvePoint]:
    """A falling night curve from 20:00 to 08:00 local, lowest near sunrise."""
    out = []
    start = dt.datetime(2026, 4, 7, 3, 0, tzinfo=UTC)
    shape = [6.0, 4.5, 3.4, 2.5, 1.8, 1.2, 0.7, 0.35, 0.1, 0.0, 0.05, 1.5, 4.0]
    for i, s in enumerate(shape):
        p50 = min_c + s
        out.append(CurvePoint(time_utc=start + dt.timedelta(hours=i), p50_c=p50, p10_c=p50 - spread_c,
                              p90_c=p50 + spread_c, wet_bulb_c=(p50 - 1.6) if wet_bulb else None))
    return out


def frost_assessment(**kw) -> Assessment:
    """A block at 'protect' with over-tree sprinklers advised."""
    a = Assessment(
        kind="frost", farm="Quillback Ridge Orchards", farm_tz="America/Los_Angeles", units="metric",
        block_id=2, block="Creek Bing", station="QR-CREEK", crop="sweet_cherry", variety="Bing",
        stage="first bloom", area_ha=4.2, night=NIGHT, revision=0, is_update=False, status="ok",
        reference_time_utc=REFERENCE, sunset_utc=SUNSET, sunrise_utc=SUNRISE, model="site-regression",
        training_nights=42, p10_c=-4.1, p50_c=-2.8, p90_c=-1.5, t10_c=-2.2, t90_c=-3.9,
        critical_source="WSU EB1128 (sweet cherry)", level="serious", level_rank=3,
        p_below_t10=0.66, p_below_t90=0.13, expected_kill_pct=14.0, p_kill_ge_10pct=0.62,
        critical_time_utc=dt.datetime(2026, 4, 7, 9, 40, tzinfo=UTC), hours_below_t10=3.5,
        curve=night_curve(),
        plan=[ProtectionStep(
            method="overtree_sprinkler", advised=True,
            start_utc=dt.datetime(2026, 4, 7, 8, 50, tzinfo=UTC),
            stop_utc=dt.datetime(2026, 4, 7, 14, 30, tzinfo=UTC),
            start_rule="when the wet bulb falls to -1.2 °C (air about 1.1 °C at the forecast dew point)",
            stop_rule="after sunrise, once the wet bulb is above -2.2 °C and the ice is melting; never earlier",
            quantities={"hours": 5.7, "start_wet_bulb_c": -1.2, "start_air_temp_c": 1.1,
                        "rate_available_mm_h": 3.8, "rate_needed_mm_h": 3.0, "water_m3": 909.7,
                        "water_l_per_ha": 216600.0},
            notes=["System rate 3.8 mm/h meets the 3.0 mm/h needed."])],
        data_quality={"latest_obs_utc": "2026-04-07T04:30:00+00:00", "obs_age_min": 10.0, "flags": [],
                      "air_temp_c": 4.1, "dew_point_c": -3.5, "wind_speed_ms": 0.8},
        verification=[
            {"night": "2026-04-01", "forecast_c": -0.5, "observed_c": -1.1, "error_c": 0.6},
            {"night": "2026-04-02", "forecast_c": 1.2, "observed_c": 0.8, "error_c": 0.4},
            {"night": "2026-04-03", "forecast_c": -1.8, "observed_c": -1.5, "error_c": -0.3},
        ],
        details={"time_of_min_utc": "2026-04-07T12:00:00+00:00", "p_kill_ge_90pct": 0.04,
                 "hours_below_t10_cold": 5.0},
        cautions=["sprinkler_no_stop", "ice_load", "water_supply"],
    )
    for k, v in kw.items():
        setattr(a, k, v)
    return a


def quiet_assessment(**kw) -> Assessment:
    a = frost_assessment(block_id=1, block="Bench Gala", station="QR-BENCH", crop="apple", variety="Gala",
                         stage="full pink", p10_c=0.4, p50_c=1.8, p90_c=3.1, t10_c=-2.2, t90_c=-4.4,
                         level="nil", level_rank=0, p_below_t10=0.0, p_below_t90=0.0, expected_kill_pct=0.0,
                         p_kill_ge_10pct=0.0, critical_time_utc=None, hours_below_t10=0.0,
                         curve=night_curve(1.8), cautions=[], details={"p_kill_ge_90pct": 0.0},
                         plan=[ProtectionStep(method="wind_machine", advised=False, estimated=False,
                                              quantities={"inversion_c": 2.4}, notes=["Inversion 2.4 °C (measured)."])])
    for k, v in kw.items():
        setattr(a, k, v)
    return a


def heat_assessment(**kw) -> Assessment:
    start = dt.datetime(2026, 7, 15, 13, 0, tzinfo=UTC)  # 06:00 PDT
    temps = [18, 20, 23, 26, 28.5, 30.5, 32, 33.5, 34.6, 35.2, 35.4, 35.0, 33.8, 31.5, 28.5, 25.0]
    curve = []
    for i, t in enumerate(temps):
        curve.append(CurvePoint(time_utc=start + dt.timedelta(hours=i), p50_c=t, p10_c=t - 1.5, p90_c=t + 1.5,
                                heat_index_c=t + (1.0 if t > 27 else 0.0), wbgt_c=t * 0.78))
    a = Assessment(
        kind="heat", farm="Quillback Ridge Orchards", farm_tz="America/Los_Angeles", units="metric",
        block_id=1, block="Bench Gala", station="QR-BENCH", crop="apple", variety="Gala", stage="fruit",
        area_ha=6.5, night=dt.date(2026, 7, 15), status="ok",
        reference_time_utc=dt.datetime(2026, 7, 15, 13, 30, tzinfo=UTC),
        sunrise_utc=dt.datetime(2026, 7, 15, 12, 30, tzinfo=UTC),
        sunset_utc=dt.datetime(2026, 7, 16, 3, 45, tzinfo=UTC),
        p10_c=33.9, p50_c=35.4, p90_c=36.9, level="serious", level_rank=3, curve=curve,
        details={"sunburn": {"threshold_c": 31.5},
                 "safer_hours": [{"start_utc": "2026-07-15T13:00:00+00:00",
                                  "stop_utc": "2026-07-15T18:00:00+00:00"}],
                 "crew_windows": [{"start_utc": "2026-07-15T20:00:00+00:00",
                                   "stop_utc": "2026-07-16T01:00:00+00:00", "label": "high",
                                   "heat_index_max_c": 36.4, "wbgt_max_c": 27.6,
                                   "advice": "45 min work, 15 min rest in shade; water every 15 min"}],
                 "guidance": ["Drink a cup of water every 15 to 20 minutes, even when not thirsty."]},
        data_quality={"latest_obs_utc": "2026-07-15T13:20:00+00:00", "obs_age_min": 10.0, "flags": []},
    )
    for k, v in kw.items():
        setattr(a, k, v)
    return a
