"""`advisory blocks list|show|set-stage|stages`."""

from __future__ import annotations

import datetime as dt
import json

from advisory import stages as stages_report
from advisory.crops import thresholds
from advisory.ingest.farm_file import record_stage
from advisory.store import queries
from advisory.store.db import Database
from advisory.store.schema import Block


def register(sub) -> None:
    p = sub.add_parser("blocks", help="blocks: list, show, set the phenological stage")
    bsub = p.add_subparsers(dest="blocks_command", metavar="ACTION")
    bsub.required = True
    ls = bsub.add_parser("list", help="list blocks")
    ls.add_argument("--farm", help="only this farm")
    ls.add_argument("--all", action="store_true", help="include inactive blocks")
    ls.add_argument("--json", action="store_true", help="print JSON")
    ls.add_argument("--date", help="day of the stage check (YYYY-MM-DD; default the farm's today)")
    ls.set_defaults(func=do_list)
    st = bsub.add_parser("stages", help="recorded and expected stages, the degree-days and chill behind them")
    st.add_argument("--farm", help="only this farm")
    st.add_argument("--date", help="day to estimate for (YYYY-MM-DD; default the farm's today)")
    st.add_argument("--json", action="store_true", help="print JSON")
    st.set_defaults(func=do_stages)
    sh = bsub.add_parser("show", help="show one block with its equipment and stage history")
    sh.add_argument("name", metavar="NAME")
    sh.add_argument("--farm")
    sh.add_argument("--json", action="store_true")
    sh.set_defaults(func=do_show)
    ss = bsub.add_parser("set-stage", help="record a new phenological stage for a block")
    ss.add_argument("name", metavar="NAME")
    ss.add_argument("stage", metavar="STAGE")
    ss.add_argument("--date", help="date the stage was observed (YYYY-MM-DD; default today)")
    ss.add_argument("--farm")
    ss.set_defaults(func=do_set_stage)


def block_dict(b: Block, detail: bool = False) -> dict:
    ct = thresholds.critical_temps(b.crop, b.stage, b.t10_override_c, b.t90_override_c)
    d = {
        "farm": b.farm.name, "name": b.name, "station": b.station.code, "crop": b.crop,
        "variety": b.variety, "stage": b.stage, "stage_date": b.stage_date.isoformat(),
        "t10_c": ct.t10_c, "t90_c": ct.t90_c, "latitude": b.latitude, "longitude": b.longitude,
        "elevation_m": b.elevation_m, "area_ha": b.area_ha, "active": b.active,
        "protection": [{"kind": e.kind, **e.params} for e in b.equipment],
    }
    if detail:
        d["reference_offset_min"] = b.reference_offset_min
        d["critical_source"] = ct.source
        d["recipients"] = [{"name": r.name, "role": r.role, "channels": sorted(r.channels)}
                           for r in b.recipients]
        d["stage_history"] = [{"stage": r.stage, "observed_on": r.observed_on.isoformat(),
                               "source": r.source} for r in b.stage_history]
    return d


def _day(text: str | None) -> dt.date | None:
    from advisory.commands.night import _date

    return _date(text) if text else None


def do_list(args) -> int:
    day = _day(getattr(args, "date", None))
    db = Database(args.db)
    with db.transaction() as s:
        blocks = list(s.scalars(queries.blocks_query(args.farm, active_only=not args.all)))
        rows = [block_dict(b) for b in blocks]
        checks = {(r.farm, r.block): r.check for r in stages_report.stage_rows(s, blocks, day)} if blocks else {}
    for r in rows:
        r["stage_check"] = checks.get((r["farm"], r["name"]))
    if args.json:
        print(json.dumps(rows, indent=2))
        return 0
    if not rows:
        print("no blocks (import a farm file with `advisory farm import FARM.toml`)")
        return 0
    header = ("farm", "block", "crop", "stage", "since", "T10 °C", "T90 °C", "protection", "station")
    from advisory.notices.words import crop_name, method_name

    table = [(r["farm"], r["name"], crop_name(r["crop"]) + (f" ({r['variety']})" if r["variety"] else ""),
              r["stage"], r["stage_date"], f"{r['t10_c']:.1f}", f"{r['t90_c']:.1f}",
              ", ".join(method_name(p["kind"]) for p in r["protection"]) or "none", r["station"])
             for r in rows]
    widths = [max(len(str(x)) for x in col) for col in zip(header, *table, strict=False)]
    for line in (header, *table):
        print("  ".join(str(x).ljust(w) for x, w in zip(line, widths, strict=True)).rstrip())
    for r in rows:
        if r["stage_check"]:
            print(f"{r['name']}: {r['stage_check']}")
    return 0


def _num(v, fmt: str = "{:.0f}") -> str:
    return "-" if v is None else fmt.format(v)


def do_stages(args) -> int:
    day = _day(args.date)
    db = Database(args.db)
    with db.transaction() as s:
        rows = stages_report.stages_report(s, args.farm, day)
    if args.json:
        print(json.dumps([r.as_dict() for r in rows], indent=2))
        return 0
    if not rows:
        print("no blocks (import a farm file with `advisory farm import FARM.toml`)")
        return 0
    for r in rows:
        print(f"{r.block} ({r.farm}), {r.crop.replace('_', ' ')}")
        print(f"  recorded    {r.recorded_stage} on {r.recorded_on}")
        if r.base_c is None:
            print("  expected    - (no heat model for this crop)")
        else:
            bound = " (lower bound: readings start after the stage date)" if r.gdd_since_record_lower_bound else ""
            print(f"  expected    {r.expected_today} (range {r.expected_range_today}): "
                  f"{_num(r.gdd_since_record_c, '{:.1f}')} °C-days base {r.base_c:g} since {r.recorded_on}, "
                  f"from {r.hours_since_record_h:.0f} h of readings{bound}")
            bound = " (lower bound: readings start after the biofix)" if r.gdd_since_biofix_lower_bound else ""
            print(f"  since biofix {r.biofix}: {_num(r.gdd_since_biofix_c, '{:.1f}')} °C-days from "
                  f"{r.hours_since_biofix_h:.0f} h of readings{bound}; alone it suggests {r.expected_from_biofix}")
        if r.chill_hours_h:
            bound = " (lower bound: readings start after the chill start)" if r.chill_lower_bound else ""
            print(f"  chill since {r.chill_start}: {_num(r.utah_cu)} Utah chill units, "
                  f"{_num(r.chill_portions, '{:.1f}')} chill portions, from {r.chill_hours_h:.0f} h{bound}; "
                  f"typical need {r.chill_need_cu or '-'} CU, {r.chill_need_portions or '-'} portions")
        else:
            print(f"  chill since {r.chill_start}: no readings")
        if r.check:
            print(f"  check       {r.check}")
    return 0


def do_show(args) -> int:
    db = Database(args.db)
    with db.transaction() as s:
        d = block_dict(queries.find_block(s, args.name, args.farm), detail=True)
    if args.json:
        print(json.dumps(d, indent=2))
        return 0
    print(f"{d['name']}  ({d['farm']})")
    print(f"  crop        {d['crop']}" + (f", {d['variety']}" if d["variety"] else ""))
    print(f"  stage       {d['stage']} since {d['stage_date']}: T10 {d['t10_c']:.1f} °C, T90 {d['t90_c']:.1f} °C")
    print(f"              ({d['critical_source']})")
    print(f"  place       {d['latitude']:.4f}, {d['longitude']:.4f}, {d['elevation_m']:.0f} m, {d['area_ha']:g} ha")
    print(f"  station     {d['station']}; evening run {d['reference_offset_min']} min after sunset")
    if d["protection"]:
        for p in d["protection"]:
            params = ", ".join(f"{k} {v}" for k, v in p.items() if k != "kind")
            print(f"  protection  {p['kind'].replace('_', ' ')}" + (f" ({params})" if params else ""))
    else:
        print("  protection  none")
    for r in d["recipients"]:
        print(f"  notices to  {r['name']}" + (f" ({r['role']})" if r["role"] else "")
              + f": outbox{''.join(', ' + c for c in r['channels'])}")
    print("  stage history:")
    for h in d["stage_history"]:
        print(f"    {h['observed_on']}  {h['stage']}  ({h['source']})")
    return 0


def do_set_stage(args) -> int:
    day = _day(args.date) or dt.date.today()
    db = Database(args.db)
    with db.transaction() as s:
        block = queries.find_block(s, args.name, args.farm)
        s.refresh(block, ["stage_history"])
        stage = thresholds.normalise_stage(block.crop, args.stage)
        record_stage(s, block, stage, day, "command line")
        ct = thresholds.critical_temps(block.crop, block.stage, block.t10_override_c, block.t90_override_c)
        print(f"{block.name}: stage {block.stage} since {block.stage_date.isoformat()} "
              f"(T10 {ct.t10_c:.1f} °C, T90 {ct.t90_c:.1f} °C)")
    return 0


