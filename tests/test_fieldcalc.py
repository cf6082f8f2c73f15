"""Unit tests for advisory.fieldcalc and the `advisory calc` command."""

import json
import sys
import types

import numpy as np
import pytest

from advisory import cli, fieldcalc
from advisory.errors import InputError
from advisory.physics import moisture


def test_resolve_converts_fahrenheit_and_humidity():
    inp = fieldcalc.resolve_inputs(air_temp_f=50.0, rel_humidity_pct=60.0)
    assert inp.air_temp_c == pytest.approx(10.0)
    assert inp.dew_point_c == pytest.approx(moisture.dew_point_c_from_rh(10.0, 60.0))
    assert inp.pressure_kpa == moisture.STANDARD_PRESSURE_KPA and inp.pressure_source == "standard"
    inp = fieldcalc.resolve_inputs(air_temp_c=5.0, dew_point_f=23.0, elevation_m=1800.0)
    assert inp.dew_point_c == pytest.approx(-5.0)
    assert inp.pressure_kpa == pytest.approx(moisture.pressure_kpa_from_elevation(1800.0))
    assert inp.rel_humidity_pct == pytest.approx(moisture.rel_humidity_pct_from_dew_point(5.0, -5.0))


@pytest.mark.parametrize("kwargs,field", [
    ({"air_temp_c": 75.0, "dew_point_c": 0.0}, "--air-temp-c"),
    ({"air_temp_f": 200.0, "dew_point_c": 0.0}, "--air-temp-f"),
    ({"air_temp_c": 5.0, "rel_humidity_pct": 120.0}, "--rel-humidity-pct"),
    ({"air_temp_c": 5.0, "rel_humidity_pct": 0.0}, "--rel-humidity-pct"),
    ({"air_temp_c": 5.0, "dew_point_c": 9.0}, "--dew-point-c"),
    ({"air_temp_c": 5.0, "dew_point_c": 1.0, "pressure_kpa": 200.0}, "--pressure-kpa"),
    ({"air_temp_c": 5.0, "dew_point_c": 1.0, "elevation_m": 9000.0}, "--elevation-m"),
    ({"air_temp_c": 5.0, "dew_point_c": 1.0, "pressure_kpa": 90.0, "elevation_m": 10.0}, "--elevation-m"),
    ({"air_temp_c": 5.0, "air_temp_f": 41.0, "dew_point_c": 1.0}, "--air-temp-f"),
    ({"air_temp_c": 5.0}, "--dew-point-c"),
    ({"dew_point_c": 1.0}, "--air-temp-c"),
    ({"air_temp_c": float("nan"), "dew_point_c": 1.0}, "--air-temp-c"),
])
def test_resolve_errors_name_the_option(kwargs, field):
    with pytest.raises(InputError) as e:
        fieldcalc.resolve_inputs(**kwargs)
    assert e.value.field == field


def test_start_air_temp_has_target_wet_bulb():
    td = np.array([-12.0, -8.0, -5.0, -3.0])
    t = fieldcalc.start_air_temp_c(-2.2, td, 1.0)
    np.testing.assert_allclose(moisture.wet_bulb_c(t, td), -1.2, atol=0.005)
    assert np.all(np.diff(t) < 0)  # drier air: start at a warmer air temperature
    # Dew point at or above the target: start at the target itself.
    assert fieldcalc.start_air_temp_c(-2.2, -0.5, 1.0) == pytest.approx(-1.2)
    # Altitude: lower pressure means a larger depression, so an earlier (warmer) start.
    assert fieldcalc.start_air_temp_c(-2.2, -8.0, 1.0, 80.0) > fieldcalc.start_air_temp_c(-2.2, -8.0, 1.0)


def test_calc_results_have_documented_keys():
    r = fieldcalc.calc_dew_point(air_temp_c=5.0, rel_humidity_pct=60.0)
    assert {"dew_point_c", "dew_point_f", "frost_point_c"} <= r.keys()
    r = fieldcalc.calc_wet_bulb(air_temp_c=20.0, rel_humidity_pct=50.0)
    assert r["wet_bulb_f"] == pytest.approx(r["wet_bulb_c"] * 1.8 + 32, abs=0.02)
    r = fieldcalc.calc_start_temp(critical_f=28.0, dew_point_f=20.0, margin_c=1.0)
    assert r["target_wet_bulb_c"] == pytest.approx(-2.22 + 1.0, abs=0.01)
    assert {"start_air_temp_c", "start_air_temp_f"} <= r.keys() and "start_now" not in r
    r = fieldcalc.calc_start_temp(critical_c=-1.0, air_temp_c=0.0, dew_point_c=-6.0)
    assert r["start_now"] is True and r["wet_bulb_c"] < -1.0
    r = fieldcalc.calc_start_temp(critical_c=-2.2, air_temp_c=0.0, dew_point_c=-6.0)
    assert r["start_now"] is False
    with pytest.raises(InputError):
        fieldcalc.calc_start_temp(dew_point_c=-5.0)  # no critical temperature


def test_heat_index_calls_the_physics_function(monkeypatch):
    calls = []

    def fake(air_temp_c, rel_humidity_pct):
        calls.append((air_temp_c, rel_humidity_pct))
        return 40.0

    monkeypatch.setitem(sys.modules, "advisory.physics.heat", types.SimpleNamespace(heat_index_c=fake))
    r = fieldcalc.calc_heat_index(air_temp_f=95.0, rel_humidity_pct=50.0)
    assert calls == [(pytest.approx(35.0), 50.0)]
    assert r["heat_index_c"] == 40.0 and r["heat_index_f"] == 104.0


def _run(capsys, monkeypatch, tmp_path, *argv):
    monkeypatch.setenv("ADVISORY_HOME", str(tmp_path))
    code = cli.main(["calc", *argv])
    out = capsys.readouterr()
    return code, out.out, out.err


def test_cli_json_is_one_flat_object(capsys, monkeypatch, tmp_path):
    code, out, _ = _run(capsys, monkeypatch, tmp_path, "wet-bulb", "--air-temp-c", "20",
                        "--rel-humidity-pct", "50", "--json")
    assert code == 0
    d = json.loads(out)
    assert all(not isinstance(v, dict | list) for v in d.values())
    assert d["wet_bulb_c"] == pytest.approx(13.79, abs=0.02)
    code, out, _ = _run(capsys, monkeypatch, tmp_path, "start-temp", "--critical-c", "-2.2",
                        "--dew-point-c", "-6", "--margin-c", "1", "--json")
    d = json.loads(out)
    assert code == 0 and "start_air_temp_c" in d and "start_air_temp_f" in d
    code, out, _ = _run(capsys, monkeypatch, tmp_path, "dew-point", "--air-temp-f", "41",
                        "--rel-humidity-pct", "60", "--json")
    assert code == 0 and {"dew_point_c", "dew_point_f"} <= json.loads(out).keys()


def test_cli_text_and_errors(capsys, monkeypatch, tmp_path):
    code, out, _ = _run(capsys, monkeypatch, tmp_path, "start-temp", "--critical-f", "28",
                        "--dew-point-f", "20", "--elevation-m", "300")
    assert code == 0 and out.startswith("Start sprinklers at air temperature:")
    code, out, err = _run(capsys, monkeypatch, tmp_path, "wet-bulb", "--air-temp-c", "99",
                          "--dew-point-c", "1")
    assert code == 2 and "--air-temp-c" in err and "Traceback" not in err
    code, _, err = _run(capsys, monkeypatch, tmp_path, "wet-bulb", "--air-temp-c", "5",
                        "--dew-point-c", "8")
    assert code == 2 and "dew point" in err
    with pytest.raises(SystemExit) as e:  # argparse: --critical-c is required for start-temp
        cli.main(["calc", "start-temp", "--dew-point-c", "-5"])
    assert e.value.code == 2


def test_start_temp_says_when_the_dew_point_is_above_it(capsys):
    from advisory import cli

    assert cli.main(["calc", "start-temp", "--critical-c", "-2.2", "--dew-point-c", "3", "--margin-c", "1"]) == 0
    out = capsys.readouterr().out
    assert "Note: The dew point (3.0 °C) is at or above the start temperature (-1.2 °C)" in out
    assert cli.main(["calc", "start-temp", "--critical-c", "-2.2", "--dew-point-c", "-5", "--margin-c", "1"]) == 0
    assert "Note:" not in capsys.readouterr().out
