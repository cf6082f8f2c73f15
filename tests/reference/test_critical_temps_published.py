"""Critical-temperature rows against the published extension tables they cite.

Expected values are the published tables' 10 % and 90 % kill temperatures (°F,
30-minute exposure) as printed in:

* [MSU] Michigan State University Extension, "Critical spring temperatures for tree
  fruit bud development stages" (apple WSU EB0913, pear EB0978, sweet cherry EB1128,
  peach EB0914, apricot EB1240, European plum; tart cherry MSU Res. Rpt. 220).
* [PSU] Penn State Extension, "Orchard frost - critical temperatures for various
  fruits" (adapted from the WSU 1989 spray guide EB0419) - the same apple, peach,
  pear and sweet-cherry values.
* [USU] Utah State University / Intermountain Fruit, "Cherry growth stages and
  critical temperatures" (tart cherry).
* [FAO] Snyder & de Melo-Abreu (2005) Frost Protection vol. 1, FAO, Table 4.8
  (Concord grape, Proebsting et al. 1988), in °C.
"""

import pytest

from advisory.crops import thresholds as th


def _f_to_c(f):
    return (f - 32.0) / 1.8


# (crop, stage, t10 °F, t90 °F, table)
PUBLISHED_F = [
    # MSU table, apples; identical in PSU table
    ("apple", "silver tip", 15, 2, "MSU/PSU apples"),
    ("apple", "green tip", 18, 10, "MSU/PSU apples"),
    ("apple", "half-inch green", 23, 15, "MSU/PSU apples"),
    ("apple", "tight cluster", 27, 21, "MSU/PSU apples"),
    ("apple", "first pink", 28, 24, "MSU/PSU apples"),
    ("apple", "full pink", 28, 25, "MSU/PSU apples"),
    ("apple", "first bloom", 28, 25, "MSU/PSU apples"),
    ("apple", "full bloom", 28, 25, "MSU/PSU apples"),
    ("apple", "post bloom", 28, 25, "MSU/PSU apples"),
    # MSU table, pears; identical in PSU table
    ("pear", "scales separating", 15, 0, "MSU/PSU pears"),
    ("pear", "blossom buds exposed", 20, 6, "MSU/PSU pears"),
    ("pear", "tight cluster", 24, 15, "MSU/PSU pears"),
    ("pear", "first white", 25, 19, "MSU/PSU pears"),
    ("pear", "full white", 26, 22, "MSU/PSU pears"),
    ("pear", "first bloom", 27, 23, "MSU/PSU pears"),
    ("pear", "full bloom", 28, 24, "MSU/PSU pears"),
    ("pear", "post bloom", 28, 24, "MSU/PSU pears"),
    # MSU table, sweet cherries; identical in PSU table
    ("sweet_cherry", "first swelling", 17, 5, "MSU/PSU sweet cherries"),
    ("sweet_cherry", "side green", 22, 9, "MSU/PSU sweet cherries"),
    ("sweet_cherry", "green tip", 25, 14, "MSU/PSU sweet cherries"),
    ("sweet_cherry", "tight cluster", 26, 17, "MSU/PSU sweet cherries"),
    ("sweet_cherry", "open cluster", 27, 21, "MSU/PSU sweet cherries"),
    ("sweet_cherry", "first white", 27, 24, "MSU/PSU sweet cherries"),
    ("sweet_cherry", "first bloom", 28, 25, "MSU/PSU sweet cherries"),
    ("sweet_cherry", "full bloom", 28, 25, "MSU/PSU sweet cherries"),
    ("sweet_cherry", "post bloom", 28, 25, "MSU/PSU sweet cherries"),
    # USU cherry-stages page, tart cherry columns
    ("tart_cherry", "first swelling", 15, 0, "USU tart cherry"),
    ("tart_cherry", "green tip", 26, 22, "USU tart cherry"),
    ("tart_cherry", "tight cluster", 26, 24, "USU tart cherry"),
    ("tart_cherry", "first white", 28, 24, "USU tart cherry"),
    ("tart_cherry", "first bloom", 28, 24, "USU tart cherry"),
    ("tart_cherry", "full bloom", 28, 25, "USU tart cherry"),
    ("tart_cherry", "post bloom", 28, 25, "USU tart cherry"),
    # MSU table, peaches; identical in PSU table
    ("peach", "first swelling", 18, 1, "MSU/PSU peaches"),
    ("peach", "calyx green", 21, 5, "MSU/PSU peaches"),
    ("peach", "calyx red", 23, 9, "MSU/PSU peaches"),
    ("peach", "first pink", 25, 15, "MSU/PSU peaches"),
    ("peach", "first bloom", 26, 21, "MSU/PSU peaches"),
    ("peach", "full bloom", 27, 24, "MSU/PSU peaches"),
    ("peach", "post bloom", 28, 25, "MSU/PSU peaches"),
    # MSU table, apricots
    ("apricot", "tips separate", 20, 0, "MSU apricots"),
    ("apricot", "calyx red", 22, 9, "MSU apricots"),
    ("apricot", "first white", 24, 14, "MSU apricots"),
    ("apricot", "first bloom", 25, 19, "MSU apricots"),
    ("apricot", "full bloom", 27, 22, "MSU apricots"),
    ("apricot", "in the shuck", 27, 24, "MSU apricots"),
    ("apricot", "green fruit", 28, 25, "MSU apricots"),
    # MSU table, European plums
    ("plum", "first swelling", 14, 0, "MSU European plums"),
    ("plum", "side white", 17, 3, "MSU European plums"),
    ("plum", "tip green", 20, 7, "MSU European plums"),
    ("plum", "tight cluster", 24, 16, "MSU European plums"),
    ("plum", "first white", 26, 22, "MSU European plums"),
    ("plum", "first bloom", 27, 23, "MSU European plums"),
    ("plum", "full bloom", 28, 23, "MSU European plums"),
    ("plum", "post bloom", 28, 23, "MSU European plums"),
]

# FAO Table 4.8, Concord grape (Proebsting et al. 1988), °C
PUBLISHED_C = [
    ("wine_grape", "first swell", -10.6, -19.4, "FAO Table 4.8"),
    ("wine_grape", "late swell", -6.1, -12.2, "FAO Table 4.8"),
    ("wine_grape", "bud burst", -3.9, -8.9, "FAO Table 4.8"),
    ("wine_grape", "first leaf", -2.8, -6.1, "FAO Table 4.8"),
    ("wine_grape", "second leaf", -2.2, -5.6, "FAO Table 4.8"),
    ("wine_grape", "third leaf", -2.2, -3.3, "FAO Table 4.8"),
    ("wine_grape", "fourth leaf", -2.2, -2.8, "FAO Table 4.8"),
]

# Rows written from memory, not found in a stored copy of the table: they must be flagged.
FROM_MEMORY = [("tart_cherry", "side green"), ("tart_cherry", "open cluster")]


@pytest.mark.parametrize("crop,stage,t10_f,t90_f,table", PUBLISHED_F)
def test_row_matches_published_fahrenheit_table(crop, stage, t10_f, t90_f, table):
    ct = th.critical_temps(crop, stage)
    # Stored °C values are rounded to 0.1 °C.
    assert ct.t10_c == pytest.approx(_f_to_c(t10_f), abs=0.051), table
    assert ct.t90_c == pytest.approx(_f_to_c(t90_f), abs=0.051), table
    assert ct.verified, table


@pytest.mark.parametrize("crop,stage,t10_c,t90_c,table", PUBLISHED_C)
def test_row_matches_published_celsius_table(crop, stage, t10_c, t90_c, table):
    ct = th.critical_temps(crop, stage)
    assert (ct.t10_c, ct.t90_c) == (t10_c, t90_c), table
    assert "Table 4.8" in ct.source


def test_every_verified_row_is_checked_here_and_the_rest_are_flagged():
    checked = {(c, s) for c, s, *_ in PUBLISHED_F + PUBLISHED_C}
    df = th.table()
    for row in df.itertuples():
        key = (row.crop, row.stage)
        if key in checked:
            assert row.verified, key
        else:
            assert key in FROM_MEMORY and not row.verified, key
