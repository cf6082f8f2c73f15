"""Unit tests for advisory.crops.thresholds."""

import math

import numpy as np
import pytest

from advisory.crops import thresholds as th
from advisory.errors import InputError


def test_every_crop_has_stages_in_order():
    df = th.table()
    assert set(df["crop"]) == set(th.CROPS)
    for crop in th.CROPS:
        sub = df[df["crop"] == crop]
        assert list(sub["stage_order"]) == list(range(1, len(sub) + 1))
        assert th.stages_for(crop) == list(sub["stage"])


def test_rows_are_sane_and_sourced():
    df = th.table()
    assert (df["t10_c"] > df["t90_c"]).all()
    assert df["source"].str.len().gt(10).all()
    # A verified row names what it was checked against.
    assert df.loc[df["verified"], "checked_against"].str.len().gt(5).all()
    assert not df.duplicated(["crop", "stage"]).any()


def test_celsius_matches_published_values():
    df = th.table()
    f = df["published_unit"] == "F"
    np.testing.assert_allclose(df.loc[f, "t10_c"], (df.loc[f, "t10_published"] - 32) / 1.8, atol=0.051)
    np.testing.assert_allclose(df.loc[f, "t90_c"], (df.loc[f, "t90_published"] - 32) / 1.8, atol=0.051)
    c = ~f
    np.testing.assert_allclose(df.loc[c, "t10_c"], df.loc[c, "t10_published"])


def test_bloom_gets_more_tender_through_the_season():
    # Hardiness is lost as buds develop (common practice): T90 never falls later in the season.
    df = th.table()
    for crop in th.CROPS:
        t90 = df.loc[df["crop"] == crop, "t90_c"].to_numpy()
        assert np.all(np.diff(t90) >= -1e-9), crop


@pytest.mark.parametrize("name,expected", [
    ("Apple", "apple"), ("SWEET CHERRY", "sweet_cherry"), ("sweet-cherry", "sweet_cherry"),
    ("tart_cherry", "tart_cherry"), ("Sour cherry", "tart_cherry"), ("prune", "plum"),
    ("Wine Grape", "wine_grape"), ("grape", "wine_grape"), ("  peach ", "peach"),
])
def test_normalise_crop(name, expected):
    assert th.normalise_crop(name) == expected


def test_unknown_crop_lists_choices():
    with pytest.raises(InputError) as e:
        th.normalise_crop("kiwifruit")
    assert "apple" in str(e.value) and "wine_grape" in str(e.value)
    assert e.value.field == "crop"


@pytest.mark.parametrize("crop,stage,expected", [
    ("apple", "Half Inch Green", "half-inch green"), ("apple", "half_inch-green", "half-inch green"),
    ("apple", "1/2 inch green", "half-inch green"), ("apple", "petal fall", "post bloom"),
    ("apple", "king bloom", "first bloom"), ("sweet cherry", "Popcorn", "first white"),
    ("wine grape", "budbreak", "bud burst"), ("pear", "FULL-WHITE", "full white"),
])
def test_normalise_stage(crop, stage, expected):
    assert th.normalise_stage(crop, stage) == expected


def test_unknown_stage_lists_stages_in_order():
    with pytest.raises(InputError) as e:
        th.normalise_stage("peach", "tight cluster")
    msg = str(e.value)
    assert "first swelling, calyx green" in msg and e.value.field == "stage"


def test_critical_temps_table_value():
    ct = th.critical_temps("apple", "full bloom")
    assert ct == th.CriticalTemps("apple", "full bloom", -2.2, -3.9, ct.source, True)
    assert "EB0913" in ct.source


def test_overrides():
    both = th.critical_temps("apple", "full bloom", t10_override_c=-1.5, t90_override_c=-4.5)
    assert (both.t10_c, both.t90_c, both.source) == (-1.5, -4.5, "block override")
    one = th.critical_temps("apple", "full bloom", t90_override_c=-5.0)
    assert (one.t10_c, one.t90_c) == (-2.2, -5.0)
    assert one.source.startswith("block override (T90)")
    with pytest.raises(InputError):
        th.critical_temps("apple", "full bloom", t10_override_c=-6.0)  # colder than T90
    with pytest.raises(InputError):
        th.critical_temps("apple", "full bloom", t10_override_c=math.nan)


def test_frame_matches_scalar_lookup_and_overrides():
    crops = ["apple", "Sweet cherry", "wine-grape", "peach"]
    stages = ["tight cluster", "first white", "bud burst", "full bloom"]
    df = th.critical_temps_frame(crops, stages, t10_override_c=[None, np.nan, -3.0, None],
                                 t90_override_c=[None, None, -7.0, -4.0])
    assert list(df["crop"]) == ["apple", "sweet_cherry", "wine_grape", "peach"]
    for i in (0, 1):
        ct = th.critical_temps(crops[i], stages[i])
        assert df.loc[i, "t10_c"] == ct.t10_c and df.loc[i, "t90_c"] == ct.t90_c
    assert df.loc[2, "source"] == "block override" and df.loc[2, "t10_c"] == -3.0
    assert df.loc[3, "t90_c"] == -4.0 and df.loc[3, "source"].startswith("block override")
    with pytest.raises(InputError):
        th.critical_temps_frame(["apple"], ["full bloom"], t10_override_c=[-9.0])
    with pytest.raises(InputError):
        th.critical_temps_frame(["apple"], ["bloom"])


def test_wine_grape_notice_note_names_the_other_cultivar_family():
    from advisory.crops import thresholds as t

    ct = t.critical_temps("wine_grape", "bud burst")
    note = t.cultivar_note("wine_grape", "Chardonnay", ct.source)
    assert note and "Concord" in note and "Chardonnay" in note and "another cultivar family" in note
    assert t.cultivar_note("apple", "Gala", t.critical_temps("apple", "full pink").source) is None
    own = t.critical_temps("wine_grape", "bud burst", t10_override_c=-3.0, t90_override_c=-6.0)
    assert t.cultivar_note("wine_grape", "Chardonnay", own.source) is None
