"""Over-tree sprinkler application rates against published guidance.

Source: Michigan State University Extension (Longstroth, "Using sprinklers to
protect plants from spring freezes", 2012; checked in a stored copy): typical
systems applying 0.12-0.15 in/h protect to about 22 °F with no wind, or 24-25 °F
with a light wind.  The rate table itself (Gerber & Harrison 1964 as reproduced
in extension guides) is from memory, unverified.
"""

import pytest

from advisory.risk.protection.sprinklers import required_sprinkler_rate_mm_h

IN_H = 25.4  # mm/h per in/h
MPH = 0.44704  # m/s per mph


def _f_to_c(f):
    return (f - 32.0) / 1.8


def test_calm_22f_needs_what_msu_says_protects():
    # MSU Extension: 0.12-0.15 in/h protects to about 22 °F with no wind.
    rate = required_sprinkler_rate_mm_h(_f_to_c(22.0), 0.5 * MPH) / IN_H
    assert 0.12 - 1e-9 <= rate <= 0.15


def test_light_wind_24_25f_close_to_msu_range():
    # MSU Extension: 0.12-0.15 in/h protects to 24-25 °F with a light wind. Our conservative look-up
    # takes the colder row, so allow 0.01 in/h above the range.
    for f in (24.0, 25.0):
        rate = required_sprinkler_rate_mm_h(_f_to_c(f), 3.0 * MPH) / IN_H
        assert 0.10 - 1e-9 <= rate <= 0.16 + 1e-9


def test_more_wind_or_cold_needs_more_water():
    # Common practice: heat loss grows with wind and with the temperature deficit.
    assert required_sprinkler_rate_mm_h(-5.0, 3.0) > required_sprinkler_rate_mm_h(-5.0, 0.3)
    assert required_sprinkler_rate_mm_h(-7.0, 1.0) > required_sprinkler_rate_mm_h(-3.0, 1.0)
    assert required_sprinkler_rate_mm_h(-2.0, 0.5) == pytest.approx(0.10 * IN_H)
