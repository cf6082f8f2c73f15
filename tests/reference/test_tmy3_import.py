"""A year of real hourly observations (pvlib's 723170TYA.CSV) through the importer.

Source: the typical-meteorological-year file shipped with pvlib, hourly air
temperature, dew point, relative humidity, wind and cloud at a piedmont
airport, converted to the canonical CSV by ``tests/helpers/tmy3.py``.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from advisory.ingest import qc
from advisory.ingest.observations import import_file, load_observations
from advisory.physics.moisture import dew_point_c_from_rh
from advisory.store.schema import Farm, Station
from tests.helpers import tmy3


@pytest.fixture
def tmy_db(db):
    with db.transaction() as s:
        farm = Farm(name="Reference", timezone=tmy3.TZ)
        s.add(farm)
        s.flush()
        s.add(Station(code="TMY", farm_id=farm.id, name="723170", latitude=tmy3.LATITUDE,
                      longitude=tmy3.LONGITUDE, elevation_m=tmy3.ELEVATION_M, timezone=tmy3.TZ, column_map={}))
    return db


def _stored(db) -> pd.DataFrame:
    with db.transaction() as s:
        sid = s.query(Station.id).filter_by(code="TMY").scalar()
        return load_observations(s, sid, pd.Timestamp("1970-01-01", tz="UTC"), pd.Timestamp("2100-01-01", tz="UTC"),
                                 qc_passed_only=False, include_qc=True)


def _source() -> pd.DataFrame:
    src = tmy3.tmy3_frame().copy()
    src.index = src.index.tz_convert("UTC")
    return src.sort_index()


def _away_from_month_joins(index: pd.DatetimeIndex) -> np.ndarray:
    """False for the first and last 6 hours of each month of the file.

    A typical year splices months from different years and smooths the
    hours around each join, which leaves them internally inconsistent
    (from memory of the TMY3 user's manual, unverified; the mismatches found
    here cluster there).
    """
    local = index.tz_convert(tmy3.TZ)
    first = (local.day == 1) & (local.hour <= 6)
    last = (local + pd.Timedelta(hours=6)).month != local.month
    return ~(first | last)


def test_imported_without_loss(tmy_db, tmp_path):
    path = tmy3.write_canonical_csv(tmp_path / "723170.csv")
    summary = import_file(tmy_db, "TMY", path)
    assert (summary.rows_read, summary.rows_added, summary.conflicts) == (8760, 8760, 0)
    stored = _stored(tmy_db)
    src = _source()
    assert len(stored) == 8760
    # Same instants: the file's hour-ending local standard times (UTC-5) in UTC.
    pd.testing.assert_index_equal(stored.index, src.index.as_unit("us"), check_names=False, exact=False)
    for col in ("air_temp_c", "dew_point_c", "wind_speed_ms", "cloud_cover_pct"):
        np.testing.assert_array_equal(stored[col].to_numpy(), src[col].to_numpy(), err_msg=col)
    # Importing it again adds nothing.
    again = import_file(tmy_db, "TMY", path)
    assert again.already_imported and again.rows_added == 0


def _slope(x):
    """d ln e_s / dT of the Magnus form (Alduchov & Eskridge 1996) [1/K]."""
    return 17.625 * 243.04 / (x + 243.04) ** 2


# The file's resolution: humidity in whole per cent (±0.5 %RH), temperatures to 0.1 °C (±0.05 °C,
# i.e. ±0.05 * slope in ln e).  Its own psychrometric formula is not ours: standard saturation
# formulas differ by up to about 0.4 % (AERK against ASHRAE's Hyland-Wexler: 0.24 % on our grid,
# tests/reference/test_moisture_psychrolib_metpy.py), so 0.5 % in ln e.
_RH_STEP, _T_STEP, _FORMULA = 0.5, 0.05, 0.005


def test_dew_point_matches_its_own_relative_humidity(tmy_db, tmp_path):
    import_file(tmy_db, "TMY", tmy3.write_canonical_csv(tmp_path / "723170.csv"))
    stored = _stored(tmy_db)
    src = _source()
    # Compared where the file's two conventions agree: dew point >= 0 °C (below it, some months
    # of this file give humidity over ice), and away from the month joins.
    sel = _away_from_month_joins(src.index) & (src["dew_point_c"].to_numpy() >= 0.0)
    assert sel.sum() > 6000
    t, td, rh = (src[c].to_numpy()[sel] for c in ("air_temp_c", "dew_point_c", "rel_humidity_pct"))
    diff = stored["rel_humidity_pct"].to_numpy()[sel] - rh
    tol = _RH_STEP + rh * (_T_STEP * (_slope(t) + _slope(td)) + _FORMULA)  # about 1.7 %RH near saturation
    assert (np.abs(diff) <= tol).all()
    assert abs(diff.mean()) < 0.2  # and no bias


def test_dew_point_derived_from_the_files_humidity(tmy_db, tmp_path):
    path = tmy3.write_canonical_csv(tmp_path / "723170-rh.csv", humidity="rel_humidity")
    summary = import_file(tmy_db, "TMY", path)
    assert summary.derived == {"dew_point_c": 8760}
    stored = _stored(tmy_db)
    src = _source()
    sel = _away_from_month_joins(src.index) & (src["dew_point_c"].to_numpy() >= 0.0)
    t, td, rh = (src[c].to_numpy()[sel] for c in ("air_temp_c", "dew_point_c", "rel_humidity_pct"))
    ours = stored["dew_point_c"].to_numpy()[sel]
    np.testing.assert_allclose(ours, dew_point_c_from_rh(t, rh))
    # The same budget in ln e, turned into °C at the dew point, plus the file's own ±0.05 °C.
    tol = (_RH_STEP / rh + _T_STEP * _slope(t) + _FORMULA) / _slope(td) + _T_STEP
    assert (np.abs(ours - td) <= tol).all()


def test_qc_on_a_year_of_real_data_flags_little(tmy_db, tmp_path):
    summary = import_file(tmy_db, "TMY", tmy3.write_canonical_csv(tmp_path / "723170.csv"))
    air = summary.flags["air_temp_c"]
    # Real hourly data: excursions and jumps beyond the WMO tolerances are rare (common practice:
    # a quality-controlled reference year should pass almost everywhere).  Stuck runs do occur:
    # the file holds filled stretches (e.g. 16 hours at -9.4 °C).
    assert air["spike"] + air["step"] + air["range"] <= 0.001 * 8760
    assert air["stuck"] < 0.05 * 8760
    assert summary.flags["cloud_cover_pct"]["stuck"] == 0  # not applied to cloud cover
    stored = _stored(tmy_db)
    assert (stored["air_temp_qc"] & qc.STUCK != 0).sum() == air["stuck"]
