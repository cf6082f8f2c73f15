"""`advisory calc dew-point|wet-bulb|heat-index|start-temp`: the field calculator."""

from __future__ import annotations

import json

from advisory import fieldcalc

_HELP = {
    "dew-point": "dew point (and frost point) from air temperature and relative humidity",
    "wet-bulb": "wet-bulb temperature from air temperature and dew point or humidity",
    "heat-index": "heat index from air temperature and dew point or humidity",
    "start-temp": "air temperature at which to start sprinklers for a critical temperature",
}

# Option dest -> keyword of the fieldcalc functions (identical names).
_KEYS = ("air_temp_c", "air_temp_f", "dew_point_c", "dew_point_f", "rel_humidity_pct", "critical_c",
         "critical_f", "margin_c", "pressure_kpa", "elevation_m")


def register(sub) -> None:
    p = sub.add_parser("calc", help="field calculator: dew point, wet bulb, heat index, sprinkler start")
    csub = p.add_subparsers(dest="calc_command", metavar="CALCULATION")
    csub.required = True
    for name, help_text in _HELP.items():
        c = csub.add_parser(name, help=help_text, description=help_text)
        air = c.add_mutually_exclusive_group()
        air.add_argument("--air-temp-c", type=float, metavar="C", help="air temperature [°C]")
        air.add_argument("--air-temp-f", type=float, metavar="F", help="air temperature [°F]")
        hum = c.add_mutually_exclusive_group()
        hum.add_argument("--dew-point-c", type=float, metavar="C", help="dew point [°C]")
        hum.add_argument("--dew-point-f", type=float, metavar="F", help="dew point [°F]")
        hum.add_argument("--rel-humidity-pct", type=float, metavar="RH", help="relative humidity [%%]")
        if name == "start-temp":
            crit = c.add_mutually_exclusive_group(required=True)
            crit.add_argument("--critical-c", type=float, metavar="C", help="critical temperature [°C]")
            crit.add_argument("--critical-f", type=float, metavar="F", help="critical temperature [°F]")
            c.add_argument("--margin-c", type=float, metavar="K", help="safety margin above critical [°C]")
        pres = c.add_mutually_exclusive_group()
        pres.add_argument("--pressure-kpa", type=float, metavar="KPA", help="station pressure [kPa]")
        pres.add_argument("--elevation-m", type=float, metavar="M",
                          help="elevation [m], to estimate the pressure")
        c.add_argument("--json", action="store_true", help="print one JSON object")
        c.set_defaults(func=handler, calc_name=name)


def handler(args) -> int:
    options = {k: getattr(args, k, None) for k in _KEYS}
    options = {k: v for k, v in options.items() if v is not None}
    result = fieldcalc.CALCULATIONS[args.calc_name](**options)
    if args.json:
        print(json.dumps(result, ensure_ascii=False))
    else:
        print(fieldcalc.format_result(result))
    return 0
